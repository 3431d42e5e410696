"""Numbers for tables: value(error) notation, the scan CSV, the LaTeX results table.

The value(error) convention used everywhere in plateaufit's output
------------------------------------------------------------------
The error is rounded to ``digits`` (default two) significant digits and the value
is rounded to the same decimal place. The digits in parentheses are the error in
units of the value's last digit (common practice)::

    0.24531 +- 0.00183   ->  0.2453(18)
    1.2345  +- 0.1123    ->  1.23(11)
    1.2345  +- 0.0995    ->  1.23(10)       the error rounds up to the next decade
    0.99996 +- 0.0012    ->  1.0000(12)     the value rounds across a power of ten

When the rounded error is 1 or more while the value still has decimals, the
error is written with the decimal point instead of in units of the last digit,
so a reader never has to count digits across the point (common practice)::

    12.345 +- 1.123      ->  12.3(1.1)
    12.345 +- 9.96       ->  12(10)         9.96 rounds to 10, two digits, no decimals
    1234.5 +- 112        ->  1230(110)

Values whose magnitude (or whose error's, if larger) is below 1e-3 or at least
1e5 use a shared power of ten, chosen after rounding::

    1.2341e-05 +- 5.6e-07   ->  1.234(56)e-05
    -3.0e7 +- 2.2e5         ->  -3.000(22)e+07

Rounding is half-up on the shortest decimal representation of the float
(``repr``), so ``0.0995`` rounds to ``0.10`` as written, not as its binary
approximation 0.09949999... would. Special cases: an error of exactly 0 prints
the value with six significant digits followed by ``(0)``; a NaN or infinite
error prints the value the same way followed by ``(nan)`` or ``(inf)``; a NaN or
infinite value prints ``nan``, ``inf`` or ``-inf`` alone. A negative error is a
caller's bug and raises ``ValueError``.
"""

from __future__ import annotations

import csv
import io
import math
import os
import re
from collections.abc import Iterable, Mapping, Sequence
from decimal import ROUND_HALF_UP, Decimal, localcontext
from pathlib import Path
from typing import Any

from plateaufit.atomic import write_text
from plateaufit.pipeline.results import Results

__all__ = [
    "format_value_error",
    "format_value_errors",
    "scan_table_csv",
    "latex_results_table",
    "latex_escape",
    "energy_names",
    "param_names",
    "file_stem",
    "write_tables",
    "scan_table_names",
]

_SCI_LOW = -3   # exponents below this use scientific notation
_SCI_HIGH = 5   # exponents at or above this use scientific notation
#: decimal digits enough for any double's value rounded at any double's error place
#: (exponents -324..308), so quantizing never runs out of precision
_DECIMAL_PRECISION = 700


def _dec(x: float) -> Decimal:
    """The float as the decimal number its shortest repr shows."""
    return Decimal(repr(float(x)))


def _round_at(x: Decimal, q: int) -> Decimal:
    """Round half-up to a multiple of 10**q."""
    return x.quantize(Decimal(1).scaleb(q), rounding=ROUND_HALF_UP)


def _error_place(err: Decimal, digits: int) -> int:
    """Decimal exponent q of the last kept digit of ``err`` rounded to ``digits`` sig. digits."""
    q = err.adjusted() - (digits - 1)
    rounded = _round_at(err, q)
    if rounded.adjusted() > err.adjusted():   # 0.0995 -> 0.100: one digit too many
        q += 1
    return q


def _fixed(value: Decimal, errors: Sequence[Decimal], q: int) -> str:
    """Write value(err1)(err2)... with everything already rounded at 10**q."""
    if value.is_zero():
        value = abs(value)                    # no "-0.00"
    if q < 0:
        text = f"{value:.{-q}f}"
        parts = []
        for err in errors:
            if err >= 1:
                parts.append(f"({err:.{-q}f})")
            else:
                parts.append(f"({int(err.scaleb(-q))})")
    else:
        text = f"{value:.0f}"
        parts = [f"({err:.0f})" for err in errors]
    return text + "".join(parts)


def format_value_errors(value: float, errors: Sequence[float], digits: int = 2) -> str:
    """Format a value with several errors, e.g. value(stat)(sys): ``0.2453(18)(7)``.

    The decimal place is set by the largest error rounded to ``digits``
    significant digits; the other errors are rounded to the same place (so a
    much smaller one may show as ``(0)``). See the module docstring for the
    convention.

    Parameters
    ----------
    value : float
        The central value.
    errors : sequence of float
        Non-negative errors; at least one.
    digits : int, default 2
        Significant digits kept in the largest error.

    Returns
    -------
    str
        The formatted number.

    Raises
    ------
    ValueError
        If an error is negative, ``errors`` is empty or ``digits`` < 1.
    """
    if digits < 1:
        raise ValueError(f"digits must be at least 1, got {digits}")
    errs = [float(e) for e in errors]
    if not errs:
        raise ValueError("at least one error is needed")
    for err in errs:
        if err < 0:
            raise ValueError(f"an error must be non-negative, got {err!r}")
    value = float(value)
    if not math.isfinite(value):
        return "nan" if math.isnan(value) else ("inf" if value > 0 else "-inf")
    bad = [e for e in errs if not math.isfinite(e)]
    if bad or max(errs) == 0.0:
        def tag(e: float) -> str:
            if math.isnan(e):
                return "(nan)"
            if math.isinf(e):
                return "(inf)"
            return "(0)" if e == 0.0 else f"({e:.{digits}g})"
        return f"{value:.6g}" + "".join(tag(e) for e in errs)

    with localcontext() as ctx:
        ctx.prec = _DECIMAL_PRECISION
        return _format_finite(value, errs, digits)


def _format_finite(value: float, errs: list[float], digits: int) -> str:
    d_errs = [_dec(e) for e in errs]
    largest = max(d_errs)
    q = _error_place(largest, digits)
    d_val = _round_at(_dec(value), q)
    r_errs = [_round_at(e, q) for e in d_errs]
    magnitude = max(abs(d_val), max(r_errs))
    exponent = magnitude.adjusted()
    if _SCI_LOW <= exponent < _SCI_HIGH:
        return _fixed(d_val, r_errs, q)
    # Scientific: scale everything by the shared power of ten (exact in Decimal).
    mant = _fixed(d_val.scaleb(-exponent), [e.scaleb(-exponent) for e in r_errs], q - exponent)
    sign = "-" if exponent < 0 else "+"
    return f"{mant}e{sign}{abs(exponent):02d}"


def format_value_error(value: float, error: float, digits: int = 2) -> str:
    """Format ``value +- error`` in value(error) notation, e.g. ``0.2453(18)``.

    The error is rounded to ``digits`` significant digits and the value to the
    same decimal place; see the module docstring for the full convention
    (errors of 1 or more, scientific notation, NaN/inf/zero errors).

    Parameters
    ----------
    value : float
        The central value.
    error : float
        Its non-negative error.
    digits : int, default 2
        Significant digits of the error.

    Returns
    -------
    str
        ``"0.2453(18)"``, ``"12.3(1.1)"``, ``"1.234(56)e-05"``, ...

    Raises
    ------
    ValueError
        If ``error`` is negative or ``digits`` < 1.

    Examples
    --------
    >>> format_value_error(0.24531, 0.00183)
    '0.2453(18)'
    >>> format_value_error(12.345, 1.123)
    '12.3(1.1)'
    """
    return format_value_errors(value, [error], digits)


# ----------------------------------------------------------------- helpers on results dicts

_ENERGY = re.compile(r"^E(osc)?\d+$")


def _param_sort_key(name: str) -> tuple[int, int]:
    """E0, E1, ..., then Eosc0, ..., then the rest (a stable sort keeps their order)."""
    m = re.match(r"^E(\d+)$", name)
    if m:
        return (0, int(m.group(1)))
    m = re.match(r"^Eosc(\d+)$", name)
    if m:
        return (1, int(m.group(1)))
    return (2, 0)


def param_names(fit: Mapping[str, Any]) -> list[str]:
    """All parameter names met in a fit's chosen result and scan, energies first.

    Energies come in order (``E0, E1, …, Eosc0, …``); the other parameters keep
    the order in which the results list them (the model's order).
    """
    seen: dict[str, None] = {}
    chosen = fit.get("chosen") or {}
    for name in (chosen.get("params") or {}):
        seen.setdefault(name, None)
    for point in fit.get("scan") or []:
        for name in (point.get("params") or {}):
            seen.setdefault(name, None)
    return sorted(seen, key=_param_sort_key)


def energy_names(params: Sequence[str] | Mapping[str, Any]) -> list[str]:
    """The energy parameters (``E0, E1, …, Eosc0, …``) among ``params``, in order."""
    return sorted((p for p in params if _ENERGY.match(p)), key=_param_sort_key)


def _num(x: Any) -> float:
    """A results-dict number as float (None -> NaN)."""
    if x is None:
        return math.nan
    return float(x)


def _csv_number(x: Any) -> str:
    if x is None:
        return ""
    if isinstance(x, bool):
        return "true" if x else "false"
    if isinstance(x, int):
        return str(x)
    x = float(x)
    if math.isnan(x):
        return "nan"
    return repr(x)


# ------------------------------------------------------------------------- the scan CSV

SCAN_COLUMNS = ("tmin", "tmax", "model", "states", "chi2", "dof", "chi2_dof", "p_value",
                "p_value_hotelling", "aic", "weight", "converged")


def scan_table_csv(fit_results: Mapping[str, Any]) -> str:
    """Every scan point of one fit as CSV text, one row per point.

    Columns: ``tmin, tmax, model, states, chi2, dof, chi2_dof, p_value,
    p_value_hotelling, aic, weight, converged``, then for each parameter ``P``
    (energies first) the columns ``P`` and ``P_error``. A parameter a point does
    not have (``E1`` of a one-state fit) is an empty cell; so is a missing
    Hotelling p-value. Numbers are written at full precision (``repr``);
    ``converged`` is ``true``/``false``.

    Parameters
    ----------
    fit_results : mapping
        One entry ``results['fits'][NAME]`` of the results dict.

    Returns
    -------
    str
        CSV text with a header row, ``\\n`` line endings.
    """
    names = param_names({"scan": fit_results.get("scan") or []})
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    header = list(SCAN_COLUMNS)
    for name in names:
        header += [name, f"{name}_error"]
    writer.writerow(header)
    for point in fit_results.get("scan") or []:
        chi2 = point.get("chi2")
        dof = point.get("dof")
        chi2_dof = None
        if chi2 is not None and dof:
            chi2_dof = float(chi2) / float(dof)
        row = [
            _csv_number(point.get("tmin")), _csv_number(point.get("tmax")),
            str(point.get("model", "")), _csv_number(point.get("states")),
            _csv_number(chi2), _csv_number(dof), _csv_number(chi2_dof),
            _csv_number(point.get("p_value")), _csv_number(point.get("p_value_hotelling")),
            _csv_number(point.get("aic")), _csv_number(point.get("weight")),
            _csv_number(bool(point.get("converged", False))),
        ]
        params = point.get("params") or {}
        for name in names:
            entry = params.get(name)
            if entry is None:
                row += ["", ""]
            else:
                row += [_csv_number(entry.get("value")), _csv_number(entry.get("error"))]
        writer.writerow(row)
    return buffer.getvalue()


# ------------------------------------------------------------------------- LaTeX

_LATEX_SPECIAL = {
    "\\": r"\textbackslash{}", "&": r"\&", "%": r"\%", "$": r"\$", "#": r"\#",
    "_": r"\_", "{": r"\{", "}": r"\}", "~": r"\textasciitilde{}",
    "^": r"\textasciicircum{}", "<": r"\textless{}", ">": r"\textgreater{}",
}


def latex_escape(text: str) -> str:
    """Escape LaTeX's special characters (``\\ & % $ # _ { } ~ ^ < >``) in plain text."""
    return "".join(_LATEX_SPECIAL.get(ch, ch) for ch in str(text))


def _latex_number(text: str) -> str:
    """value(error) text for LaTeX: ``1.23(4)e-05`` -> ``$1.23(4)\\times 10^{-5}$``."""
    m = re.match(r"^(.*)e([+-])(\d+)$", text)
    if m and m.group(1) not in ("nan", "inf", "-inf"):
        sign = "-" if m.group(2) == "-" else ""
        return f"${m.group(1)}\\times 10^{{{sign}{int(m.group(3))}}}$"
    if text in ("nan", "inf", "-inf") or "(nan)" in text or "(inf)" in text:
        return latex_escape(text)
    return f"${text}$" if text.startswith("-") else text


def chosen_range_text(fit: Mapping[str, Any]) -> str:
    """A short description of the chosen fit range (or of the averaged ranges)."""
    chosen = fit.get("chosen") or {}
    method = chosen.get("method", "")
    if method == "average":
        used = [p for p in fit.get("scan") or []
                if p.get("converged", True) and _num(p.get("weight")) > 0]
        if used:
            tmins = [int(p["tmin"]) for p in used]
            tmaxs = [int(p["tmax"]) for p in used]
            states = sorted({int(p["states"]) for p in used})
            st = ",".join(str(s) for s in states)
            return (f"average of {len(used)} fits (tmin {min(tmins)}-{max(tmins)}, "
                    f"tmax {min(tmaxs)}-{max(tmaxs)}, states {st})")
        band = chosen.get("band") or {}
        if band.get("tmin") is not None:
            return f"average over [{band['tmin']}, {band['tmax']}]"
        return "average"
    tmin, tmax, states = chosen.get("tmin"), chosen.get("tmax"), chosen.get("states")
    text = f"[{tmin}, {tmax}]"
    if states is not None:
        text += f", {states} state" + ("s" if int(states) != 1 else "")
    return text


def latex_results_table(results: Mapping[str, Any]) -> str:
    """The chosen results of every fit as a LaTeX ``tabular`` fragment.

    One row per (fit, parameter) with columns: fit name, parameter,
    value(stat)(sys), value(total), method, chosen range. The derived
    quantities (``results['derived']``, when there are any) follow in rows of
    the same six columns: ``derived``, the quantity's name, value(stat)(sys),
    value(total), ``jackknife``, and the expression (the last header then
    reads "Range / expression"). Names are escaped for LaTeX. The fragment
    uses the rules ``\\toprule``, ``\\midrule`` and ``\\bottomrule`` of the
    **booktabs** package: put ``\\usepackage{booktabs}`` in the document's
    preamble, and ``\\input`` the fragment inside a ``table`` environment if you
    want a float and a caption.

    Parameters
    ----------
    results : mapping
        The results dict (``results['fits'][NAME]['chosen']`` is read).

    Returns
    -------
    str
        The LaTeX source, ending in a newline.
    """
    derived = results.get("derived") or {}
    last = "Range / expression" if derived else "Range"
    lines = [
        "% plateaufit results table; needs \\usepackage{booktabs}",
        "\\begin{tabular}{llllll}",
        "\\toprule",
        f"Fit & Parameter & Value(stat)(sys) & Value(total) & Method & {last} \\\\",
        "\\midrule",
    ]
    fits = results.get("fits") or {}
    first = True
    for fit_name, fit in fits.items():
        chosen = fit.get("chosen") or {}
        params = chosen.get("params") or {}
        if not first:
            lines.append("\\midrule")
        first = False
        names = sorted(params, key=_param_sort_key)
        range_text = latex_escape(chosen_range_text(fit))
        method = latex_escape(str(chosen.get("method", "")))
        for i, pname in enumerate(names):
            entry = params[pname]
            value = _num(entry.get("value"))
            stat = _num(entry.get("stat_error", entry.get("error")))
            sys_ = _num(entry.get("sys_error", 0.0))
            total = _num(entry.get("error"))
            if pname in (chosen.get("withheld") or ()) or not math.isfinite(value):
                both = tot = "not a result" if pname in (chosen.get("withheld") or ()) else "---"
            else:
                both = _latex_number(_safe_format(value, [stat, sys_]))
                tot = _latex_number(_safe_format(value, [total]))
            cells = [latex_escape(fit_name) if i == 0 else "", latex_escape(pname), both, tot,
                     method if i == 0 else "", range_text if i == 0 else ""]
            lines.append(" & ".join(cells) + " \\\\")
    if derived and not first:
        lines.append("\\midrule")
    for i, (name, entry) in enumerate(derived.items()):
        entry = entry or {}
        value = _num(entry.get("value"))
        stat = _num(entry.get("stat_error", entry.get("error")))
        sys_ = _num(entry.get("sys_error", 0.0))
        total = _num(entry.get("error"))
        shown = ([_latex_number(_safe_format(value, [stat, sys_])),
                  _latex_number(_safe_format(value, [total]))] if math.isfinite(value)
                 else ["---", "---"])
        cells = ["derived" if i == 0 else "", latex_escape(name), *shown, "jackknife",
                 f"\\texttt{{{latex_escape(entry.get('expression', ''))}}}"]
        lines.append(" & ".join(cells) + " \\\\")
    lines += ["\\bottomrule", "\\end{tabular}"]
    return "\n".join(lines) + "\n"


def _safe_format(value: float, errors: Sequence[float]) -> str:
    """format_value_errors, tolerant of a negative error in a damaged results dict."""
    errs = [abs(e) if math.isfinite(e) else e for e in errors]
    return format_value_errors(value, errs)


# ------------------------------------------------------------------------- files

def file_stem(name: str) -> str:
    """A name made safe for a file name: runs of other characters become ``_``."""
    cleaned = re.sub(r"[^A-Za-z0-9_.-]+", "_", str(name)).strip("._")
    return cleaned or "unnamed"


def write_tables(results: Results | Mapping[str, Any],
                 out_dir: str | os.PathLike[str]) -> list[Path]:
    """Write ``scan_FIT.csv`` for every fit and ``results.tex`` into ``out_dir``.

    Each file is written atomically. ``FIT`` is the fit's name made safe for a
    file name (:func:`file_stem`); two fits whose names clash after that get
    ``-2``, ``-3``, ... appended.

    Parameters
    ----------
    results : Results or mapping
        Typed results, or the results dict (the tables are made from its layout).
    out_dir : path-like
        The run's output directory.

    Returns
    -------
    list of Path
        The files written, the CSV files first.
    """
    if isinstance(results, Results):
        results = results.to_dict()
    out = Path(out_dir)
    fits = results.get("fits") or {}
    written = [write_text(out / name, scan_table_csv(fit))
               for name, fit in zip(scan_table_names(fits), fits.values())]
    written.append(write_text(out / "results.tex", latex_results_table(results)))
    return written


def scan_table_names(fit_names: Iterable[str]) -> list[str]:
    """The file names of the scan tables of fits ``fit_names``, in order: ``scan_FIT.csv``.

    ``FIT`` is :func:`file_stem` of the name; clashes get ``-2``, ``-3``, ...
    (what :func:`write_tables` writes, so a run can check them before fitting).
    """
    names, used = [], set()
    for fit_name in fit_names:
        stem, i = file_stem(fit_name), 2
        base = stem
        while stem in used:
            stem, i = f"{base}-{i}", i + 1
        used.add(stem)
        names.append(f"scan_{stem}.csv")
    return names
