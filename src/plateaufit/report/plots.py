"""Plots of a results dict: effective masses, stability, weights, autocorrelation,
binning, correlation matrices and eigenvalue spectra.

Every ``plot_*`` function takes the relevant part of the results dict (the
layout of results.json, see DEVELOPERS.md) and returns a
:class:`matplotlib.figure.Figure` built without pyplot, so no global figure
state is created and nothing needs closing; the figure is garbage once the
caller drops it. The style (:mod:`plateaufit.report.style`) is applied through
``matplotlib.rc_context`` and never changes the caller's settings. Nothing here
refits: every number drawn is read from the results.

References
----------
.. [1] U. Wolff, "Monte Carlo errors with less errors", Comput. Phys. Commun.
   156 (2004) 143 -- tau_int = 1/2 + sum rho and its summation window.
.. [2] W. I. Jay and E. T. Neil, "Bayesian model averaging for analysis of
   lattice field theory results", Phys. Rev. D 103 (2021) 114502 -- the AIC
   weights shown in the stability and weight plots.
.. [3] O. Ledoit and M. Wolf, "A well-conditioned estimator for large-dimensional
   covariance matrices", J. Multivar. Anal. 88 (2004) 365 -- the shrinkage whose
   effect the eigenvalue plot shows.
"""

from __future__ import annotations

import io
import math
from collections.abc import Callable, Iterator, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import matplotlib
import matplotlib.ticker
import numpy as np
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.patches import Patch

from plateaufit import __version__
from plateaufit.atomic import write_bytes
from plateaufit.report.style import (
    AVERAGE_COLOR,
    BAND_COLOR,
    COLORS,
    COLUMN_WIDTH,
    PNG_DPI,
    STATE_MARKERS,
    STYLE,
    TRUTH_COLOR,
)
from plateaufit.report.tables import energy_names, file_stem, format_value_error

__all__ = [
    "PlotItem",
    "plot_effective_mass",
    "plot_stability",
    "plot_weights",
    "plot_autocorrelation",
    "plot_binning",
    "plot_correlation",
    "plot_eigenvalues",
    "plot_plan",
    "figure_png",
    "save_figure",
    "make_all_plots",
]

TAU_LABEL = r"$\tau_\mathrm{int}$ ($1/2 + \sum\rho$ convention)"
_LOW_P = 0.05
_LAYOUT = "constrained"


# --------------------------------------------------------------------- small helpers

def _text(s: Any) -> str:
    """Plain text for matplotlib: a '$' in a user's name must not start mathtext."""
    return str(s).replace("$", r"\$")


def _short(name: Any, limit: int = 18) -> str:
    """A name shortened for a title (the page and captions carry it in full)."""
    name = str(name)
    return name if len(name) <= limit else name[:limit - 1] + "…"


def _arr(x: Any) -> np.ndarray:
    """A results-dict list (None for NaN) as a float array."""
    if x is None:
        return np.array([], dtype=float)
    return np.array(x, dtype=float)   # None -> nan


def _num(x: Any) -> float:
    return math.nan if x is None else float(x)


def _figure(height: float, width: float = COLUMN_WIDTH) -> Figure:
    return Figure(figsize=(width, height), layout=_LAYOUT)


def _chosen_best(fit: Mapping[str, Any]) -> dict[str, Any] | None:
    """The scan point behind the chosen result: the chosen one, or the top-weighted."""
    chosen = fit.get("chosen") or {}
    scan = fit.get("scan") or []
    if not scan:
        return None
    ref = chosen.get("best") or chosen
    key = (ref.get("tmin"), ref.get("tmax"), ref.get("states"))
    for point in scan:
        if (point.get("tmin"), point.get("tmax"), point.get("states")) == key:
            return point
    weights = [_num(p.get("weight")) for p in scan]
    if all(math.isnan(w) for w in weights):
        return None
    return scan[int(np.nanargmax(weights))]


def _range_label(point: Mapping[str, Any]) -> str:
    states = int(point.get("states", 1))
    return f"[{point.get('tmin')}, {point.get('tmax')}], {states} state" + ("s" if states != 1 else "")


def _band(ax: Any, lo: float, hi: float, value: float, error: float, *, color: str,
          label: str | None = None, alpha: float = 0.22, hatch: str | None = None,
          zorder: float = 1) -> None:
    """A horizontal value +- error band over lo..hi with the central line."""
    if not (math.isfinite(value) and math.isfinite(error)):
        return
    # a hatched band is hatch only, so a filled band beneath it stays visible
    ax.fill_between([lo, hi], value - error, value + error,
                    facecolor="none" if hatch else color, alpha=alpha,
                    edgecolor=color if hatch else "none", linewidth=0, label=label,
                    hatch=hatch, zorder=zorder)
    ax.plot([lo, hi], [value, value], color=color, linewidth=0.9, zorder=zorder + 0.5)


def _padded(lo: float, hi: float, frac: float = 0.08) -> tuple[float, float]:
    span = hi - lo
    if not math.isfinite(span) or span <= 0:
        span = abs(hi) * 0.1 or 1.0
    return lo - frac * span, hi + frac * span


# --------------------------------------------------------------------- effective mass

def plot_effective_mass(fit_name: str, fit: Mapping[str, Any], observable: str,
                        truth: Mapping[str, float] | None = None) -> Figure:
    """Effective mass of one observable of a fit with the chosen E0 band.

    For a single chosen fit the band is its E0 over its range; for a model
    average the band of the highest-weight fit is drawn over its range and the
    averaged E0 as a second, hatched band over the whole scanned range.

    Parameters
    ----------
    fit_name : str
        Name of the fit (title).
    fit : mapping
        ``results['fits'][fit_name]``.
    observable : str
        Key in ``fit['effective_mass']``.
    truth : mapping, optional
        ``results['truth'][fit_name]``; its E0 is drawn as a dashed line.

    Returns
    -------
    matplotlib.figure.Figure
    """
    em = fit["effective_mass"][observable]
    t, value, error = _arr(em.get("t")), _arr(em.get("value")), _arr(em.get("error"))
    kind = em.get("kind", "log")
    chosen = fit.get("chosen") or {}
    e0 = (chosen.get("params") or {}).get("E0") or {}
    e0v, e0e = _num(e0.get("value")), _num(e0.get("error"))
    method = chosen.get("method", "single")
    with matplotlib.rc_context(STYLE):
        fig = _figure(2.9)
        ax = fig.add_subplot()
        ok = np.isfinite(value) & np.isfinite(error)
        data = ax.errorbar(t[ok], value[ok], yerr=error[ok], fmt="o", color=COLORS[0],
                           markersize=3, elinewidth=0.8, zorder=3)
        handles = [(data, f"a m_eff ({_text(kind)})")]
        band = chosen.get("band") or {}
        lo, hi = band.get("tmin", chosen.get("tmin")), band.get("tmax", chosen.get("tmax"))
        e0_text = format_value_error(e0v, e0e) if math.isfinite(e0e) else f"{e0v:.6g}"
        if method == "average":
            if lo is not None and hi is not None and math.isfinite(e0v):
                _band(ax, lo, hi, e0v, e0e, color=AVERAGE_COLOR, alpha=0.8, hatch="////",
                      zorder=2)
                handles.append((Patch(facecolor="none", alpha=0.8, hatch="////",
                                      edgecolor=AVERAGE_COLOR, linewidth=0),
                                f"average E0 = {e0_text}"))
            best = _chosen_best(fit)
            if best is not None and "E0" in (best.get("params") or {}):
                b = best["params"]["E0"]
                _band(ax, best["tmin"], best["tmax"], _num(b["value"]), _num(b["error"]),
                      color=BAND_COLOR, alpha=0.35)
                handles.append((Patch(color=BAND_COLOR, alpha=0.45),
                                f"highest weight fit {_range_label(best)}"))
        elif lo is not None and hi is not None and math.isfinite(e0v):
            _band(ax, lo, hi, e0v, e0e, color=BAND_COLOR, alpha=0.35)
            handles.append((Patch(color=BAND_COLOR, alpha=0.45),
                            f"E0 = {e0_text}, [{lo}, {hi}]"))
        if truth and truth.get("E0") is not None:
            line = ax.axhline(float(truth["E0"]), color=TRUTH_COLOR, linestyle="--",
                              linewidth=0.8, zorder=2)
            handles.append((line, "truth E0"))
        # y range: around E0, with the points that are precise enough to be seen
        if math.isfinite(e0v):
            scale = max(10 * e0e if math.isfinite(e0e) else 0.0, 0.08 * abs(e0v), 1e-12)
            close = ok & (error < scale)
            lows = [e0v - 3 * (e0e if math.isfinite(e0e) else 0)]
            highs = [e0v + 3 * (e0e if math.isfinite(e0e) else 0)]
            if close.any():
                lows.append(float(np.min(value[close] - error[close])))
                highs.append(float(np.max(value[close] + error[close])))
            lo_y, hi_y = min(lows), max(highs)
            lo_y, hi_y = max(lo_y, e0v - 0.5 * abs(e0v)), min(hi_y, e0v + 0.5 * abs(e0v))
            ax.set_ylim(*_padded(lo_y, hi_y))
        # x range: the timeslices whose point is inside the y range, and the bands
        y_lo, y_hi = ax.get_ylim()
        visible = ok & (value >= y_lo) & (value <= y_hi)
        xs = [float(x) for x in t[visible]] + [float(x) for x in (lo, hi) if x is not None]
        if xs:
            ax.set_xlim(min(xs) - 0.5, max(xs) + 0.5)
        n_hidden = int((ok & ~visible).sum())
        if n_hidden:
            ax.text(0.01, 0.02, f"{n_hidden} point(s) outside the range shown",
                    transform=ax.transAxes, fontsize=6, color="#555555", ha="left", va="bottom")
        ax.set_xlabel("t/a")
        ax.xaxis.set_major_locator(matplotlib.ticker.MaxNLocator(integer=True))
        ax.set_ylabel("a m_eff")
        ax.set_title(_text(f"{_short(fit_name)}: effective mass of {_short(observable)}"))
        fig.legend([h for h, _ in handles], [lab for _, lab in handles],
                   loc="outside lower center", ncol=2, fontsize=6)
    return fig


# --------------------------------------------------------------------- stability

def plot_stability(fit_name: str, fit: Mapping[str, Any],
                   truth: Mapping[str, float] | None = None) -> Figure:
    """Fitted energies against tmin, one series per (tmax, states).

    Marker size and opacity grow with the fit's AIC weight; fits with p-value
    below 0.05 are drawn hollow, fits that did not converge as grey crosses.
    The chosen (or averaged) value is a band across the plot, the truth (when
    known) a dashed line. One panel per energy of the chosen result.

    Parameters
    ----------
    fit_name : str
        Name of the fit (title).
    fit : mapping
        ``results['fits'][fit_name]``.
    truth : mapping, optional
        ``results['truth'][fit_name]``.

    Returns
    -------
    matplotlib.figure.Figure
    """
    chosen = fit.get("chosen") or {}
    params = chosen.get("params") or {}
    # the energies; a formula model without E0, E1, ... shows its first parameter
    energies = energy_names(params) or list(params)[:1] or ["E0"]
    scan = fit.get("scan") or []
    tmaxs = sorted({int(p["tmax"]) for p in scan})
    states = sorted({int(p["states"]) for p in scan})
    series = [(tm, st) for st in states for tm in tmaxs]
    n_series = max(len(series), 1)
    offsets = {s: (i - (n_series - 1) / 2) * min(0.6 / n_series, 0.12) for i, s in enumerate(series)}
    color_of = {tm: COLORS[i % len(COLORS)] for i, tm in enumerate(tmaxs)}
    marker_of = {st: STATE_MARKERS[i % len(STATE_MARKERS)] for i, st in enumerate(states)}
    weights = np.array([_num(p.get("weight")) for p in scan]) if scan else np.zeros(0)
    wmax = float(np.nanmax(weights)) if weights.size and np.any(weights > 0) else 1.0
    method = chosen.get("method", "single")
    with matplotlib.rc_context(STYLE):
        fig = _figure(1.0 + 2.0 * len(energies))
        axes = fig.subplots(len(energies), 1, sharex=True, squeeze=False)[:, 0]
        for ax, name in zip(axes, energies):
            shown_lo, shown_hi, n_hidden = [], [], 0
            c = params.get(name) or {}
            cv, ce = _num(c.get("value")), _num(c.get("error"))
            # an error bar much wider than the chosen result's error would squash the plot:
            # such bars run off the axes instead of setting its range
            reach = 5.0 * ce if math.isfinite(ce) and ce > 0 else math.inf
            for p in scan:
                entry = (p.get("params") or {}).get(name)
                if entry is None:
                    continue
                v, e = _num(entry.get("value")), _num(entry.get("error"))
                if not math.isfinite(v):
                    continue
                x = int(p["tmin"]) + offsets[(int(p["tmax"]), int(p["states"]))]
                if not p.get("converged", True):
                    ax.plot([x], [v], marker="x", color="#999999", markersize=3.5,
                            linestyle="none", zorder=3)
                    continue
                w = _num(p.get("weight"))
                rel = math.sqrt(max(w, 0.0) / wmax) if math.isfinite(w) else 0.0
                color = color_of[int(p["tmax"])]
                low_p = _num(p.get("p_value")) < _LOW_P
                ax.errorbar([x], [v], yerr=[e] if math.isfinite(e) else None,
                            fmt=marker_of[int(p["states"])], color=color,
                            markersize=2.2 + 3.8 * rel, alpha=0.3 + 0.7 * rel,
                            markerfacecolor="none" if low_p else color,
                            markeredgewidth=0.7, elinewidth=0.6, capsize=0, zorder=3 + rel)
                if (not low_p) or rel > 1e-3:
                    bar = min(e, reach) if math.isfinite(e) else 0.0
                    shown_lo.append(v - bar)
                    shown_hi.append(v + bar)
                elif not math.isfinite(cv) or abs(v - cv) <= 4.0 * reach:
                    # a poor fit near the result shows how the plateau is approached
                    shown_lo.append(v)
                    shown_hi.append(v)
            label = "average" if method == "average" else "chosen"
            if math.isfinite(cv):
                ax.axhspan(cv - ce, cv + ce, color=AVERAGE_COLOR if method == "average"
                           else BAND_COLOR, alpha=0.18, linewidth=0, zorder=1)
                ax.axhline(cv, color=AVERAGE_COLOR if method == "average" else BAND_COLOR,
                           linewidth=0.8, zorder=2)
                shown_lo.append(cv - 2 * ce)
                shown_hi.append(cv + 2 * ce)
            if truth and truth.get(name) is not None:
                ax.axhline(float(truth[name]), color=TRUTH_COLOR, linestyle="--", linewidth=0.8,
                           zorder=2)
                shown_lo.append(float(truth[name]))
                shown_hi.append(float(truth[name]))
            if shown_lo:
                lo, hi = _padded(min(shown_lo), max(shown_hi))
                ax.set_ylim(lo, hi)
                for p in scan:
                    entry = (p.get("params") or {}).get(name)
                    if entry is not None:
                        v = _num(entry.get("value"))
                        if math.isfinite(v) and not lo <= v <= hi:
                            n_hidden += 1
                if n_hidden:
                    ax.text(0.01, 0.02, f"{n_hidden} fit(s) outside the range shown",
                            transform=ax.transAxes, fontsize=6, color="#555555",
                            va="bottom", ha="left")
            if math.isfinite(cv):
                ax.text(0.99, 0.97, f"{label} {name} = {format_value_error(cv, ce) if math.isfinite(ce) else cv}",
                        transform=ax.transAxes, ha="right", va="top", fontsize=6.5,
                        bbox={"facecolor": "white", "edgecolor": "none", "alpha": 0.8, "pad": 1})
            ax.set_ylabel(f"{_text(name)} (lattice units)" if name in energy_names([name])
                          else _text(name))
        axes[-1].set_xlabel("tmin (t/a)")
        axes[-1].xaxis.set_major_locator(matplotlib.ticker.MaxNLocator(integer=True))
        axes[0].set_title(_text(f"{_short(fit_name)}: stability against tmin"))
        handles = [Line2D([], [], color=color_of[tm], marker="o", linestyle="none",
                          markersize=3.5, label=f"tmax {tm}") for tm in tmaxs]
        handles += [Line2D([], [], color="#444444", marker=marker_of[st], linestyle="none",
                           markersize=3.5, label=f"{st} state" + ("s" if st != 1 else ""))
                    for st in states]
        handles.append(Line2D([], [], color="#444444", marker="o", markerfacecolor="none",
                              linestyle="none", markersize=3.5, label="p < 0.05"))
        if any(not p.get("converged", True) for p in scan):
            handles.append(Line2D([], [], color="#999999", marker="x", linestyle="none",
                                  markersize=3.5, label="not converged"))
        handles.append(Patch(color=AVERAGE_COLOR if method == "average" else BAND_COLOR,
                             alpha=0.3, label=f"{'average' if method == 'average' else 'chosen'}"
                                              " ± total error"))
        if truth and any(truth.get(n) is not None for n in energies):
            handles.append(Line2D([], [], color=TRUTH_COLOR, linestyle="--", label="truth"))
        handles.append(Line2D([], [], linestyle="none", label="size, opacity: AIC weight"))
        fig.legend(handles=handles, loc="outside lower center", ncol=3, fontsize=6)
    return fig


# --------------------------------------------------------------------- weights

def plot_weights(fit_name: str, fit: Mapping[str, Any], top: int = 20) -> Figure:
    """The model-average weights of the fits, largest first (horizontal bars).

    Each bar is labelled by its fit range and number of states and annotated
    with the fit's p-value. At most ``top`` fits are drawn; the weight carried
    by the others is stated.

    Parameters
    ----------
    fit_name : str
        Name of the fit (title).
    fit : mapping
        ``results['fits'][fit_name]``.
    top : int, default 20
        How many fits to show.

    Returns
    -------
    matplotlib.figure.Figure
    """
    scan = list(fit.get("scan") or [])
    w = np.array([_num(p.get("weight")) for p in scan])
    w = np.where(np.isfinite(w), w, 0.0)
    order = np.argsort(-w, kind="stable")[:top]
    shown = [scan[i] for i in order]
    rest = float(w.sum() - w[order].sum())
    with matplotlib.rc_context(STYLE):
        fig = _figure(0.9 + 0.15 * max(len(shown), 3))
        ax = fig.add_subplot()
        y = np.arange(len(shown))
        colors = [COLORS[0] if _num(p.get("p_value")) >= _LOW_P else COLORS[1] for p in shown]
        ax.barh(y, w[order], color=colors, height=0.7, zorder=2)
        ax.set_yticks(y, [_range_label(p) for p in shown])
        ax.invert_yaxis()
        xmax = float(w[order].max()) if len(shown) and w[order].max() > 0 else 1.0
        for yi, p, wi in zip(y, shown, w[order]):
            pv = _num(p.get("p_value"))
            ax.text(wi + 0.01 * xmax, yi, f"p={pv:.2f}" if math.isfinite(pv) else "p=n/a",
                    va="center", ha="left", fontsize=5.5, color="#444444")
        ax.set_xlim(0, 1.18 * xmax)
        ax.grid(axis="y", visible=False)
        ax.tick_params(axis="y", labelsize=6, length=0)
        ax.set_xlabel(f"AIC weight (the {len(shown)} largest of {len(scan)} fits)")
        ax.set_ylabel("fit range [tmin, tmax], states", fontsize=7)
        ax.set_title(_text(f"{_short(fit_name)}: model-average weights"))
        note = f"other fits: {100 * rest:.1f}% of the weight" if len(scan) > len(shown) else ""
        if any(c == COLORS[1] for c in colors):
            note = (note + "; " if note else "") + "red: p < 0.05"
        if note:
            ax.text(0.99, 0.02, note, transform=ax.transAxes, ha="right", va="bottom",
                    fontsize=5.5, color="#555555")
    return fig


# --------------------------------------------------------------------- autocorrelation

def plot_autocorrelation(observable: str, autocorrelation: Mapping[str, Any],
                         tau: Mapping[str, Any] | None = None) -> Figure:
    """rho(t) with the summation window, and tau_int against the window.

    Parameters
    ----------
    observable : str
        Name of the observable (title).
    autocorrelation : mapping
        ``results['ensemble']['autocorrelation'][observable]``: ``rho``,
        ``tau_by_window``, ``window`` and ``t`` (the timeslice measured).
    tau : mapping, optional
        ``results['ensemble']['tau_int'][observable]`` (value, error, reliable).

    Returns
    -------
    matplotlib.figure.Figure

    References
    ----------
    .. [1] U. Wolff, Comput. Phys. Commun. 156 (2004) 143.
    """
    rho = _arr(autocorrelation.get("rho"))
    tbw = _arr(autocorrelation.get("tau_by_window"))
    window = autocorrelation.get("window")
    window = int(window) if window is not None else None
    tau = tau or {}
    tv, te = _num(tau.get("value")), _num(tau.get("error"))
    n_show = int(min(max(rho.size, tbw.size),
                     max(4 * (window or 0) + 1, 21)))
    with matplotlib.rc_context(STYLE):
        fig = _figure(4.0)
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
        where = autocorrelation.get("t", tau.get("t"))
        title = (f"{_short(observable)}: autocorrelation"
                 + (f" of C(t={where})" if where is not None else ""))
        ax1.set_title(_text(title))
        if tau.get("reliable") is False:
            ax2.set_title("window not found: τ_int is a lower bound", fontsize=6.5,
                          fontweight="normal", color=BAND_COLOR)
        for ax in (ax1, ax2):
            ax.xaxis.set_major_locator(matplotlib.ticker.MaxNLocator(integer=True))
    return fig


# --------------------------------------------------------------------- binning

def plot_binning(observable: str, study: Mapping[str, Any],
                 tau: Mapping[str, Any] | None = None, bin_size: int | None = None) -> Figure:
    """Error of the mean against bin size, with the naive (unbinned) error.

    When tau_int is given, the error the autocorrelation predicts for large
    bins, ``sqrt(2 tau_int)`` times the naive one, is drawn as well.

    Parameters
    ----------
    observable : str
        Name of the observable (title).
    study : mapping
        ``results['ensemble']['binning_study'][observable]``: ``sizes``,
        ``errors`` (one per size, or one row per size and a column per
        timeslice), ``naive_error`` and optionally ``t``.
    tau : mapping, optional
        ``results['ensemble']['tau_int'][observable]``.
    bin_size : int, optional
        The bin size used in the analysis, marked with a vertical line.

    Returns
    -------
    matplotlib.figure.Figure
    """
    sizes = _arr(study.get("sizes"))
    errors = _arr(study.get("errors"))
    naive = _arr(study.get("naive_error"))
    tau = tau or {}
    tv = _num(tau.get("value"))
    with matplotlib.rc_context(STYLE):
        fig = _figure(2.5)
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
        where = study.get("t", tau.get("t"))
        ax.set_title(_text(f"{_short(observable)}: binning study"
                           + (f", C(t={where})" if where is not None else "")))
        fig.legend(loc="outside lower center", ncol=2, fontsize=6)
    return fig


# --------------------------------------------------------------------- covariance

def _blocks(fit: Mapping[str, Any], n: int) -> tuple[list[str], list[int]] | None:
    """Observable names and timeslices of the rows, when the layout is known."""
    cov = fit.get("covariance") or {}
    obs = list(fit.get("observables") or [])
    tmin, tmax = cov.get("tmin"), cov.get("tmax")
    if tmin is None or tmax is None:
        best = _chosen_best(fit)
        if best is None:
            return None
        tmin, tmax = best.get("tmin"), best.get("tmax")
    if not obs or tmin is None:
        return None
    per = int(tmax) - int(tmin) + 1
    if per <= 0 or per * len(obs) != n:
        return None
    return obs, list(range(int(tmin), int(tmax) + 1))


def plot_correlation(fit_name: str, fit: Mapping[str, Any]) -> Figure:
    """The correlation matrix of the data points of a fit (after shrinkage).

    Parameters
    ----------
    fit_name : str
        Name of the fit (title).
    fit : mapping
        ``results['fits'][fit_name]`` (``covariance.correlation`` is drawn).

    Returns
    -------
    matplotlib.figure.Figure
    """
    cov = fit.get("covariance") or {}
    corr = _arr(cov.get("correlation"))
    if corr.ndim != 2:
        corr = np.atleast_2d(corr)
    n = corr.shape[0]
    lam = _num(cov.get("shrinkage"))
    with matplotlib.rc_context(STYLE):
        fig = _figure(3.2)
        ax = fig.add_subplot()
        image = ax.imshow(corr, cmap="RdBu_r", vmin=-1, vmax=1, interpolation="nearest")
        fig.colorbar(image, ax=ax, shrink=0.8, label="correlation", pad=0.02)
        ax.grid(False)
        layout = _blocks(fit, n)
        if layout is not None:
            obs, ts = layout
            per = len(ts)
            step = max(1, math.ceil(per / 6))
            ticks = [b * per + i for b in range(len(obs)) for i in range(0, per, step)]
            labels = [str(ts[i % per]) for i in ticks]
            ax.set_xticks(ticks, labels)
            ax.set_yticks(ticks, labels)
            for b in range(1, len(obs)):
                ax.axhline(b * per - 0.5, color="black", linewidth=0.8)
                ax.axvline(b * per - 0.5, color="black", linewidth=0.8)
            if len(obs) > 1:
                top = ax.secondary_xaxis("top")
                top.set_xticks([b * per + per / 2 - 0.5 for b in range(len(obs))],
                               [_text(_short(name, 16)) for name in obs])
                top.tick_params(length=0, labelsize=6)
            ax.set_xlabel("t/a of each data point")
            ax.set_ylabel("t/a of each data point")
        else:
            ax.set_xlabel("data point index")
            ax.set_ylabel("data point index")
        shr = f"\nafter shrinkage, λ = {lam:.2f}" if math.isfinite(lam) else ""
        ax.set_title(_text(f"{_short(fit_name)}: correlation matrix{shr}"))
    return fig


def plot_eigenvalues(fit_name: str, fit: Mapping[str, Any]) -> Figure:
    """Eigenvalues of the data's correlation matrix before and after shrinkage (log y).

    Parameters
    ----------
    fit_name : str
        Name of the fit (title).
    fit : mapping
        ``results['fits'][fit_name]`` (``covariance.eigenvalues`` and
        ``eigenvalues_raw``, ``condition_number``, ``condition_number_raw``).

    Returns
    -------
    matplotlib.figure.Figure

    References
    ----------
    .. [1] O. Ledoit and M. Wolf, J. Multivar. Anal. 88 (2004) 365.
    """
    cov = fit.get("covariance") or {}
    raw = np.sort(_arr(cov.get("eigenvalues_raw")))[::-1]
    after = np.sort(_arr(cov.get("eigenvalues")))[::-1]
    lam = _num(cov.get("shrinkage"))
    k_raw, k_after = _num(cov.get("condition_number_raw")), _num(cov.get("condition_number"))
    with matplotlib.rc_context(STYLE):
        fig = _figure(2.5)
        ax = fig.add_subplot()
        hidden = 0
        for values, label, style in (
                (raw, "before shrinkage", {"marker": "o", "markerfacecolor": "none",
                                           "color": COLORS[0]}),
                (after, "after shrinkage", {"marker": "s", "color": COLORS[1]})):
            if values.size == 0:
                continue
            idx = np.arange(1, values.size + 1)
            pos = np.isfinite(values) & (values > 0)
            hidden += int((~pos).sum())
            if label.startswith("after") and math.isfinite(lam):
                label += f", λ = {lam:.2f}"
            ax.plot(idx[pos], values[pos], linestyle="-", linewidth=0.7, markersize=3,
                    label=label, **style)
        ax.set_yscale("log")
        ax.set_xlabel("eigenvalue index")
        ax.set_ylabel("eigenvalue of the correlation matrix")
        ax.set_title(_text(f"{_short(fit_name)}: eigenvalue spectrum"))
        kappa = None
        if math.isfinite(k_raw) or math.isfinite(k_after):
            kappa = f"covariance condition number\n{k_raw:.3g} before, {k_after:.3g} after"
        legend = ax.legend(loc="upper right", fontsize=6, title=kappa, title_fontsize=6,
                           alignment="left")
        legend.get_title().set_color("#555555")
        if hidden:
            ax.text(0.02, 0.03, f"{hidden} eigenvalue(s) ≤ 0 not shown", transform=ax.transAxes,
                    fontsize=6, color="#555555", ha="left", va="bottom")
    return fig


# --------------------------------------------------------------------- output

def figure_png(fig: Figure, dpi: int = PNG_DPI) -> bytes:
    """The figure as PNG bytes (in memory)."""
    buffer = io.BytesIO()
    with matplotlib.rc_context(STYLE):
        fig.savefig(buffer, format="png", dpi=dpi, metadata={"Software": f"plateaufit {__version__}"})
    return buffer.getvalue()


def save_figure(fig: Figure, stem: str | Path, dpi: int = PNG_DPI) -> list[Path]:
    """Write the figure as ``STEM.png`` and ``STEM.pdf``, each atomically.

    Parameters
    ----------
    fig : matplotlib.figure.Figure
        The figure.
    stem : str or Path
        Path without suffix; ``.png`` and ``.pdf`` are appended (so a stem may
        contain dots).
    dpi : int
        Resolution of the PNG.

    Returns
    -------
    list of Path
        ``[png, pdf]``.
    """
    stem = Path(stem)
    png = stem.with_name(stem.name + ".png")
    pdf = stem.with_name(stem.name + ".pdf")
    write_bytes(png, figure_png(fig, dpi))
    # The PNG draw has laid the figure out; keep those positions for the PDF
    # rather than running the layout engine a second time.
    if fig.get_layout_engine() is not None:
        fig.set_layout_engine("none")
    buffer = io.BytesIO()
    with matplotlib.rc_context(STYLE):
        fig.savefig(buffer, format="pdf", metadata={"Creator": f"plateaufit {__version__}"})
    write_bytes(pdf, buffer.getvalue())
    return [png, pdf]


@dataclass(frozen=True)
class PlotItem:
    """One plot of the report: where it belongs and how to draw it.

    Attributes
    ----------
    key : str
        Unique file stem (safe for file names), e.g. ``pion.effmass.pion_ll``.
    section : str
        ``"ensemble"`` or the fit's name.
    caption : str
        One line saying what the plot shows.
    draw : callable
        Builds the :class:`~matplotlib.figure.Figure`.
    """

    key: str
    section: str
    caption: str
    draw: Callable[[], Figure]


def plot_plan(results: Mapping[str, Any]) -> list[PlotItem]:
    """Every plot the results support, in report order (ensemble first, then fits).

    Parts missing from the results (an ensemble without a binning study, a fit
    without a covariance summary) are skipped, not errors.
    """
    items: list[PlotItem] = []
    used: set[str] = set()

    def key(*parts: str) -> str:
        base = ".".join(file_stem(p) for p in parts)
        k, i = base, 2
        while k in used:
            k, i = f"{base}-{i}", i + 1
        used.add(k)
        return k

    ens = results.get("ensemble") or {}
    taus = ens.get("tau_int") or {}
    for name, ac in (ens.get("autocorrelation") or {}).items():
        if ac and ac.get("rho") is not None:
            items.append(PlotItem(
                key("autocorr", name), "ensemble",
                f"{name}: normalised autocorrelation function and tau_int against the "
                "summation window (tau_int = 1/2 + sum rho convention)",
                lambda n=name, a=ac: plot_autocorrelation(n, a, taus.get(n))))
    for name, study in (ens.get("binning_study") or {}).items():
        if study and study.get("sizes") is not None:
            items.append(PlotItem(
                key("binning", name), "ensemble",
                f"{name}: error of the mean against bin size",
                lambda n=name, s=study: plot_binning(n, s, taus.get(n), ens.get("bin_size"))))
    truth_all = results.get("truth") or {}
    for fit_name, fit in (results.get("fits") or {}).items():
        truth = truth_all.get(fit_name)
        for obs in (fit.get("effective_mass") or {}):
            items.append(PlotItem(
                key(fit_name, "effmass", obs), fit_name,
                f"{fit_name}: effective mass of {obs} with the chosen E0",
                lambda f=fit_name, d=fit, o=obs, tr=truth: plot_effective_mass(f, d, o, tr)))
        if fit.get("scan"):
            items.append(PlotItem(
                key(fit_name, "stability"), fit_name,
                f"{fit_name}: fitted energies against tmin for every tmax and number of states",
                lambda f=fit_name, d=fit, tr=truth: plot_stability(f, d, tr)))
            if (fit.get("chosen") or {}).get("method") == "average" and len(fit["scan"]) > 1:
                items.append(PlotItem(
                    key(fit_name, "weights"), fit_name,
                    f"{fit_name}: AIC weights of the fits in the model average",
                    lambda f=fit_name, d=fit: plot_weights(f, d)))
        cov = fit.get("covariance") or {}
        if cov.get("correlation") is not None:
            items.append(PlotItem(
                key(fit_name, "correlation"), fit_name,
                f"{fit_name}: correlation matrix of the fitted data points",
                lambda f=fit_name, d=fit: plot_correlation(f, d)))
        if cov.get("eigenvalues") is not None or cov.get("eigenvalues_raw") is not None:
            items.append(PlotItem(
                key(fit_name, "eigenvalues"), fit_name,
                f"{fit_name}: correlation-matrix eigenvalues before and after shrinkage",
                lambda f=fit_name, d=fit: plot_eigenvalues(f, d)))
    return items


def iter_figures(results: Mapping[str, Any]) -> Iterator[tuple[PlotItem, Figure]]:
    """Draw the plan's plots one at a time (each figure can be dropped after use)."""
    for item in plot_plan(results):
        yield item, item.draw()


def make_all_plots(results: Mapping[str, Any], out_dir: str | Path) -> dict[str, list[Path]]:
    """Draw every plot of the results into ``OUT_DIR/plots/`` as PNG and PDF.

    Parameters
    ----------
    results : mapping
        The results dict.
    out_dir : str or Path
        The run's output directory; the files go to its ``plots/`` subdirectory.

    Returns
    -------
    dict
        Plot key (the file stem, see :class:`PlotItem`) -> ``[png, pdf]`` paths,
        in report order.
    """
    plots_dir = Path(out_dir) / "plots"
    written: dict[str, list[Path]] = {}
    for item, fig in iter_figures(results):
        written[item.key] = save_figure(fig, plots_dir / item.key)
    return written
