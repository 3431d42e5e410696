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
    per timeslice; ``#`` starts a comment. Blank lines are ignored.
``npy`` (``.npy``)
    A 2-D array, real or complex (or a compound dtype of two real fields, read
    as real and imaginary part).
``npz`` (``.npz``)
    The array named ``array``; when it is not given and the archive holds
    exactly one array, that one.
``hdf5`` (``.h5``, ``.hdf5``)
    The 2-D dataset at path ``dataset`` (required when the file holds more than
    one dataset), real, complex or compound ``(r, i)``; optionally the 1-D
    integer dataset ``ids_dataset`` holding the configuration ids.
``csv`` (``.csv``)
    Long form with a header line naming the columns ``config``, ``t``,
    ``value`` and optionally ``stream`` and ``imag``, one row per
    (configuration, timeslice). Rows may come in any order. The result is
    ordered by stream label, then by ascending configuration id within each
    stream (configuration ids are taken to count Monte Carlo time), so every
    stream is one contiguous block. Integer stream labels are kept; text labels
    are numbered 0, 1, ... in sorted order.

Complex data: the real part is returned unless ``part="imag"``.

One module of about 600 lines on purpose: the five readers share the context that
names the file and spec key in every error, and the shape, id and NaN checks; split
per format, each reader would import all of that back.
"""

from __future__ import annotations

import csv
import io
import math
import os
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from plateaufit.errors import DataError

__all__ = ["RawCorrelator", "load_correlator", "FORMATS", "SUFFIXES", "format_from_suffix"]

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

_PARTS = ("real", "imag")
_CSV_REQUIRED = ("config", "t", "value")
_CSV_OPTIONAL = ("stream", "imag")


@dataclass(frozen=True)
class RawCorrelator:
    """One correlator as read from a file, before alignment and folding.

    Attributes
    ----------
    values : numpy.ndarray
        ``(n_cfg, n_t)`` float64, rows in Monte Carlo order.
    config_ids : numpy.ndarray or None
        ``(n_cfg,)`` int64 configuration ids, when the file knows them
        (CSV ``config`` column, HDF5 ``ids_dataset``).
    streams : numpy.ndarray or None
        ``(n_cfg,)`` int64 stream label of each configuration, when the file
        knows them (CSV ``stream`` column).
    source : pathlib.Path
        The file the values came from.
    """

    values: np.ndarray
    config_ids: np.ndarray | None
    streams: np.ndarray | None
    source: Path

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


class _Ctx:
    """Builds DataErrors that name the file, and the spec key when known."""

    def __init__(self, path: Path, where: str) -> None:
        self.path = path
        self.where = where

    def error(self, message: str) -> DataError:
        return DataError(self.where or str(self.path), f"{self.path}: {message}")


def load_correlator(
    path: str | os.PathLike[str],
    *,
    format: str | None = None,
    dataset: str | None = None,
    ids_dataset: str | None = None,
    array: str | None = None,
    part: str = "real",
    where: str = "",
) -> RawCorrelator:
    """Read one per-configuration correlator from a file.

    Parameters
    ----------
    path : path-like
        The file (already resolved; relative paths are taken relative to the
        current directory).
    format : {'text', 'npy', 'npz', 'hdf5', 'csv'}, optional
        Default: from the suffix (``.txt``/``.dat`` text, ``.npy``, ``.npz``,
        ``.h5``/``.hdf5``, ``.csv``).
    dataset : str, optional
        HDF5 only: path of the correlator dataset inside the file. Required
        when the file holds more than one dataset (besides ``ids_dataset``).
    ids_dataset : str, optional
        HDF5 only: path of a 1-D integer dataset of configuration ids.
    array : str, optional
        npz only: name of the array in the archive.
    part : {'real', 'imag'}
        Which part of complex data to return.
    where : str
        The spec key path the file came from (``observables.pion.file``), used
        to label errors; empty outside a spec.

    Returns
    -------
    RawCorrelator

    Raises
    ------
    DataError
        The file is missing, unreadable or malformed, the format is unknown,
        the array is not 2-D or empty, or a value is NaN or infinite (the
        message names the file, the configuration index -- and id when known --
        and the timeslice).
    """
    p = Path(path)
    ctx = _Ctx(p, where)
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
    if not p.exists():
        raise ctx.error("file not found; check the path")
    if p.is_dir():
        raise ctx.error("is a directory, not a data file")

    ids: np.ndarray | None = None
    streams: np.ndarray | None = None
    if fmt == "text":
        if part == "imag":
            raise ctx.error("text files hold real numbers only; 'part: imag' needs complex data")
        values = _read_text(p, ctx)
    elif fmt == "npy":
        values = _select_part(_read_npy(p, ctx), part, ctx)
    elif fmt == "npz":
        values = _select_part(_read_npz(p, array, ctx), part, ctx)
    elif fmt == "hdf5":
        data, ids = _read_hdf5(p, dataset, ids_dataset, ctx)
        values = _select_part(data, part, ctx)
    else:
        values, ids, streams = _read_csv(p, part, ctx)

    values = _check_shape(values, ctx)
    if ids is not None and ids.shape[0] != values.shape[0]:
        raise ctx.error(
            f"the configuration ids dataset has {ids.shape[0]} entries but the correlator "
            f"has {values.shape[0]} configurations; they must match"
        )
    if ids is not None:
        _check_unique_ids(ids, streams, ctx)
    _check_finite(values, ids, ctx)
    return RawCorrelator(values=values, config_ids=ids, streams=streams, source=p)


# --------------------------------------------------------------------------- checks


def _check_shape(values: np.ndarray, ctx: _Ctx) -> np.ndarray:
    if values.ndim != 2:
        raise ctx.error(
            f"expected a 2-D array (configurations, timeslices), got shape {values.shape}"
        )
    if values.shape[0] == 0 or values.shape[1] == 0:
        raise ctx.error(f"no data: the array has shape {values.shape}")
    try:
        out = np.ascontiguousarray(values, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise ctx.error(f"values are not numbers ({exc})") from None
    return out


def _check_finite(values: np.ndarray, ids: np.ndarray | None, ctx: _Ctx) -> None:
    bad = ~np.isfinite(values)
    if not bad.any():
        return
    cfg, t = (int(i) for i in np.argwhere(bad)[0])
    what = "NaN" if math.isnan(values[cfg, t]) else "infinite"
    ident = f" (id {int(ids[cfg])})" if ids is not None else ""
    n_bad = int(bad.sum())
    more = f"; {n_bad} non-finite values in all" if n_bad > 1 else ""
    raise ctx.error(
        f"{what} value at configuration index {cfg}{ident}, t = {t}{more}; "
        "remove or repair the affected configurations"
    )


def _pair_codes(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """One int64 per (a, b) pair, ordered as the pairs sort (a first, then b)."""
    _, a_inv = np.unique(a, return_inverse=True)
    b_vals, b_inv = np.unique(b, return_inverse=True)
    return a_inv.reshape(-1).astype(np.int64) * b_vals.size + b_inv.reshape(-1)


def _check_unique_ids(ids: np.ndarray, streams: np.ndarray | None, ctx: _Ctx) -> None:
    keys = ids if streams is None else _pair_codes(streams, ids)
    _, first, counts = np.unique(keys, return_index=True, return_counts=True)
    if (counts > 1).any():
        dup = int(ids[first[np.argmax(counts > 1)]])
        raise ctx.error(f"configuration id {dup} appears more than once; ids must be unique")


def _select_part(data: np.ndarray, part: str, ctx: _Ctx) -> np.ndarray:
    """Real or imaginary part of complex data (also compound (r, i) dtypes)."""
    names = data.dtype.names
    if names is not None:
        if len(names) != 2 or not all(
            np.issubdtype(data.dtype.fields[n][0], np.number) for n in names
        ):
            raise ctx.error(
                f"compound data type with fields {names}; expected two numeric fields "
                "(real, imaginary)"
            )
        return np.asarray(data[names[0] if part == "real" else names[1]], dtype=np.float64)
    if np.iscomplexobj(data):
        return np.ascontiguousarray(data.real if part == "real" else data.imag)
    if data.dtype.kind not in "biuf":
        raise ctx.error(f"data type {data.dtype} is not numeric")
    if part == "imag":
        raise ctx.error("the data are real; 'part: imag' needs complex data")
    return data


# --------------------------------------------------------------------------- text


def _read_text(p: Path, ctx: _Ctx) -> np.ndarray:
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", UserWarning)  # "input contained no data"
            values = np.loadtxt(p, comments="#", dtype=np.float64, ndmin=2,
                                encoding="utf-8-sig")
    except UnicodeDecodeError:
        raise ctx.error("not a text file (cannot decode it as text); set the format") from None
    except ValueError:
        # The fast C parser counts only data rows; find the offending line.
        raise _diagnose_text(p, ctx) from None
    except OSError as exc:
        raise ctx.error(f"cannot read the file ({exc.strerror or exc})") from None
    if values.size == 0:
        raise ctx.error("no data: the file holds only comments or blank lines")
    return values


def _diagnose_text(p: Path, ctx: _Ctx) -> DataError:
    n_cols: int | None = None
    first_line = 0
    with open(p, encoding="utf-8-sig", errors="replace") as handle:
        for lineno, line in enumerate(handle, start=1):
            fields = line.split("#", 1)[0].split()
            if not fields:
                continue
            for col, field in enumerate(fields, start=1):
                try:
                    float(field)
                except ValueError:
                    return ctx.error(
                        f"line {lineno}, column {col}: cannot read {field!r} as a number"
                    )
            if n_cols is None:
                n_cols, first_line = len(fields), lineno
            elif len(fields) != n_cols:
                return ctx.error(
                    f"line {lineno} has {len(fields)} columns but line {first_line} has "
                    f"{n_cols}; every row (configuration) needs one value per timeslice"
                )
    return ctx.error("cannot parse the file as whitespace-separated numbers")


# --------------------------------------------------------------------------- npy / npz


def _read_npy(p: Path, ctx: _Ctx) -> np.ndarray:
    try:
        data = np.load(p, allow_pickle=False)
    except ValueError as exc:
        raise ctx.error(f"cannot read it as a .npy array ({exc})") from None
    except OSError as exc:
        raise ctx.error(f"cannot read the file ({exc})") from None
    if not isinstance(data, np.ndarray):
        raise ctx.error("holds an npz archive, not a single array; set format: npz")
    return data


def _read_npz(p: Path, array: str | None, ctx: _Ctx) -> np.ndarray:
    try:
        archive = np.load(p, allow_pickle=False)
    except (ValueError, OSError) as exc:
        raise ctx.error(f"cannot read it as an .npz archive ({exc})") from None
    if not isinstance(archive, np.lib.npyio.NpzFile):
        raise ctx.error("holds a single array, not an npz archive; set format: npy")
    with archive:
        archive_names = list(archive.files)
        if array is None:
            if len(archive_names) != 1:
                listed = ", ".join(archive_names) or "(none)"
                raise ctx.error(
                    f"the archive holds {len(archive_names)} arrays ({listed}); "
                    "name the one to use with 'array'"
                )
            array = archive_names[0]
        if array not in archive_names:
            raise ctx.error(
                f"no array {array!r} in the archive; it holds {', '.join(archive_names)}"
            )
        try:
            return archive[array]
        except ValueError as exc:
            raise ctx.error(f"cannot read array {array!r} ({exc})") from None


# --------------------------------------------------------------------------- hdf5


def _read_hdf5(
    p: Path, dataset: str | None, ids_dataset: str | None, ctx: _Ctx
) -> tuple[np.ndarray, np.ndarray | None]:
    import h5py

    try:
        handle = h5py.File(p, "r")
    except OSError as exc:
        raise ctx.error(f"cannot open it as an HDF5 file ({exc})") from None
    with handle:
        found: list[str] = []
        handle.visititems(
            lambda name, obj: found.append(name) if isinstance(obj, h5py.Dataset) else None
        )
        if dataset is None:
            candidates = [n for n in found if n != (ids_dataset or "").strip("/")]
            if len(candidates) != 1:
                listed = ", ".join(found) or "(none)"
                raise ctx.error(
                    f"the file holds {len(candidates)} candidate datasets ({listed}); "
                    "name the correlator with 'dataset'"
                )
            dataset = candidates[0]
        data = _h5_dataset(handle, dataset, found, "dataset", ctx)
        ids = None
        if ids_dataset is not None:
            raw_ids = _h5_dataset(handle, ids_dataset, found, "ids_dataset", ctx)
            ids = _integer_ids(raw_ids, f"ids dataset {ids_dataset!r}", ctx)
    return data, ids


def _h5_dataset(handle, name: str, found: list[str], key: str, ctx: _Ctx) -> np.ndarray:
    import h5py

    obj = handle.get(name)
    if obj is None or not isinstance(obj, h5py.Dataset):
        listed = ", ".join(found) or "(none)"
        raise ctx.error(f"no dataset {name!r} ('{key}') in the file; it holds {listed}")
    try:
        return obj[()]
    except (OSError, TypeError, ValueError) as exc:
        raise ctx.error(f"cannot read dataset {name!r} ({exc})") from None


def _integer_ids(raw: np.ndarray, what: str, ctx: _Ctx) -> np.ndarray:
    arr = np.asarray(raw)
    if arr.ndim != 1:
        raise ctx.error(f"{what} must be 1-D (one id per configuration), got shape {arr.shape}")
    if arr.dtype.kind in "iu":
        return arr.astype(np.int64)
    if arr.dtype.kind == "f" and np.all(np.isfinite(arr)) and np.all(arr == np.round(arr)):
        return arr.astype(np.int64)
    raise ctx.error(f"{what} must hold whole numbers, got data type {arr.dtype}")


# --------------------------------------------------------------------------- csv


def _read_csv(
    p: Path, part: str, ctx: _Ctx
) -> tuple[np.ndarray, np.ndarray, np.ndarray | None]:
    try:
        text = p.read_text(encoding="utf-8-sig")
    except UnicodeDecodeError:
        raise ctx.error("not a text file (cannot decode it as UTF-8)") from None
    except OSError as exc:
        raise ctx.error(f"cannot read the file ({exc.strerror or exc})") from None
    lines = text.splitlines()
    header_index = next(
        (i for i, line in enumerate(lines) if line.strip() and not line.lstrip().startswith("#")),
        None,
    )
    if header_index is None:
        raise ctx.error("empty CSV file; expected a header line 'config,t,value'")
    header = [h.strip().lower() for h in next(csv.reader([lines[header_index]]))]
    missing = [c for c in _CSV_REQUIRED if c not in header]
    unknown = [c for c in header if c not in _CSV_REQUIRED + _CSV_OPTIONAL]
    if missing or unknown:
        problems = []
        if missing:
            problems.append(f"missing column(s) {', '.join(missing)}")
        if unknown:
            problems.append(f"unknown column(s) {', '.join(unknown)}")
        raise ctx.error(
            f"line {header_index + 1}: header {','.join(header)!r}: {'; '.join(problems)}; "
            f"the columns are config, t, value and optionally {', '.join(_CSV_OPTIONAL)}"
        )
    if len(set(header)) != len(header):
        raise ctx.error(f"line {header_index + 1}: a column name appears twice in the header")
    if part == "imag" and "imag" not in header:
        raise ctx.error("'part: imag' needs an 'imag' column, but the header has none")
    value_col = "value" if part == "real" else "imag"

    body = "\n".join(lines[header_index + 1:])
    columns = _csv_columns_fast(body, header)
    if columns is None:
        columns = _csv_columns_slow(lines, header_index, header, ctx)
    cfg_raw, t_raw, val = columns["config"], columns["t"], columns[value_col]
    if cfg_raw.size == 0:
        raise ctx.error("no data rows after the header")
    cfg = _whole(cfg_raw, "config", ctx, lines, header_index)
    t = _whole(t_raw, "t", ctx, lines, header_index)
    if (t < 0).any():
        row = int(np.argmax(t < 0))
        raise ctx.error(
            f"line {_data_line(lines, header_index, row)}: negative timeslice t = {t[row]}; "
            "timeslices count from 0"
        )
    streams_raw = columns.get("stream")
    stream_codes = None if streams_raw is None else _stream_codes(streams_raw)
    return _pivot(cfg, t, val, stream_codes, ctx, lambda row: _data_line(lines, header_index, row))


def _csv_columns_fast(body: str, header: list[str]) -> dict[str, np.ndarray] | None:
    """All-numeric CSV through numpy's C parser; None when that fails."""
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", UserWarning)
            table = np.loadtxt(io.StringIO(body), delimiter=",", comments="#",
                               dtype=np.float64, ndmin=2)
    except ValueError:
        return None
    if table.size == 0:
        return {name: np.empty(0) for name in header}
    if table.shape[1] != len(header):
        return None
    return {name: table[:, i] for i, name in enumerate(header)}


def _csv_columns_slow(
    lines: list[str], header_index: int, header: list[str], ctx: _Ctx
) -> dict[str, np.ndarray]:
    """Line by line, for text stream labels and for exact error locations."""
    cols: dict[str, list] = {name: [] for name in header}
    numeric = [name for name in header if name != "stream"]
    for lineno in range(header_index + 2, len(lines) + 1):
        line = lines[lineno - 1]
        if not line.strip() or line.lstrip().startswith("#"):
            continue
        fields = [f.strip() for f in next(csv.reader([line]))]
        if len(fields) != len(header):
            raise ctx.error(
                f"line {lineno} has {len(fields)} fields but the header has {len(header)} "
                f"({','.join(header)})"
            )
        for name, field in zip(header, fields):
            if name in numeric:
                try:
                    cols[name].append(float(field))
                except ValueError:
                    raise ctx.error(
                        f"line {lineno}: cannot read {name} = {field!r} as a number"
                    ) from None
            else:
                cols[name].append(field)
    out: dict[str, np.ndarray] = {n: np.asarray(cols[n], dtype=np.float64) for n in numeric}
    if "stream" in header:
        labels = cols["stream"]
        try:
            out["stream"] = np.asarray([float(s) for s in labels], dtype=np.float64)
        except ValueError:
            out["stream"] = np.asarray(labels, dtype=object)
    return out


def _data_line(lines: list[str], header_index: int, row: int) -> int:
    """1-based line number of data row ``row`` (0-based; comments and blanks skipped)."""
    seen = -1
    for lineno in range(header_index + 2, len(lines) + 1):
        line = lines[lineno - 1]
        if line.strip() and not line.lstrip().startswith("#"):
            seen += 1
            if seen == row:
                return lineno
    return len(lines)


def _whole(x: np.ndarray, name: str, ctx: _Ctx, lines: list[str], header_index: int) -> np.ndarray:
    bad = ~np.isfinite(x) | (x != np.round(x))
    if bad.any():
        row = int(np.argmax(bad))
        raise ctx.error(
            f"line {_data_line(lines, header_index, row)}: {name} = {x[row]:g} is not a "
            "whole number"
        )
    return x.astype(np.int64)


def _stream_codes(raw: np.ndarray) -> np.ndarray:
    if raw.dtype != object:
        if np.all(np.isfinite(raw)) and np.all(raw == np.round(raw)):
            return raw.astype(np.int64)
        raw = raw.astype(str).astype(object)
    labels = np.asarray([str(s) for s in raw])
    _, codes = np.unique(labels, return_inverse=True)
    return codes.astype(np.int64)


def _pivot(
    cfg: np.ndarray,
    t: np.ndarray,
    val: np.ndarray,
    streams: np.ndarray | None,
    ctx: _Ctx,
    line_of,
) -> tuple[np.ndarray, np.ndarray, np.ndarray | None]:
    stream_key = np.zeros_like(cfg) if streams is None else streams
    # rows sorted by (stream, config)
    codes, first_row, row_of = np.unique(_pair_codes(stream_key, cfg), return_index=True,
                                         return_inverse=True)
    row_of = row_of.reshape(-1)
    uniq = np.stack([stream_key[first_row], cfg[first_row]], axis=1)
    n_t = int(t.max()) + 1
    n_cfg = uniq.shape[0]
    flat = row_of * n_t + t
    counts = np.bincount(flat, minlength=n_cfg * n_t)
    if (counts > 1).any():
        cell = int(np.argmax(counts > 1))
        r, tt = divmod(cell, n_t)
        rows = [line_of(int(i)) for i in np.nonzero(flat == cell)[0][:2]]
        in_stream = f" in stream {uniq[r, 0]}" if streams is not None else ""
        raise ctx.error(
            f"config {uniq[r, 1]}{in_stream}, t = {tt} appears more than once "
            f"(lines {rows[0]} and {rows[1]}); each (config, t) must appear once"
        )
    if (counts == 0).any():
        cell = int(np.argmax(counts == 0))
        r, tt = divmod(cell, n_t)
        in_stream = f" in stream {uniq[r, 0]}" if streams is not None else ""
        n_missing = int((counts == 0).sum())
        more = f"; {n_missing} (config, t) pairs are missing in all" if n_missing > 1 else ""
        raise ctx.error(
            f"no value for config {uniq[r, 1]}{in_stream}, t = {tt} (the file has t = 0..{n_t - 1})"
            f"{more}; every configuration needs every timeslice"
        )
    values = np.empty(n_cfg * n_t, dtype=np.float64)
    values[flat] = val
    ids = uniq[:, 1].astype(np.int64)
    out_streams = None if streams is None else uniq[:, 0].astype(np.int64)
    return values.reshape(n_cfg, n_t), ids, out_streams
