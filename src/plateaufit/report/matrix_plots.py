"""Plots of a correlator matrix: principal effective energies, eigenvectors, overlaps.

Each takes a :class:`~plateaufit.pipeline.matrix_results.MatrixResult` (and,
for the bands, the :class:`~plateaufit.pipeline.results.FitResult` of its
level fits) and returns a matplotlib Figure built without pyplot. Nothing here
refits.

References
----------
.. [1] B. Blossier, M. Della Morte, G. von Hippel, T. Mendes, R. Sommer, JHEP 04
   (2009) 094 -- principal correlators, ``t0 >= t/2``, and overlaps from the
   eigenvectors.
"""

from __future__ import annotations

import math
from collections.abc import Mapping

import matplotlib
import matplotlib.ticker
import numpy as np
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.patches import Patch

from plateaufit.pipeline.matrix_results import MatrixResult
from plateaufit.pipeline.results import FitResult
from plateaufit.report.plot_helpers import band, figure, padded, short, text
from plateaufit.report.style import COLORS, STYLE, TRUTH_COLOR
from plateaufit.report.tables import format_value_error

__all__ = ["plot_principal_energies", "plot_eigenvectors", "plot_overlap_map"]

#: points whose error exceeds this fraction of the value are not drawn (pure noise)
_NOISE = 0.25


def _t0_text(matrix: MatrixResult) -> str:
    return "t0 = ⌈t/2⌉" if matrix.t0_rule == "half" else f"t0 = {matrix.t0}"


def _color(n: int) -> str:
    return COLORS[n % len(COLORS)]


def _level_fit(matrix: MatrixResult, n: int,
               fits: Mapping[str, FitResult] | None) -> FitResult | None:
    name = matrix.levels[n] if n < len(matrix.levels) else None
    return None if name is None or fits is None else fits.get(name)


def plot_principal_energies(matrix: MatrixResult,
                            fits: Mapping[str, FitResult] | None = None,
                            truth: Mapping[str, Mapping[str, float]] | None = None) -> Figure:
    """Effective energies of every principal correlator, with each level's chosen band.

    Parameters
    ----------
    matrix : MatrixResult
        ``results.matrices[NAME]``.
    fits : mapping, optional
        ``results.fits``: the fit of each level (``matrix.levels``) gives its band,
        the chosen ``E0`` over the chosen range (the scanned span for an average).
    truth : mapping, optional
        ``results.truth``: the known ``E0`` of a level's fit is drawn dashed.

    Returns
    -------
    matplotlib.figure.Figure
    """
    with matplotlib.rc_context(STYLE):
        fig = figure(3.2)
        ax = fig.add_subplot()
        handles: list[tuple[object, str]] = []
        lows, highs, xs = [], [], []
        for n, p in enumerate(matrix.principal):
            t, v, e = (np.asarray(x, dtype=float) for x in (p.t, p.value, p.error))
            ok = np.isfinite(v) & np.isfinite(e) & (e < _NOISE * np.abs(v))
            color = _color(n)
            if ok.any():
                h = ax.errorbar(t[ok] + 0.12 * (n - 1), v[ok], yerr=e[ok], fmt="o",
                                color=color, markersize=2.5, elinewidth=0.7, zorder=3)
                handles.append((h, f"level {n}"))
                lows.append(float(np.min(v[ok] - e[ok])))
                highs.append(float(np.max(v[ok] + e[ok])))
                xs += [float(t[ok].min()), float(t[ok].max())]
            fit = _level_fit(matrix, n, fits)
            e0 = fit.chosen.params.get("E0") if fit is not None else None
            if fit is not None and e0 is not None and math.isfinite(e0.value):
                lo, hi = fit.chosen.band
                band(ax, lo, hi, e0.value, e0.error, color=color, alpha=0.3)
                handles.append((Patch(color=color, alpha=0.4),
                                f"{text(short(fit.name, 14))}: E0 = "
                                f"{format_value_error(e0.value, e0.error)}"))
                lows.append(e0.value - 3 * e0.error)
                highs.append(e0.value + 3 * e0.error)
                xs += [lo, hi]
                known = (truth or {}).get(fit.name, {}).get("E0")
                if known is not None and math.isfinite(float(known)):
                    ax.plot([lo, hi], [float(known)] * 2, color=TRUTH_COLOR, linestyle="--",
                            linewidth=0.8, zorder=2)
        if truth and any((truth.get(f or "", {}) or {}).get("E0") is not None
                         for f in matrix.levels):
            handles.append((Line2D([], [], color=TRUTH_COLOR, linestyle="--", linewidth=0.8),
                            "truth"))
        if lows and highs:
            ax.set_ylim(*padded(min(lows), max(highs)))
        if xs:
            ax.set_xlim(min(xs) - 0.7, max(xs) + 0.7)
        kind = matrix.principal[0].kind if matrix.principal else "log"
        ax.set_xlabel("t/a")
        ax.xaxis.set_major_locator(matplotlib.ticker.MaxNLocator(integer=True))
        ax.set_ylabel(f"a E_eff ({text(kind)})")
        ax.set_title(text(f"{short(matrix.name)}: levels' E_eff, {_t0_text(matrix)}"))
        if handles:
            fig.legend([h for h, _ in handles], [lab for _, lab in handles],
                       loc="outside lower center", ncol=2, fontsize=6)
    return fig


def _shown_range(matrix: MatrixResult, n: int) -> int:
    """Last timeslice worth showing for level ``n``: where its effective energy is
    still better than :data:`_NOISE` relative error (at least ``t0 + 2``)."""
    last = matrix.t0 + 2
    if n < len(matrix.principal):
        p = matrix.principal[n]
        v, e = np.asarray(p.value, dtype=float), np.asarray(p.error, dtype=float)
        good = np.flatnonzero(np.isfinite(v) & np.isfinite(e) & (e < _NOISE * np.abs(v)))
        if good.size:
            last = max(last, int(np.asarray(p.t)[good].max()) + 1)
    return min(last, int(matrix.t.size) - 1)


def plot_eigenvectors(matrix: MatrixResult) -> Figure:
    """Components of every eigenvector ``v_n(t, t0)`` against ``t``, one panel per level.

    Normalised ``v_n^T C(t0) v_n = 1``; a level whose eigenvector is stable has
    flat components after ``t0``. Each panel stops where the level's effective
    energy is lost in noise.

    Parameters
    ----------
    matrix : MatrixResult

    Returns
    -------
    matplotlib.figure.Figure
    """
    vec = np.asarray(matrix.eigenvectors, dtype=float)
    err = np.asarray(matrix.eigenvector_errors, dtype=float)
    n_t, r, n_levels = vec.shape if vec.ndim == 3 else (0, len(matrix.grid), 0)
    labels = matrix.operators or [f"O{i}" for i in range(r)]
    with matplotlib.rc_context(STYLE):
        fig = figure(1.0 + 1.05 * max(n_levels, 1))
        axes = fig.subplots(max(n_levels, 1), 1, sharex=True, squeeze=False)[:, 0]
        for n in range(n_levels):
            ax = axes[n]
            last = _shown_range(matrix, n)
            t = np.arange(min(n_t, last + 1))
            for i in range(r):
                ax.errorbar(t + 0.1 * (i - (r - 1) / 2), vec[t, i, n], yerr=err[t, i, n],
                            fmt="o-", color=_color(i), markersize=2.2, linewidth=0.6,
                            elinewidth=0.6, label=text(short(labels[i], 10)))
            ax.axvline(matrix.t0, color="#888888", linewidth=0.6, linestyle=":")
            ax.axhline(0.0, color="#bbbbbb", linewidth=0.5)
            ax.set_ylabel(f"v_{n}")
            ax.text(0.99, 0.92, f"level {n}", transform=ax.transAxes, ha="right", va="top",
                    fontsize=6.5)
        axes[-1].set_xlabel("t/a")
        axes[-1].xaxis.set_major_locator(matplotlib.ticker.MaxNLocator(integer=True))
        axes[0].set_title(text(f"{short(matrix.name)}: eigenvectors v_n(t), t0 = {matrix.t0}"))
        if n_levels:
            handles, names = axes[0].get_legend_handles_labels()
            fig.legend(handles, names, loc="outside lower center", ncol=min(r, 6), fontsize=6)
    return fig


def plot_overlap_map(matrix: MatrixResult) -> Figure:
    """Heat map of ``|Z_in| / max_m |Z_im|``: for each operator (row), how strongly it
    overlaps each level (column) relative to the level it overlaps most.

    Parameters
    ----------
    matrix : MatrixResult
        With ``overlaps`` (a matrix with at least one level fitted).

    Returns
    -------
    matplotlib.figure.Figure
    """
    ov = matrix.overlaps
    rel = np.atleast_2d(np.asarray(ov.relative, dtype=float)) if ov is not None \
        else np.zeros((0, 0))
    rel_err = np.atleast_2d(np.asarray(ov.relative_error, dtype=float)) if ov is not None \
        else np.zeros((0, 0))
    r, n_levels = rel.shape
    labels = matrix.operators or [f"O{i}" for i in range(r)]
    with matplotlib.rc_context(STYLE):
        fig = figure(0.9 + 0.45 * max(r, 2))
        ax = fig.add_subplot()
        shown = np.where(np.isfinite(rel), rel, np.nan)
        image = ax.imshow(shown, cmap="Blues", vmin=0.0, vmax=1.0, interpolation="nearest",
                          aspect="auto")
        fig.colorbar(image, ax=ax, shrink=0.9, pad=0.02, label="|Z_in| / max_m |Z_im|")
        ax.grid(False)
        for i in range(r):
            for n in range(n_levels):
                v, e = rel[i, n], rel_err[i, n]
                if not math.isfinite(v):
                    label = "not fitted"
                elif math.isfinite(e) and e > 0:
                    label = format_value_error(float(v), float(e))
                else:
                    label = f"{v:.2f}"
                ax.text(n, i, label, ha="center", va="center", fontsize=6,
                        color="white" if math.isfinite(v) and v > 0.6 else "black")
        ax.set_xticks(range(n_levels), [f"level {n}" for n in range(n_levels)])
        ax.set_yticks(range(r), [text(short(x, 12)) for x in labels])
        ax.set_xlabel("level n")
        ax.set_ylabel("operator i")
        ax.set_title(text(f"{short(matrix.name)}: overlaps, relative per operator"))
    return fig
