"""Read per-configuration correlator measurements from files.

One function, :func:`load_correlator`, reads one correlator -- an array of
shape ``(n_cfg, n_t)``, one row per gauge configuration in Monte Carlo order,
one column per timeslice -- from any of the accepted formats and returns a
:class:`RawCorrelator`. Nothing here knows about the specification file; the
optional ``where`` argument only labels errors with the spec key the path came
from.

Accepted formats (``format=`` or, by default, the file suffix):

``text`` (``.txt``, ``.dat``)
    Whitespace-separated real numbers, one row per configuration, one column
    per timeslice; ``#`` starts a comment. Blank lines are ignored. UTF-8 (or
    ASCII), with or without a byte order mark.
``npy`` (``.npy``)
    A 2-D array, real or complex (or a compound dtype of two real fields, read
    as real and imaginary part). Never unpickled: object arrays are refused.
``npz`` (``.npz``)
    The array named ``array``; when it is not given and the archive holds
    exactly one array, that one.
``hdf5`` (``.h5``, ``.hdf5``)
    The 2-D dataset at path ``dataset`` (required when the file holds more than
    one dataset), real, complex or compound ``(r, i)``; optionally the 1-D
    integer dataset ``ids_dataset`` holding the configuration ids. The ids
    count Monte Carlo time: rows stored out of id order are sorted by id
    (``RawCorrelator.file_rows`` then records the permutation).
``csv`` (``.csv``)
    Long form with a header line naming the columns ``config``, ``t``,
    ``value`` and optionally ``stream`` and ``imag``, one row per
    (configuration, timeslice), rows in any order
    (:mod:`plateaufit.data.long_csv`). Streams come in order of first
    appearance in the file, configurations by ascending id within each stream.

Complex data: the real part is returned unless ``part="imag"``.

Every input is checked before it is parsed (:mod:`plateaufit.data.files`):
regular files only (a FIFO, device, socket or directory is refused without
being opened for reading), no empty files, text and CSV files no larger than
``max_text_bytes``. Every malformed file -- truncated, corrupt, wrongly
encoded, of the wrong rank or type, holding NaN, inf or values whose squares
overflow or underflow double precision -- is a :class:`DataError` naming the
file and saying what to do.
"""

from __future__ import annotations

import math
import os
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from plateaufit.data.binary import read_hdf5, read_npy, read_npz
from plateaufit.data.files import MAX_TEXT_BYTES, FileContext, read_text, regular_file_size
from plateaufit.data.long_csv import parse_long_csv
from plateaufit.errors import DataError

__all__ = ["RawCorrelator", "load_correlator", "FORMATS", "SUFFIXES", "format_from_suffix",
           "MAX_TEXT_BYTES", "LARGEST_VALUE", "SMALLEST_SCALE"]

#: The accepted values of ``format``.
FORMATS: tuple[str, ...] = ("text", "npy", "npz", "hdf5", "csv")

#: Suffix -> format used when ``format`` is not given.
SUFFIXES: dict[str, str] = {
    ".txt": "text",
    ".dat": "text",
    ".npy": "npy",
    ".npz": "npz",
    ".h5": "hdf5",
    ".hdf5": "hdf5",
    ".csv": "csv",
}

#: Largest magnitude of a value: squares of 1e150 summed over 1e8 entries stay
#: below the largest double (1.8e308), so means, variances and covariances of
#: any real ensemble cannot overflow.
LARGEST_VALUE: float = 1e150

#: Smallest nonzero magnitude of the largest value of a timeslice: below it the
#: squares of the fluctuations underflow double precision (2.2e-308) and no
#: variance can be computed. Values in the subnormal range (below 2.2e-308)
#: have lost precision themselves and are refused everywhere.
SMALLEST_SCALE: float = 1e-150

_PARTS = ("real", "imag")

@dataclass(frozen=True)
class RawCorrelator:
    """One correlator as read from a file, before alignment and folding.

    Attributes
    ----------
    values : numpy.ndarray
        ``(n_cfg, n_t)`` float64, rows in Monte Carlo order.
    config_ids : numpy.ndarray or None
        ``(n_cfg,)`` int64 configuration ids (non-negative, unique within a
        stream, ascending within each stream), when the file knows them (CSV
        ``config`` column, HDF5 ``ids_dataset``).
    streams : numpy.ndarray or None
        ``(n_cfg,)`` int64 stream code of each configuration, when the file
        knows them (CSV ``stream`` column); each stream is one contiguous
        block, streams in order of first appearance in the file. Integer
        labels are their own codes; text labels are numbered 0, 1, ... in
        order of appearance.
    source : pathlib.Path
        The file the values came from.
    stream_names : dict[int, str] or None
        Stream code -> label as written in the file, in order of appearance
        (None when the file has no streams).
    file_rows : numpy.ndarray or None
        ``(n_cfg,)`` int64: row ``i`` holds the configuration the file stores
        at position ``file_rows[i]`` (HDF5: the row of the dataset; CSV: the
        order in which the configurations first appear). None when the rows
        are in the file's order. The loader reorders HDF5 rows stored out of
        id order and CSV configurations that appear out of (stream, id) order.
    """

    values: np.ndarray
    config_ids: np.ndarray | None
    streams: np.ndarray | None
    source: Path
    stream_names: dict[int, str] | None = None
    file_rows: np.ndarray | None = None

    @property
    def reordered(self) -> bool:
        """Whether the rows were put in another order than the file's (Monte Carlo order)."""
        return self.file_rows is not None

    @property
    def n_moved(self) -> int:
        """Number of configurations not at their file position (0 when not reordered)."""
        if self.file_rows is None:
            return 0
        return int(np.count_nonzero(self.file_rows != np.arange(self.file_rows.size)))

    @property
    def n_configs(self) -> int:
        """Number of configurations (rows)."""
        return int(self.values.shape[0])

    @property
    def n_timeslices(self) -> int:
        """Number of timeslices (columns)."""
        return int(self.values.shape[1])


def format_from_suffix(path: str | os.PathLike[str]) -> str | None:
    """The format implied by the file suffix, or None when the suffix is unknown."""
    return SUFFIXES.get(Path(path).suffix.lower())


def load_correlator(
    path: str | os.PathLike[str],
    *,
    format: str | None = None,
    dataset: str | None = None,
    ids_dataset: str | None = None,
    array: str | None = None,
    part: str = "real",
    where: str = "",
    max_text_bytes: int | None = MAX_TEXT_BYTES,
) -> RawCorrelator:
    """Read one per-configuration correlator from a file.

    Parameters
    ----------
    path : path-like
        The file (already resolved; relative paths are taken relative to the
        current directory). Must be a regular file (or a symbolic link to one).
    format : {'text', 'npy', 'npz', 'hdf5', 'csv'}, optional
        Default: from the suffix (``.txt``/``.dat`` text, ``.npy``, ``.npz``,
        ``.h5``/``.hdf5``, ``.csv``).
    dataset : str, optional
        HDF5 only: path of the correlator dataset inside the file. Required
        when the file holds more than one dataset (besides ``ids_dataset``).
    ids_dataset : str, optional
        HDF5 only: path of a 1-D integer dataset of configuration ids. They
        define the Monte Carlo order: rows are sorted by id.
    array : str, optional
        npz only: name of the array in the archive.
    part : {'real', 'imag'}
        Which part of complex data to return.
    where : str
        The spec key path the file came from (``observables.pion.file``), used
        to label errors; empty outside a spec.
    max_text_bytes : int or None, default :data:`MAX_TEXT_BYTES` (2 GiB)
        Largest text or CSV file read, in bytes (10^5 configurations x 256
        timeslices is ~640 MB of text); None for no limit. Binary formats
        are not limited.

    Returns
    -------
    RawCorrelator

    Raises
    ------
    DataError
        The file is missing, vanished, unreadable (permissions), not a regular
        file, empty, too large (text, CSV), wrongly encoded, truncated or
        corrupt, the format is unknown, the array is not 2-D, empty or not
        numeric, a value is NaN, infinite, above :data:`LARGEST_VALUE` or
        subnormal, or a timeslice is too small to square (:data:`SMALLEST_SCALE`);
        ids are not whole non-negative numbers below 2^53 or repeat. The
        message names the file (and the configuration index, id and
        timeslice where one value is at fault) and says what to do.
    """
    p = Path(path)
    ctx = FileContext(p, where)
    if part not in _PARTS:
        raise ctx.error(f"unknown part {part!r}; use one of {', '.join(_PARTS)}")
    fmt = format
    if fmt is None:
        fmt = format_from_suffix(p)
        if fmt is None:
            accepted = ", ".join(f"{s} ({f})" for s, f in SUFFIXES.items())
            raise ctx.error(
                f"cannot tell the format from the suffix {p.suffix or '(none)'!r}; "
                f"accepted suffixes are {accepted}, or set the format explicitly "
                f"to one of {', '.join(FORMATS)}"
            )
    if fmt not in FORMATS:
        raise ctx.error(f"unknown format {fmt!r}; use one of {', '.join(FORMATS)}")
    if dataset is not None and fmt != "hdf5":
        raise ctx.error(f"'dataset' applies to hdf5 files only, but the format is {fmt}")
    if ids_dataset is not None and fmt != "hdf5":
        raise ctx.error(f"'ids_dataset' applies to hdf5 files only, but the format is {fmt}")
    if array is not None and fmt != "npz":
        raise ctx.error(f"'array' applies to npz files only, but the format is {fmt}")
    if fmt == "text" and part == "imag":
        raise ctx.error("text files hold real numbers only; 'part: imag' needs complex data")
    if max_text_bytes is not None and (not isinstance(max_text_bytes, (int, np.integer))
                                       or max_text_bytes < 1):
        raise ctx.error(f"max_text_bytes must be a positive number of bytes or None, "
                        f"got {max_text_bytes!r}")

    size = regular_file_size(p, ctx)  # stat only: special files are refused unopened
    if size == 0:
        raise ctx.error(f"the file is empty (0 bytes); expected {fmt} data: write it again")

    ids: np.ndarray | None = None
    streams: np.ndarray | None = None
    names: dict[int, str] | None = None
    file_rows: np.ndarray | None = None
    if fmt == "text":
        values = _read_text(p, ctx, max_text_bytes)
    elif fmt == "npy":
        values = _select_part(read_npy(p, ctx), part, ctx)
    elif fmt == "npz":
        values = _select_part(read_npz(p, array, ctx), part, ctx)
    elif fmt == "hdf5":
        data, ids = read_hdf5(p, dataset, ids_dataset, ctx)
        values = _select_part(data, part, ctx)
    else:
        table = parse_long_csv(read_text(p, ctx, limit=max_text_bytes, what="CSV"), part, ctx)
        values, ids, streams = table.values, table.config_ids, table.streams
        names, file_rows = table.stream_names, table.file_rows

    values = _check_shape(values, ctx)
    if ids is not None and ids.shape[0] != values.shape[0]:
        raise ctx.error(
            f"the configuration ids dataset has {ids.shape[0]} entries but the correlator "
            f"has {values.shape[0]} configurations; they must match"
        )
    if ids is not None:
        _check_unique_ids(ids, streams, ctx)
    if ids is not None and streams is None and np.any(np.diff(ids) < 0):
        # HDF5: the ids define Monte Carlo order
        file_rows = np.argsort(ids, kind="stable")
        values, ids = values[file_rows], ids[file_rows]
    _check_finite(values, ids, ctx)
    _check_magnitude(values, ids, ctx)
    return RawCorrelator(values=values, config_ids=ids, streams=streams, source=p,
                         stream_names=names, file_rows=file_rows)


# --------------------------------------------------------------------------- checks


def _check_shape(values: np.ndarray, ctx: FileContext) -> np.ndarray:
    values = np.asarray(values)
    if values.ndim != 2:
        raise ctx.error(
            f"expected a 2-D array (configurations, timeslices), got shape {values.shape}; "
            "store one correlator as one 2-D array, a row per configuration"
        )
    if values.shape[0] == 0 or values.shape[1] == 0:
        raise ctx.error(f"no data: the array has shape {values.shape}")
    try:
        with np.errstate(over="ignore", invalid="ignore"):
            out = np.ascontiguousarray(values, dtype=np.float64)
    except (TypeError, ValueError, OverflowError) as exc:
        raise ctx.error(f"values are not numbers ({exc}); store them as floating-point "
                        "numbers") from None
    return out


def _location(values: np.ndarray, ids: np.ndarray | None,
              mask: np.ndarray) -> tuple[float, str, int]:
    """The first flagged value, where it is (index, id, t), and how many are flagged."""
    cfg, t = (int(i) for i in np.argwhere(mask)[0])
    ident = f" (id {int(ids[cfg])})" if ids is not None else ""
    return float(values[cfg, t]), f"configuration index {cfg}{ident}, t = {t}", int(mask.sum())


def _check_finite(values: np.ndarray, ids: np.ndarray | None, ctx: FileContext) -> None:
    bad = ~np.isfinite(values)
    if not bad.any():
        return
    first, where, n_bad = _location(values, ids, bad)
    what = "NaN" if math.isnan(first) else "infinite"
    more = f"; {n_bad} non-finite values in all" if n_bad > 1 else ""
    raise ctx.error(
        f"{what} value at {where}{more}; remove or repair the affected configurations"
    )


def _check_magnitude(values: np.ndarray, ids: np.ndarray | None, ctx: FileContext) -> None:
    magnitude = np.abs(values)
    tiny_normal = np.finfo(np.float64).tiny
    for mask, problem in (
        (magnitude > LARGEST_VALUE,
         f"is larger in magnitude than {LARGEST_VALUE:g}: its square overflows double "
         "precision in means and covariances; divide every value of the correlator by one "
         "constant (energies do not change), or check that the file holds what it should"),
        ((magnitude > 0) & (magnitude < tiny_normal),
         f"is subnormal (below {tiny_normal:.3g}) and has lost precision; such values usually "
         "mean binary data read with the wrong type or byte order: check the file, or "
         "multiply every value by one constant"),
    ):
        if mask.any():
            first, where, n_bad = _location(values, ids, mask)
            more = f" ({n_bad} such values)" if n_bad > 1 else ""
            raise ctx.error(f"value {first:.3g} at {where}{more} {problem}")
    scale = magnitude.max(axis=0)
    tiny = (scale > 0) & (scale < SMALLEST_SCALE)
    if tiny.any():
        t = int(np.argmax(tiny))
        raise ctx.error(
            f"every value at t = {t} is below {SMALLEST_SCALE:g} in magnitude (largest "
            f"{scale[t]:.3g}): the squares of its fluctuations underflow double precision, "
            "so no variance can be computed; multiply every value of the correlator by one "
            "constant (energies do not change)"
        )


def _check_unique_ids(ids: np.ndarray, streams: np.ndarray | None, ctx: FileContext) -> None:
    if streams is None:
        keys = ids
    else:
        _, s_inv = np.unique(streams, return_inverse=True)
        _, i_inv = np.unique(ids, return_inverse=True)
        keys = s_inv.reshape(-1).astype(np.int64) * (int(i_inv.max()) + 1) + i_inv.reshape(-1)
    _, first, counts = np.unique(keys, return_index=True, return_counts=True)
    if (counts > 1).any():
        dup = int(ids[first[np.argmax(counts > 1)]])
        n_dup = int((counts > 1).sum())
        more = f" ({n_dup} ids repeat)" if n_dup > 1 else ""
        raise ctx.error(f"configuration id {dup} appears more than once{more}; ids must be "
                        "unique: remove the repeated configurations or fix the ids")


def _select_part(data: np.ndarray, part: str, ctx: FileContext) -> np.ndarray:
    """Real or imaginary part of complex data (also compound (r, i) dtypes)."""
    data = np.asarray(data)
    names = data.dtype.names
    if names is not None:
        if len(names) != 2 or not all(
            np.issubdtype(data.dtype.fields[n][0], np.number)
            and data.dtype.fields[n][0].shape == () for n in names
        ):
            raise ctx.error(
                f"compound data type with fields {names}; expected two numeric fields "
                "(real, imaginary): store the correlator as real or complex numbers"
            )
        field = data[names[0] if part == "real" else names[1]]
        if np.iscomplexobj(field):
            raise ctx.error(f"compound data type with complex fields {names}; expected two "
                            "real fields (real, imaginary)")
        return np.asarray(field, dtype=np.float64)
    if np.iscomplexobj(data):
        return np.ascontiguousarray(data.real if part == "real" else data.imag)
    if data.dtype.kind not in "iuf":
        raise ctx.error(f"data type {data.dtype} is not numeric; store the correlator as "
                        "floating-point (or complex) numbers")
    if part == "imag":
        raise ctx.error("the data are real; 'part: imag' needs complex data")
    return data


# --------------------------------------------------------------------------- text


def _read_text(p: Path, ctx: FileContext, limit: int | None) -> np.ndarray:
    text = read_text(p, ctx, limit=limit, what="text").replace("\r\n", "\n").replace("\r", "\n")
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # "input contained no data" and the like
            values = np.loadtxt(text.split("\n"), comments="#", dtype=np.float64, ndmin=2)
    except (ValueError, TypeError, OverflowError, IndexError):
        # The fast C parser counts only data rows; find the offending line.
        raise _diagnose_text(text, ctx) from None
    if values.size == 0:
        raise ctx.error("no data: the file holds only comments or blank lines")
    return values


def _diagnose_text(text: str, ctx: FileContext) -> DataError:
    n_cols: int | None = None
    first_line = 0
    lines = text.split("\n")
    for lineno, line in enumerate(lines, start=1):
        fields = line.split("#", 1)[0].split()
        if not fields:
            continue
        last = lineno == len(lines)  # no newline after it: a cut-off file ends like this
        cut = " (the last line looks cut off: is the file complete?)" if last else ""
        for col, field in enumerate(fields, start=1):
            try:
                float(field)
            except ValueError:
                shown = field if len(field) <= 40 else field[:37] + "..."
                return ctx.error(
                    f"line {lineno}, column {col}: cannot read {shown!r} as a number{cut}; "
                    "fix the value or remove the row"
                )
        if n_cols is None:
            n_cols, first_line = len(fields), lineno
        elif len(fields) != n_cols:
            return ctx.error(
                f"line {lineno} has {len(fields)} columns but line {first_line} has "
                f"{n_cols}{cut}; every row (configuration) needs one value per timeslice"
            )
    return ctx.error("cannot parse the file as whitespace-separated numbers, one row per "
                     "configuration; check the format")
