"""The summary of a batch (``plateaufit batch``): summary.csv, summary.html and plots.

A batch runs many specs (one ensemble each) into their own output folders; this
module turns what they returned (:class:`BatchItem`, one per spec, the results.json
dicts) into three kinds of files in the batch folder:

- ``summary.csv``: one row per ensemble x fit x reported parameter of the chosen
  results (:data:`COLUMNS`), numbers at full precision (``repr``);
- ``plots/FIT.PARAM.png``: each fit parameter across the ensembles
  (:mod:`plateaufit.report.batch_plots`);
- ``summary.html``: an index page in the report page's style -- the specs (status,
  the error of a failed one, time, scan points, fit-cache hits, a relative link to
  each spec's report page), the headline values and the plots.

Amplitude-like parameters (``A0.OBS``, ``Z0.OP``, ``Aosc0.OBS``, ``c.OBS``) are in
the CSV and the tables but get no plot: they depend on each ensemble's operators,
smearing and normalisation, so a line of them across ensembles compares nothing,
and they would triple the page. Energies and a formula's own parameters are drawn.

chi2/dof is the chosen result's ``chi2 / dof``: for ``method: single`` that fit's,
for ``method: average`` the highest-weight scan point's (``chosen.best``, which
results.json also records as ``chosen.chi2`` and ``chosen.dof``).

Nothing is refitted; the results dicts are only read (and checked with
:func:`plateaufit.report.validate.check_results`, so a damaged one is a
``DataError`` naming its spec and key, not a wrong number).
"""

from __future__ import annotations

import csv
import datetime as _dt
import io
import math
import os
import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any
from urllib.parse import quote

import numpy as np

from plateaufit import __version__
from plateaufit.atomic import write_bytes, write_text
from plateaufit.report.batch_plots import (ParameterAcrossEnsembles, plot_across_ensembles,
                                           unique_labels)
# the report page's stylesheet and markup helpers, so the index page looks the same
from plateaufit.report.html import _CSS, _e, _png_size, _row, _ve
from plateaufit.report.plots import figure_png
from plateaufit.report.tables import file_stem, format_value_errors, param_names
from plateaufit.report.validate import check_results
from plateaufit.run_folder import STAGING_PREFIX

__all__ = ["BatchItem", "COLUMNS", "summary_rows", "summary_csv", "render_batch_summary",
           "write_batch_summary", "PLOTS_DIR"]

#: the columns of summary.csv, in order
COLUMNS = ("ensemble", "spec", "fit", "parameter", "value", "stat_error", "sys_error", "error",
           "chi2_dof", "method", "note")
#: the batch folder's subfolder of plots (the one RunFolder treats as the plots folder)
PLOTS_DIR = "plots"
#: parameters without a plot (see the module notes)
_AMPLITUDE = re.compile(r"^(A|Z|Aosc|Zosc)\d+\.|^c\.")
_EXTRA_CSS = """
table.specs tr.failed td { background: var(--warn); }
.status-failed { color: var(--warnline); font-weight: 600; }
"""


@dataclass(frozen=True)
class BatchItem:
    """One spec of a batch: what it returned, or why it failed.

    Attributes
    ----------
    spec : str
        The spec's path as given.
    ensemble : str or None
        ``ensemble.name`` of the spec (None when the spec could not be read).
    output_dir : str or None
        Where its results went.
    results : mapping or None
        The results.json dict; None when the spec failed.
    error : str or None
        The one-line error message when it failed.
    seconds : float
        Wall time of that spec.
    from_cache, n_points : int
        Scan points taken from the fit cache, and scan points in total.
    """

    spec: str
    ensemble: str | None
    output_dir: str | None
    results: Mapping[str, Any] | None
    error: str | None
    seconds: float = 0.0
    from_cache: int = 0
    n_points: int = 0

    @property
    def ok(self) -> bool:
        """The spec ran: results, no error."""
        return self.error is None and self.results is not None

    @property
    def name(self) -> str:
        """The ensemble's name (the spec's file stem when it is unknown)."""
        if self.ensemble is not None:
            return self.ensemble
        name = ((self.results or {}).get("ensemble") or {}).get("name")
        return str(name) if name is not None else Path(self.spec).stem


def _number(x: Any) -> float | None:
    """A results-dict number as float; None for null (NaN, inf) and NaN."""
    if x is None:
        return None
    x = float(x)
    return x if math.isfinite(x) else None


def _chi2_dof(chosen: Mapping[str, Any]) -> float | None:
    chi2, dof = _number(chosen.get("chi2")), _number(chosen.get("dof"))
    return chi2 / dof if chi2 is not None and dof else None


def summary_rows(items: Sequence[BatchItem]) -> list[dict[str, Any]]:
    """One row per ensemble x fit x reported parameter of the successful items.

    Parameters
    ----------
    items : sequence of BatchItem
        The batch's specs, in order; failed ones give no rows.

    Returns
    -------
    list of dict
        Keys :data:`COLUMNS`: ``ensemble`` (the item's ensemble name), ``spec``,
        ``fit``, ``parameter`` (energies first, then the model's order), ``value``,
        ``stat_error``, ``sys_error``, ``error`` (the total, sqrt(stat^2 + sys^2), as
        results.json has it), ``chi2_dof`` (see the module notes), ``method``
        (``single`` or ``average``) and ``note``. Numbers are floats, None where
        there is none; a withheld parameter (``chosen.withheld``: the chosen fit is
        not a fit) has None in all four number fields and the note ``not a
        result: REASONS``.

    Raises
    ------
    DataError
        A results dict that is damaged (naming the spec and the key).
    """
    rows: list[dict[str, Any]] = []
    for item in items:
        if not item.ok:
            continue
        results = item.results
        check_results(results, f"{item.spec}: results")
        for fit_name, fit in (results.get("fits") or {}).items():
            chosen = fit.get("chosen") or {}
            params = chosen.get("params") or {}
            withheld = set(chosen.get("withheld") or ())
            reasons = "; ".join(str(r) for r in chosen.get("withheld_reasons") or ())
            common = {"ensemble": item.name, "spec": item.spec, "fit": str(fit_name)}
            tail = {"chi2_dof": _chi2_dof(chosen), "method": str(chosen.get("method", ""))}
            for pname in param_names({"chosen": chosen}):
                entry = params.get(pname) or {}
                numbers = {k: _number(entry.get(k))
                           for k in ("value", "stat_error", "sys_error", "error")}
                note = ""
                if pname in withheld:
                    numbers = dict.fromkeys(numbers)
                    note = "not a result" + (f": {reasons}" if reasons else "")
                elif numbers["value"] is None:
                    note = "no value"
                rows.append({**common, "parameter": pname, **numbers, **tail, "note": note})
    return rows


def _cell(x: Any) -> str:
    if x is None:
        return ""
    if isinstance(x, float):
        return repr(x)
    return str(x)


def summary_csv(rows: Sequence[Mapping[str, Any]]) -> str:
    """The rows (:func:`summary_rows`) as CSV text: a header, numbers as ``repr``."""
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow(COLUMNS)
    for row in rows:
        writer.writerow([_cell(row.get(c)) for c in COLUMNS])
    return buffer.getvalue()


# ------------------------------------------------------------------------- plots

def _plotted(parameter: str) -> bool:
    return not _AMPLITUDE.match(parameter)


def parameter_series(items: Sequence[BatchItem],
                     rows: Sequence[Mapping[str, Any]]) -> list[ParameterAcrossEnsembles]:
    """The plots' data: every (fit, parameter) with a value in at least one ensemble.

    Amplitude-like parameters are left out (see the module notes). Each series has
    one entry per successful item that has the fit, in the batch's order.
    """
    ok = [item for item in items if item.ok]
    labels = dict(zip(map(id, ok), unique_labels([i.name for i in ok], [i.spec for i in ok])))
    by_key: dict[tuple[str, str], dict[str, Mapping[str, Any]]] = {}
    for row in rows:
        by_key.setdefault((row["fit"], row["parameter"]), {})[row["spec"]] = row
    series = []
    for (fit, param), found in by_key.items():
        if not _plotted(param) or all(r["value"] is None for r in found.values()):
            continue
        having = [i for i in ok if fit in (i.results.get("fits") or {})]
        entries = [found.get(i.spec) or {} for i in having]
        truths = [_number(((i.results.get("truth") or {}).get(fit) or {}).get(param))
                  for i in having]

        def column(key: str, entries: list = entries) -> np.ndarray:
            return np.array([math.nan if e.get(key) is None else e[key] for e in entries],
                            dtype=float)

        series.append(ParameterAcrossEnsembles(
            fit=fit, parameter=param, labels=tuple(labels[id(i)] for i in having),
            value=column("value"), stat_error=column("stat_error"), error=column("error"),
            truth=np.array([math.nan if t is None else t for t in truths], dtype=float)))
    return series


def _plot_names(series: Sequence[ParameterAcrossEnsembles]) -> list[str]:
    """``plots/FIT.PARAM.png`` (made safe for file names; clashes get -2, -3, ...)."""
    used: set[str] = set()
    names = []
    for s in series:
        base = f"{file_stem(s.fit)}.{file_stem(s.parameter)}"
        stem, i = base, 2
        while stem in used:
            stem, i = f"{base}-{i}", i + 1
        used.add(stem)
        names.append(f"{PLOTS_DIR}/{stem}.png")
    return names


# ------------------------------------------------------------------------- the page

def _href(target: Path, base: Path) -> str:
    """``target`` relative to ``base``, as an escaped URL for an attribute."""
    rel = os.path.relpath(os.path.abspath(target), os.path.abspath(base))
    return _e(quote(rel.replace(os.sep, "/")))


def _results_link(item: BatchItem, base: Path) -> str:
    out = item.output_dir or ((item.results or {}).get("output") or {}).get("dir")
    if not out:
        return "—"
    for name in ("report.html", "results.json"):
        target = Path(out) / name
        if target.is_file():
            return f'<a href="{_href(target, base)}">{_e(name)}</a>'
    return "—"


def _section_specs(items: Sequence[BatchItem], base: Path) -> str:
    failed = [i for i in items if not i.ok]
    out = []
    if failed:
        lis = "".join(f"<li><code>{_e(i.spec)}</code> ({_e(i.name)}): "
                      f"{_e(i.error or 'no results')}</li>" for i in failed)
        out.append(f'<section id="failed"><h2>Failed specs ({len(failed)})</h2>'
                   f'<ul class="warnings">{lis}</ul></section>')
    out.append('<section id="specs"><h2>Specs</h2>'
               '<p class="note">In the order given. Scan points: fit ranges x state counts of '
               "all the spec's fits; from cache: those taken from the fit cache, not "
               "refitted. Results: the spec's report page (else its results.json), linked "
               "relative to this page.</p>")
    head = ["Ensemble", "Spec", "Status", "configurations", "bins", "seconds", "scan points",
            "from cache", "Results"]
    numeric = [False, False, False, True, True, True, True, True, False]
    out.append('<div class="scroll"><table class="specs">')
    out.append(_row(head, header=True, num=numeric))
    for item in items:
        ens = (item.results or {}).get("ensemble") or {}
        status = ("ok" if item.ok else
                  f'<span class="status-failed">failed</span>: {_e(item.error or "no results")}')
        cells = [_e(item.name), f"<code>{_e(item.spec)}</code>", status,
                 _e(ens.get("n_configs", "—")), _e(ens.get("n_bins", "—")),
                 _e(f"{item.seconds:.1f}"), _e(item.n_points if item.ok else "—"),
                 _e(item.from_cache if item.ok else "—"),
                 _results_link(item, base) if item.ok else "—"]
        out.append(_row(cells, classes="" if item.ok else "failed", num=numeric))
    out.append("</table></div></section>")
    return "".join(out)


def _value_cells(row: Mapping[str, Any]) -> list[str]:
    v, stat, sys_, tot = (row[k] for k in ("value", "stat_error", "sys_error", "error"))
    if v is None:
        return [_e("not a result" if row["note"].startswith("not a result") else "n/a")] * 2 \
            + ["", ""]
    both = (format_value_errors(v, [abs(stat), abs(sys_)])
            if stat is not None and sys_ is not None else "n/a")
    return [_e(_ve(v, tot)), _e(both), _e("" if stat is None else f"{stat:.2g}"),
            _e("" if sys_ is None else f"{sys_:.2g}")]


def _section_results(items: Sequence[BatchItem], rows: Sequence[Mapping[str, Any]]) -> str:
    ok = [i for i in items if i.ok]
    labels = dict(zip((i.spec for i in ok), unique_labels([i.name for i in ok],
                                                          [i.spec for i in ok])))
    out = ['<section id="results"><h2>Results</h2>',
           '<p class="note">The chosen result of every fit of every ensemble: value(error) with '
           "the error rounded to two significant digits; stat: jackknife error; sys: spread "
           "over the model average (0 for a single fit); total = sqrt(stat^2 + sys^2). "
           "chi2/dof: the chosen fit's, for an average the highest-weight fit's. Energies "
           "in lattice units. The same numbers at full precision are in summary.csv.</p>"]
    if not rows:
        out.append('<p class="note">No results: no spec of the batch ran.</p>')
    fits: dict[str, list[Mapping[str, Any]]] = {}
    for row in rows:
        fits.setdefault(row["fit"], []).append(row)
    head = ["Ensemble", "Parameter", "value(total)", "value(stat)(sys)", "stat", "sys",
            "chi2/dof", "method", "note"]
    numeric = [False, False, True, True, True, True, True, False, False]
    for fit, fit_rows in fits.items():
        out.append(f'<h3>{_e(fit)}</h3><div class="scroll"><table>')
        out.append(_row(head, header=True, num=numeric))
        for row in fit_rows:
            chi = row["chi2_dof"]
            cells = [_e(labels.get(row["spec"], row["ensemble"])), _e(row["parameter"]),
                     *_value_cells(row), _e("n/a" if chi is None else f"{chi:.3g}"),
                     _e(row["method"]), _e(row["note"].removeprefix("not a result: "))]
            out.append(_row(cells, num=numeric))
        out.append("</table></div>")
    out.append("</section>")
    return "".join(out)


def _section_plots(figures: Sequence[tuple[str, ParameterAcrossEnsembles, bytes]]) -> str:
    if not figures:
        return ""
    out = ['<section id="plots"><h2>Plots</h2>',
           '<p class="note">Each fit parameter against the ensembles: thin capped bars the '
           "total error, thick bars the statistical error; amplitudes are not drawn (they "
           "depend on each ensemble's operators and normalisation).</p>"]
    groups: dict[str, list[str]] = {}
    for name, s, png in figures:
        size = _png_size(png)
        dims = f' width="{size[0]}" height="{size[1]}"' if size else ""
        caption = f"{s.fit}: {s.parameter} per ensemble ({s.n_results} with a result)"
        groups.setdefault(s.fit, []).append(
            f'<figure><img src="{_e(quote(name))}" alt="{_e(caption)}"{dims}>'
            f"<figcaption>{_e(caption)} — file {_e(name)}</figcaption></figure>")
    for fit, figs in groups.items():
        out.append(f'<h3>Fit {_e(fit)}</h3><div class="figures">{"".join(figs)}</div>')
    out.append("</section>")
    return "".join(out)


def render_batch_summary(items: Sequence[BatchItem], base: str | os.PathLike[str],
                         figures: Sequence[tuple[str, ParameterAcrossEnsembles, bytes]] = (),
                         rows: Sequence[Mapping[str, Any]] | None = None) -> str:
    """The index page as HTML text (see :func:`write_batch_summary`).

    ``base`` is the folder the page will be read from (the links are relative to
    it); ``figures`` are ``(relative name, series, PNG bytes)``.
    """
    rows = summary_rows(items) if rows is None else rows
    n_failed = sum(not i.ok for i in items)
    stamp = _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")
    title = "plateaufit batch summary"
    sub = (f"{len(items)} spec(s), {len(items) - n_failed} ran, {n_failed} failed · page "
           f"written {_e(stamp)} by plateaufit {_e(__version__)}")
    links = [*([("failed", "Failed")] if n_failed else []), ("specs", "Specs"),
             ("results", "Results"), *([("plots", "Plots")] if figures else [])]
    nav = "".join(f'<a href="#{a}">{t}</a>' for a, t in links)
    body = (_section_specs(items, Path(base)) + _section_results(items, rows)
            + _section_plots(figures))
    return (
        "<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n"
        "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">\n"
        f"<title>{title}</title>\n<style>{_CSS}{_EXTRA_CSS}</style>\n</head>\n<body>\n"
        f"<header><h1>{title}</h1><p>{sub}</p></header>\n<nav>{nav}</nav>\n"
        f"<main>\n{body}\n<footer>Written by plateaufit {_e(__version__)} from the specs' "
        "results alone; nothing on this page was refitted.</footer>\n</main>\n</body>\n</html>\n"
    )


def write_batch_summary(folder: str | os.PathLike[str], items: Sequence[BatchItem], *,
                        plots: bool = True,
                        link_base: str | os.PathLike[str] | None = None) -> list[str]:
    """Write summary.csv, the plots and summary.html into ``folder``.

    Parameters
    ----------
    folder : path-like
        An existing folder (the caller stages it and moves it into place).
    items : sequence of BatchItem
        One per spec, in the batch's order.
    plots : bool
        Also draw ``plots/FIT.PARAM.png`` for each fit parameter (not amplitudes)
        with a value in at least one ensemble, and embed them in the page.
    link_base : path-like, optional
        The folder the page will be read from, which its links to the specs'
        results are relative to. Default: ``folder``, or its parent when
        ``folder`` is a :class:`~plateaufit.run_folder.RunFolder` staging folder
        (its name starts with ``.plateaufit-staging-``), whose files end up there.

    Returns
    -------
    list of str
        The files written, relative to ``folder``: ``summary.csv``, the plots,
        ``summary.html`` (last).

    Raises
    ------
    DataError
        A damaged results dict (naming its spec and key), before anything is written.
    OSError
        A write failed (``filename`` names the file; each file is written atomically).
    """
    folder = Path(folder)
    if link_base is None:
        link_base = folder.parent if folder.name.startswith(STAGING_PREFIX) else folder
    rows = summary_rows(items)
    written = [write_text(folder / "summary.csv", summary_csv(rows)).name]
    figures = []
    if plots:
        series = parameter_series(items, rows)
        for name, s in zip(_plot_names(series), series):
            png = figure_png(plot_across_ensembles(s))
            write_bytes(folder / name, png)
            figures.append((name, s, png))
            written.append(name)
    write_text(folder / "summary.html", render_batch_summary(items, link_base, figures, rows))
    written.append("summary.html")
    return written
