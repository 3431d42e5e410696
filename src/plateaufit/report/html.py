"""The report page: one self-contained HTML file per run.

``report.html`` holds the data summary, the chosen results (with the truth
beside them when the results carry one), the derived quantities, every plot as an embedded PNG, the
fit-range scan tables, the warnings and the provenance. Styles are inline, the
images are base64 ``data:`` URIs, and the page uses no script and no external
resource, so it opens from disk in any browser and can be mailed as one file.
All text from the results (fit and observable names above all) is escaped.

The page is built from a results dict only; nothing is refitted.
:func:`rebuild_report` remakes tables, plots and page from a run's
results.json.

One module of about 500 lines: the page's sections share the escaping and number
helpers and one stylesheet; split per section, each file would import them all back.
"""

from __future__ import annotations

import base64
import datetime as _dt
import html
import json
import math
import os
import struct
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

from plateaufit import __version__
from plateaufit.atomic import write_text
from plateaufit.errors import DataError
from plateaufit.pipeline.results import Results, as_float
from plateaufit.report.matrix_section import render_matrices
from plateaufit.report.plots import as_results, figure_png, plot_plan
from plateaufit.report.tables import (
    chosen_range_text,
    format_value_error,
    format_value_errors,
    param_names,
    scan_table_names,
    write_tables,
)
from plateaufit.report.validate import check_results

__all__ = ["write_report", "rebuild_report", "render_report"]

_CSS = """
:root { --ink:#1d2330; --muted:#5b6372; --line:#d8dce3; --band:#f4f6f9;
        --accent:#1f4e79; --chosen:#e2f1ee; --top:#fbf0d9; --warn:#fdecea; --warnline:#b5403a; }
* { box-sizing: border-box; }
body { margin: 0; font: 15px/1.45 "DejaVu Sans", "Segoe UI", Helvetica, Arial, sans-serif;
       color: var(--ink); background: #fff; }
main { max-width: 1180px; margin: 0 auto; padding: 0 24px 48px; }
header { background: var(--accent); color: #fff; padding: 18px 24px; }
header h1 { margin: 0; font-size: 22px; font-weight: 600; }
header p { margin: 4px 0 0; opacity: .9; font-size: 13px; }
nav { position: sticky; top: 0; background: #fff; border-bottom: 1px solid var(--line);
      padding: 8px 24px; font-size: 13px; z-index: 1; }
nav a { color: var(--accent); margin-right: 16px; text-decoration: none; }
nav a:hover { text-decoration: underline; }
h2 { font-size: 19px; border-bottom: 2px solid var(--accent); padding-bottom: 4px; margin-top: 34px; }
h3 { font-size: 16px; margin: 24px 0 8px; }
p.note { color: var(--muted); font-size: 13px; margin: 4px 0 10px; }
table { border-collapse: collapse; font-size: 13px; margin: 6px 0 14px; }
th, td { border: 1px solid var(--line); padding: 3px 8px; text-align: left; vertical-align: top; }
th { background: var(--band); font-weight: 600; }
td.num, th.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
table.kv th { width: 230px; }
.scroll { overflow-x: auto; max-width: 100%; }
table.scan { font-size: 12px; }
table.scan tr.chosen td { background: var(--chosen); font-weight: 600; }
table.scan tr.top td { background: var(--top); }
table.scan tr.failed td { color: #8a8f98; }
.tag { display: inline-block; font-size: 11px; padding: 0 5px; border-radius: 3px;
       border: 1px solid var(--muted); color: var(--muted); }
.warnings { background: var(--warn); border-left: 4px solid var(--warnline); padding: 8px 14px; }
.warnings li { margin: 3px 0; }
.ok { background: var(--chosen); border-left: 4px solid #1d8a84; padding: 8px 14px; }
.figures { display: flex; flex-wrap: wrap; gap: 18px; }
figure { margin: 0; flex: 0 1 540px; min-width: 0; }
figure img { display: block; max-width: 100%; height: auto; border: 1px solid var(--line); }
figcaption { font-size: 12px; color: var(--muted); margin-top: 4px; }
code { font-size: 12px; word-break: break-all; }
details { margin: 14px 0; }
summary { cursor: pointer; font-size: 15px; margin-bottom: 4px; }
footer { color: var(--muted); font-size: 12px; margin-top: 40px; }
"""


# --------------------------------------------------------------------- text helpers

def _e(x: Any) -> str:
    """Escaped text of anything."""
    return html.escape("" if x is None else str(x), quote=True)


_num = as_float


def _fmt(x: Any, spec: str = ".4g") -> str:
    v = _num(x)
    return "n/a" if math.isnan(v) else format(v, spec)


def _ve(value: Any, error: Any) -> str:
    v, e = _num(value), _num(error)
    if math.isnan(v):
        return "n/a"
    return format_value_error(v, abs(e) if math.isfinite(e) else e)


def _row(cells: Sequence[str], *, header: bool = False, classes: str = "",
         num: Sequence[bool] | None = None) -> str:
    tag = "th" if header else "td"
    num = num or [False] * len(cells)
    num_attr = ' class="num"'
    parts = [f"<{tag}{num_attr if n else ''}>{c}</{tag}>" for c, n in zip(cells, num)]
    cls = f' class="{classes}"' if classes else ""
    return f"<tr{cls}>" + "".join(parts) + "</tr>"


def _kv_table(rows: Sequence[tuple[str, str]]) -> str:
    body = "".join(f"<tr><th>{k}</th><td>{v}</td></tr>" for k, v in rows)
    return f'<table class="kv">{body}</table>'


# --------------------------------------------------------------------- warnings

def _section_warnings(typed: Results) -> str:
    """The run's warnings table (decided by plateaufit.pipeline.warnings), rendered."""
    messages = [w.message for w in typed.warnings]
    if not messages:
        return '<section id="warnings"><h2>Warnings</h2><p class="ok">No warnings.</p></section>'
    items = "".join(f"<li>{_e(m)}</li>" for m in messages)
    return (f'<section id="warnings"><h2>Warnings ({len(messages)})</h2>'
            f'<ul class="warnings">{items}</ul></section>')


def _section_data(results: Mapping[str, Any]) -> str:
    ens = results.get("ensemble") or {}
    streams = ens.get("n_streams")
    sizes = ens.get("stream_sizes")
    stream_text = _e(streams if streams is not None else "n/a")
    if sizes:
        stream_text += f" (configurations per stream: {_e(', '.join(str(s) for s in sizes))})"
    rows = [
        ("Ensemble", _e(ens.get("name", "n/a"))),
        ("Time extent T", _e(ens.get("time_extent", "n/a"))),
        ("Configurations", _e(ens.get("n_configs", "n/a"))),
        ("Streams", stream_text),
        ("Bins", _e(ens.get("n_bins", "n/a"))),
        ("Bin size (configurations)", _e(ens.get("bin_size", "n/a"))),
        ("Configurations dropped at stream ends", _e(ens.get("n_dropped", "n/a"))),
    ]
    out = ['<section id="data"><h2>Data summary</h2>', _kv_table(rows)]
    observables = ens.get("observables") or {}
    if observables:
        out.append("<h3>Observables</h3><table>")
        out.append(_row(["Observable", "timeslices", "boundary", "folded"], header=True))
        for name, info in observables.items():
            info = info or {}
            folded = info.get("folded")
            out.append(_row([_e(name), _e(info.get("n_t", "")), _e(info.get("boundary", "")),
                             "yes" if folded else ("no" if folded is False else "")]))
        out.append("</table>")
    taus = ens.get("tau_int") or {}
    convention = ens.get("tau_int_convention") or "1/2 + sum_{t>=1} rho(t)"
    out.append("<h3>Integrated autocorrelation time</h3>")
    out.append(f'<p class="note">tau_int in the convention tau_int = {_e(convention)} '
               "(Wolff 2004): the variance of the mean is 2&nbsp;tau_int times the naive one. "
               "Measured at the timeslice t named, W is the summation window.</p>")
    if taus:
        out.append("<table>")
        out.append(_row(["Observable", "tau_int (1/2 + sum rho)", "window W", "timeslice t",
                         "window found"], header=True, num=[False, True, True, True, False]))
        for name, tau in taus.items():
            tau = tau or {}
            reliable = tau.get("reliable")
            flag = ("yes" if reliable else '<span class="tag">no: lower bound</span>'
                    if reliable is False else "n/a")
            shown = _ve(tau.get("value"), tau.get("error"))
            if not _num(tau.get("value")) >= 0:    # NaN: too few configurations
                shown, flag = "not estimable", '<span class="tag">no</span>'
            out.append(_row([_e(name), _e(shown),
                             _e(tau.get("window", "")), _e(tau.get("t", "")), flag],
                            num=[False, True, True, True, False]))
        out.append("</table>")
    else:
        out.append('<p class="note">No tau_int in the results.</p>')
    out.append("</section>")
    return "".join(out)


def _truth_cells(value: float, total: float, truth: Any) -> list[str]:
    """The truth and the pull (value - truth) / total error, as two table cells."""
    tv = _num(truth)
    pull = ((value - tv) / total if math.isfinite(tv) and math.isfinite(total) and total > 0
            else math.nan)
    return [_e(_fmt(tv, ".6g") if math.isfinite(tv) else "—"),
            _e(f"{pull:+.2f}" if math.isfinite(pull) else "—")]


def _section_results(results: Mapping[str, Any]) -> str:
    truth_all = results.get("truth") or {}
    out = ['<section id="results"><h2>Results</h2>',
           '<p class="note">value(error) with the error rounded to two significant digits; '
           "stat: jackknife error; sys: spread over the model average (0 for a single fit); "
           "total = sqrt(stat^2 + sys^2). Energies in lattice units.</p>"]
    for fit_name, fit in (results.get("fits") or {}).items():
        chosen = fit.get("chosen") or {}
        params = chosen.get("params") or {}
        truth = truth_all.get(fit_name) or {}
        has_truth = any(truth.get(p) is not None for p in params)
        method = chosen.get("method", "")
        obs = ", ".join(str(o) for o in fit.get("observables") or [])
        range_text = chosen_range_text(fit)
        meta = [f"method <b>{_e(method)}</b>",
                _e(range_text) if method == "average" else f"range {_e(range_text)}"]
        if method == "average":
            best = chosen.get("best") or chosen
            meta.append(f"highest weight: [{_e(best.get('tmin'))}, {_e(best.get('tmax'))}], "
                        f"{_e(best.get('states'))} state(s), weight {_fmt(best.get('weight'), '.3f')}")
        chi2, dof = _num(chosen.get("chi2")), _num(chosen.get("dof"))
        if math.isfinite(chi2) and math.isfinite(dof) and dof > 0:
            meta.append(f"chi2/dof = {chi2 / dof:.3g} (dof {int(dof)})")
        if math.isfinite(_num(chosen.get("p_value"))):
            meta.append(f"p = {_num(chosen.get('p_value')):.3g}")
        out.append(f"<h3>{_e(fit_name)}</h3>")
        data_text = (f"level {_e(fit.get('level'))} of matrix {_e(fit['matrix'])} (t0 = "
                     f"{_e(fit.get('t0'))}; see Correlator matrices)" if fit.get("matrix")
                     else f"observables {_e(obs)}")
        out.append(f'<p class="note">{data_text}; model {_e(fit.get("model", ""))}; '
                   + "; ".join(meta) + "</p>")
        head = ["Parameter", "value(total)", "value(stat)(sys)", "stat", "sys"]
        numeric = [False, True, True, True, True]
        if has_truth:
            head += ["truth", "(value - truth) / total"]
            numeric += [True, True]
        out.append('<div class="scroll"><table>')
        out.append(_row(head, header=True, num=numeric))
        for pname in param_names({"chosen": chosen}):
            entry = params[pname]
            v, tot = _num(entry.get("value")), _num(entry.get("error"))
            stat = _num(entry.get("stat_error", entry.get("error")))
            sys_ = _num(entry.get("sys_error", 0.0))
            both = ("n/a" if math.isnan(v) else
                    format_value_errors(v, [abs(stat) if math.isfinite(stat) else stat,
                                            abs(sys_) if math.isfinite(sys_) else sys_]))
            total = _ve(v, tot)
            if pname in (chosen.get("withheld") or ()):   # see the Warnings section
                both = total = "not a result"
            cells = [_e(pname), _e(total), _e(both), _e(_fmt(stat, ".2g")),
                     _e(_fmt(sys_, ".2g"))]
            if has_truth:
                cells += _truth_cells(v, tot, truth.get(pname))
            out.append(_row(cells, num=numeric))
        out.append("</table></div>")
    out.append("</section>")
    return "".join(out)


def _section_derived(results: Mapping[str, Any]) -> str:
    """The derived quantities (``results['derived']``); empty when there are none."""
    derived = results.get("derived") or {}
    if not derived:
        return ""
    truth = (results.get("truth") or {}).get("derived") or {}
    has_truth = any(truth.get(name) is not None for name in derived)
    out = ['<section id="derived"><h2>Derived quantities</h2>',
           '<p class="note">Functions of the chosen or averaged fit parameters. stat: jackknife '
           "error of the expression evaluated on every jackknife sample (all fits share the "
           "bins, so the correlations between fits are kept); sys: the inputs' systematic "
           "errors propagated linearly in quadrature, taken as independent; total = "
           "sqrt(stat^2 + sys^2).</p>"]
    head = ["Quantity", "expression", "value(total)", "value(stat)(sys)", "stat", "sys"]
    numeric = [False, False, True, True, True, True]
    if has_truth:
        head += ["truth", "(value - truth) / total"]
        numeric += [True, True]
    out.append('<div class="scroll"><table>')
    out.append(_row(head, header=True, num=numeric))
    for name, entry in derived.items():
        entry = entry or {}
        v, tot = _num(entry.get("value")), _num(entry.get("error"))
        stat = _num(entry.get("stat_error", entry.get("error")))
        sys_ = _num(entry.get("sys_error", 0.0))
        both = ("n/a" if math.isnan(v) else
                format_value_errors(v, [abs(stat) if math.isfinite(stat) else stat,
                                        abs(sys_) if math.isfinite(sys_) else sys_]))
        cells = [_e(name), f"<code>{_e(entry.get('expression', ''))}</code>", _e(_ve(v, tot)),
                 _e(both), _e(_fmt(stat, ".2g")), _e(_fmt(sys_, ".2g"))]
        if has_truth:
            cells += _truth_cells(v, tot, truth.get(name))
        out.append(_row(cells, num=numeric))
    out.append("</table></div></section>")
    return "".join(out)


def _png_size(data: bytes) -> tuple[int, int] | None:
    if data[:8] != b"\x89PNG\r\n\x1a\n" or data[12:16] != b"IHDR":
        return None
    return struct.unpack(">II", data[16:24])


def _section_plots(typed: Results,
                   figures: Mapping[str, Sequence[Path]] | None) -> str:
    plan = plot_plan(typed)
    out = ['<section id="plots"><h2>Plots</h2>']
    if figures is not None and not figures:
        out.append('<p class="note">No plots were drawn for this page.</p></section>')
        return "".join(out)
    groups: dict[str, list[str]] = {}
    for item in plan:
        if figures is None:
            png = figure_png(item.draw())
            files = ""
        else:
            paths = [Path(p) for p in figures.get(item.key, [])]
            pngs = [p for p in paths if p.suffix == ".png"]
            if not pngs:
                continue
            png = pngs[0].read_bytes()
            files = " — files: " + ", ".join(f"plots/{_e(p.name)}" for p in paths)
        size = _png_size(png)
        dims = f' width="{size[0]}" height="{size[1]}"' if size else ""
        uri = "data:image/png;base64," + base64.b64encode(png).decode("ascii")
        groups.setdefault(item.section, []).append(
            f'<figure><img src="{uri}" alt="{_e(item.caption)}"{dims}>'
            f"<figcaption>{_e(item.caption)}{files}</figcaption></figure>")
    for section, figs in groups.items():
        title = ("Ensemble" if section == "ensemble" else
                 f"Matrix {section[len('matrix '):]}" if section.startswith("matrix ")
                 else f"Fit {section}")
        out.append(f"<h3>{_e(title)}</h3><div class=\"figures\">{''.join(figs)}</div>")
    out.append("</section>")
    return "".join(out)


def _section_scans(results: Mapping[str, Any]) -> str:
    out = ['<section id="scan"><h2>Fit-range scans</h2>',
           '<p class="note">Every fit of each scan. <span class="tag">chosen</span> marks the '
           "chosen fit (method single), <span class=\"tag\">top weight</span> the fit with the "
           "largest AIC weight; weights follow exp(-AIC/2) with AIC = chi2 + 2k + 2 n_cut "
           "(Jay &amp; Neil 2021). The same tables are written as scan_FIT.csv.</p>"]
    for fit_name, fit in (results.get("fits") or {}).items():
        scan = fit.get("scan") or []
        chosen = fit.get("chosen") or {}
        names = param_names({"scan": scan})
        weights = [_num(p.get("weight")) for p in scan]
        finite = [w for w in weights if math.isfinite(w)]
        top = weights.index(max(finite)) if finite and max(finite) > 0 else None
        single = chosen.get("method") == "single"
        key = (chosen.get("tmin"), chosen.get("tmax"), chosen.get("states"))
        out.append(f"<details open><summary><b>{_e(fit_name)}</b>: {len(scan)} fits "
                   "(click to fold)</summary>")
        head = ["", "tmin", "tmax", "states", "chi2/dof", "dof", "p", "p (Hotelling)", "AIC",
                "weight", "converged", "refits failed"] + [_e(n) for n in names]
        numeric = [False] + [True] * 9 + [False, True] + [True] * len(names)
        out.append('<div class="scroll"><table class="scan">')
        out.append(_row(head, header=True, num=numeric))
        for i, p in enumerate(scan):
            is_chosen = single and (p.get("tmin"), p.get("tmax"), p.get("states")) == key
            tags, classes = [], []
            if is_chosen:
                tags.append('<span class="tag">chosen</span>')
                classes.append("chosen")
            if i == top and not is_chosen:
                tags.append('<span class="tag">top weight</span>')
                classes.append("top")
            if p.get("converged") is False:
                classes.append("failed")
            chi2, dof = _num(p.get("chi2")), _num(p.get("dof"))
            params = p.get("params") or {}
            cells = [" ".join(tags), _e(p.get("tmin")), _e(p.get("tmax")), _e(p.get("states")),
                     _e(f"{chi2 / dof:.3g}" if math.isfinite(chi2) and dof > 0 else "n/a"),
                     _e(p.get("dof", "")), _e(_fmt(p.get("p_value"), ".3g")),
                     _e(_fmt(p.get("p_value_hotelling"), ".3g")), _e(_fmt(p.get("aic"), ".5g")),
                     _e(_fmt(p.get("weight"), ".3g")),
                     "yes" if p.get("converged", True) else "no",
                     _e(p.get("n_refit_failed", ""))]
            for n in names:
                entry = params.get(n)
                cells.append(_e(_ve(entry.get("value"), entry.get("error"))) if entry else "")
            out.append(_row(cells, classes=" ".join(classes), num=numeric))
        out.append("</table></div></details>")
    out.append("</section>")
    return "".join(out)


def _section_provenance(results: Mapping[str, Any]) -> str:
    prov = results.get("provenance") or {}
    rows = [("plateaufit version", _e(prov.get("version", results.get("version", "n/a"))))]
    if prov.get("spec"):
        rows.append(("Spec file", f"<code>{_e(prov['spec'])}</code>"))
    rows.append(("Spec sha256", f"<code>{_e(prov.get('spec_sha256', 'n/a'))}</code>"))
    data = prov.get("data_sha256") or {}
    if data:
        inner = "".join(f"<tr><td>{_e(k)}</td><td><code>{_e(v)}</code></td></tr>"
                        for k, v in data.items())
        rows.append(("Data sha256", f"<table>{inner}</table>"))
    else:
        rows.append(("Data sha256", "n/a"))
    seeds = prov.get("seeds")
    if isinstance(seeds, Mapping) and seeds:
        rows.append(("Seeds", _e(", ".join(f"{k} = {v}" for k, v in seeds.items()))))
    else:
        rows.append(("Seeds", "none recorded (the analysis draws no random numbers)"
                     if isinstance(seeds, Mapping) else _e(seeds if seeds is not None else "n/a")))
    rows.append(("Created", _e(prov.get("created", "n/a"))))
    known = {"version", "spec", "spec_sha256", "data_sha256", "seeds", "created"}
    for key, value in prov.items():
        if key not in known:
            rows.append((_e(key), _e(json.dumps(value) if isinstance(value, (dict, list))
                                     else value)))
    return '<section id="provenance"><h2>Provenance</h2>' + _kv_table(rows) + "</section>"


# --------------------------------------------------------------------- the page

def render_report(results: Results | Mapping[str, Any],
                  figures: Mapping[str, Sequence[Path]] | None = None,
                  calibration: Any = None) -> str:
    """The report page as HTML text (see :func:`write_report`)."""
    typed = results if isinstance(results, Results) else None
    results = typed.to_dict() if typed is not None else results
    check_results(results, "results")
    typed = typed if typed is not None else as_results(results)
    ens = results.get("ensemble") or {}
    prov = results.get("provenance") or {}
    title = f"plateaufit report: {ens.get('name', 'ensemble')}"
    stamp = _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")
    sub = (f"ensemble {_e(ens.get('name', 'n/a'))} · {len(results.get('fits') or {})} fit(s) · "
           f"results created {_e(prov.get('created', 'n/a'))} · page written {_e(stamp)} by "
           f"plateaufit {_e(__version__)}")
    derived = _section_derived(results)
    matrices = render_matrices(typed)
    calibrated = ""
    if calibration is not None:      # plateaufit calibrate: its section after the results
        from plateaufit.report.calibration_section import render_calibration_section

        calibrated = render_calibration_section(calibration, figures)
    links = [("warnings", "Warnings"), ("data", "Data"), ("results", "Results"),
             *([("derived", "Derived")] if derived else []),
             *([("matrices", "Matrices")] if matrices else []),
             *([("calibration", "Calibration")] if calibrated else []), ("plots", "Plots"),
             ("scan", "Scans"), ("provenance", "Provenance")]
    nav = "".join(f'<a href="#{a}">{t}</a>' for a, t in links)
    body = "".join([
        _section_warnings(typed), _section_data(results), _section_results(results),
        derived, matrices, calibrated, _section_plots(typed, figures), _section_scans(results),
        _section_provenance(results),
    ])
    return (
        "<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n"
        "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">\n"
        f"<title>{_e(title)}</title>\n<style>{_CSS}</style>\n</head>\n<body>\n"
        f"<header><h1>{_e(title)}</h1><p>{sub}</p></header>\n<nav>{nav}</nav>\n"
        f"<main>\n{body}\n<footer>Written by plateaufit {_e(__version__)} from the results "
        "dict alone; nothing on this page was refitted.</footer>\n</main>\n</body>\n</html>\n"
    )


def write_report(results: Results | Mapping[str, Any], out_dir: str | os.PathLike[str], *,
                 figures: Mapping[str, Sequence[Path]] | None = None,
                 calibration: Any = None) -> Path:
    """Write the self-contained report page ``OUT_DIR/report.html``.

    Parameters
    ----------
    results : Results or mapping
        Typed results, or a results dict (the layout of results.json).
    out_dir : path-like
        The run's output directory.
    figures : mapping, optional
        What :func:`~plateaufit.report.plots.make_all_plots` returned: the page
        then embeds those PNG files instead of drawing every plot again. An
        empty mapping gives a page without plots. By default the plots are
        drawn afresh (in memory) from ``results``.
    calibration : CalibrationResults, optional
        ``plateaufit calibrate``'s results: the page gets a calibration section
        (:mod:`plateaufit.report.calibration_section`).

    Returns
    -------
    Path
        The page.

    Raises
    ------
    DataError
        If ``results`` lacks a key the page needs (the message names it).
    """
    page = render_report(results, figures, calibration)
    return write_text(Path(out_dir) / "report.html", page)


def rebuild_report(out_dir: str | os.PathLike[str]) -> Path:
    """Remake tables, plots and the page of a finished run from its results.json.

    A calibration.json beside it (``plateaufit calibrate``) adds the calibration section.

    Reads ``OUT_DIR/results.json`` and writes the scan CSV files and
    results.tex, the plots in ``OUT_DIR/plots/`` and ``OUT_DIR/report.html``,
    without refitting. The files are written into a staging folder and moved
    into place together (:mod:`plateaufit.run_folder`); results.json and run.log
    are left as they are, plots of the earlier page that are not drawn again
    are removed.

    Parameters
    ----------
    out_dir : path-like
        A run's output directory.

    Returns
    -------
    Path
        The page.

    Raises
    ------
    DataError
        Naming results.json when it is missing, not a regular file, not JSON,
        or has a key missing or unusable (the message names the key path), or
        naming the file that could not be written.
    """
    from plateaufit.report.plots import save_figure
    from plateaufit.report.reading import CONVERSION_ERRORS, damaged, read_results, trail_of
    from plateaufit.run_folder import RunFolder

    out = Path(out_dir)
    results, typed = read_results(out)
    path = out / "results.json"
    calibration = _read_calibration(out)
    folder = RunFolder(out, key=str(out), inputs=[path])
    # before drawing anything: nothing in the way of the files it writes
    folder.check_outputs([*scan_table_names(results.get("fits") or {}), "results.tex",
                          "report.html"], plots=True)
    keep = ("results.json", "run.log") + (("calibration.json",) if calibration is not None
                                          else ())
    with folder.writing(completion=None, keep=keep) as staging:
        with damaged(path, trail_of(results)):
            write_tables(results, staging)
            figures: dict[str, list[Path]] = {}
            for item in plot_plan(typed):
                try:
                    figures[item.key] = save_figure(item.draw(), staging / "plots" / item.key)
                except CONVERSION_ERRORS as exc:   # a value the plot cannot use: damaged
                    raise DataError(str(path), f"cannot draw the plot {item.key} ({item.caption})"
                                    f" from it: {type(exc).__name__}: {exc}; the file is damaged "
                                    "or from another layout: rerun `plateaufit fit SPEC`") from None
            if calibration is not None:
                from plateaufit.report.calibration_plots import make_calibration_plots

                figures.update(make_calibration_plots(calibration, staging))
            write_report(results, staging, figures=figures, calibration=calibration)
    return out / "report.html"


def _read_calibration(out: Path) -> Any:
    """``OUT/calibration.json`` (written by ``plateaufit calibrate``) typed, or None."""
    path = out / "calibration.json"
    if not path.is_file():
        return None
    from plateaufit.pipeline.calibration_results import CalibrationResults

    try:
        return CalibrationResults.from_dict(json.loads(path.read_text(encoding="utf-8")))
    except (UnicodeDecodeError, json.JSONDecodeError, TypeError, ValueError, AttributeError):
        raise DataError(str(path), "is not a calibration file plateaufit wrote; rerun "
                        "`plateaufit calibrate SPEC` or remove it") from None
