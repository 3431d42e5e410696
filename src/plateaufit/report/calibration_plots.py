"""The calibration's plots: pulls, p-values and coverages of ``plateaufit calibrate``.

Each takes the typed calibration
(:class:`~plateaufit.pipeline.calibration_results.CalibrationResults` or one
fit's :class:`~plateaufit.pipeline.calibration_results.FitCalibration`) and
draws without pyplot, in the report's style; nothing is recomputed but
histograms.

* :func:`plot_pulls` -- histogram of ``(value - truth) / error`` of each
  measured parameter over the replicas, against the unit Gaussian;
* :func:`plot_p_values` -- histogram of the chosen fits' p-values against the
  uniform distribution (the KS distance in the legend);
* :func:`plot_coverage` -- the 1 and 2 sigma coverage of every parameter with
  its binomial error bar, over the nominal value and its 2-standard-error band.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from pathlib import Path

import matplotlib
import numpy as np
from matplotlib.figure import Figure

from plateaufit.pipeline.calibration_results import (CalibrationResults, FitCalibration,
                                                     ParameterCalibration)
from plateaufit.report.plot_helpers import figure, short, text
from plateaufit.report.style import COLORS, STYLE, TRUTH_COLOR
from plateaufit.report.tables import file_stem

__all__ = ["plot_pulls", "plot_p_values", "plot_coverage", "calibration_plot_plan",
           "make_calibration_plots"]

_NOMINAL = {1: math.erf(1 / math.sqrt(2)), 2: math.erf(2 / math.sqrt(2))}
_MAX_HIST = 4   # parameters drawn in one pull histogram


def _measured(params: Mapping[str, ParameterCalibration]) -> dict[str, ParameterCalibration]:
    return {k: v for k, v in params.items() if v.n > 0}


def plot_pulls(title: str, params: Mapping[str, ParameterCalibration]) -> Figure:
    """Histogram of the pulls of each parameter (at most four) against N(0, 1)."""
    shown = {k: v for k, v in _measured(params).items() if v.pulls.size}
    names = list(shown)[:_MAX_HIST]
    with matplotlib.rc_context(STYLE):
        fig = figure(2.4)
        ax = fig.add_subplot()
        every = np.concatenate([shown[n].pulls for n in names]) if names else np.zeros(0)
        lim = float(min(max(4.0, np.nanmax(np.abs(every)) if every.size else 4.0), 12.0))
        bins = np.linspace(-lim, lim, 25)
        for i, name in enumerate(names):
            z = np.clip(shown[name].pulls, -lim, lim)
            ax.hist(z, bins=bins, density=True, histtype="step", linewidth=1.1,
                    color=COLORS[i % len(COLORS)],
                    label=text(f"{name}: rms {shown[name].pull_rms:.2f}"))
        x = np.linspace(-lim, lim, 200)
        ax.plot(x, np.exp(-0.5 * x * x) / math.sqrt(2 * math.pi), color=TRUTH_COLOR,
                linestyle="--", linewidth=0.9, label="unit Gaussian")
        ax.set_xlabel("pull (value - truth) / error")
        ax.set_ylabel("density")
        n = max((shown[k].n for k in names), default=0)
        ax.set_title(text(f"{short(title)}: pulls over {n} replicas"))
        if names:
            ax.legend(loc="upper right")
        else:
            ax.text(0.5, 0.5, "no parameter with a truth", transform=ax.transAxes,
                    ha="center", va="center", color="#666666")
    return fig


def plot_p_values(title: str, fit: FitCalibration) -> Figure:
    """Histogram of the chosen fits' p-values against the uniform distribution."""
    p = fit.p_values[np.isfinite(fit.p_values)]
    with matplotlib.rc_context(STYLE):
        fig = figure(2.2)
        ax = fig.add_subplot()
        bins = np.linspace(0.0, 1.0, 11)
        ax.hist(p, bins=bins, density=True, color=COLORS[0], alpha=0.75, zorder=2,
                label=text(f"{p.size} replicas"))
        ax.axhline(1.0, color=TRUTH_COLOR, linestyle="--", linewidth=0.9, label="uniform")
        if p.size:
            # +-2 standard errors of a bin count of a uniform distribution (binomial)
            k = p.size / (len(bins) - 1)
            half = 2 * math.sqrt(k * (1 - 1 / (len(bins) - 1))) / k
            ax.axhspan(1 - half, 1 + half, color="#cccccc", alpha=0.35, zorder=1,
                       label="uniform +- 2 s.e.")
        ax.set_xlim(0, 1)
        ax.set_xlabel("p-value of the chosen fit")
        ax.set_ylabel("density")
        ks = (f" (KS distance {fit.ks_statistic:.2f}, p = {fit.ks_p_value:.2g})"
              if math.isfinite(fit.ks_statistic) else "")
        ax.set_title(text(f"{short(title)}: p-values{ks}"), fontsize=7)
        ax.legend(loc="upper right")
    return fig


def plot_coverage(title: str, params: Mapping[str, ParameterCalibration]) -> Figure:
    """1 and 2 sigma coverage of every parameter with binomial errors, over the bands."""
    shown = _measured(params)
    names = list(shown)
    with matplotlib.rc_context(STYLE):
        fig = figure(1.2 + 0.22 * max(len(names), 2))
        ax = fig.add_subplot()
        y = np.arange(len(names))
        for level, color, offset in ((1, COLORS[0], -0.15), (2, COLORS[2], 0.15)):
            cov = np.array([getattr(shown[n], f"coverage_{level}sigma") for n in names])
            err = np.array([getattr(shown[n], f"coverage_{level}sigma_error") for n in names])
            if names:
                lo, hi = getattr(shown[names[0]], f"band_{level}sigma")
                if math.isfinite(lo) and math.isfinite(hi):
                    ax.axvspan(lo, hi, color=color, alpha=0.12, zorder=1)
            ax.axvline(_NOMINAL[level], color=color, linestyle="--", linewidth=0.8, zorder=1)
            ax.errorbar(cov, y + offset, xerr=err, fmt="o", color=color, zorder=3,
                        label=f"{level} sigma (nominal {_NOMINAL[level]:.3f})")
        ax.set_yticks(y, [text(n) for n in names])
        ax.invert_yaxis()
        ax.set_xlim(0, 1.02)
        ax.grid(axis="y", visible=False)
        ax.set_xlabel("coverage of the truth (shaded: nominal ± 2 s.e.)")
        ax.set_title(text(f"{short(title)}: coverage"))
        fig.legend(*ax.get_legend_handles_labels(), loc="outside lower center", ncols=2,
                   fontsize=6)
    return fig


def calibration_plot_plan(calibration: CalibrationResults) -> list[tuple[str, str, object]]:
    """``(key, caption, draw)`` of every calibration plot, in page order."""
    items = []
    for name, fc in calibration.fits.items():
        stem = file_stem(name)
        if _measured(fc.params):
            items.append((f"calibration.{stem}.pulls",
                          f"{name}: pulls over the replicas against the unit Gaussian",
                          lambda n=name, f=fc: plot_pulls(n, f.params)))
            items.append((f"calibration.{stem}.coverage",
                          f"{name}: 1 and 2 sigma coverage with binomial errors",
                          lambda n=name, f=fc: plot_coverage(n, f.params)))
        if fc.p_values.size:
            items.append((f"calibration.{stem}.p_values",
                          f"{name}: p-values of the chosen fits against uniform",
                          lambda n=name, f=fc: plot_p_values(n, f)))
    if _measured(calibration.derived):
        items.append(("calibration.derived.pulls", "derived quantities: pulls",
                      lambda: plot_pulls("derived", calibration.derived)))
        items.append(("calibration.derived.coverage", "derived quantities: coverage",
                      lambda: plot_coverage("derived", calibration.derived)))
    return items


def make_calibration_plots(calibration: CalibrationResults,
                           out_dir: str | Path) -> dict[str, list[Path]]:
    """Draw the calibration plots into ``OUT_DIR/plots/`` (PNG and PDF); key -> paths."""
    from plateaufit.report.plots import save_figure

    plots_dir = Path(out_dir) / "plots"
    return {key: save_figure(draw(), plots_dir / key)
            for key, _, draw in calibration_plot_plan(calibration)}
