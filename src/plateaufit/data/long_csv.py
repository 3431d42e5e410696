"""The long CSV form: one row per (configuration, timeslice), pivoted to ``(n_cfg, n_t)``.

Columns (header line, any order, names case-insensitive): ``config``, ``t``,
``value`` and optionally ``stream`` and ``imag``. Lines that are blank or start
with ``#`` are skipped. Rows may come in any order; each (stream, config, t)
must appear exactly once.

Order of the result:

* **Streams** in order of *first appearance in the file* -- the order the
  spec's ``ensemble.streams`` counts follow. Integer labels are kept as they
  are; text labels are numbered 0, 1, ... in that order. Every stream's label,
  as written, is returned in ``stream_names``.
* **Configurations** by ascending id within each stream: ids count Monte Carlo
  time.

``file_rows`` gives, for each returned row, the position of its configuration
in the file (the order of first appearance of each (stream, config)); it is
None when the two orders agree.

Everything is bounded by the number of rows: a timeslice index written as
``10**12`` by mistake is reported as missing data, not allocated.
"""

from __future__ import annotations

import csv
import warnings
from dataclasses import dataclass

import numpy as np

from plateaufit.data.files import FileContext

__all__ = ["LongTable", "parse_long_csv", "REQUIRED", "OPTIONAL", "LARGEST_ID"]

REQUIRED: tuple[str, ...] = ("config", "t", "value")
OPTIONAL: tuple[str, ...] = ("stream", "imag")

#: Largest configuration id or timeslice accepted: 2^53 - 1. Fields are read
#: as doubles, and from 2^53 on a double no longer holds every integer (2^53 + 1
#: is read as 2^53), so two different ids could be read as one.
LARGEST_ID: int = 2**53 - 1


@dataclass(frozen=True)
class LongTable:
    """A long CSV pivoted to one row per configuration.

    Attributes
    ----------
    values : ndarray, (n_cfg, n_t)
    config_ids : ndarray of int64, (n_cfg,)
    streams : ndarray of int64, (n_cfg,) or None
    stream_names : dict[int, str] or None
        Stream code -> label as written in the file, in order of appearance.
    file_rows : ndarray of int64, (n_cfg,), or None
        Position of each row's configuration in the file's order of first
        appearance; None when the rows are in that order.
    """

    values: np.ndarray
    config_ids: np.ndarray
    streams: np.ndarray | None
    stream_names: dict[int, str] | None
    file_rows: np.ndarray | None


class _Lines:
    """Line numbers of data rows, computed only when an error needs one."""

    def __init__(self, text: str, header_line: int) -> None:
        self._text = text
        self.header_line = header_line  # 1-based
        self._rows: list[int] | None = None
        self._lines: list[str] | None = None

    @property
    def lines(self) -> list[str]:
        if self._lines is None:
            self._lines = self._text.split("\n")
        return self._lines

    def of_row(self, row: int) -> int:
        """1-based line number of data row ``row`` (0-based; comments and blanks skipped)."""
        if self._rows is None:
            self._rows = [i + 1 for i in range(self.header_line, len(self.lines))
                          if _is_data(self.lines[i])]
        return self._rows[row] if 0 <= row < len(self._rows) else len(self.lines)


def _is_data(line: str) -> bool:
    stripped = line.strip()
    return bool(stripped) and not stripped.startswith("#")


def _split(line: str, lineno: int, ctx: FileContext) -> list[str]:
    try:
        return [f.strip() for f in next(csv.reader([line]), [])]
    except csv.Error as exc:
        raise ctx.error(f"line {lineno}: cannot split it into CSV fields ({exc})") from None


def parse_long_csv(text: str, part: str, ctx: FileContext) -> LongTable:
    """Pivot the decoded text of a long CSV file (see the module docstring).

    Parameters
    ----------
    text : str
        The decoded file (:func:`plateaufit.data.files.read_text`).
    part : {'real', 'imag'}
        ``imag`` reads the ``imag`` column instead of ``value``.
    ctx : FileContext

    Returns
    -------
    LongTable

    Raises
    ------
    DataError
        Header missing, incomplete or with unknown or repeated columns; a field
        that is not a number (line named); a config id or t that is not a whole
        number, negative, or 2^53 or more; a (config, t) pair missing or repeated
        (config, stream, t and lines named).
    """
    text = text.replace("\r\n", "\n").replace("\r", "\n")
    header_line, header_end = _find_header(text)
    if header_line is None:
        raise ctx.error("empty CSV file (only blank or comment lines); expected a header line "
                        "'config,t,value'")
    header = [h.lower() for h in _split(text[:header_end].rsplit("\n", 1)[-1], header_line, ctx)]
    _check_header(header, header_line, part, ctx)
    lines = _Lines(text, header_line)
    body = text[header_end + 1:] if header_end < len(text) else ""
    columns = _columns_fast(body, header)
    if columns is None and "stream" in header:
        columns = _columns_text_streams(body, header)
    if columns is None:
        columns = _columns_slow(lines, header, ctx)
    cfg_raw, t_raw = columns["config"], columns["t"]
    val = columns["value" if part == "real" else "imag"]
    if cfg_raw.size == 0:
        raise ctx.error("no data rows after the header; expected rows 'config,t,value'")
    cfg = _whole(cfg_raw, "config", "configuration ids count Monte Carlo time", ctx, lines)
    t = _whole(t_raw, "t", "timeslices count from 0", ctx, lines)
    streams_raw = columns.get("stream")
    if streams_raw is None:
        return _pivot(cfg, t, val, None, None, ctx, lines)
    codes, rank, names = _stream_codes(streams_raw)
    return _pivot(cfg, t, val, (codes, rank), names, ctx, lines)


def _find_header(text: str) -> tuple[int | None, int]:
    """(1-based line number, end offset) of the first line that is neither blank nor a comment."""
    start, lineno = 0, 1
    while start <= len(text):
        end = text.find("\n", start)
        end = len(text) if end < 0 else end
        if _is_data(text[start:end]):
            return lineno, end
        start, lineno = end + 1, lineno + 1
    return None, len(text)


def _check_header(header: list[str], lineno: int, part: str, ctx: FileContext) -> None:
    missing = [c for c in REQUIRED if c not in header]
    unknown = [c for c in header if c not in REQUIRED + OPTIONAL]
    if missing or unknown:
        problems = []
        if missing:
            problems.append(f"missing column(s) {', '.join(missing)}")
        if unknown:
            problems.append(f"unknown column(s) {', '.join(unknown)}")
        shown = ",".join(header)
        if len(shown) > 80:
            shown = shown[:77] + "..."
        raise ctx.error(
            f"line {lineno}: header {shown!r}: {'; '.join(problems)}; the columns are "
            f"config, t, value and optionally {', '.join(OPTIONAL)} (a header line first)"
        )
    if len(set(header)) != len(header):
        raise ctx.error(f"line {lineno}: a column name appears twice in the header; "
                        "name each column once")
    if part == "imag" and "imag" not in header:
        raise ctx.error("'part: imag' needs an 'imag' column, but the header has none; "
                        "add it or read the real part")


def _columns_fast(body: str, header: list[str]) -> dict[str, np.ndarray] | None:
    """All-numeric CSV through numpy's C parser; None when that fails."""
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # "input contained no data" and the like
            table = np.loadtxt(body.split("\n"), delimiter=",", comments="#",
                               dtype=np.float64, ndmin=2)
    except (ValueError, TypeError, OverflowError, IndexError):
        return None
    if table.size == 0:
        return {name: np.empty(0) for name in header}
    if table.ndim != 2 or table.shape[1] != len(header):
        return None
    return {name: table[:, i] for i, name in enumerate(header)}


def _columns_text_streams(body: str, header: list[str]) -> dict[str, np.ndarray] | None:
    """Numbers through numpy's C parser, text stream labels from a plain split.

    Only for well-formed files (no quoting, one field per column on every
    data line); None otherwise, and the line-by-line reader finds and names
    what is wrong.
    """
    if '"' in body:
        return None
    k = header.index("stream")
    rows = [line for line in body.split("\n") if _is_data(line)]
    if not rows:
        return None
    fields = [line.split(",") for line in rows]
    if any(len(f) != len(header) for f in fields):
        return None
    labels = [f[k].strip() for f in fields]
    keep = [i for i in range(len(header)) if i != k]
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            table = np.loadtxt(rows, delimiter=",", dtype=np.float64, ndmin=2, usecols=keep)
    except (ValueError, TypeError, OverflowError, IndexError):
        return None
    if table.shape != (len(rows), len(keep)):
        return None
    out = {header[i]: table[:, j] for j, i in enumerate(keep)}
    try:
        out["stream"] = np.asarray([float(x) for x in labels], dtype=np.float64)
    except ValueError:
        out["stream"] = np.asarray(labels, dtype=object)
    return out


def _columns_slow(lines: _Lines, header: list[str], ctx: FileContext) -> dict[str, np.ndarray]:
    """Line by line, for text stream labels and for exact error locations."""
    cols: dict[str, list] = {name: [] for name in header}
    numeric = [name for name in header if name != "stream"]
    all_lines = lines.lines
    for index in range(lines.header_line, len(all_lines)):
        line, lineno = all_lines[index], index + 1
        if not _is_data(line):
            continue
        fields = _split(line, lineno, ctx)
        if len(fields) != len(header):
            raise ctx.error(
                f"line {lineno} has {len(fields)} fields but the header has {len(header)} "
                f"({','.join(header)}); every row needs one value per column"
                + (" (the last line looks cut off: is the file complete?)"
                   if index == len(all_lines) - 1 and len(fields) < len(header) else "")
            )
        for name, field in zip(header, fields):
            if name in numeric:
                try:
                    cols[name].append(float(field))
                except ValueError:
                    shown = field if len(field) <= 40 else field[:37] + "..."
                    raise ctx.error(
                        f"line {lineno}: cannot read {name} = {shown!r} as a number; fix the "
                        "value or remove the row"
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


def _whole(x: np.ndarray, name: str, meaning: str, ctx: FileContext, lines: _Lines) -> np.ndarray:
    with np.errstate(invalid="ignore"):
        bad = ~np.isfinite(x) | (x != np.round(x))
    if bad.any():
        row = int(np.argmax(bad))
        raise ctx.error(f"line {lines.of_row(row)}: {name} = {x[row]:g} is not a whole number; "
                        f"{meaning}")
    if (x < 0).any():
        row = int(np.argmax(x < 0))
        raise ctx.error(f"line {lines.of_row(row)}: negative {name} = {x[row]:g}; {meaning} "
                        "and cannot be negative: fix or renumber")
    if (x > LARGEST_ID).any():
        row = int(np.argmax(x > LARGEST_ID))
        raise ctx.error(f"line {lines.of_row(row)}: {name} = {x[row]:g} is 2^53 or more, too "
                        "large to be read exactly; renumber")
    return x.astype(np.int64)


def _stream_codes(raw: np.ndarray) -> tuple[np.ndarray, np.ndarray, dict[int, str]]:
    """Per row: stream code, rank by first appearance; and code -> label as written."""
    integral = False
    if raw.dtype != object:
        with np.errstate(invalid="ignore"):
            integral = bool(np.all(np.isfinite(raw)) and np.all(raw == np.round(raw))
                            and np.all(np.abs(raw) <= LARGEST_ID))
    if integral:
        values = raw.astype(np.int64)
        labels, first, inverse = np.unique(values, return_index=True, return_inverse=True)
        label_text = [str(int(v)) for v in labels]
    else:
        text = [str(s) if raw.dtype == object else f"{float(s):g}" for s in raw]
        labels_arr, first, inverse = np.unique(np.asarray(text, dtype=object),
                                               return_index=True, return_inverse=True)
        label_text = [str(v) for v in labels_arr]
        labels = None
    inverse = inverse.reshape(-1)
    appearance = np.argsort(first, kind="stable")  # label indices in order of appearance
    rank_of_label = np.empty(appearance.size, dtype=np.int64)
    rank_of_label[appearance] = np.arange(appearance.size)
    rank = rank_of_label[inverse]
    if integral:
        codes_of_label = labels
    else:
        codes_of_label = rank_of_label  # text labels numbered 0, 1, ... by appearance
    codes = np.asarray(codes_of_label, dtype=np.int64)[inverse]
    names = {int(codes_of_label[i]): label_text[i] for i in appearance}
    return codes, rank, names


def _pivot(cfg, t, val, streams, names, ctx: FileContext, lines: _Lines) -> LongTable:
    codes = rank = None
    if streams is not None:
        codes, rank = streams
    n_rows = int(cfg.size)
    stream_key = np.zeros(n_rows, dtype=np.int64) if rank is None else rank
    cfg_vals, cfg_inv = np.unique(cfg, return_inverse=True)
    pair = stream_key * np.int64(cfg_vals.size) + cfg_inv.reshape(-1)
    # units (stream, config) sorted by (stream rank, config id)
    _, first_row, unit_of = np.unique(pair, return_index=True, return_inverse=True)
    unit_of = unit_of.reshape(-1)
    n_cfg = int(first_row.size)
    n_t = int(t.max()) + 1
    ids = cfg[first_row].astype(np.int64)
    out_streams = None if codes is None else codes[first_row].astype(np.int64)

    def unit_text(u: int) -> str:
        where = f" in stream {names[int(out_streams[u])]}" if out_streams is not None else ""
        return f"config {int(ids[u])}{where}"

    if n_cfg * n_t <= n_rows:
        flat = unit_of * n_t + t
        counts = np.bincount(flat, minlength=n_cfg * n_t)
        if (counts > 1).any():
            cell = int(np.argmax(counts > 1))
            u, tt = divmod(cell, n_t)
            rows = [lines.of_row(int(i)) for i in np.nonzero(flat == cell)[0][:2]]
            raise ctx.error(
                f"{unit_text(u)}, t = {tt} appears more than once (lines {rows[0]} and "
                f"{rows[1]}); each (config, t) must appear once: remove the repeated rows"
            )
    if n_cfg * n_t != n_rows:
        _raise_missing(unit_of, t, n_cfg, n_t, unit_text, ctx)
    values = np.empty(n_cfg * n_t, dtype=np.float64)
    values[unit_of * n_t + t] = val
    file_rows = None
    if np.any(np.diff(first_row) < 0):
        file_rows = np.argsort(np.argsort(first_row, kind="stable"), kind="stable")
    return LongTable(values=values.reshape(n_cfg, n_t), config_ids=ids, streams=out_streams,
                     stream_names=names, file_rows=file_rows)


def _raise_missing(unit_of, t, n_cfg: int, n_t: int, unit_text, ctx: FileContext) -> None:
    """The first missing (config, t), found in memory bounded by the number of rows."""
    o = np.lexsort((t, unit_of))
    u, tt = unit_of[o], t[o]
    distinct = np.ones(u.size, dtype=bool)
    distinct[1:] = (u[1:] != u[:-1]) | (tt[1:] != tt[:-1])
    u, tt = u[distinct], tt[distinct]
    per_unit = np.bincount(u, minlength=n_cfg)
    short = int(np.argmax(per_unit < n_t))
    ts = tt[u == short]
    gaps = np.flatnonzero(ts != np.arange(ts.size))
    missing_t = int(gaps[0]) if gaps.size else int(ts.size)
    n_missing = n_cfg * n_t - int(u.size)
    more = f"; {n_missing} (config, t) pairs are missing in all" if n_missing > 1 else ""
    raise ctx.error(
        f"no value for {unit_text(short)}, t = {missing_t} (the file has t = 0..{n_t - 1})"
        f"{more}; every configuration needs every timeslice: add the missing rows or remove "
        "the incomplete configurations"
    )
