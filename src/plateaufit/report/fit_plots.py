"""Plots of one fit: effective mass with the chosen E0, stability against tmin, the
model-average weights, the data's correlation matrix and its eigenvalue spectrum.

Each takes a :class:`~plateaufit.pipeline.results.FitResult` -- from a run
(``Results.fits[NAME]``, or ``Results.from_dict(json)`` of a results.json) or
from a notebook's own scan (:func:`plateaufit.pipeline.summary.summarise_scan`)
-- and returns a matplotlib Figure built without pyplot. Nothing here refits.

References
----------
.. [1] W. I. Jay and E. T. Neil, "Bayesian model averaging for analysis of
   lattice field theory results", Phys. Rev. D 103 (2021) 114502 -- the AIC
   weights shown in the stability and weight plots.
.. [2] O. Ledoit and M. Wolf, "A well-conditioned estimator for large-dimensional
   covariance matrices", J. Multivar. Anal. 88 (2004) 365 -- the shrinkage whose
   effect the eigenvalue plot shows.
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

from plateaufit.pipeline.results import FitResult
from plateaufit.report.plot_helpers import LOW_P, band, figure, padded, short, text
from plateaufit.report.style import (AVERAGE_COLOR, BAND_COLOR, COLORS, STATE_MARKERS, STYLE,
                                     TRUTH_COLOR)
from plateaufit.report.tables import energy_names, format_value_error

__all__ = ["plot_effective_mass", "plot_stability", "plot_weights", "plot_correlation",
           "plot_eigenvalues"]


def plot_effective_mass(fit: FitResult, observable: str,
                        truth: Mapping[str, float] | None = None) -> Figure:
    """Effective mass of one observable of a fit with the chosen E0 band.

    For a single chosen fit the band is its E0 over its range; for a model
    average the band of the highest-weight fit is drawn over its range and the
    averaged E0 as a second, hatched band over the whole scanned range.

    Parameters
    ----------
    fit : FitResult
        ``results.fits[NAME]`` (its ``name`` is the title).
    observable : str
        Key in ``fit.effective_mass``.
    truth : mapping, optional
        ``results.truth[NAME]``; its E0 is drawn as a dashed line.

    Returns
    -------
    matplotlib.figure.Figure
    """
    fit_name = fit.name
    em = fit.effective_mass[observable]
    t, value, error = (np.asarray(x, dtype=float) for x in (em.t, em.value, em.error))
    kind = em.kind
    chosen = fit.chosen
    e0 = chosen.params.get("E0")
    e0v, e0e = (e0.value, e0.error) if e0 is not None else (math.nan, math.nan)
    method = chosen.method
    with matplotlib.rc_context(STYLE):
        fig = figure(2.9)
        ax = fig.add_subplot()
        ok = np.isfinite(value) & np.isfinite(error)
        data = ax.errorbar(t[ok], value[ok], yerr=error[ok], fmt="o", color=COLORS[0],
                           markersize=3, elinewidth=0.8, zorder=3)
        handles = [(data, f"a m_eff ({text(kind)})")]
        lo, hi = chosen.band
        e0_text = format_value_error(e0v, e0e) if math.isfinite(e0e) else f"{e0v:.6g}"
        if method == "average":
            if lo is not None and hi is not None and math.isfinite(e0v):
                band(ax, lo, hi, e0v, e0e, color=AVERAGE_COLOR, alpha=0.8, hatch="////",
                      zorder=2)
                handles.append((Patch(facecolor="none", alpha=0.8, hatch="////",
                                      edgecolor=AVERAGE_COLOR, linewidth=0),
                                f"average E0 = {e0_text}"))
            best = fit.chosen_point()
            if best is not None and "E0" in best.params:
                b = best.params["E0"]
                band(ax, best.tmin, best.tmax, b.value, b.error, color=BAND_COLOR, alpha=0.35)
                handles.append((Patch(color=BAND_COLOR, alpha=0.45),
                                f"highest weight fit {best.label}"))
        elif lo is not None and hi is not None and math.isfinite(e0v):
            band(ax, lo, hi, e0v, e0e, color=BAND_COLOR, alpha=0.35)
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
            ax.set_ylim(*padded(lo_y, hi_y))
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
        ax.set_title(text(f"{short(fit_name)}: effective mass of {short(observable)}"))
        fig.legend([h for h, _ in handles], [lab for _, lab in handles],
                   loc="outside lower center", ncol=2, fontsize=6)
    return fig

def plot_stability(fit: FitResult, truth: Mapping[str, float] | None = None) -> Figure:
    """Fitted energies against tmin, one series per (tmax, states).

    Marker size and opacity grow with the fit's AIC weight; fits with p-value
    below 0.05 are drawn hollow, fits that did not converge as grey crosses.
    The chosen (or averaged) value is a band across the plot, the truth (when
    known) a dashed line. One panel per energy of the chosen result.

    Parameters
    ----------
    fit : FitResult
        ``results.fits[NAME]`` (its ``name`` is the title).
    truth : mapping, optional
        ``results.truth[NAME]``.

    Returns
    -------
    matplotlib.figure.Figure
    """
    fit_name = fit.name
    chosen = fit.chosen
    params = chosen.params
    # the energies; a formula model without E0, E1, ... shows its first parameter
    energies = energy_names(params) or list(params)[:1] or ["E0"]
    scan = fit.scan
    tmaxs = sorted({p.tmax for p in scan})
    states = sorted({p.states for p in scan})
    series = [(tm, st) for st in states for tm in tmaxs]
    n_series = max(len(series), 1)
    offsets = {s: (i - (n_series - 1) / 2) * min(0.6 / n_series, 0.12) for i, s in enumerate(series)}
    color_of = {tm: COLORS[i % len(COLORS)] for i, tm in enumerate(tmaxs)}
    marker_of = {st: STATE_MARKERS[i % len(STATE_MARKERS)] for i, st in enumerate(states)}
    weights = np.array([p.weight for p in scan]) if scan else np.zeros(0)
    wmax = float(np.nanmax(weights)) if weights.size and np.any(weights > 0) else 1.0
    method = chosen.method
    with matplotlib.rc_context(STYLE):
        fig = figure(1.0 + 2.0 * len(energies))
        axes = fig.subplots(len(energies), 1, sharex=True, squeeze=False)[:, 0]
        for ax, name in zip(axes, energies):
            shown_lo, shown_hi, n_hidden = [], [], 0
            c = params.get(name)
            cv, ce = (c.value, c.error) if c is not None else (math.nan, math.nan)
            # an error bar much wider than the chosen result's error would squash the plot:
            # such bars run off the axes instead of setting its range
            reach = 5.0 * ce if math.isfinite(ce) and ce > 0 else math.inf
            for p in scan:
                entry = p.params.get(name)
                if entry is None:
                    continue
                v, e = entry.value, entry.error
                if not math.isfinite(v):
                    continue
                x = p.tmin + offsets[(p.tmax, p.states)]
                if not p.converged:
                    ax.plot([x], [v], marker="x", color="#999999", markersize=3.5,
                            linestyle="none", zorder=3)
                    continue
                w = p.weight
                rel = math.sqrt(max(w, 0.0) / wmax) if math.isfinite(w) else 0.0
                color = color_of[p.tmax]
                low_p = p.p_value < LOW_P
                ax.errorbar([x], [v], yerr=[e] if math.isfinite(e) else None,
                            fmt=marker_of[p.states], color=color,
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
                lo, hi = padded(min(shown_lo), max(shown_hi))
                ax.set_ylim(lo, hi)
                for p in scan:
                    entry = p.params.get(name)
                    if entry is not None:
                        v = entry.value
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
            ax.set_ylabel(f"{text(name)} (lattice units)" if name in energy_names([name])
                          else text(name))
        axes[-1].set_xlabel("tmin (t/a)")
        axes[-1].xaxis.set_major_locator(matplotlib.ticker.MaxNLocator(integer=True))
        axes[0].set_title(text(f"{short(fit_name)}: stability against tmin"))
        handles = [Line2D([], [], color=color_of[tm], marker="o", linestyle="none",
                          markersize=3.5, label=f"tmax {tm}") for tm in tmaxs]
        handles += [Line2D([], [], color="#444444", marker=marker_of[st], linestyle="none",
                           markersize=3.5, label=f"{st} state" + ("s" if st != 1 else ""))
                    for st in states]
        handles.append(Line2D([], [], color="#444444", marker="o", markerfacecolor="none",
                              linestyle="none", markersize=3.5, label="p < 0.05"))
        if any(not p.converged for p in scan):
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

def plot_weights(fit: FitResult, top: int = 20) -> Figure:
    """The model-average weights of the fits, largest first (horizontal bars).

    Each bar is labelled by its fit range and number of states and annotated
    with the fit's p-value. At most ``top`` fits are drawn; the weight carried
    by the others is stated.

    Parameters
    ----------
    fit : FitResult
        ``results.fits[NAME]`` (its ``name`` is the title).
    top : int, default 20
        How many fits to show.

    Returns
    -------
    matplotlib.figure.Figure
    """
    fit_name = fit.name
    scan = list(fit.scan)
    w = np.array([p.weight for p in scan], dtype=float)
    w = np.where(np.isfinite(w), w, 0.0)
    order = np.argsort(-w, kind="stable")[:top]
    shown = [scan[i] for i in order]
    rest = float(w.sum() - w[order].sum())
    with matplotlib.rc_context(STYLE):
        fig = figure(0.9 + 0.15 * max(len(shown), 3))
        ax = fig.add_subplot()
        y = np.arange(len(shown))
        colors = [COLORS[0] if p.p_value >= LOW_P else COLORS[1] for p in shown]
        ax.barh(y, w[order], color=colors, height=0.7, zorder=2)
        ax.set_yticks(y, [p.label for p in shown])
        ax.invert_yaxis()
        xmax = float(w[order].max()) if len(shown) and w[order].max() > 0 else 1.0
        for yi, p, wi in zip(y, shown, w[order]):
            pv = p.p_value
            ax.text(wi + 0.01 * xmax, yi, f"p={pv:.2f}" if math.isfinite(pv) else "p=n/a",
                    va="center", ha="left", fontsize=5.5, color="#444444")
        ax.set_xlim(0, 1.18 * xmax)
        ax.grid(axis="y", visible=False)
        ax.tick_params(axis="y", labelsize=6, length=0)
        ax.set_xlabel(f"AIC weight (the {len(shown)} largest of {len(scan)} fits)")
        ax.set_ylabel("fit range [tmin, tmax], states", fontsize=7)
        ax.set_title(text(f"{short(fit_name)}: model-average weights"))
        note = f"other fits: {100 * rest:.1f}% of the weight" if len(scan) > len(shown) else ""
        if any(c == COLORS[1] for c in colors):
            note = (note + "; " if note else "") + "red: p < 0.05"
        if note:
            ax.text(0.99, 0.02, note, transform=ax.transAxes, ha="right", va="bottom",
                    fontsize=5.5, color="#555555")
    return fig

def _blocks(fit: FitResult, n: int) -> tuple[list[str], list[int]] | None:
    """Observable names and timeslices of the rows, when the layout is known."""
    cov = fit.covariance
    obs = list(fit.observables)
    tmin, tmax = (cov.tmin, cov.tmax) if cov is not None else (None, None)
    if tmin is None or tmax is None:
        best = fit.chosen_point()
        if best is None:
            return None
        tmin, tmax = best.tmin, best.tmax
    if not obs or tmin is None:
        return None
    per = int(tmax) - int(tmin) + 1
    if per <= 0 or per * len(obs) != n:
        return None
    return obs, list(range(int(tmin), int(tmax) + 1))


def plot_correlation(fit: FitResult) -> Figure:
    """The correlation matrix of the data points of a fit (after shrinkage).

    Parameters
    ----------
    fit : FitResult
        ``results.fits[NAME]`` (``covariance.correlation`` is drawn; ``name`` the title).

    Returns
    -------
    matplotlib.figure.Figure
    """
    fit_name, cov = fit.name, fit.covariance
    corr = np.atleast_2d(np.asarray(cov.correlation, dtype=float))
    n = corr.shape[0]
    lam = cov.shrinkage
    with matplotlib.rc_context(STYLE):
        fig = figure(3.2)
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
                               [text(short(name, 16)) for name in obs])
                top.tick_params(length=0, labelsize=6)
            ax.set_xlabel("t/a of each data point")
            ax.set_ylabel("t/a of each data point")
        else:
            ax.set_xlabel("data point index")
            ax.set_ylabel("data point index")
        shr = f"\nafter shrinkage, λ = {lam:.2f}" if math.isfinite(lam) else ""
        ax.set_title(text(f"{short(fit_name)}: correlation matrix{shr}"))
    return fig


def plot_eigenvalues(fit: FitResult) -> Figure:
    """Eigenvalues of the data's correlation matrix before and after shrinkage (log y).

    Parameters
    ----------
    fit : FitResult
        ``results.fits[NAME]`` (``covariance.eigenvalues`` and
        ``eigenvalues_raw``, ``condition_number``, ``condition_number_raw``).

    Returns
    -------
    matplotlib.figure.Figure

    References
    ----------
    .. [1] O. Ledoit and M. Wolf, J. Multivar. Anal. 88 (2004) 365.
    """
    fit_name, cov = fit.name, fit.covariance
    raw = np.sort(np.asarray(cov.eigenvalues_raw, dtype=float))[::-1]
    after = np.sort(np.asarray(cov.eigenvalues, dtype=float))[::-1]
    lam = cov.shrinkage
    k_raw, k_after = cov.condition_number_raw, cov.condition_number
    with matplotlib.rc_context(STYLE):
        fig = figure(2.5)
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
        ax.set_title(text(f"{short(fit_name)}: eigenvalue spectrum"))
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
