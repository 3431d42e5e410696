"""The report page: its sections, escaping, images, warnings, rebuild_report, and a
real browser rendering it."""

from __future__ import annotations

import base64
import html
import io
import json
import re
import shutil
import subprocess
import sys
from pathlib import Path

import matplotlib.image
import pytest

from plateaufit.cli import main
from plateaufit.errors import DataError
from plateaufit.pipeline.results import Results
from plateaufit.pipeline.warnings import collect_warnings
from plateaufit.report.html import rebuild_report, write_report
from plateaufit.report.plots import plot_plan
from plateaufit.report.tables import format_value_error
from pipeline_results import make_results

_IMG = re.compile(r'<img src="([^"]*)"[^>]*?width="(\d+)" height="(\d+)"')


@pytest.fixture(scope="module")
def rebuilt(tmp_path_factory):
    """A run directory with results.json only, rebuilt into tables, plots and page."""
    out = tmp_path_factory.mktemp("run")
    results = make_results()
    (out / "results.json").write_text(json.dumps(results, indent=1))
    page = rebuild_report(out)
    return out, page, results


@pytest.fixture(scope="module")
def page_only(tmp_path_factory):
    """The page of the same results without plots (fast), for the tests about its text."""
    out = tmp_path_factory.mktemp("page")
    results = make_results()
    return out, write_report(results, out, figures={}), results


def _page_text(results, tmp_path: Path) -> str:
    """The page without plots (fast), for tests about text."""
    return write_report(results, tmp_path, figures={}).read_text(encoding="utf-8")


@pytest.mark.slow   # draws and writes every plot of the run
def test_rebuild_report_writes_tables_plots_and_page(rebuilt) -> None:
    out, page, results = rebuilt
    assert page == out / "report.html" and page.is_file()
    assert (out / "scan_pion.csv").is_file() and (out / "scan_kaon.csv").is_file()
    assert (out / "results.tex").is_file()
    assert len(list((out / "plots").glob("*.png"))) == len(plot_plan(results))
    assert len(list((out / "plots").glob("*.pdf"))) == len(plot_plan(results))


def test_page_has_every_section(page_only) -> None:
    _, page, results = page_only
    text = page.read_text(encoding="utf-8")
    assert text.startswith("<!DOCTYPE html>")
    for anchor, heading in [("warnings", "Warnings"), ("data", "Data summary"),
                            ("results", "Results"), ("plots", "Plots"),
                            ("scan", "Fit-range scans"), ("provenance", "Provenance")]:
        assert f'<section id="{anchor}">' in text
        assert f"<h2>{heading}" in text
    ens = results["ensemble"]
    for value in (ens["name"], ens["n_configs"], ens["n_bins"], ens["bin_size"], ens["n_dropped"]):
        assert f"<td>{value}</td>" in text
    sizes = ens["stream_sizes"]
    assert f"{sizes[0]}, {sizes[1]}" in text     # configurations per stream
    tau = ens["tau_int"]["pion_ll"]
    assert format_value_error(tau["value"], tau["error"]) in text
    assert "1/2 + sum" in text                    # the tau_int convention is stated


def test_page_shows_chosen_results_and_truth(page_only) -> None:
    _, page, results = page_only
    text = page.read_text(encoding="utf-8")
    assert "truth</th>" in text
    for fit_name, fit in results["fits"].items():
        for pname, entry in fit["chosen"]["params"].items():
            assert f">{format_value_error(entry['value'], entry['error'])}<" in text
        truth = results["truth"][fit_name]
        e0 = fit["chosen"]["params"]["E0"]
        pull = (e0["value"] - truth["E0"]) / e0["error"]
        assert f">{pull:+.2f}<" in text
    assert "method <b>average</b>" in text and "method <b>single</b>" in text


def test_page_without_truth_has_no_truth_column(tmp_path) -> None:
    text = _page_text(make_results(truth=False), tmp_path)
    assert "truth</th>" not in text
    assert "<h2>Results</h2>" in text


@pytest.mark.slow   # draws and writes every plot of the run
def test_every_image_is_an_embedded_png(rebuilt) -> None:
    _, page, results = rebuilt
    text = page.read_text(encoding="utf-8")
    images = _IMG.findall(text)
    assert len(images) == text.count("<img ") == len(plot_plan(results))
    for src, width, height in images:
        assert src.startswith("data:image/png;base64,")
        data = base64.b64decode(src.split(",", 1)[1], validate=True)
        assert data[:8] == b"\x89PNG\r\n\x1a\n"
        pixels = matplotlib.image.imread(io.BytesIO(data))    # decodes as a whole
        assert pixels.shape[:2] == (int(height), int(width))


@pytest.mark.slow   # draws and writes every plot of the run
def test_page_is_self_contained(rebuilt) -> None:
    _, page, _ = rebuilt
    text = page.read_text(encoding="utf-8").lower()
    assert "<script" not in text
    assert "<link" not in text and "@import" not in text and "url(" not in text
    assert not re.search(r'(src|href)="(?!data:|#)', text)    # only data URIs and anchors


def test_hostile_names_are_escaped(tmp_path) -> None:
    text = _page_text(make_results(hostile=True), tmp_path)
    assert "<script>" not in text and "<b>co</b>" not in text
    assert "&lt;script&gt;alert(1)&lt;/script&gt;&amp;&quot;x&quot;" in text
    assert "kaon &amp; &lt;b&gt;co&lt;/b&gt;" in text


def test_scan_tables_mark_the_chosen_and_the_top_weighted_fit(page_only) -> None:
    _, page, results = page_only
    text = page.read_text(encoding="utf-8")
    chosen_rows = re.findall(r'<tr class="chosen">(.*?)</tr>', text)
    assert len(chosen_rows) == 1                       # the kaon fit's choice
    cells = re.findall(r"<td[^>]*>(.*?)</td>", chosen_rows[0])
    assert cells[1:4] == ["6", "20", "2"]
    top_rows = re.findall(r'<tr class="top">(.*?)</tr>', text)
    assert len(top_rows) == 1                          # the pion average's top weight
    best = results["fits"]["pion"]["chosen"]["best"]
    cells = re.findall(r"<td[^>]*>(.*?)</td>", top_rows[0])
    assert cells[1:4] == [str(best["tmin"]), str(best["tmax"]), str(best["states"])]
    n_rows = len(re.findall(r"<tr", text.split('<section id="scan">')[1].split("</section>")[0]))
    n_scan = sum(len(f["scan"]) for f in results["fits"].values())
    assert n_rows == n_scan + len(results["fits"])     # one header row per fit
    assert '<tr class="failed">' in text               # the non-converged point


def test_provenance_is_shown(page_only) -> None:
    _, page, results = page_only
    text = page.read_text(encoding="utf-8")
    prov = results["provenance"]
    assert prov["spec_sha256"] in text
    for name, digest in prov["data_sha256"].items():
        assert f"<td>{name}</td><td><code>{digest}</code></td>" in text
    assert "demo = 20240611" in text and prov["created"] in text


def test_the_warnings_are_the_pipelines_rules_applied_to_the_results() -> None:
    # the report decides no warning: the pipeline's table (plateaufit.pipeline.warnings)
    # finds these in the results, each once, with its code
    results = make_results(strong_shrinkage=True, unreliable_tau=True)
    results["fits"]["kaon"]["chosen"]["p_value"] = 0.012
    results["ensemble"]["tau_int"]["pion_ls"]["reliable"] = False
    found = collect_warnings(Results.from_dict(results))
    by_code = {}
    for w in found:
        by_code.setdefault(w.code, []).append(w)
    joined = "\n".join(w.message for w in found)
    assert "fit kaon: the chosen fit has p-value 0.012" in joined
    assert "pion_ls: no autocorrelation window was found" in joined
    assert "kaon_ll: no autocorrelation window was found" in joined
    assert "fit pion: strong covariance shrinkage (0.70)" in joined
    # one point of an average given weight 0 is not a warning (run.log lists it)
    assert "scan points" not in joined.split("refit(s) failed")[0]
    assert "fit pion: 2 jackknife refit(s) failed" in joined
    assert len(found) == len({w.message for w in found}) == 5
    assert [w.fit for w in by_code["low-p-value"]] == ["kaon"]
    assert len(by_code["tau-unreliable"]) == 2 and by_code["tau-unreliable"][0].fit is None


def test_the_page_shows_exactly_the_warnings_of_the_results(tmp_path) -> None:
    results = make_results()
    assert results["warnings"]                    # the edited points of the pion scan
    text = _page_text(results, tmp_path)
    items = re.findall(r"<li>(.*?)</li>", text.split('<section id="warnings">')[1]
                       .split("</section>")[0])
    assert items == [html.escape(m, quote=True) for m in results["warnings"]]


def test_page_lists_the_warnings(tmp_path) -> None:
    results = make_results(strong_shrinkage=True)
    text = _page_text(results, tmp_path)
    assert any("strong covariance shrinkage" in m for m in results["warnings"])
    for message in results["warnings"]:
        assert f"<li>{html.escape(message, quote=True)}</li>" in text
    clean = make_results()
    clean["warnings"] = []
    for fit in clean["fits"].values():
        fit["warnings"] = []
        for point in fit["scan"]:
            point["converged"], point["n_refit_failed"] = True, 0
    assert "No warnings." in _page_text(clean, tmp_path)


def test_minimal_results_make_a_page(tmp_path) -> None:
    results = {"ensemble": {"name": "tiny"},
               "fits": {"f": {"chosen": {"method": "single", "tmin": 2, "tmax": 6, "states": 1,
                                         "params": {"E0": {"value": 0.5, "error": None}}},
                              "scan": []}}}
    text = write_report(results, tmp_path).read_text(encoding="utf-8")
    assert "<h3>f</h3>" in text and "n/a" in text
    assert "No tau_int in the results." in text
    assert "<img" not in text


# --------------------------------------------------------------------- rebuild errors

def test_rebuild_report_without_results_json(tmp_path) -> None:
    with pytest.raises(DataError) as err:
        rebuild_report(tmp_path)
    assert err.value.where == str(tmp_path / "results.json")
    assert "plateaufit fit" in err.value.message
    with pytest.raises(DataError):
        rebuild_report(tmp_path / "no_such_dir")
    assert list(tmp_path.iterdir()) == []              # nothing written


def test_rebuild_report_on_damaged_json(tmp_path) -> None:
    (tmp_path / "results.json").write_text('{"fits": {"pion": ')
    with pytest.raises(DataError, match="not valid JSON") as err:
        rebuild_report(tmp_path)
    assert err.value.where.endswith("results.json")
    assert not (tmp_path / "report.html").exists()


@pytest.mark.parametrize(("damage", "key"), [
    (lambda r: r.pop("ensemble"), "ensemble"),
    (lambda r: r.pop("fits"), "fits"),
    (lambda r: r["fits"]["pion"]["chosen"].pop("params"), "fits.pion.chosen.params"),
    (lambda r: r["fits"]["kaon"].pop("scan"), "fits.kaon.scan"),
    (lambda r: r["fits"]["pion"]["scan"][3].pop("tmin"), "fits.pion.scan[3].tmin"),
    (lambda r: r["fits"]["pion"]["chosen"]["params"]["E0"].pop("error"),
     "fits.pion.chosen.params.E0.error"),
])
def test_rebuild_report_names_a_missing_key(tmp_path, damage, key) -> None:
    results = make_results()
    damage(results)
    (tmp_path / "results.json").write_text(json.dumps(results))
    with pytest.raises(DataError, match=re.escape(f"required key {key} is missing")):
        rebuild_report(tmp_path)
    assert not (tmp_path / "report.html").exists()
    assert not (tmp_path / "plots").exists()


def test_rebuild_report_on_json_that_is_not_an_object(tmp_path) -> None:
    (tmp_path / "results.json").write_text("[1, 2]")
    with pytest.raises(DataError, match="JSON object"):
        rebuild_report(tmp_path)


def test_cli_report_on_missing_results_exits_2(tmp_path, capsys) -> None:
    assert main(["report", str(tmp_path)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "results.json" in err[0] and "Traceback" not in err[0]


# --------------------------------------------------------------------- a real browser

def _browser() -> str | None:
    for name in ("chromium", "chromium-browser", "google-chrome"):
        path = shutil.which(name)
        if path:
            return path
    return None


_CHECK = """<script>
window.addEventListener("load", function () {
  var imgs = document.images, broken = 0;
  for (var i = 0; i < imgs.length; i++) {
    if (!imgs[i].complete || imgs[i].naturalWidth === 0) { broken++; }
  }
  var out = document.createElement("pre");
  out.id = "imgcheck";
  out.textContent = "images=" + imgs.length + " broken=" + broken;
  document.body.appendChild(out);
});
</script>"""


def _run_browser(browser: str, profile: Path, *args: str) -> subprocess.CompletedProcess:
    cmd = [browser, "--headless", "--no-sandbox", "--disable-gpu",
           "--disable-background-networking", "--disable-component-update", "--disable-sync",
           "--no-first-run", "--disable-extensions", f"--user-data-dir={profile}", *args]
    return subprocess.run(cmd, capture_output=True, text=True, timeout=60, check=False)
@pytest.mark.slow   # a process pool or subprocess
def test_page_renders_in_a_headless_browser(rebuilt, tmp_path) -> None:
    browser = _browser()
    if browser is None:
        pytest.skip("no browser found: install Debian's chromium to run the rendering check")
    _, page, results = rebuilt
    n_images = len(plot_plan(results))
    # 1. Every image loads: a copy of the page with a load-time check appended (the
    #    report itself has no script), its DOM dumped after the load event.
    probe = tmp_path / "probe.html"
    probe.write_text(page.read_text(encoding="utf-8").replace("</body>", _CHECK + "</body>"),
                     encoding="utf-8")
    done = _run_browser(browser, tmp_path / "profile1", "--virtual-time-budget=15000",
                        "--dump-dom", probe.as_uri())
    assert done.returncode == 0, done.stderr[-2000:]
    found = re.search(r'<pre id="imgcheck">images=(\d+) broken=(\d+)</pre>', done.stdout)
    assert found, "the page did not finish loading in the browser"
    assert (int(found.group(1)), int(found.group(2))) == (n_images, 0)
    assert "Fit-range scans" in done.stdout
    # 2. The page itself renders to a non-blank screenshot.
    shot = tmp_path / "page.png"
    done = _run_browser(browser, tmp_path / "profile2", "--hide-scrollbars",
                        f"--screenshot={shot}", "--window-size=1200,3000", page.as_uri())
    assert done.returncode == 0, done.stderr[-2000:]
    pixels = matplotlib.image.imread(shot)
    assert pixels.shape[:2] == (3000, 1200)
    assert pixels[..., :3].std() > 0.05                # not blank


if __name__ == "__main__":  # pragma: no cover
    sys.exit(pytest.main([__file__, "-q"]))
