"""plateaufit calibrate: the truth, the replicas, the summary, the files, the page, the errors."""

from __future__ import annotations

import json

import numpy as np
import pytest
import yaml
from calibration_ensembles import TRUTH, single_state, write_spec

from plateaufit.cli import main
from plateaufit.errors import SpecError
from plateaufit.pipeline.calibrate import build_truth, calibrate, calibrate_spec
from plateaufit.pipeline.calibration_replicas import ReplicaJob, replica_ensemble, run_replica
from plateaufit.pipeline.calibration_results import (CalibrationResults, FitCalibration,
                                                     ParameterCalibration, VariantResult)
from plateaufit.pipeline.calibration_summary import remedies, remedy_sentence, restores
from plateaufit.pipeline.calibration_truth import column_layout, read_truth_file
from plateaufit.pipeline.inputs import load_ensemble
from plateaufit.pipeline.rules import load_spec
from plateaufit.pipeline.run import run_analysis
from plateaufit.report.html import rebuild_report


def _two_fit_spec(tmp_path):
    """Two fits of one observable (a scan and a single range) and a derived quantity."""
    path = write_spec(tmp_path, single_state(3, 800, tau=1.5), tmin=[5, 7], tmax=[12, 13])
    spec = yaml.safe_load(path.read_text())
    spec["fits"].append({"name": "late", "observables": ["corr"], "model": "cosh",
                         "tmin": 9, "tmax": 14})
    spec["derived"] = {"ratio": "late.E0 / meson.E0"}
    path.write_text(yaml.safe_dump(spec, sort_keys=False))
    return path


@pytest.fixture(scope="module")
def two_fits(tmp_path_factory):
    spec = load_spec(_two_fit_spec(tmp_path_factory.mktemp("two")))
    base = run_analysis(spec)
    ensemble = load_ensemble(spec)
    return spec, base, ensemble


def test_truth_is_the_fitted_model_on_the_band_and_the_mean_elsewhere(two_fits):
    spec, base, ensemble = two_fits
    truth, model = build_truth(spec, base, ensemble, None)
    first = truth.fits["meson"]
    point = base.fits["meson"].chosen.point
    assert (first.tmin, first.tmax, first.states) == (point.tmin, point.tmax, point.states)
    e0, a0 = first.params["E0"], first.params["A0.corr"]
    t = np.arange(17)
    cosh = a0 * (np.exp(-e0 * t) + np.exp(-e0 * (32 - t)))     # exact: the cosh model
    # fit `late` (9..14) uses the same observable: meson (the first) sets its truth over
    # the union of both bands, 5..14; late's truth is its model fitted without noise to
    # that, which a one-state cosh recovers exactly (noise-free data)
    np.testing.assert_allclose(truth.vector[5:15], cosh[5:15], rtol=1e-12)
    assert truth.fits["late"].params["E0"] == pytest.approx(e0, rel=1e-8)
    assert truth.fits["late"].params["A0.corr"] == pytest.approx(a0, rel=1e-8)
    assert base.fits["late"].chosen.params["E0"].value != pytest.approx(e0, rel=1e-8)
    np.testing.assert_allclose(truth.vector[:5], ensemble.correlators["corr"].mean(axis=0)[:5])
    np.testing.assert_allclose(truth.vector[15:], ensemble.correlators["corr"].mean(axis=0)[15:])
    assert truth.derived["ratio"] == pytest.approx(truth.fits["late"].params["E0"] / e0)
    assert model.truth is truth.vector or np.array_equal(model.truth, truth.vector)


def test_a_replica_is_an_ensemble_of_the_same_layout(two_fits):
    spec, base, ensemble = two_fits
    truth, model = build_truth(spec, base, ensemble, None)
    job = ReplicaJob.of(spec, model, ensemble, column_layout(ensemble))
    seed = model.replica_seeds(1, 5)[0]
    rep = replica_ensemble(job, model.draw(seed))
    assert rep.correlators["corr"].shape == ensemble.correlators["corr"].shape
    np.testing.assert_array_equal(rep.stream_labels, ensemble.stream_labels)
    assert rep.folded == ensemble.folded and rep.boundaries == ensemble.boundaries
    a = run_replica(job, (0, seed))
    b = run_replica(job, (0, model.replica_seeds(1, 5)[0]))
    assert not a.failed and a.params == b.params           # a seed gives the same replica
    assert set(a.params) == {"meson", "late"} and "ratio" in a.derived


def test_calibrate_summarises_every_fit_and_derived_quantity(two_fits):
    spec, _, _ = two_fits
    base, cal = calibrate(spec, 8, seed=7, variants=False)
    assert cal.n_replicas == 8 and cal.seed == 7 and cal.n_failed == 0
    meson = cal.fits["meson"]
    assert set(meson.params) == {"E0", "A0.corr"}
    assert meson.params["E0"].n == 8 and meson.params["E0"].pulls.size == 8
    assert meson.p_values.size == 8 and 0 <= meson.ks_p_value <= 1
    assert sum(c.count for c in meson.chosen_points) == 8        # a scan: chosen points
    assert not cal.fits["late"].chosen_points                    # one range: none
    assert cal.derived["ratio"].n == 8
    # the same seed, the same calibration
    _, again = calibrate(spec, 8, seed=7, variants=False)
    np.testing.assert_array_equal(again.fits["meson"].params["E0"].pulls, meson.params["E0"].pulls)
    d = cal.to_dict()
    assert CalibrationResults.from_dict(json.loads(json.dumps(d))).to_dict() == d


def test_truth_file_overrides_the_fit_and_is_checked(tmp_path):
    path = _two_fit_spec(tmp_path)
    spec = load_spec(path)
    good = tmp_path / "truth.yaml"
    good.write_text(yaml.safe_dump({"meson": {"E0": TRUTH["E0"], "A0.corr": TRUTH["A0"]},
                                    "derived": {"ratio": 1.0}}))
    base = run_analysis(spec)
    truth, _ = build_truth(spec, base, load_ensemble(spec), read_truth_file(good, spec))
    assert truth.fits["meson"].params["E0"] == TRUTH["E0"] and truth.derived["ratio"] == 1.0
    assert truth.source == "file"
    for bad, words in (({"pion": {"E0": 0.3}}, "no fit of that name"),
                       ({"meson": {"E7": 0.3}}, "has no parameter E7"),
                       ({"meson": {"E0": "fast"}}, "not a finite number"),
                       ({"derived": {"gap": 0.1}}, "no derived quantity")):
        good.write_text(yaml.safe_dump(bad))
        with pytest.raises(SpecError) as err:
            build_truth(spec, base, load_ensemble(spec), read_truth_file(good, spec))
        assert err.value.where == "--truth" and words in err.value.message


def _pc(c1, c2, n=100):
    from plateaufit.stats.coverage import coverage_band

    return ParameterCalibration(truth=1.0, n=n, coverage_1sigma=c1, coverage_2sigma=c2,
                                coverage_1sigma_error=0.05, coverage_2sigma_error=0.02,
                                band_1sigma=coverage_band(0.6827, n),
                                band_2sigma=coverage_band(0.9545, n), bias_over_error=0.0,
                                bias_over_error_error=0.1, pull_rms=1.0, scatter_over_error=1.0,
                                mean_error=0.1)


def test_remedies_and_what_the_warning_says(tmp_path):
    spec = load_spec(write_spec(tmp_path, single_state(1, 400), tmin=6, tmax=11, bin_size=1))
    tried, skipped = remedies(spec, 1, 23, [1000])
    assert [r.name for r in tried] == ["larger-bins", "per-sample", "no-shrinkage", "gamma"]
    assert tried[0].spec.binning.size == 23 and tried[0].changes == {"binning.size": 23}
    assert tried[3].spec.covariance.estimator == "gamma" and not skipped
    assert spec.binning.size == 1 and spec.covariance.estimator == "binned"   # unchanged
    # at the largest size that leaves 20 bins, no larger bins; too few bins: no 'none'
    tried, skipped = remedies(spec, 50, 23, [1000])
    names = [r.name for r in tried]
    assert "larger-bins" not in names and "no-shrinkage" in names
    tried, skipped = remedies(spec, 40, 23, [240])
    assert "no-shrinkage" not in [r.name for r in tried]
    assert any("singular" in s for s in skipped)
    base = {"meson": FitCalibration(params={"E0": _pc(0.30, 0.55)})}
    fixed = VariantResult("larger-bins", "binning.size 1 -> 23", {},
                          {"meson": FitCalibration(params={"E0": _pc(0.66, 0.95)})})
    other = VariantResult("per-sample", "covariance.per_sample true", {},
                          {"meson": FitCalibration(params={"E0": _pc(0.31, 0.56)})})
    failing = [("meson", "E0")]
    assert restores(fixed.fits, {}, failing) and not restores(other.fits, {}, failing)
    fixed = VariantResult(**{**fixed.__dict__, "restores": True})
    text = remedy_sentence(base, {}, [fixed, other], failing, [])
    assert text.startswith("rerunning the first 100 replicas with binning.size 1 -> 23 restores")
    assert "meson E0 30% -> 66%" in text and "does not restore it" in text


def test_files_page_and_rebuild(tmp_path, capsys):
    spec = write_spec(tmp_path / "spec", single_state(2, 600, tau=1.0), tmin=6, tmax=11,
                      name="meson.b-1")
    out = tmp_path / "out"
    assert main(["calibrate", str(spec), "--replicas", "5", "--seed", "3", "--jobs", "1",
                 "--out", str(out), "--quiet", "--no-variants"]) == 0
    printed = capsys.readouterr().out
    assert "calibration on 5 replicas (seed 3)" in printed and "meson.b-1: E0" in printed
    cal = json.loads((out / "calibration.json").read_text())
    e0 = cal["fits"]["meson.b-1"]["params"]["E0"]
    for key in ("coverage_1sigma", "coverage_2sigma", "coverage_1sigma_error", "bias_over_error",
                "pull_rms", "scatter_over_error"):
        assert isinstance(e0[key], float)
    assert cal["n_replicas"] == 5 and cal["seed"] == 3 and isinstance(cal["warnings"], list)
    page = (out / "report.html").read_text()
    assert 'id="calibration"' in page and "<h3>meson.b-1</h3>" in page
    assert "calibration.meson.b-1.pulls" in " ".join(p.name for p in (out / "plots").iterdir())
    (out / "report.html").unlink()
    rebuild_report(out)
    assert 'id="calibration"' in (out / "report.html").read_text()


@pytest.mark.parametrize("args, where", [(["--replicas", "1"], "--replicas"),
                                         (["--seed", "-4"], "--seed"),
                                         (["--truth", "nowhere.yaml"], "--truth")])
def test_bad_options_exit_2_with_one_line(tmp_path, capsys, args, where):
    spec = write_spec(tmp_path, single_state(2, 300, tau=1.0), tmin=6, tmax=11)
    assert main(["calibrate", str(spec), "--quiet", "--jobs", "1", *args]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith(f"plateaufit: error: {where}")
    assert not (tmp_path / "results").exists()


def test_calibrate_spec_refuses_a_bad_count_before_fitting(tmp_path):
    spec = write_spec(tmp_path, single_state(2, 300, tau=1.0), tmin=6, tmax=11)
    with pytest.raises(SpecError):
        calibrate_spec(spec, 1.5)


@pytest.mark.slow   # a process pool
def test_replicas_on_a_process_pool_give_the_serial_numbers(tmp_path):
    from plateaufit.parallel import make_executor

    spec = load_spec(write_spec(tmp_path, single_state(4, 500, tau=1.0), tmin=6, tmax=11))
    _, serial = calibrate(spec, 6, seed=9, variants=False)
    with make_executor(jobs=2) as executor:
        _, pooled = calibrate(spec, 6, seed=9, executor=executor, variants=False)
    np.testing.assert_array_equal(pooled.fits["meson"].params["E0"].pulls,
                                  serial.fits["meson"].params["E0"].pulls)
    np.testing.assert_array_equal(pooled.fits["meson"].p_values, serial.fits["meson"].p_values)


def test_p_value_warnings_know_that_an_average_picks_small_chi2():
    from plateaufit.pipeline.calibration_summary import coverage_warnings
    from plateaufit.stats.coverage import p_value_uniformity

    rng = np.random.default_rng(1)
    high = np.sqrt(rng.random(200))           # leaning high: chi2 too small
    low = rng.random(200) ** 2                # leaning low: chi2 too large

    def fit(p):
        d, ks = p_value_uniformity(p)
        return FitCalibration(params={"E0": _pc(0.68, 0.95, 200)}, p_values=p,
                              ks_statistic=d, ks_p_value=ks)
    said = coverage_warnings({"a": fit(high), "b": fit(high), "c": fit(low)}, {}, 200,
                             averaged=["a", "c"])
    assert not any(w.startswith("fit a:") for w in said)       # selection, not a defect
    assert any(w.startswith("fit b:") and "overestimated" in w for w in said)
    assert any(w.startswith("fit c:") and "underestimated" in w for w in said)
    assert len(said) == 2
