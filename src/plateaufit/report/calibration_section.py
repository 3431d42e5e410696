"""The report page's calibration section (``plateaufit calibrate``): tables and plots.

Rendered from the typed calibration
(:class:`~plateaufit.pipeline.calibration_results.CalibrationResults`) alone:
the replicas' count and seed, the calibration's warnings (decided by
:mod:`plateaufit.pipeline.calibration_summary`), a coverage table per fit and
for the derived quantities, how often each scan point was chosen, the
variants tried on the same replicas, and the plots of
:mod:`plateaufit.report.calibration_plots`.
"""

from __future__ import annotations

import base64
import math
from collections.abc import Mapping, Sequence
from pathlib import Path

from plateaufit.pipeline.calibration_results import CalibrationResults, ParameterCalibration
from plateaufit.report.calibration_plots import calibration_plot_plan

__all__ = ["render_calibration_section"]


def _cov(pc: ParameterCalibration, level: int) -> str:
    c = getattr(pc, f"coverage_{level}sigma")
    e = getattr(pc, f"coverage_{level}sigma_error")
    lo, hi = getattr(pc, f"band_{level}sigma")
    if not math.isfinite(c):
        return "n/a"
    inside = lo <= c <= hi
    text = f"{c:.3f} ± {e:.3f}"
    return text if inside else f'<span class="tag">outside</span> {text}'


def _f(x: float, spec: str = ".2f") -> str:
    return format(x, spec) if math.isfinite(x) else "n/a"


def _param_rows(helpers, params: Mapping[str, ParameterCalibration]) -> list[str]:
    _e, _row = helpers
    rows = []
    for name, pc in params.items():
        rows.append(_row([
            _e(name), _e(_f(pc.truth, ".6g")), str(pc.n), _cov(pc, 1),
            _e(f"{_f(pc.band_1sigma[0], '.3f')}–{_f(pc.band_1sigma[1], '.3f')}"), _cov(pc, 2),
            _e(f"{_f(pc.band_2sigma[0], '.3f')}–{_f(pc.band_2sigma[1], '.3f')}"),
            _e(f"{_f(pc.bias_over_error, '+.2f')} ± {_f(pc.bias_over_error_error)}"),
            _e(_f(pc.pull_rms)), _e(_f(pc.scatter_over_error))],
            num=[False] + [True] * 9))
    return rows


_HEAD = ["quantity", "truth", "replicas", "coverage 1σ", "band 1σ", "coverage 2σ", "band 2σ",
         "bias / error", "pull rms", "scatter / error"]


def _figures(calibration: CalibrationResults, figures: Mapping[str, Sequence[Path]] | None,
             png_of, e) -> str:
    out = []
    for key, caption, draw in calibration_plot_plan(calibration):
        if figures is None:
            png = png_of(draw())
        else:
            pngs = [Path(p) for p in figures.get(key, []) if Path(p).suffix == ".png"]
            if not pngs:
                continue
            png = pngs[0].read_bytes()
        uri = "data:image/png;base64," + base64.b64encode(png).decode("ascii")
        out.append(f'<figure><img src="{uri}" alt="{e(caption)}">'
                   f"<figcaption>{e(caption)}</figcaption></figure>")
    return f'<div class="figures">{"".join(out)}</div>' if out else ""


def render_calibration_section(calibration: CalibrationResults,
                               figures: Mapping[str, Sequence[Path]] | None = None) -> str:
    """The calibration section of the report page (HTML text)."""
    from plateaufit.report.html import _e, _row
    from plateaufit.report.plots import figure_png

    cal = calibration
    noise = cal.noise_model or {}
    out = ['<section id="calibration"><h2>Calibration: are the errors honest?</h2>',
           f'<p class="note">{cal.n_replicas} synthetic replicas of the ensemble (seed '
           f"{_e(cal.seed)}; noise model {_e(noise.get('method', 'n/a'))}: the measured "
           "covariance across timeslices and observables, the streams and the Monte Carlo "
           f"autocorrelation, largest tau_int {_e(_f(float(noise.get('tau_max', math.nan))))} "
           "in the 1/2 + sum rho convention), each analysed with this spec; their truth is "
           f"the {'--truth file' if cal.truth.get('source') == 'file' else 'fitted result'}. "
           "Honest Gaussian errors cover the truth in 68.3% (1σ) and 95.4% (2σ) of the "
           "replicas; the bands are ±2 binomial standard errors around those values."
           + (f" {cal.n_failed} replica(s) failed and are left out." if cal.n_failed else "")
           + "</p>"]
    if cal.warnings:
        items = "".join(f"<li>{_e(w)}</li>" for w in cal.warnings)
        out.append(f'<ul class="warnings">{items}</ul>')
    else:
        out.append('<p class="ok">Every coverage lies inside its binomial band.</p>')
    for name, fc in cal.fits.items():
        out.append(f"<h3>{_e(name)}</h3>")
        out.append('<div class="scroll"><table>')
        out.append(_row(_HEAD, header=True, num=[False] + [True] * 9))
        out.extend(_param_rows((_e, _row), fc.params))
        out.append("</table></div>")
        if fc.unmeasured:
            out.append('<p class="note">Not measured: ' + "; ".join(
                f"{_e(k)} ({_e(v)})" for k, v in fc.unmeasured.items()) + "</p>")
        if math.isfinite(fc.ks_statistic):
            out.append(f'<p class="note">p-values of the chosen fits: Kolmogorov–Smirnov '
                       f"distance to uniform {fc.ks_statistic:.3f} (KS p = {fc.ks_p_value:.3g})."
                       "</p>")
        if fc.chosen_points:
            cells = ", ".join(f"[{c.tmin}, {c.tmax}] {c.states} state(s): {100 * c.fraction:.0f}%"
                              for c in fc.chosen_points[:8])
            more = f" and {len(fc.chosen_points) - 8} more" if len(fc.chosen_points) > 8 else ""
            out.append(f'<p class="note">Highest-weight scan point over the replicas: '
                       f"{_e(cells)}{more}.</p>")
    if cal.derived:
        out.append("<h3>Derived quantities</h3>")
        out.append('<div class="scroll"><table>')
        out.append(_row(_HEAD, header=True, num=[False] + [True] * 9))
        out.extend(_param_rows((_e, _row), cal.derived))
        out.append("</table></div>")
    if cal.variants:
        out.append("<h3>The same replicas with one change</h3><table>")
        out.append(_row(["change", "quantity", "coverage 1σ", "coverage 2σ", "scatter / error",
                         "restores"], header=True, num=[False, False, True, True, True, False]))
        for v in cal.variants:
            groups = [(f, fc.params) for f, fc in v.fits.items()] + [("derived", v.derived)]
            for group, params in groups:
                for pname, pc in params.items():
                    out.append(_row([_e(v.description), _e(f"{group}: {pname}"), _cov(pc, 1),
                                     _cov(pc, 2), _e(_f(pc.scatter_over_error)),
                                     "yes" if v.restores else "no"],
                                    num=[False, False, True, True, True, False]))
        out.append("</table>")
    out.append(_figures(cal, figures, figure_png, _e))
    out.append("</section>")
    return "".join(out)
