"""Plots of the ensemble section: autocorrelation (rho, tau_int against the window) and
the binning study. Each takes the typed summaries of
:class:`~plateaufit.pipeline.results.EnsembleResult` and returns a matplotlib
Figure built without pyplot.

References
----------
.. [1] U. Wolff, "Monte Carlo errors with less errors", Comput. Phys. Commun.
   156 (2004) 143 -- tau_int = 1/2 + sum rho and its summation window.
.. [2] H. Flyvbjerg, H. G. Petersen, J. Chem. Phys. 91 (1989) 461 -- binning.
"""

from __future__ import annotations

import math

import matplotlib
import matplotlib.ticker
import numpy as np
from matplotlib.figure import Figure

from plateaufit.pipeline.results import AutocorrelationSummary, BinningStudySummary, TauIntSummary
from plateaufit.report.plot_helpers import TAU_LABEL, figure, short, text
from plateaufit.report.style import BAND_COLOR, COLORS, STYLE
from plateaufit.report.tables import format_value_error

__all__ = ["plot_autocorrelation", "plot_binning"]


def plot_autocorrelation(observable: str, autocorrelation: AutocorrelationSummary,
                         tau: TauIntSummary | None = None) -> Figure:
    """rho(t) with the summation window, and tau_int against the window.

    Parameters
    ----------
    observable : str
        Name of the observable (title).
    autocorrelation : AutocorrelationSummary
        ``results.ensemble.autocorrelation[observable]``: ``rho``,
        ``tau_by_window``, ``window`` and ``t`` (the timeslice measured).
    tau : TauIntSummary, optional
        ``results.ensemble.tau_int[observable]`` (value, error, reliable).

    Returns
    -------
    matplotlib.figure.Figure

    References
    ----------
    .. [1] U. Wolff, Comput. Phys. Commun. 156 (2004) 143.
    """
    rho = np.asarray(autocorrelation.rho, dtype=float)
    tbw = np.asarray(autocorrelation.tau_by_window, dtype=float)
    window = autocorrelation.window
    tv, te = (tau.value, tau.error) if tau is not None else (math.nan, math.nan)
    n_show = int(min(max(rho.size, tbw.size),
                     max(4 * (window or 0) + 1, 21)))
    with matplotlib.rc_context(STYLE):
        fig = figure(4.0)
        ax1, ax2 = fig.subplots(2, 1)
        lags = np.arange(min(rho.size, n_show))
        ax1.axhline(0.0, color="#777777", linewidth=0.6)
        ax1.plot(lags, rho[:lags.size], marker="o", markersize=2.5, color=COLORS[0],
                 label="ρ(t)")
        if window is not None:
            ax1.axvline(window, color=BAND_COLOR, linestyle="--", linewidth=0.8,
                        label=f"window W = {window}")
            ax2.axvline(window, color=BAND_COLOR, linestyle="--", linewidth=0.8,
                        label=f"chosen W = {window}")
        ax1.set_xlabel("Monte Carlo lag t (configurations)")
        ax1.set_ylabel("ρ(t)")
        ax1.legend(loc="upper right")
        ws = np.arange(min(tbw.size, n_show))
        ax2.plot(ws, tbw[:ws.size], marker="o", markersize=2.5, color=COLORS[0],
                 label=r"$\tau_\mathrm{int}(W)$")
        if math.isfinite(tv):
            ax2.axhspan(tv - te, tv + te, color=BAND_COLOR, alpha=0.18, linewidth=0)
            ax2.axhline(tv, color=BAND_COLOR, linewidth=0.8,
                        label=f"τ_int = {format_value_error(tv, te) if math.isfinite(te) else tv}")
        ax2.set_xlabel("summation window W")
        ax2.set_ylabel(TAU_LABEL, fontsize=7)
        ax2.legend(loc="lower right")
        where = autocorrelation.t if autocorrelation.t is not None else (
            tau.t if tau is not None else None)
        title = (f"{short(observable)}: autocorrelation"
                 + (f" of C(t={where})" if where is not None else ""))
        ax1.set_title(text(title))
        if tau is not None and not tau.reliable:
            ax2.set_title("window not found: τ_int is a lower bound", fontsize=6.5,
                          fontweight="normal", color=BAND_COLOR)
        for ax in (ax1, ax2):
            ax.xaxis.set_major_locator(matplotlib.ticker.MaxNLocator(integer=True))
    return fig




def plot_binning(observable: str, study: BinningStudySummary,
                 tau: TauIntSummary | None = None, bin_size: int | None = None) -> Figure:
    """Error of the mean against bin size, with the naive (unbinned) error.

    When tau_int is given, the error the autocorrelation predicts for large
    bins, ``sqrt(2 tau_int)`` times the naive one, is drawn as well.

    Parameters
    ----------
    observable : str
        Name of the observable (title).
    study : BinningStudySummary
        ``results.ensemble.binning_study[observable]``: ``sizes``,
        ``errors`` (one per size, or one row per size and a column per
        timeslice), ``naive_error`` and optionally ``t``.
    tau : TauIntSummary, optional
        ``results.ensemble.tau_int[observable]``.
    bin_size : int, optional
        The bin size used in the analysis, marked with a vertical line.

    Returns
    -------
    matplotlib.figure.Figure
    """
    sizes = np.asarray(study.sizes, dtype=float)
    errors = np.asarray(study.errors, dtype=float)
    naive = np.atleast_1d(np.asarray(study.naive_error, dtype=float))
    tv = tau.value if tau is not None else math.nan
    with matplotlib.rc_context(STYLE):
        fig = figure(2.5)
        ax = fig.add_subplot()
        if errors.ndim == 2:
            ratio = errors / np.where(naive > 0, naive, np.nan)
            for k in range(ratio.shape[1]):
                ax.plot(sizes, ratio[:, k], marker="o", markersize=2, linewidth=0.7,
                        color=COLORS[k % len(COLORS)], alpha=0.8)
            ax.axhline(1.0, color="#555555", linestyle=":", linewidth=0.9, label="naive error")
            if math.isfinite(tv):
                ax.axhline(math.sqrt(2 * tv), color=BAND_COLOR, linestyle="--", linewidth=0.8,
                           label=r"$\sqrt{2\tau_\mathrm{int}}$")
            ax.set_ylabel("error / naive error")
        else:
            ax.plot(sizes, errors, marker="o", markersize=3, color=COLORS[0],
                    label="binned error")
            nv = float(naive.ravel()[0]) if naive.size else math.nan
            if math.isfinite(nv):
                ax.axhline(nv, color="#555555", linestyle=":", linewidth=0.9,
                           label="naive error (no autocorrelation)")
                if math.isfinite(tv):
                    ax.axhline(nv * math.sqrt(2 * tv), color=BAND_COLOR, linestyle="--",
                               linewidth=0.8, label=r"naive $\times\sqrt{2\tau_\mathrm{int}}$")
            ax.set_ylabel("error of the mean of C(t)")
            ax.ticklabel_format(axis="y", style="sci", scilimits=(-3, 4))
        if bin_size is not None:
            ax.axvline(bin_size, color=COLORS[2], linewidth=0.8, label=f"bin size used ({bin_size})")
        if sizes.size and np.all(sizes > 0):
            ax.set_xscale("log", base=2)
            ax.xaxis.set_major_formatter(matplotlib.ticker.FuncFormatter(
                lambda x, _pos: f"{x:g}"))
        ax.set_xlabel("bin size (configurations)")
        where = study.t if study.t is not None else (tau.t if tau is not None else None)
        ax.set_title(text(f"{short(observable)}: binning study"
                           + (f", C(t={where})" if where is not None else "")))
        fig.legend(loc="outside lower center", ncol=2, fontsize=6)
    return fig
