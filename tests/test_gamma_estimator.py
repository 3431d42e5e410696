"""covariance.estimator: gamma -- the spec key, the fit core's covariance_matrix seam, the run."""

from __future__ import annotations

import numpy as np
import pytest
import yaml
from calibration_ensembles import single_state, write_spec

from plateaufit.errors import FitError, SpecError
from plateaufit.fit.correlator_fit import fit_correlator
from plateaufit.fit.scan import scan
from plateaufit.pipeline.rules import load_spec
from plateaufit.pipeline.run import run_analysis
from plateaufit.stats.covariance import covariance_of_mean
from plateaufit.stats.resample import bin_samples


@pytest.fixture(scope="module")
def binned():
    data = single_state(31, 1200, tau=1.0)[:, :17]      # the first half (no folding here)
    return bin_samples(data, 4)


def test_a_given_full_covariance_gives_the_same_fit_as_the_bins(binned):
    full = covariance_of_mean(binned, shrinkage="none")
    plain = fit_correlator(binned, form="cosh", states=1, tmin=5, tmax=11, time_extent=32,
                           shrinkage="none")
    given = fit_correlator(binned, form="cosh", states=1, tmin=5, tmax=11, time_extent=32,
                           covariance_matrix=full)
    np.testing.assert_allclose(given.covariance.matrix, plain.covariance.matrix, rtol=1e-12)
    for name in plain.names:
        assert given.values[name] == pytest.approx(plain.values[name], rel=1e-9)
        assert given.errors[name] == pytest.approx(plain.errors[name], rel=1e-6)
    assert given.chi2 == pytest.approx(plain.chi2, rel=1e-8)


def test_every_scan_point_takes_its_block(binned):
    rng = np.random.default_rng(3)
    a = rng.standard_normal((40, 17))
    full = covariance_of_mean(binned, shrinkage="none").matrix * (1 + 0.1 * np.corrcoef(a.T))
    fits = scan(binned, tmin=[4, 6], tmax=12, states=1, form="cosh", time_extent=32,
                covariance_matrix=full)
    for f in fits:
        np.testing.assert_array_equal(f.covariance.matrix,
                                      full[f.tmin:f.tmax + 1, f.tmin:f.tmax + 1])


def test_bad_covariance_matrix_and_per_sample_are_refused(binned):
    with pytest.raises(FitError) as err:
        fit_correlator(binned, form="cosh", states=1, tmin=5, tmax=11, time_extent=32,
                       covariance_matrix=np.eye(5))
    assert err.value.where == "covariance_matrix" and "17 timeslices" in err.value.message
    nan = np.full((17, 17), np.nan)
    with pytest.raises(FitError, match="non-finite"):
        fit_correlator(binned, form="cosh", states=1, tmin=5, tmax=11, time_extent=32,
                       covariance_matrix=nan)
    with pytest.raises(FitError) as err:
        fit_correlator(binned, form="cosh", states=1, tmin=5, tmax=11, time_extent=32,
                       covariance_matrix=np.eye(17), per_sample=True)
    assert err.value.where == "per_sample"


def test_spec_refuses_gamma_with_per_sample(tmp_path):
    path = write_spec(tmp_path, single_state(1, 200), covariance={"estimator": "gamma",
                                                                  "per_sample": True})
    with pytest.raises(SpecError) as err:
        load_spec(path)
    assert err.value.where.startswith("covariance.per_sample")
    assert "estimator: binned" in err.value.message
    spec = yaml.safe_load(path.read_text())
    spec["covariance"] = {"estimator": "bootstrap"}
    path.write_text(yaml.safe_dump(spec))
    with pytest.raises(SpecError) as err:
        load_spec(path)
    assert err.value.where.startswith("covariance.estimator")


def test_the_run_uses_the_gamma_covariance(tmp_path):
    data = single_state(5, 1500)
    gamma = load_spec(write_spec(tmp_path / "g", data, tmin=5, tmax=14,
                                 covariance={"estimator": "gamma"}))
    binned = load_spec(write_spec(tmp_path / "b", data, tmin=5, tmax=14))
    rg, rb = run_analysis(gamma), run_analysis(binned)
    fg, fb = rg.fits["meson"], rb.fits["meson"]
    # the same bins (so jackknife errors of the same size), another covariance
    assert rg.ensemble.n_bins == rb.ensemble.n_bins
    assert fg.chosen.point.chi2 != pytest.approx(fb.chosen.point.chi2, rel=1e-3)
    assert fg.chosen.params["E0"].value == pytest.approx(fb.chosen.params["E0"].value,
                                                         abs=3 * fb.chosen.params["E0"].error)
    assert 0.5 < fg.chosen.params["E0"].error / fb.chosen.params["E0"].error < 2.0
    assert fg.covariance.n_points == 10


def test_estimator_key_reaches_the_fit(tmp_path, monkeypatch):
    """covariance.estimator: gamma, through run_spec, equals the core called by hand."""
    import importlib

    from test_runner_end_to_end import (STREAMS, T, folded_binned, invented_spec,
                                        write_invented_data)
    from test_runner_end_to_end import write_spec as write_run_spec

    from plateaufit.data.transforms import fold
    from plateaufit.pipeline.run import run_spec
    from plateaufit.stats.gamma_covariance import gamma_covariance

    scan_module = importlib.import_module("plateaufit.fit.scan")
    calls = []
    real = scan_module.prepare_range

    def recording(binned, **kwargs):
        calls.append(kwargs.get("covariance_matrix"))
        return real(binned, **kwargs)

    monkeypatch.setattr(scan_module, "prepare_range", recording)
    write_invented_data(tmp_path)
    spec = invented_spec()
    spec["fits"] = [f for f in spec["fits"] if f["name"] == "eta"]
    spec["covariance"]["estimator"] = "gamma"
    results = run_spec(write_run_spec(tmp_path, spec), tmp_path / "out", plots=False, jobs=1,
                       progress=False)
    assert calls and all(c is not None for c in calls)
    # by hand: the Gamma-method covariance of the folded unbinned data over the fit's span
    fit_spec = spec["fits"][0]
    raw = fold(np.load(tmp_path / "eta.npy"), "periodic")
    lo, hi = fit_spec["tmin"], fit_spec["tmax"]
    est = gamma_covariance(raw[:, lo:hi + 1], np.repeat(np.arange(len(STREAMS)), STREAMS))
    full = np.full((raw.shape[1],) * 2, np.nan)
    full[lo:hi + 1, lo:hi + 1] = est.matrix
    binned = folded_binned(tmp_path, "eta", results["ensemble"]["bin_size"],
                           results["ensemble"]["binning_correction"])
    fit = fit_correlator({"eta": binned}, form="cosh", states=1, tmin=lo, tmax=hi,
                         time_extent=T, covariance_matrix=full)
    chosen = results["fits"]["eta"]["chosen"]["params"]
    for name in fit.model.reported_names:
        assert chosen[name]["value"] == pytest.approx(fit.central.reported[name], rel=1e-10)
        assert chosen[name]["error"] == pytest.approx(fit.errors[name], rel=1e-8)
    assert results["fits"]["eta"]["covariance"]["shrinkage"] == pytest.approx(est.shrinkage)
