"""Behaviour of correlated fits: priors, bounds, failures, refits, fit_correlator."""

from __future__ import annotations

import numpy as np
import pytest

from plateaufit.errors import FitError
from plateaufit.fit.central import correlated_fit
from plateaufit.fit.constraints import Prior, internal_bounds
from plateaufit.fit.correlator_fit import fit_correlator
from plateaufit.fit.refits import jackknife_refits
from plateaufit.fit.guesses import starting_values
from plateaufit.fit.models import make_model

T = 32


def _problem(seed=0, noise=0.02, states=2, t=np.arange(2.0, 16.0)):
    rng = np.random.default_rng(seed)
    model = make_model("cosh", states, ["a"], {"a": t}, T)
    truth = np.array([0.3, 0.8, 1.0, 0.5][: 2 * states]) if states == 2 else \
        np.array([0.3, 1.0])
    clean = model.predict(model.from_reported(truth))
    cov = np.outer(noise * clean, noise * clean) * 0.6 ** np.abs(np.subtract.outer(t, t))
    y = clean + rng.multivariate_normal(np.zeros(t.size), cov)
    return model, y, cov, t, truth


def _binned(seed=1, n_bins=50, n_t=17, states=2, noise=0.04, names=("pion",)):
    rng = np.random.default_rng(seed)
    t = np.arange(n_t)
    out = {}
    for i, name in enumerate(names):
        model = make_model("cosh", states, [name], {name: t}, T)
        phys = [0.3, 0.8, 1.0 + i, 0.5][: 2 * states] if states == 2 else [0.3, 1.0 + i]
        clean = model.predict(model.from_reported(np.array(phys)))
        corr = 0.7 ** np.abs(np.subtract.outer(t, t))
        out[name] = clean * (1 + noise * rng.multivariate_normal(np.zeros(n_t), corr,
                                                                  size=n_bins))
    return out


def test_huge_prior_changes_nothing():
    model, y, cov, t, _ = _problem()
    p0 = starting_values(model, y, t)
    free = correlated_fit(y, cov, model, p0, tol=1e-12)
    wide = correlated_fit(y, cov, model, p0, tol=1e-12,
                          priors={"E0": Prior(0.3, 1e6), "E1": (0.8, 1e6)})
    np.testing.assert_allclose(wide.values, free.values, rtol=1e-6)
    assert wide.n_priors == 2 and wide.chi2_prior < 1e-10
    assert wide.dof == free.dof            # priors are reported apart from dof


def test_tight_prior_pins_the_parameter():
    model, y, cov, t, _ = _problem()
    fit = correlated_fit(y, cov, model, starting_values(model, y, t),
                         priors={"E1": (1.2, 1e-6)})
    assert abs(fit.reported["E1"] - 1.2) < 1e-5
    assert fit.chi2_prior > 0 and np.isclose(fit.chi2, fit.chi2_data + fit.chi2_prior)
    assert np.sqrt(fit.param_covariance[1, 1]) < 2e-6


def test_bad_priors_and_bounds_name_the_key():
    model, y, cov, t, _ = _problem()
    p0 = starting_values(model, y, t)
    with pytest.raises(FitError) as err:
        correlated_fit(y, cov, model, p0, priors={"E5": (1, 1)})
    assert err.value.where == "priors.E5" and "E0" in err.value.message
    with pytest.raises(FitError) as err:
        correlated_fit(y, cov, model, p0, priors={"E0": (1, -1)})
    assert err.value.where == "priors.E0"
    with pytest.raises(FitError) as err:
        correlated_fit(y, cov, model, p0, bounds={"E0": (1, 0.5)})
    assert err.value.where == "bounds.E0"
    with pytest.raises(ValueError, match="width"):
        Prior(0.0, 0.0)


def test_bound_on_e0_is_respected_and_start_moved_inside():
    model, y, cov, t, _ = _problem()
    fit = correlated_fit(y, cov, model, starting_values(model, y, t),
                         bounds={"E0": (0.31, 0.5)})
    assert fit.converged and 0.31 <= fit.reported["E0"] <= 0.5
    assert fit.reported["E0"] == pytest.approx(0.31, abs=1e-6)   # truth 0.3 is outside


def test_bounds_on_higher_energies_act_on_gaps():
    model, *_ = _problem()
    lo, hi = internal_bounds(model, {"E0": (0.2, 0.4), "E1": (0.7, 1.0)})
    # gap = E1 - E0 in [0.7 - 0.4, 1.0 - 0.2]
    np.testing.assert_allclose([lo[0], hi[0], lo[1], hi[1]],
                               [0.2, 0.4, np.log(0.3), np.log(0.8)])
    with pytest.raises(FitError) as err:
        internal_bounds(model, {"E0": (0.5, 0.6), "E1": (0.1, 0.4)})
    assert err.value.where == "bounds.E1"


def test_singular_covariance_is_a_fit_error_naming_the_counts():
    model, y, cov, t, _ = _problem()
    bad = np.ones_like(cov)
    with pytest.raises(FitError, match=r"14 points from 9 bins"):
        correlated_fit(y, bad, model, starting_values(model, y, t), n_bins=9)
    with pytest.raises(FitError, match="14 points"):
        correlated_fit(y[:5], cov, model, starting_values(model, y, t))


def test_non_convergence_is_flagged_not_raised():
    model, y, cov, t, _ = _problem()
    p0 = starting_values(model, y, t) + np.array([0.5, 1.0, 3.0, -2.0])
    fit = correlated_fit(y, cov, model, p0, max_nfev=2)
    assert fit.converged is False and fit.message
    # a model that overflows at the start: flagged, with a message
    crazy = np.array([-500.0, 5.0, 1.0, 1.0])
    fit = correlated_fit(y, cov, model, crazy)
    assert fit.converged is False and "not finite" in fit.message


def test_lmfit_refits_reproduce_the_central_fit_of_each_sample():
    model, y, cov, t, _ = _problem()
    rng = np.random.default_rng(4)
    samples = y + rng.normal(scale=0.002, size=(6, y.size)) * y
    central = correlated_fit(y, cov, model, starting_values(model, y, t))
    refit = jackknife_refits(samples, model, central.theta, cov=cov, engine="lmfit")
    assert refit.engine == "lmfit" and refit.converged.all() and refit.n_fallback == 0
    sigma = np.sqrt(np.diag(central.param_covariance))
    for s in range(6):
        one = correlated_fit(samples[s], cov, model, central.theta)
        # both minimisers stop within a small fraction of a standard error of
        # the minimum (the central fit at CENTRAL_STAT_TOL, lmfit at its tol)
        assert np.all(np.abs(refit.reported[s] - one.values) <= 1e-4 * sigma)


def test_batched_engine_agrees_with_lmfit_loop():
    batched = pytest.importorskip("plateaufit.fit.batched")
    if not hasattr(batched, "batched_refits"):
        pytest.skip("batched_refits not available yet")
    model, y, cov, t, _ = _problem()
    rng = np.random.default_rng(5)
    samples = y + rng.normal(scale=0.01, size=(20, y.size)) * y
    central = correlated_fit(y, cov, model, starting_values(model, y, t))
    a = jackknife_refits(samples, model, central.theta, cov=cov, engine="lmfit")
    b = jackknife_refits(samples, model, central.theta, cov=cov, engine="batched")
    assert b.engine == "batched" and b.converged.all()
    # the engine's statistical stopping rule: within STAT_TOL (1e-5) standard
    # errors of the minimum, extrapolated; lmfit is much closer here
    sigma = np.sqrt(np.diag(central.param_covariance))
    assert np.all(np.abs(b.reported - a.reported) <= 2e-5 * sigma)
    # without the statistical rule the engine iterates to the rounding floor
    c = jackknife_refits(samples, model, central.theta, cov=cov, engine="batched", stol=None)
    np.testing.assert_allclose(c.reported, a.reported, rtol=1e-8)


def test_refits_with_a_broken_sample_covariance_fail_that_sample_only():
    model, y, cov, t, _ = _problem()
    samples = np.tile(y, (4, 1))
    cov_s = np.tile(cov, (4, 1, 1))
    cov_s[2] = np.ones_like(cov)         # not positive definite
    central = correlated_fit(y, cov, model, starting_values(model, y, t))
    refit = jackknife_refits(samples, model, central.theta, cov_samples=cov_s,
                             engine="lmfit")
    assert refit.converged.tolist() == [True, True, False, True]
    assert np.all(np.isnan(refit.reported[2])) and refit.n_failed == 1
    with pytest.raises(FitError, match="exactly one"):
        jackknife_refits(samples, model, central.theta)
    with pytest.raises(FitError) as err:
        jackknife_refits(samples, model, central.theta, cov=cov, engine="fast")
    assert err.value.where == "engine"


@pytest.mark.parametrize("engine", ["lmfit", "batched"])
def test_per_sample_covariances_flag_nan_and_indefinite_samples_alike(engine):
    model, y, cov, t, _ = _problem()
    rng = np.random.default_rng(6)
    samples = y + rng.normal(scale=0.002, size=(5, y.size)) * y
    cov_s = np.tile(cov, (5, 1, 1)) * (1.0 + 0.05 * np.arange(5))[:, None, None]
    cov_s[1, 0, 0] = np.nan                 # not finite
    cov_s[3] = -cov_s[3]                    # not positive definite
    central = correlated_fit(y, cov, model, starting_values(model, y, t))
    refit = jackknife_refits(samples, model, central.theta, cov_samples=cov_s, engine=engine)
    assert refit.converged.tolist() == [True, False, True, False, True]
    assert np.isnan(refit.reported[[1, 3]]).all()
    # every other sample is the correlated fit of its data with its own covariance
    for s in (0, 2, 4):
        one = correlated_fit(samples[s], cov_s[s], model, central.theta)
        sigma = np.sqrt(np.diag(one.param_covariance))
        assert np.all(np.abs(refit.reported[s] - one.values) <= 1e-4 * sigma)


def test_fit_correlator_records_what_results_need():
    binned = _binned()
    fit = fit_correlator(binned, form="cosh", states=2, tmin=3, tmax=15, time_extent=T,
                         engine="lmfit", start={"E1": 0.9})
    assert (fit.tmin, fit.tmax, fit.states, fit.form) == (3, 15, 2, "cosh")
    assert fit.names == ("E0", "E1", "A0.pion", "A1.pion")
    assert fit.samples.shape == (50, 4) and fit.param_covariance.shape == (4, 4)
    assert fit.converged and fit.n_refit_failed == 0 and fit.n_bins == 50
    assert fit.dof == 13 - 4 and fit.central.n_cut == 17 - 13
    assert fit.covariance.matrix.shape == (13, 13) and 0 <= fit.covariance.shrinkage <= 1
    np.testing.assert_allclose(np.sqrt(np.diag(fit.param_covariance)),
                               [fit.errors[n] for n in fit.names], rtol=1e-10)
    assert fit.aic == fit.central.aic and np.isfinite(fit.p_value_hotelling)


def test_fit_correlator_simultaneous_and_per_sample():
    binned = _binned(states=1, names=("ll", "ls"))
    fit = fit_correlator(binned, form="cosh", states=1, tmin=4, tmax=14, time_extent=T,
                         engine="lmfit", per_sample=True)
    assert fit.names == ("E0", "A0.ll", "A0.ls") and fit.per_sample
    assert fit.central.n_points == 22 and fit.central.n_cut == 34 - 22
    assert fit.converged
    assert abs(fit.values["E0"] - 0.3) < 3 * fit.errors["E0"]


def test_fit_correlator_plain_array_and_factorised():
    rng = np.random.default_rng(9)
    t = np.arange(17)
    ops = {"ll": ("l", "l"), "ls": ("l", "s"), "ss": ("s", "s")}
    model = make_model("cosh", 1, list(ops), {k: t for k in ops}, T, operators=ops)
    clean = model.predict(np.array([0.4, 1.2, 0.7])).reshape(3, -1)
    binned = {k: clean[i] * (1 + 0.02 * rng.normal(size=(40, 17)))
              for i, k in enumerate(ops)}
    fit = fit_correlator(binned, form="cosh", states=1, tmin=3, tmax=12, time_extent=T,
                         operators=ops, engine="lmfit")
    assert fit.names == ("E0", "Z0.l", "Z0.s") and fit.converged
    assert abs(abs(fit.values["Z0.l"]) - 1.2) < 4 * fit.errors["Z0.l"]
    single = fit_correlator(binned["ll"], form="cosh", states=1, tmin=3, tmax=12,
                            time_extent=T, engine="lmfit")
    assert single.names == ("E0", "A0.corr")


def test_fit_correlator_bad_ranges_are_fit_errors():
    binned = _binned(states=1)
    with pytest.raises(FitError) as err:
        fit_correlator(binned, form="cosh", states=1, tmin=3, tmax=17, time_extent=T)
    assert err.value.where == "tmax" and "3..16" in err.value.message
    with pytest.raises(FitError) as err:
        fit_correlator(binned, form="cosh", states=1, tmin=-1, tmax=10, time_extent=T)
    assert err.value.where == "tmin"
    with pytest.raises(FitError, match="3 points for 4 parameters"):
        fit_correlator(binned, form="cosh", states=2, tmin=5, tmax=7, time_extent=T)
    with pytest.raises(FitError, match="bins"):
        fit_correlator({"a": np.ones((5, 17)), "b": np.ones((6, 17))}, form="exp",
                       states=1, tmin=2, tmax=8, time_extent=T)


def test_formula_fit_equals_the_built_in_cosh_fit():
    # the same one-state cosh written as a formula must give the same fit
    binned = _binned(states=1)
    kw = dict(tmin=4, tmax=14, time_extent=T, engine="auto")
    built_in = fit_correlator(binned, form="cosh", states=1, **kw)
    formula = fit_correlator(binned, form="formula", states=1, **kw, formula={
        "expression": "amp * (exp(-m * t) + exp(-m * (T - t)))",
        "params": {"m": 0.25, "amp": 1.0}})
    assert formula.engine == "lmfit"          # numerical jacobian: no batched engine
    assert formula.names == ("m", "amp")
    np.testing.assert_allclose([formula.values["m"], formula.values["amp"]],
                               [built_in.values["E0"], built_in.values["A0.pion"]], rtol=1e-7)
    np.testing.assert_allclose(formula.errors["m"], built_in.errors["E0"], rtol=1e-5)
    np.testing.assert_allclose(formula.chi2, built_in.chi2, rtol=1e-8)


def test_a_fit_from_jackknife_samples_equals_the_fit_from_bins():
    # the pseudo-values of the jackknife samples of the mean are the bins again,
    # so a fit given only those samples (and the central values) is the same fit
    from plateaufit.stats.resample import jackknife_samples, pseudo_values

    binned = _binned()["pion"]
    plain = fit_correlator(binned, form="cosh", states=2, tmin=3, tmax=15, time_extent=T)
    from_samples = fit_correlator(pseudo_values(jackknife_samples(binned)), form="cosh",
                                  states=2, tmin=3, tmax=15, time_extent=T,
                                  central=binned.mean(axis=0))
    for name in plain.names:
        # equal up to where the minimisers stop (a small fraction of an error)
        assert abs(from_samples.values[name] - plain.values[name]) <= 1e-4 * plain.errors[name]
        assert from_samples.errors[name] == pytest.approx(plain.errors[name], rel=1e-4)
