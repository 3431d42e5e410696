"""Checks of the fitting core against sources outside the project.

Each assertion names its source: scipy (curve_fit, least_squares, chi2, f),
statsmodels (GLS), exact results (finite differences, noiseless data) or a
published formula.
"""

from __future__ import annotations

import numpy as np
import pytest

from plateaufit.fit.models import make_model

T = 32


def _finite_difference_jacobian(model, theta, h=1e-6):
    jac = np.zeros((model.n_points, model.n_params))
    for k in range(model.n_params):
        step = np.zeros(model.n_params)
        step[k] = h
        jac[:, k] = (model.predict(theta + step) - model.predict(theta - step)) / (2 * h)
    return jac


@pytest.mark.parametrize("form", ["exp", "cosh", "sinh"])
@pytest.mark.parametrize("extras", [
    {},
    {"oscillating": 2, "constant": True},
    {"oscillating": 1, "operators": {"a": ("x", "x"), "b": ("x", "y"), "c": ("y", "y")}},
])
def test_analytic_jacobian_equals_finite_differences(form, extras):
    # exact: central finite differences, error O(h^2) ~ 1e-12 relative
    rng = np.random.default_rng(11)
    tr = {"a": np.arange(3, 10), "b": np.arange(2, 8), "c": np.arange(4, 14)}
    model = make_model(form, 3, ["a", "b", "c"], tr, T, **extras)
    theta = rng.normal(scale=0.3, size=model.n_params)
    theta[0] = 0.4
    jac = model.jacobian(theta)
    np.testing.assert_allclose(jac, _finite_difference_jacobian(model, theta),
                               atol=1e-8 * np.abs(jac).max())


@pytest.mark.parametrize("form", ["cosh", "exp"])
def test_physical_jacobian_equals_finite_differences(form):
    # exact: central finite differences of to_reported
    rng = np.random.default_rng(12)
    model = make_model(form, 3, ["a"], {"a": np.arange(2, 9)}, T, oscillating=2)
    theta = rng.normal(scale=0.5, size=model.n_params)
    num = np.zeros((model.n_params, model.n_params))
    for k in range(model.n_params):
        step = np.zeros(model.n_params)
        step[k] = 1e-6
        num[:, k] = (model.to_reported(theta + step) - model.to_reported(theta - step)) / 2e-6
    np.testing.assert_allclose(model.reported_jacobian(theta), num, atol=1e-8)


def test_formula_numerical_jacobian_equals_analytic_derivative():
    # exact: d/dm [a exp(-m t)] = -t a exp(-m t), d/da = exp(-m t)
    model = make_model("formula", 1, ["a"], {"a": np.arange(1, 12)}, T,
                       formula={"expression": "a * exp(-m * t)", "params": {"a": 1, "m": 1}})
    a, m = 1.7, 0.35
    t = np.arange(1, 12)
    expect = np.stack([np.exp(-m * t), -t * a * np.exp(-m * t)], axis=-1)
    np.testing.assert_allclose(model.jacobian([a, m]), expect, rtol=1e-8)


# ---------------------------------------------------------------------------
# correlated fits against scipy and statsmodels
# ---------------------------------------------------------------------------
import scipy.optimize  # noqa: E402
import scipy.stats  # noqa: E402

from plateaufit.fit.central import correlated_fit  # noqa: E402
from plateaufit.fit.correlator_fit import fit_correlator  # noqa: E402
from plateaufit.fit.criteria import aic, hotelling_p_value  # noqa: E402
from plateaufit.fit.guesses import starting_values  # noqa: E402


def _correlated_cov(t, sigma, rho=0.7):
    """An invented, strongly correlated covariance: sigma_i sigma_j rho^|t_i - t_j|."""
    return np.outer(sigma, sigma) * rho ** np.abs(np.subtract.outer(t, t))


def test_correlated_linear_fit_equals_statsmodels_gls():
    pytest.importorskip("statsmodels")
    import statsmodels.api as sm

    rng = np.random.default_rng(21)
    t = np.arange(2.0, 14.0)
    cov = _correlated_cov(t, 0.05 + 0.01 * t)
    y = 1.3 - 0.07 * t + rng.multivariate_normal(np.zeros(t.size), cov)
    model = make_model("formula", 1, ["x"], {"x": t}, T,
                       formula={"expression": "a + b * t", "params": {"a": 0.0, "b": 0.0}})
    fit = correlated_fit(y, cov, model, np.zeros(2))
    gls = sm.GLS(y, np.column_stack([np.ones_like(t), t]), sigma=cov).fit()
    # statsmodels GLS: identical parameters; normalized_cov_params is (X^T C^-1 X)^-1,
    # the covariance with a known (not re-estimated) scale
    np.testing.assert_allclose(fit.values, gls.params, rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(fit.param_covariance, gls.normalized_cov_params, rtol=1e-7)
    # and its chi2 is GLS's weighted sum of squared residuals (scale * dof)
    np.testing.assert_allclose(fit.chi2, gls.scale * gls.df_resid, rtol=1e-9)
    assert fit.converged


def test_single_exponential_equals_scipy_curve_fit_with_full_covariance():
    rng = np.random.default_rng(22)
    t = np.arange(3.0, 15.0)
    truth_a, truth_e = 2.0, 0.31
    clean = truth_a * np.exp(-truth_e * t)
    cov = _correlated_cov(t, 0.02 * clean, rho=0.8)
    y = clean + rng.multivariate_normal(np.zeros(t.size), cov)
    model = make_model("exp", 1, ["pion"], {"pion": t}, T)
    fit = correlated_fit(y, cov, model, starting_values(model, y, t), tol=1e-12)

    def f(tt, a, e):
        return a * np.exp(-e * tt)

    def jac(tt, a, e):
        return np.column_stack([np.exp(-e * tt), -tt * a * np.exp(-e * tt)])

    popt, pcov = scipy.optimize.curve_fit(f, t, y, p0=[1.5, 0.25], sigma=cov,
                                          absolute_sigma=True, jac=jac,
                                          ftol=1e-15, xtol=1e-15, gtol=1e-15)
    # scipy.optimize.curve_fit with a 2-d sigma (full covariance), absolute_sigma=True:
    # reported order is (E0, A0.pion)
    np.testing.assert_allclose(fit.values, [popt[1], popt[0]], rtol=1e-6)
    swap = np.array([[0, 1], [1, 0]])
    np.testing.assert_allclose(fit.param_covariance, swap @ pcov @ swap, rtol=1e-6)


def test_chi2_and_p_value_equal_the_direct_formula_and_scipy_chi2():
    rng = np.random.default_rng(23)
    t = np.arange(2.0, 12.0)
    model = make_model("cosh", 1, ["a"], {"a": t}, T)
    clean = model.predict(np.array([0.4, 1.0]))
    cov = _correlated_cov(t, 0.03 * clean)
    y = clean + rng.multivariate_normal(np.zeros(t.size), cov)
    fit = correlated_fit(y, cov, model, starting_values(model, y, t), n_bins=40)
    r = y - model.predict(fit.theta)
    chi2 = r @ np.linalg.solve(cov, r)           # exact: the definition, without Cholesky
    np.testing.assert_allclose(fit.chi2, chi2, rtol=1e-10)
    assert fit.dof == t.size - 2
    # scipy.stats.chi2 survival function
    np.testing.assert_allclose(fit.p_value, scipy.stats.chi2.sf(chi2, t.size - 2), rtol=1e-10)


@pytest.mark.parametrize("n_bins, dof, chi2", [(40, 8, 11.3), (12, 5, 3.1), (200, 20, 40.0)])
def test_hotelling_p_value_equals_f_distribution_formula(n_bins, dof, chi2):
    # H. Hotelling, "The generalization of Student's ratio", Ann. Math. Statist. 2 (1931)
    # 360: (N - d) / (d (N - 1)) T^2 ~ F(d, N - d); computed here with scipy.stats.f
    stat = (n_bins - dof) / (dof * (n_bins - 1)) * chi2
    expect = scipy.stats.f.sf(stat, dof, n_bins - dof)
    np.testing.assert_allclose(hotelling_p_value(chi2, dof, n_bins), expect, rtol=1e-12)
    # the estimated covariance makes large chi2 less surprising than the chi2 law says
    assert hotelling_p_value(chi2, dof, n_bins) > scipy.stats.chi2.sf(chi2, dof) or chi2 < dof


def test_hotelling_p_value_undefined_without_enough_bins():
    # Hotelling (1931): F(d, N - d) needs N > d
    assert np.isnan(hotelling_p_value(3.0, 8, 8))
    assert np.isnan(hotelling_p_value(3.0, 8, None))


def test_central_fit_uses_hotelling_with_the_bin_count():
    t = np.arange(2.0, 12.0)
    model = make_model("exp", 1, ["a"], {"a": t}, T)
    clean = model.predict(np.array([0.4, 1.0]))
    y = clean * (1 + 0.01 * np.sin(t))
    cov = np.diag((0.01 * clean) ** 2)
    fit = correlated_fit(y, cov, model, starting_values(model, y, t), n_bins=30)
    # Hotelling (1931) via scipy.stats.f, N = 30, d = 8
    expect = scipy.stats.f.sf((30 - 8) / (8 * 29) * fit.chi2_data, 8, 22)
    np.testing.assert_allclose(fit.p_value_hotelling, expect, rtol=1e-12)


def test_aic_has_the_data_subset_penalty():
    # W. I. Jay, E. T. Neil, Phys. Rev. D 103 (2021) 114502: AIC = chi2 + 2k + 2 n_cut
    t = np.arange(4.0, 12.0)
    model = make_model("exp", 1, ["a"], {"a": t}, T)
    clean = model.predict(np.array([0.4, 1.0]))
    y = clean * (1 + 0.01 * np.cos(t))
    fit = correlated_fit(y, np.diag((0.01 * clean) ** 2), model,
                         starting_values(model, y, t), n_total_points=17)
    assert fit.n_cut == 17 - 8
    np.testing.assert_allclose(fit.aic, fit.chi2 + 2 * 2 + 2 * 9, rtol=1e-14)
    assert aic(5.0, 3, 4) == 5.0 + 6 + 8


def test_simultaneous_fit_equals_stacked_least_squares_by_hand():
    rng = np.random.default_rng(24)
    ta, tb = np.arange(3.0, 12.0), np.arange(2.0, 10.0)
    e0, aa, ab = 0.35, 1.5, 0.4
    clean = np.concatenate([aa * np.exp(-e0 * ta), ab * np.exp(-e0 * tb)])
    t_all = np.concatenate([ta, tb])
    cov = _correlated_cov(t_all, 0.02 * clean, rho=0.5)
    cov[: ta.size, ta.size:] *= 0.5                 # weaker cross-correlation
    cov[ta.size:, : ta.size] *= 0.5
    y = clean + rng.multivariate_normal(np.zeros(clean.size), cov)
    model = make_model("exp", 1, ["a", "b"], {"a": ta, "b": tb}, T)
    fit = correlated_fit(y, cov, model, starting_values(
        model, {"a": y[:9], "b": y[9:]}, {"a": ta, "b": tb}))

    # scipy.optimize.least_squares on the stacked chi2, whitened by hand
    winv = np.linalg.inv(np.linalg.cholesky(cov))

    def resid(p):
        e, a1, a2 = p
        return winv @ (np.concatenate([a1 * np.exp(-e * ta), a2 * np.exp(-e * tb)]) - y)

    ref = scipy.optimize.least_squares(resid, [0.3, 1.0, 1.0], xtol=1e-15, ftol=1e-15,
                                       gtol=1e-15, method="lm")
    np.testing.assert_allclose(fit.values, ref.x, rtol=1e-8)
    np.testing.assert_allclose(fit.chi2, 2 * ref.cost, rtol=1e-10)

    # exact: the information on E0 from both observables is at least that of either
    err_joint = np.sqrt(fit.param_covariance[0, 0])
    for name, sl, tt in (("a", slice(0, 9), ta), ("b", slice(9, 17), tb)):
        alone = make_model("exp", 1, [name], {name: tt}, T)
        one = correlated_fit(y[sl], cov[sl, sl], alone, starting_values(alone, y[sl], tt))
        assert err_joint <= np.sqrt(one.param_covariance[0, 0]) * (1 + 1e-12)


@pytest.mark.parametrize("form", ["exp", "cosh"])
def test_two_state_fit_of_noiseless_data_recovers_the_truth(form):
    # exact: noiseless two-state data are reproduced by the true parameters (chi2 = 0)
    t = np.arange(1.0, 16.0)
    model = make_model(form, 2, ["a"], {"a": t}, T)
    truth = np.array([0.3, 0.75, 1.0, 0.6])
    y = model.predict(model.from_reported(truth))
    cov = _correlated_cov(t, 0.01 * y, rho=0.4)
    fit = correlated_fit(y, cov, model, starting_values(model, y, t), tol=1e-12)
    assert fit.converged
    np.testing.assert_allclose(fit.values[:2], truth[:2], rtol=1e-8)
    np.testing.assert_allclose(fit.values, truth, rtol=1e-7)
    assert fit.chi2 < 1e-12


def test_fit_correlator_recovers_invented_truth_within_three_sigma():
    # exact truth: the data are generated from known parameters with a fixed seed
    rng = np.random.default_rng(25)
    n_t, n_bins = 17, 80
    t = np.arange(n_t)
    truth = {"E0": 0.28, "E1": 0.8, "A0.pion": 1.0, "A1.pion": 0.7}
    model = make_model("cosh", 2, ["pion"], {"pion": t}, T)
    clean = model.predict(model.from_reported([truth[n] for n in model.reported_names]))
    corr = 0.7 ** np.abs(np.subtract.outer(t, t))
    noise = rng.multivariate_normal(np.zeros(n_t), corr, size=n_bins)
    binned = clean * (1 + 0.04 * noise)
    fit = fit_correlator({"pion": binned}, form="cosh", states=2, tmin=2, tmax=16,
                         time_extent=T, engine="lmfit")
    assert fit.converged and fit.n_refit_failed == 0
    for name in ("E0", "A0.pion"):
        assert abs(fit.values[name] - truth[name]) < 3 * fit.errors[name], name
    # the jackknife error of E0 is close to the curvature error of the central fit
    np.testing.assert_allclose(fit.errors["E0"], np.sqrt(fit.central.param_covariance[0, 0]),
                               rtol=0.35)
