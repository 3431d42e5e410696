"""The batch summary's plots: one fit parameter of the chosen results across ensembles.

:func:`plot_across_ensembles` draws one :class:`ParameterAcrossEnsembles` (a fit's
parameter, one entry per ensemble, in the order given): the value with its total
error as a thin capped bar and its statistical error as a thick inner bar, against
a categorical axis of the ensembles' names. An ensemble whose value is withheld
(the chosen fit is not a fit) or missing is marked "not a result" at its place.
The figure is built without pyplot in the report's style
(:mod:`plateaufit.report.style`, applied through ``matplotlib.rc_context``);
:mod:`plateaufit.report.batch_summary` builds the series from results dicts and
writes the PNG files. Nothing here refits.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import matplotlib
import matplotlib.transforms as mtransforms
import numpy as np
from matplotlib.figure import Figure

from plateaufit.report.plot_helpers import figure, padded, short, text
from plateaufit.report.style import COLORS, COLUMN_WIDTH, STYLE, TRUTH_COLOR
from plateaufit.report.tables import energy_names

__all__ = ["ParameterAcrossEnsembles", "plot_across_ensembles", "unique_labels"]

#: widest figure, inches (about a page's text width)
MAX_WIDTH = 7.0
#: horizontal room per ensemble, inches
WIDTH_PER_ENSEMBLE = 0.42


@dataclass(frozen=True)
class ParameterAcrossEnsembles:
    """One parameter of one fit, the chosen result of every ensemble that has the fit.

    Attributes
    ----------
    fit, parameter : str
        The fit's name and the reported parameter (``E0``, ``E1``, a formula's name).
    labels : tuple of str
        One label per ensemble, in the batch's order (unique).
    value, stat_error, error : ndarray
        ``(n,)``: the central value, the statistical (jackknife) error and the total
        error ``sqrt(stat^2 + sys^2)``; NaN where the ensemble has no result.
    truth : ndarray
        ``(n,)``: the known truth (a spec's ``truth:``), NaN where none is given.
    """

    fit: str
    parameter: str
    labels: tuple[str, ...]
    value: np.ndarray
    stat_error: np.ndarray
    error: np.ndarray
    truth: np.ndarray

    @property
    def n_results(self) -> int:
        """Ensembles with a finite value."""
        return int(np.isfinite(self.value).sum())


def plot_across_ensembles(series: ParameterAcrossEnsembles) -> Figure:
    """One parameter of one fit against the ensembles, with total and statistical errors.

    Parameters
    ----------
    series : ParameterAcrossEnsembles
        The values to draw.

    Returns
    -------
    matplotlib.figure.Figure
        Built without pyplot; thin capped bars are the total error, thick bars the
        statistical error, dashes a known truth.
    """
    n = len(series.labels)
    x = np.arange(n, dtype=float)
    value, stat, total, truth = (np.asarray(a, dtype=float) for a in
                                 (series.value, series.stat_error, series.error, series.truth))
    ok = np.isfinite(value)
    total_ok = ok & np.isfinite(total)
    stat_ok = ok & np.isfinite(stat)
    width = min(MAX_WIDTH, max(COLUMN_WIDTH, 1.2 + WIDTH_PER_ENSEMBLE * n))
    energy = bool(energy_names([series.parameter]))
    with matplotlib.rc_context(STYLE):
        fig = figure(2.8, width)
        ax = fig.add_subplot()
        handles, names = [], []
        if total_ok.any():
            h = ax.errorbar(x[total_ok], value[total_ok], yerr=total[total_ok], fmt="o",
                            color=COLORS[0], markersize=3.5, elinewidth=0.8, capsize=2.5,
                            zorder=3)
            handles.append(h)
            names.append("total error")
        if stat_ok.any():
            h = ax.errorbar(x[stat_ok], value[stat_ok], yerr=stat[stat_ok], fmt="none",
                            ecolor=COLORS[0], elinewidth=3.2, capsize=0, alpha=0.45, zorder=2)
            handles.append(h)
            names.append("statistical error")
        if ok.any() and not total_ok.any():
            handles.append(ax.plot(x[ok], value[ok], "o", color=COLORS[0])[0])
            names.append("value (no error)")
        has_truth = np.isfinite(truth)
        if has_truth.any():
            handles.append(ax.plot(x[has_truth], truth[has_truth], "_", color=TRUTH_COLOR,
                                   markersize=12, markeredgewidth=1.0, zorder=4)[0])
            names.append("truth")
        spans = [value[total_ok] - total[total_ok], value[total_ok] + total[total_ok],
                 value[ok], truth[has_truth]]
        both = np.concatenate(spans)
        if both.size:
            ax.set_ylim(*padded(float(both.min()), float(both.max())))
        blended = mtransforms.blended_transform_factory(ax.transData, ax.transAxes)
        for xi in x[~ok]:
            ax.text(xi, 0.04, "not a result", transform=blended, rotation=90, fontsize=6,
                    color="#5b6372", ha="center", va="bottom")
        ax.set_xlim(-0.6, n - 0.4)
        ax.set_xticks(x)
        long = n > 4 or any(len(label) > 12 for label in series.labels)
        ax.set_xticklabels([text(short(label, 24)) for label in series.labels],
                           rotation=30 if long else 0, ha="right" if long else "center")
        ax.grid(False, axis="x")
        unit = " (lattice units)" if energy else ""
        ax.set_ylabel(text(f"{short(series.parameter)}{unit}"))
        ax.set_title(text(f"{short(series.fit, 24)}: {short(series.parameter)} per ensemble"))
        if handles:
            fig.legend(handles, names, loc="outside lower center", ncol=len(handles),
                       fontsize=6)
    return fig


def unique_labels(names: Sequence[str], specs: Sequence[str]) -> list[str]:
    """Labels for a categorical axis: the ensemble names, made unique.

    A name shared by several entries gets its spec's file stem in parentheses,
    and, if that is shared too, ``#2``, ``#3``, ...
    """
    counts: dict[str, int] = {}
    for name in names:
        counts[name] = counts.get(name, 0) + 1
    labels = [name if counts[name] == 1 else f"{name} ({Path(spec).stem})"
              for name, spec in zip(names, specs)]
    seen: dict[str, int] = {}
    out = []
    for label in labels:
        seen[label] = seen.get(label, 0) + 1
        out.append(label if seen[label] == 1 else f"{label} #{seen[label]}")
    return out
