"""The windowed autocorrelation-matrix covariance of the mean against outside sources.

Sources: plateaufit.stats.autocorr.tau_int (the Gamma method for one series,
itself checked against emcee and AR(1) in test_autocorr_reference.py);
statsmodels (tsa.stattools.acovf / ccovf and the HAC sum
stats.sandwich_covariance.S_hac_simple); exact results for i.i.d. data and a
vector AR(1) process.

Vector AR(1): x_t = phi x_{t-1} + e_t with innovation covariance Sigma_e has
Gamma(0) = Sigma_e / (1 - phi^2), Gamma(tau) = phi^|tau| Gamma(0), hence the
long-run covariance sum_tau Gamma(tau) = Gamma(0) (1 + phi) / (1 - phi)
(exact result; Brockwell & Davis, "Time Series: Theory and Methods", 1991).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.signal import lfilter
from statsmodels.stats.sandwich_covariance import S_hac_simple, weights_uniform
from statsmodels.tsa.stattools import acovf, ccovf

from plateaufit.stats.autocorr import tau_int
from plateaufit.stats.gamma_covariance import gamma_covariance

SIGMA_E = np.array([[1.0, 0.6, -0.3], [0.6, 2.0, 0.2], [-0.3, 0.2, 0.5]])


def var1(phi: float, n: int, seed: int, sigma_e: np.ndarray = SIGMA_E) -> np.ndarray:
    """Stationary vector AR(1) with a common coefficient phi."""
    rng = np.random.default_rng(seed)
    e = rng.standard_normal((n, sigma_e.shape[0])) @ np.linalg.cholesky(sigma_e).T
    e[0] /= np.sqrt(1.0 - phi**2)  # stationary start
    return lfilter([1.0], [1.0, -phi], e, axis=0)


def andrews_sd(long_run: np.ndarray, window: int, n: int) -> np.ndarray:
    """Standard error of a truncated-kernel long-run covariance estimate, per element.

    Var(S_ij) ~ (2W + 1)/N (S_ii S_jj + S_ij^2) for the truncated kernel
    (D. W. K. Andrews, Econometrica 59 (1991) 817, Proposition 1(b); formula
    from memory, checked by us to be ~7 % conservative on this process).
    """
    d = np.diag(long_run)
    return np.sqrt((2 * window + 1) / n * (np.outer(d, d) + long_run**2))


def test_diagonal_equals_tau_int_variance_of_the_mean_at_the_same_window():
    x = var1(0.8, 20_000, seed=1)
    res = gamma_covariance(x, shrinkage="none")
    k = res.component
    r = tau_int(x[:, k])
    # the chosen component: the same window, the same bias correction -> round-off
    assert r.window == res.window
    assert res.matrix[k, k] == pytest.approx(r.value_error**2, rel=1e-10)  # source: tau_int
    assert res.tau == pytest.approx(r.tau, rel=1e-10)
    # every component, at the common window, from tau_int's rho output
    # (bias correction off, so rho = Gamma/Gamma(0) and value_error^2 = 2 tau Gamma(0) / N)
    raw = gamma_covariance(x, shrinkage="none", bias_correction=False, window=res.window)
    for j in range(x.shape[1]):
        rj = tau_int(x[:, j], bias_correction=False)
        assert len(rj.tau_by_window) > res.window
        gamma0 = rj.value_error**2 * x.shape[0] / (2 * rj.tau)
        expected = 2 * rj.tau_by_window[res.window] * gamma0 / x.shape[0]
        assert raw.matrix[j, j] == pytest.approx(expected, rel=1e-10)  # source: tau_int


def test_diagonal_equals_tau_int_with_two_streams():
    x = np.concatenate([var1(0.7, 9_000, seed=2), var1(0.7, 6_000, seed=3) + 0.05])
    labels = np.repeat([4, 9], [9_000, 6_000])
    res = gamma_covariance(x, labels, shrinkage="none")
    r = tau_int(x[:, res.component], streams=labels)
    assert r.window == res.window
    # source: tau_int with Wolff's replica formulas
    assert res.matrix[res.component, res.component] == pytest.approx(r.value_error**2, rel=1e-10)


def test_matches_statsmodels_acovf_ccovf_and_hac_sum():
    x = var1(0.6, 5_000, seed=4)
    n = x.shape[0]
    res = gamma_covariance(x, shrinkage="none", bias_correction=False)
    w = res.window
    p = x.shape[1]
    # statsmodels cross-covariances with the n - k denominators ("adjusted"):
    # ccovf(a, b)[k] = sum_t (a_{t+k} - abar)(b_t - bbar) / (n - k)
    ref = np.empty((p, p))
    for i in range(p):
        for j in range(p):
            fwd = ccovf(x[:, j], x[:, i], adjusted=True)[: w + 1]  # Gamma_ij(tau >= 0)
            bwd = ccovf(x[:, i], x[:, j], adjusted=True)[1 : w + 1]  # Gamma_ij(tau < 0)
            ref[i, j] = (fwd.sum() + bwd.sum()) / n
    np.testing.assert_allclose(res.raw_matrix, ref, rtol=1e-9)  # source: statsmodels ccovf
    for i in range(p):
        g = acovf(x[:, i], adjusted=True, fft=True)
        assert res.raw_matrix[i, i] == pytest.approx((g[0] + 2 * g[1 : w + 1].sum()) / n, rel=1e-9)  # acovf
    # the HAC "inner" sum S = sum_lag w_lag (X_{t+lag}^T X_t + transpose) of demeaned data:
    # with weights n / (n - lag) it is our estimator times n^2 (round-off) ...
    d = x - x.mean(axis=0)
    hac = S_hac_simple(d, nlags=w, weights_func=lambda m: n / (n - np.arange(m + 1.0)))
    np.testing.assert_allclose(res.raw_matrix, hac / n**2, rtol=1e-9)  # source: statsmodels
    # ... and with statsmodels' own uniform weights (denominator n at every lag) it
    # differs only by the O(W / N) end effect
    hac_u = S_hac_simple(d, nlags=w, weights_func=weights_uniform) / n**2
    scale = np.sqrt(np.outer(np.diag(hac_u), np.diag(hac_u)))
    assert np.max(np.abs(res.raw_matrix - hac_u) / scale) < 2 * w / n  # source: statsmodels


def test_iid_data_give_the_ordinary_covariance_of_the_mean():
    rng = np.random.default_rng(5)
    n = 40_000
    cov = np.array([[2.0, 0.9, 0.1, 0.0], [0.9, 1.0, 0.3, 0.2], [0.1, 0.3, 0.5, -0.1], [0.0, 0.2, -0.1, 1.5]])
    x = rng.multivariate_normal(np.zeros(4), cov, size=n)
    res = gamma_covariance(x, shrinkage="none")
    ordinary = np.cov(x, rowvar=False) / n  # source: numpy, the i.i.d. covariance of the mean
    # exact for i.i.d. data: every Gamma(tau != 0) has mean 0 and standard error
    # sqrt(Gamma_ii Gamma_jj / N); the 2W lag terms add a relative error ~ sqrt(2W / N)
    scale = np.sqrt(np.outer(np.diag(ordinary), np.diag(ordinary)))
    tol = 5 * np.sqrt((2 * res.window + 1) / n)
    assert np.max(np.abs(res.matrix - ordinary) / scale) < tol
    assert res.window <= 5  # no autocorrelation: Wolff's window stops early
    np.testing.assert_allclose(res.taus, 0.5, atol=5 * np.sqrt((2 * res.window + 1) / n))


@pytest.mark.parametrize("phi, n, streams", [(0.8, 60_000, None), (0.9, 80_000, (50_000, 30_000))])
def test_vector_ar1_long_run_covariance_is_recovered(phi, n, streams):
    if streams is None:
        x, labels = var1(phi, n, seed=6), None
    else:
        x = np.concatenate([var1(phi, streams[0], seed=7), var1(phi, streams[1], seed=8)])
        labels = np.repeat([0, 1], streams)
    res = gamma_covariance(x, labels, shrinkage="none")
    gamma0 = SIGMA_E / (1.0 - phi**2)
    exact = gamma0 * (1.0 + phi) / (1.0 - phi)  # exact result, vector AR(1)
    sd = andrews_sd(exact, res.window, n)
    z = (res.matrix * n - exact) / sd
    assert np.max(np.abs(z)) < 4.0  # within 4 standard errors (Andrews 1991)
    tau_exact = (1 + phi) / (2 * (1 - phi))  # every component, exact
    assert res.tau == pytest.approx(tau_exact, abs=4 * res.tau_error)
    assert res.n_clipped == 0
