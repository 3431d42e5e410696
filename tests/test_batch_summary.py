"""The batch summary (summary.csv, summary.html, the plots across ensembles).

Built from real runs: three invented ensembles, ``kestrel-a09``, ``kestrel-a12`` and
``kestrel-a15`` (T = 16, two streams of 120 and 100 configurations, AR(1) noise in
Monte Carlo time), each generated from a known truth with a fixed seed and run
through ``run_spec`` (serial, no plots, no cache), plus one spec that fails (its
data file, named with ``<b>`` in it, does not exist). Per ensemble:

* ``pion``: two states (E0 = 0.21, 0.27, 0.33; E1 = E0 + 0.5), averaged over
  tmin 2..4, tmax 8 and 1 or 2 states;
* ``eta``: one state (E0 = 0.55, 0.61, 0.68), fitted with two states over [1, 8]: the
  second is not resolved, so E1 and A1.eta are withheld (``chosen.withheld``); in
  kestrel-a12 the fit is bounded to E0 >= 0.69, so the whole chosen fit is not a fit
  and all its parameters are withheld.

Only kestrel-a09 gets a report page (the report writer, without plots), so both
link targets (report.html, else results.json) occur.
"""

from __future__ import annotations

import csv
import html
import io
import math
import re
from html.parser import HTMLParser
from pathlib import Path
from urllib.parse import unquote, urlparse

import matplotlib.image
import numpy as np
import pytest
import yaml

from plateaufit.errors import DataError, PlateaufitError
from plateaufit.pipeline.run import run_spec
from plateaufit.report.batch_plots import unique_labels
from plateaufit.report.batch_summary import (COLUMNS, BatchItem, parameter_series,
                                             summary_rows, write_batch_summary)
from plateaufit.report.html import write_report
from plateaufit.run_folder import RunFolder

T = 16
STREAMS = (120, 100)
PHI = 0.3
#: ensemble -> (pion E0, eta E0); pion E1 = E0 + 0.5
ENSEMBLES = {"kestrel-a09": (0.21, 0.55), "kestrel-a12": (0.27, 0.61),
             "kestrel-a15": (0.33, 0.68)}
BROKEN_FILE = "pion <b>missing</b>.npy"
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"   # the PNG specification (ISO/IEC 15948), section 5.2


def _correlator(rng: np.random.Generator, states: list[tuple[float, float]]) -> np.ndarray:
    """(sum STREAMS, T) periodic correlator with multiplicative AR(1) noise."""
    t = np.arange(T)
    exact = sum(a * (np.exp(-e * t) + np.exp(-e * (T - t))) for e, a in states)
    z = rng.standard_normal((sum(STREAMS), T))
    x = np.empty_like(z)
    start = 0
    for n in STREAMS:
        x[start] = z[start]
        for i in range(start + 1, start + n):
            x[i] = PHI * x[i - 1] + math.sqrt(1 - PHI * PHI) * z[i]
        start += n
    return exact * (1.0 + 0.01 * np.exp(0.05 * t) * x)


def _spec(name: str, e_pion: float, e_eta: float) -> dict:
    eta = {"name": "eta", "observables": ["eta"], "model": "cosh", "states": 2, "tmin": 1,
           "tmax": 8, "priors": {"E1": [1.4, 0.5]}}
    if name == "kestrel-a12":   # pinned at a bound: not a fit
        eta = {"name": "eta", "observables": ["eta"], "model": "cosh", "states": 1, "tmin": 1,
               "tmax": 8, "bounds": {"E0": [e_eta + 0.08, 1.5]}}
    return {
        "ensemble": {"name": name, "time_extent": T, "streams": list(STREAMS)},
        "observables": {"pion": {"file": "pion.npy"}, "eta": {"file": "eta.npy"}},
        "fits": [{"name": "pion", "observables": ["pion"], "model": "cosh", "states": [1, 2],
                  "tmin": [2, 4], "tmax": 8, "priors": {"E1": [e_pion + 0.5, 0.3]}}, eta],
        "output": {"dir": "out", "plots": False},
        "truth": {"pion": {"E0": e_pion, "E1": e_pion + 0.5}, "eta": {"E0": e_eta}},
    }


def _item(spec_path: Path, **extra) -> BatchItem:
    """What `plateaufit batch` records for one spec: run it, or keep its error."""
    try:
        results = run_spec(spec_path, plots=False, jobs=1, progress=False, cache=False)
    except PlateaufitError as err:
        return BatchItem(spec=str(spec_path), ensemble=extra.get("ensemble"), output_dir=None,
                         results=None, error=str(err), seconds=0.1)
    return BatchItem(spec=str(spec_path), ensemble=results["ensemble"]["name"],
                     output_dir=results["output"]["dir"], results=results, error=None,
                     **extra)


@pytest.fixture(scope="module")
def items(tmp_path_factory) -> list[BatchItem]:
    """The three ensembles' items, with the failed one second."""
    root = tmp_path_factory.mktemp("kestrel")
    out = []
    for k, (name, (e_pion, e_eta)) in enumerate(ENSEMBLES.items()):
        directory = root / name
        directory.mkdir()
        rng = np.random.default_rng(16_0100 + k)
        np.save(directory / "pion.npy", _correlator(rng, [(e_pion, 1.2), (e_pion + 0.5, 0.6)]))
        np.save(directory / "eta.npy", _correlator(rng, [(e_eta, 0.9)]))
        path = directory / "spec.yaml"
        path.write_text(yaml.safe_dump(_spec(name, e_pion, e_eta)), encoding="utf-8")
        out.append(_item(path, seconds=1.25 + k, from_cache=k, n_points=7))
    broken = root / "kestrel-a18"
    broken.mkdir()
    spec = _spec("kestrel-a18", 0.4, 0.7)
    spec["observables"] = {"pion": {"file": BROKEN_FILE}}
    spec["fits"] = spec["fits"][:1]
    spec["truth"] = {"pion": spec["truth"]["pion"]}
    (broken / "spec.yaml").write_text(yaml.safe_dump(spec), encoding="utf-8")
    out.insert(1, _item(broken / "spec.yaml", ensemble="kestrel-a18"))
    assert out[1].error is not None and "<b>" in out[1].error
    results = out[0].results
    write_report(results, results["output"]["dir"], figures={})   # a page without plots
    return out


@pytest.fixture(scope="module")
def written(items, tmp_path_factory):
    """The summary written with plots: (folder, names written)."""
    folder = tmp_path_factory.mktemp("summary")
    return folder, write_batch_summary(folder, items, plots=True)


class _Page(HTMLParser):
    """Every href and img src of a page, and its text."""

    def __init__(self) -> None:
        super().__init__()
        self.hrefs: list[str] = []
        self.images: list[str] = []
        self.text: list[str] = []

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        if tag == "a":
            self.hrefs.append(attrs["href"])
        if tag == "img":
            self.images.append(attrs["src"])

    def handle_data(self, data):
        self.text.append(data)


def _parse(text: str) -> _Page:
    page = _Page()
    page.feed(text)
    return page


# ------------------------------------------------------------------------- rows and CSV

def test_one_row_per_ensemble_fit_parameter_with_the_results_numbers(items):
    rows = summary_rows(items)
    ran = [i for i in items if i.error is None]
    expected = sum(len(fit["chosen"]["params"]) for i in ran for fit in i.results["fits"].values())
    assert len(rows) == expected == 3 * 4 + 2 * 4 + 2   # a12's eta has one state
    assert [r["ensemble"] for r in rows[:1]] == ["kestrel-a09"]
    assert "kestrel-a18" not in {r["ensemble"] for r in rows}      # failed: no rows
    for row in rows:
        item = next(i for i in ran if i.spec == row["spec"])
        assert row["ensemble"] == item.results["ensemble"]["name"]
        chosen = item.results["fits"][row["fit"]]["chosen"]
        entry = chosen["params"][row["parameter"]]
        assert row["method"] == chosen["method"]
        # chi2/dof: the chosen result's; for an average the highest-weight point's (best)
        best = chosen["best"] if chosen["method"] == "average" else chosen
        assert row["chi2_dof"] == best["chi2"] / best["dof"]
        if row["parameter"] in chosen["withheld"]:
            continue
        for key in ("value", "stat_error", "sys_error", "error"):
            assert row[key] == entry[key], (row, key)          # the very numbers, no rounding
        # total = sqrt(stat^2 + sys^2): the results.json contract (design.md)
        assert row["error"] == pytest.approx(math.hypot(row["stat_error"], row["sys_error"]),
                                             rel=1e-12)
    assert {r["method"] for r in rows if r["fit"] == "pion"} == {"average"}


def test_withheld_parameters_get_no_numbers_and_say_why(items, written):
    rows = summary_rows(items)
    withheld = [r for r in rows if r["note"]]
    # a09, a15: E1 and A1.eta of eta (unresolved); a12: E0 and A0.eta (pinned at a bound)
    assert {(r["ensemble"], r["parameter"]) for r in withheld} == {
        ("kestrel-a09", "E1"), ("kestrel-a09", "A1.eta"), ("kestrel-a15", "E1"),
        ("kestrel-a15", "A1.eta"), ("kestrel-a12", "E0"), ("kestrel-a12", "A0.eta")}
    for r in withheld:
        assert r["fit"] == "eta" and r["note"].startswith("not a result: ")
        assert [r[k] for k in ("value", "stat_error", "sys_error", "error")] == [None] * 4
    a12 = next(i for i in items if i.ensemble == "kestrel-a12")
    assert "bound" in next(r for r in withheld if r["ensemble"] == "kestrel-a12")["note"]
    assert a12.results["fits"]["eta"]["chosen"]["withheld_reasons"]
    folder, _ = written
    table = list(csv.DictReader(io.StringIO((folder / "summary.csv").read_text("utf-8"))))
    for line in table:
        if line["note"]:
            assert [line[k] for k in ("value", "stat_error", "sys_error", "error")] == [""] * 4
    page = (folder / "summary.html").read_text("utf-8")
    eta_table = page[page.index("<h3>eta</h3>"):]
    a12_e0 = re.search(r"<tr><td>kestrel-a12</td><td>E0</td>(.*?)</tr>", eta_table).group(1)
    assert "not a result" in a12_e0 and not re.search(r"\d\(\d+\)", a12_e0)


def test_the_csv_has_every_row_at_full_precision(items, written):
    folder, names = written
    assert names[0] == "summary.csv" and names[-1] == "summary.html"
    text = (folder / "summary.csv").read_text("utf-8")
    reader = csv.reader(io.StringIO(text))          # read back with the stdlib csv module
    header = next(reader)
    assert tuple(header) == COLUMNS
    lines = list(reader)
    rows = summary_rows(items)
    assert len(lines) == len(rows)
    for line, row in zip(lines, rows):
        got = dict(zip(header, line))
        for key in ("ensemble", "spec", "fit", "parameter", "method", "note"):
            assert got[key] == row[key]
        for key in ("value", "stat_error", "sys_error", "error", "chi2_dof"):
            assert (float(got[key]) if got[key] else None) == row[key]   # repr round-trips


def test_a_damaged_results_dict_is_refused_naming_the_spec_and_key(items, tmp_path):
    good = items[0]
    damaged = {**good.results, "fits": {"pion": {**good.results["fits"]["pion"],
                                                 "chosen": "broken"}}}
    bad = BatchItem(spec="specs/kestrel-a09.yaml", ensemble="kestrel-a09", output_dir=None,
                    results=damaged, error=None)
    with pytest.raises(DataError) as info:
        write_batch_summary(tmp_path, [bad])
    assert "specs/kestrel-a09.yaml" in str(info.value) and "fits.pion.chosen" in str(info.value)
    assert list(tmp_path.iterdir()) == []                   # nothing written


# ------------------------------------------------------------------------- the page

def test_the_page_links_relative_to_existing_reports_and_results(items, written):
    folder, _ = written
    page = _parse((folder / "summary.html").read_text("utf-8"))
    links = [h for h in page.hrefs if not h.startswith("#")]
    assert len(links) == 3                               # one per spec that ran
    for href in links:
        url = urlparse(href)
        assert not url.scheme and not url.netloc and not href.startswith("/"), href
        assert (folder / unquote(href)).resolve().is_file(), href
    targets = [Path(unquote(h)).name for h in links]
    assert targets == ["report.html", "results.json", "results.json"]   # a09 has a page
    for href, item in zip(links, [items[0], items[2], items[3]]):
        assert (folder / unquote(href)).resolve().parent == Path(item.output_dir).resolve()


def test_links_from_a_staging_folder_are_right_where_the_page_ends_up(items, tmp_path):
    folder = tmp_path / "batch"
    with RunFolder(folder, key="--out").writing(completion="summary.html") as staging:
        names = write_batch_summary(staging, items, plots=False)
    assert names == ["summary.csv", "summary.html"]
    page = _parse((folder / "summary.html").read_text("utf-8"))
    links = [h for h in page.hrefs if not h.startswith("#")]
    assert len(links) == 3 and all((folder / unquote(h)).resolve().is_file() for h in links)
    assert not page.images and not (folder / "plots").exists()


def test_the_failed_spec_is_listed_with_its_error_escaped(items, written):
    folder, _ = written
    text = (folder / "summary.html").read_text("utf-8")
    failed = items[1]
    assert "<b>missing</b>" not in text                     # never as markup
    escaped = html.escape(failed.error)
    assert "&lt;b&gt;missing&lt;/b&gt;" in escaped
    section = re.search(r'<section id="failed">(.*?)</section>', text).group(1)
    assert escaped in section and "Failed specs (1)" in section
    assert text.index('id="failed"') < text.index('id="specs"') < text.index('id="results"')
    row = re.search(r'<tr class="failed">(.*?)</tr>', text).group(1)
    assert "kestrel-a18" in row and escaped in row and "failed" in row
    assert "".join(_parse(text).text).count(failed.error) == 2   # read back as plain text


def test_the_specs_table_shows_time_points_and_cache(items, written):
    folder, _ = written
    text = (folder / "summary.html").read_text("utf-8")
    for item in items[0], items[2], items[3]:
        row = re.search(rf"<tr><td>{item.ensemble}</td>(.*?)</tr>", text).group(1)
        cells = re.findall(r"<td[^>]*>(.*?)</td>", row)
        ens = item.results["ensemble"]
        assert cells[1] == "ok"
        assert cells[2:7] == [str(ens["n_configs"]), str(ens["n_bins"]), f"{item.seconds:.1f}",
                              "7", str(item.from_cache)]


def _by_hand(value: float, errors: list[float]) -> str:
    """value(err)(err): the largest error to two significant digits, the value and the
    other errors at the same decimal place (common practice; DEVELOPERS.md), for errors
    below 1."""
    place = 1 - math.floor(math.log10(float(f"{max(errors):.2g}")))
    return f"{value:.{place}f}" + "".join(f"({round(e * 10**place)})" for e in errors)


def test_the_headline_table_shows_value_error_from_the_results(items, written):
    folder, _ = written
    text = (folder / "summary.html").read_text("utf-8")
    shown = 0
    for row in summary_rows(items):
        if row["value"] is None:
            continue
        total = _by_hand(row["value"], [row["error"]])
        both = _by_hand(row["value"], [row["stat_error"], row["sys_error"]])
        cells = (f"<td>{row['ensemble']}</td><td>{html.escape(row['parameter'])}</td>"
                 f'<td class="num">{total}</td><td class="num">{both}</td>')
        assert cells in text, cells
        shown += 1
    assert shown == 16


# ------------------------------------------------------------------------- plots

def test_one_png_per_fit_parameter_except_amplitudes(items, written):
    folder, names = written
    plots = [n for n in names if n.startswith("plots/")]
    # eta.E1 is withheld everywhere: no value, no plot; amplitudes are not drawn
    assert plots == ["plots/pion.E0.png", "plots/pion.E1.png", "plots/eta.E0.png"]
    page = _parse((folder / "summary.html").read_text("utf-8"))
    assert page.images == plots
    for name in plots:
        data = (folder / name).read_bytes()
        assert data[:8] == PNG_SIGNATURE
        image = matplotlib.image.imread(folder / name)
        assert image.ndim == 3 and image.shape[0] > 100 and image.shape[1] > 100
        assert image[..., :3].std() > 0.01                 # something is drawn


def test_the_plot_series_hold_the_rows_in_batch_order(items):
    series = {(s.fit, s.parameter): s for s in parameter_series(items, summary_rows(items))}
    eta = series[("eta", "E0")]
    assert eta.labels == ("kestrel-a09", "kestrel-a12", "kestrel-a15")
    assert np.isnan(eta.value[1]) and eta.n_results == 2    # a12: not a result
    for k, item in enumerate([items[0], items[2], items[3]]):
        entry = item.results["fits"]["pion"]["chosen"]["params"]["E0"]
        s = series[("pion", "E0")]
        assert (s.value[k], s.stat_error[k], s.error[k]) == (
            entry["value"], entry["stat_error"], entry["error"])
        assert s.truth[k] == item.results["truth"]["pion"]["E0"]


def test_ensembles_named_alike_get_their_spec_in_the_label():
    labels = unique_labels(["kestrel-a09", "kestrel-a09", "kestrel-a12"],
                           ["s/pion.yaml", "s/nucleon.yaml", "s/pion.yaml"])
    assert labels == ["kestrel-a09 (pion)", "kestrel-a09 (nucleon)", "kestrel-a12"]
    assert unique_labels(["x", "x"], ["a/s.yaml", "b/s.yaml"]) == ["x (s)", "x (s) #2"]
