"""The report page's section on correlator matrices (empty when the run has none).

For each matrix: the grid, ``t0``, the condition number of ``C(t0)`` and the
largest asymmetry of the grid, then one row per level: the fit that gives its
energy, ``E0`` as value(error) (with the truth and the pull when known), the
range the result rests on, crossings and the smallest separation from a
neighbouring level inside it, and the overlaps ``Z_in`` of every operator with
jackknife errors (their normalisation stated below the table). Rendered from the
typed results; nothing is refitted and no warning is decided here.
"""

from __future__ import annotations

import html
import math
from collections.abc import Mapping
from typing import Any

from plateaufit.pipeline.matrix_results import MatrixResult
from plateaufit.pipeline.results import FitResult, Results
from plateaufit.report.tables import format_value_error

__all__ = ["render_matrices"]


def _e(x: Any) -> str:
    return html.escape("" if x is None else str(x), quote=True)


def _ve(value: float, error: float) -> str:
    if not math.isfinite(value):
        return "n/a"
    if not (math.isfinite(error) and error > 0):
        return f"{value:.6g}"
    return format_value_error(value, error)


_NUM = ' class="num"'


def _cells(cells: list[str], numeric: list[bool], tag: str = "td") -> str:
    return "<tr>" + "".join(f"<{tag}{_NUM if n else ''}>{c}</{tag}>"
                            for c, n in zip(cells, numeric)) + "</tr>"


def _grid_table(matrix: MatrixResult) -> str:
    labels = matrix.operators
    head = _cells(["sink \\ source"] + [_e(x) for x in labels], [False] * (len(labels) + 1),
                  "th")
    rows = [_cells([f"<b>{_e(labels[i])}</b>"] + [_e(x) for x in row],
                   [False] * (len(row) + 1)) for i, row in enumerate(matrix.grid)]
    return "<table>" + head + "".join(rows) + "</table>"


def _level_rows(matrix: MatrixResult, fits: Mapping[str, FitResult],
                truth: Mapping[str, Mapping[str, float]]) -> tuple[str, bool]:
    labels = matrix.operators
    has_truth = any((truth.get(f or "") or {}).get("E0") is not None for f in matrix.levels)
    head = ["Level", "fit", "E0 = E_n", *(["truth", "pull"] if has_truth else []), "t0",
            "range", "crossings in range", "smallest separation (sigma)",
            *[f"Z {_e(x)}" for x in labels]]
    numeric = [True, False, True, *([True, True] if has_truth else []), True, False, False,
               True, *[True] * len(labels)]
    out = [_cells(head, [False] * len(head), "th")]
    ov = matrix.overlaps
    for n in range(matrix.n_levels):
        name = matrix.levels[n] if n < len(matrix.levels) else None
        fit = fits.get(name) if name else None
        check = matrix.fits.get(name) if name else None
        e0 = fit.chosen.params.get("E0") if fit is not None else None
        cells = [str(n), _e(name or "not fitted"),
                 _e(_ve(e0.value, e0.error)) if e0 is not None else "—"]
        if has_truth:
            known = (truth.get(name or "") or {}).get("E0")
            if known is not None and e0 is not None and e0.error > 0:
                cells += [_e(f"{float(known):.6g}"),
                          _e(f"{(e0.value - float(known)) / e0.error:+.2f}")]
            else:
                cells += ["—", "—"]
        if check is not None:
            crossing = (f"{check.crossings} at t = {', '.join(map(str, check.crossing_t))}"
                        if check.crossing_t else "none")
            sep = check.separation_min
            cells += [str(check.t0), f"{check.tmin}..{check.tmax}", _e(crossing),
                      _e(f"{sep:.3g}" if math.isfinite(sep) else "n/a")]
        else:
            cells += ["—"] * 4
        for i in range(len(labels)):
            if ov is not None and ov.value.ndim == 2 and n < ov.value.shape[1]:
                cells.append(_e(_ve(float(ov.value[i, n]), float(ov.error[i, n]))))
            else:
                cells.append("—")
        out.append(_cells(cells, numeric))
    return "".join(out), has_truth


def _matrix_block(matrix: MatrixResult, fits: Mapping[str, FitResult],
                  truth: Mapping[str, Mapping[str, float]]) -> str:
    r = len(matrix.grid)
    rule = ("t0: half (each fit at t0 = ceil(max tmax / 2); effective energies at "
            "t0 = ceil(t/2); eigenvectors, crossings and overlaps at the reference t0 = "
            f"{matrix.t0})" if matrix.t0_rule == "half" else f"t0 = {matrix.t0}")
    a = matrix.asymmetry
    worst = max((float(a[i, j]) for i in range(a.shape[0]) for j in range(i + 1, a.shape[0])
                 if math.isfinite(float(a[i, j]))), default=math.nan) if a.ndim == 2 else math.nan
    meta = [f"{r} x {r} operators ({_e(', '.join(matrix.operators))})", _e(rule),
            f"condition number of C(t0) {matrix.condition_number:.3g}",
            f"largest asymmetry of C_ij against C_ji {worst:.2g} sigma" if math.isfinite(worst)
            else "grid measured symmetric",
            f"{matrix.n_samples} jackknife samples"]
    rows, _ = _level_rows(matrix, fits, truth)
    out = [f"<h3>{_e(matrix.name)}</h3>", f'<p class="note">{"; ".join(meta)}.</p>',
           _grid_table(matrix), '<div class="scroll"><table>', rows, "</table></div>"]
    ov = matrix.overlaps
    if ov is not None:
        at = ", ".join(f"level {n}: t = {t}" for n, t in enumerate(ov.t) if t is not None)
        out.append(f'<p class="note">Overlaps ({_e(ov.form)} time dependence; {_e(at)}): '
                   f"{_e(ov.normalisation)}. Errors: jackknife.</p>")
    out.append('<p class="note">Levels are named by descending principal correlator at '
               "t0 + 1 and followed across t by their eigenvectors (overlap in the C(t0) "
               "metric); each jackknife sample is assigned to the central levels of the same t. "
               "Crossings: (sample, t) pairs inside the range where the level is out of the "
               "central eigenvalue order. Separation: |lambda_n - lambda_m| over the jackknife "
               "error of the difference, for the neighbouring levels m.</p>")
    return "".join(out)


def render_matrices(results: Results) -> str:
    """The "Correlator matrices" section (``id="matrices"``), or '' without matrices."""
    if not results.matrices:
        return ""
    blocks = [_matrix_block(m, results.fits, results.truth)
              for m in results.matrices.values()]
    return ('<section id="matrices"><h2>Correlator matrices</h2>'
            '<p class="note">The variational method: the generalised eigenvalue problem '
            "C(t) v_n = lambda_n C(t0) v_n on the symmetrised matrix (C + C^T)/2, solved on "
            "the mean and on every jackknife sample, v^T C(t0) v = 1 (Luscher &amp; Wolff "
            "1990; Blossier et al. 2009). Each level's energy is the E0 of a fit of its "
            "principal correlator lambda_n(t, t0).</p>" + "".join(blocks) + "</section>")
