"""Correlator matrices through the pipeline: spec -> GEVP -> level fits -> results -> report.

Invented data throughout (tests/matrix_cases.py and the committed demo data:
the axial channel of plateaufit.demo.matrix, three operators and four states,
known truth, fixed seeds). The checks against exact results are in
tests/reference/test_matrix_reference.py.
"""

from __future__ import annotations

import dataclasses
import json
from pathlib import Path

import numpy as np
import pytest

from matrix_cases import LEVEL_FITS, matrix_spec, write_matrix_data, write_spec
from plateaufit.demo.matrix import AXIAL
from plateaufit.pipeline.results import Results
from plateaufit.pipeline.rules import validate_spec
from plateaufit.pipeline.run import RunLog, run_analysis, run_spec
from plateaufit.pipeline.warnings import collect_warnings

ROOT = Path(__file__).resolve().parents[1]
DEMO_DATA = ROOT / "examples" / "demo_data" / AXIAL.file
DEMO_STREAMS = (("a", 600), ("b", 400))


def _analyse(spec: dict, base: Path) -> tuple[Results, RunLog]:
    log = RunLog()
    return run_analysis(validate_spec(spec, base_dir=base), log=log), log


@pytest.fixture(scope="module")
def demo_matrix(tmp_path_factory):
    """The demo's matrix alone at t0 = 2 (the ranges of fit_specs/demo.yaml)."""
    base = tmp_path_factory.mktemp("demo_matrix")
    return _analyse(matrix_spec(DEMO_DATA, streams=DEMO_STREAMS), base)


# --------------------------------------------------------------------------- recovery


def test_noisy_3x3_recovers_every_level_within_two_sigma(demo_matrix):
    results, _ = demo_matrix
    for n, energy in enumerate(AXIAL.energies[:3]):
        e0 = results.fits[f"axial_{n}"].chosen.params["E0"]
        assert abs(e0.value - energy) < 2 * e0.error, (n, e0)
        # a real measurement: not so wide that any answer would pass
        assert e0.error < 0.02 * energy
    assert results.warnings == []


def test_the_ready_to_run_matrix_spec_recovers_every_level_within_two_sigma(tmp_path):
    # fit_specs/demo_matrix.yaml: t0: half, each fit at t0 = ceil(max tmax / 2)
    data = run_spec(ROOT / "fit_specs" / "demo_matrix.yaml", tmp_path, plots=False, jobs=1,
                    progress=False)
    assert data["warnings"] == []
    for n in range(3):
        fit = data["fits"][f"axial_{n}"]
        e0 = fit["chosen"]["params"]["E0"]
        assert abs(e0["value"] - AXIAL.energies[n]) < 2 * e0["error"]
        assert fit["t0"] == {0: 9, 1: 6, 2: 4}[n]
    m = data["matrices"]["axial"]
    assert m["t0_rule"] == "half" and m["t0"] == 4            # the smallest t0 of its fits
    # t0 = ceil(t/2) at every t of the effective energies
    assert m["principal"][0]["t0"][:6] == [0, 1, 1, 2, 2, 3]


# --------------------------------------------------------------------------- results


def test_results_record_matrix_level_t0_and_the_matrix_section(demo_matrix):
    results, log = demo_matrix
    data = results.to_dict()
    for n in range(3):
        fit = data["fits"][f"axial_{n}"]
        assert (fit["matrix"], fit["level"], fit["t0"]) == ("axial", n, 2)
        assert fit["observables"] == ["axial"]
        assert set(fit["chosen"]["params"]) >= {"E0", "A0.axial"}
        assert list(fit["effective_mass"]) == ["axial"]
    m = data["matrices"]["axial"]
    assert m["grid"] == AXIAL.grid() and m["operators"] == ["L", "S", "W"]
    assert m["t0"] == 2 and m["t0_rule"] == "fixed" and m["n_levels"] == 3
    assert len(m["principal"]) == 3 and m["principal"][0]["kind"] == "cosh"
    assert np.shape(m["crossings"]) == (3, 25) and np.shape(m["separation"]) == (2, 25)
    assert np.shape(m["eigenvectors"]["value"]) == (25, 3, 3)
    assert np.shape(m["overlaps"]["value"]) == (3, 3)
    assert m["levels"] == ["axial_0", "axial_1", "axial_2"]
    assert set(m["fits"]) == {"axial_0", "axial_1", "axial_2"}
    assert m["condition_number"] > 1 and np.shape(m["asymmetry"]) == (3, 3)
    assert "Z_in = <0|O_i|n>" in m["overlaps"]["normalisation"]
    # the principal correlator's effective energy is at its plateau at the fitted E0
    e0 = data["fits"]["axial_0"]["chosen"]["params"]["E0"]["value"]
    assert m["principal"][0]["value"][10] == pytest.approx(e0, abs=0.003)
    assert any("matrix axial: 3 x 3, t0 = 2" in line for line in log.lines)


def test_results_json_round_trip_keeps_the_matrix(demo_matrix):
    results, _ = demo_matrix
    data = json.loads(json.dumps(results.to_dict(), allow_nan=False))
    again = Results.from_dict(data)
    assert again.to_dict() == data
    m = again.matrices["axial"]
    assert m.overlaps is not None and m.overlaps.value.shape == (3, 3)
    assert again.fits["axial_1"].level == 1 and again.fits["axial_1"].matrix == "axial"


def test_overlaps_are_the_truth_up_to_the_truncation(demo_matrix):
    # the ground state's overlaps, at t = its chosen tmin, are free of the truncation
    # to O(exp(-(E_3 - E_0) t)) (Blossier et al. 2009): close to the invented Z
    results, _ = demo_matrix
    ov = results.matrices["axial"].overlaps
    truth = np.asarray(AXIAL.overlaps)[:, :3]
    np.testing.assert_allclose(ov.value[:, 0], truth[:, 0], rtol=0.02)
    # relative per operator: the ground state is every operator's largest here
    np.testing.assert_allclose(ov.relative[:, 0], 1.0)
    assert np.all(np.isfinite(ov.error)) and np.all(ov.error > 0)


def test_degenerate_point_flags_apply_to_level_fits(demo_matrix):
    # two-state fits at large tmin cannot resolve a second state: the fit core flags
    # them, and the average leaves their E1 out, as for any fit
    results, _ = demo_matrix
    scan = results.fits["axial_0"].scan
    flagged = [p for p in scan if p.states == 2 and any(
        f.startswith("state-unresolved") for f in p.flags)]
    assert flagged
    assert all(p.weight >= 0 for p in scan)


def test_covariance_keys_reach_the_level_fits(tmp_path):
    data_file = write_matrix_data(tmp_path)
    shrinks = {}
    for shrinkage in ("none", "ledoit-wolf"):
        spec = matrix_spec(data_file, fits=[dict(LEVEL_FITS[1], states=1, priors={})])
        spec["covariance"] = {"shrinkage": shrinkage}
        results, _ = _analyse(spec, tmp_path)
        shrinks[shrinkage] = results.fits["axial_1"].covariance.shrinkage
    assert shrinks["none"] == 0.0 and shrinks["ledoit-wolf"] > 0.0


# --------------------------------------------------------------------------- warnings


def test_a_misplaced_grid_entry_is_warned_about(tmp_path):
    data_file = write_matrix_data(tmp_path)
    spec = matrix_spec(data_file, fits=[LEVEL_FITS[0]])
    grid = spec["matrices"]["axial"]["grid"]
    grid[0][1], grid[0][2] = grid[0][2], grid[0][1]       # LS and LW swapped in row 0
    results, _ = _analyse(spec, tmp_path)
    codes = [w.code for w in results.warnings]
    assert "matrix-asymmetric" in codes
    message = next(w.message for w in results.warnings if w.code == "matrix-asymmetric")
    assert "axial_LW" in message and "axial_SL" in message


def test_levels_the_data_cannot_separate_are_warned_about(tmp_path):
    # levels 1 and 2 only 0.01 apart: inside level 1's range they are within 2 sigma
    close = dataclasses.replace(AXIAL, energies=(0.38, 0.62, 0.63, 1.25))
    data_file = write_matrix_data(tmp_path, matrix=close)
    spec = matrix_spec(data_file, fits=[dict(LEVEL_FITS[1], states=1, priors={})],
                       matrix=close)
    results, _ = _analyse(spec, tmp_path)
    check = results.matrices["axial"].fits["axial_1"]
    assert check.separation_min < 2
    warned = [w for w in results.warnings if w.code in ("matrix-levels-close",
                                                           "matrix-crossings")]
    assert any(w.code == "matrix-levels-close" and w.fit == "axial_1"
               and f"t = {check.tmin}..{check.tmax}" in w.message for w in warned)


def test_crossings_inside_a_fit_range_are_warned_about_naming_the_range(demo_matrix):
    results, _ = demo_matrix
    m = results.matrices["axial"]
    check = dataclasses.replace(m.fits["axial_2"], crossings=4, crossing_t=(8, 9))
    edited = dataclasses.replace(results, matrices={"axial": dataclasses.replace(
        m, fits={**m.fits, "axial_2": check})})
    warnings = [w for w in collect_warnings(edited) if w.code == "matrix-crossings"]
    assert len(warnings) == 1 and warnings[0].fit == "axial_2"
    assert "t = 8, 9" in warnings[0].message
    assert f"t = {check.tmin}..{check.tmax}" in warnings[0].message


def test_an_ill_conditioned_c_t0_is_warned_about(demo_matrix):
    results, _ = demo_matrix
    m = dataclasses.replace(results.matrices["axial"], condition_number=3e11)
    warnings = collect_warnings(dataclasses.replace(results, matrices={"axial": m}))
    assert [w.code for w in warnings] == ["matrix-ill-conditioned"]
    assert "axial" in warnings[0].message and "t0 = 2" in warnings[0].message


# --------------------------------------------------------------------------- check, report


def test_check_summarises_the_matrix_and_its_level_fits(tmp_path, capsys):
    from plateaufit.cli import main

    data_file = write_matrix_data(tmp_path)
    assert main(["check", str(write_spec(tmp_path, matrix_spec(data_file)))]) == 0
    out = capsys.readouterr().out
    assert "matrix axial: 3 x 3 (L, S, W), t0 = 2" in out
    assert "level 2 effective energy (cosh)" in out
    assert "fit axial_1: level 1, t0 = 2, cosh" in out
    assert "check passed" in out


def test_report_shows_the_matrix_section_and_its_plots(demo_matrix, tmp_path):
    from plateaufit.report.html import render_report
    from plateaufit.report.plots import plot_plan

    results, _ = demo_matrix
    plan = [item for item in plot_plan(results) if item.section == "matrix axial"]
    assert [item.key for item in plan] == ["axial.principal", "axial.eigenvectors",
                                           "axial.overlaps"]
    page = render_report(results, figures={})
    assert '<section id="matrices">' in page and 'href="#matrices"' in page
    section = page[page.index('<section id="matrices">'):]
    section = section[:section.index("</section>")]
    e0 = results.fits["axial_2"].chosen.params["E0"]
    from plateaufit.report.tables import format_value_error
    assert format_value_error(e0.value, e0.error) in section
    assert "Z_in = &lt;0|O_i|n&gt;" in section and "crossings in range" in section
    # the matrix's figures: all three levels with their bands on one; one panel per level
    principal, vectors, heat = (item.draw() for item in plan)
    ax = principal.axes[0]
    assert len(ax.collections) >= 3                       # a band per level
    assert len(vectors.axes) == 3
    texts = [t.get_text() for t in heat.axes[0].texts]
    assert len(texts) == 9 and texts.count("1.00") == 3   # the ground state is largest


@pytest.mark.slow   # draws every plot of the run
def test_report_is_rebuilt_with_the_matrix_from_results_json(demo_matrix, tmp_path):
    from plateaufit.report.html import rebuild_report

    results, _ = demo_matrix
    (tmp_path / "results.json").write_text(json.dumps(results.to_dict(), allow_nan=False))
    rebuild_report(tmp_path)
    for stem in ("axial.principal", "axial.eigenvectors", "axial.overlaps"):
        assert (tmp_path / "plots" / f"{stem}.png").is_file()
    page = (tmp_path / "report.html").read_text()
    assert "<h3>Matrix axial</h3>" in page and '<section id="matrices">' in page
