"""Derived quantities checked against exact results, the delta method and astropy.

Sources:
* exact: for a linear ``f = g . x + c`` the jackknife samples of ``f`` are
  ``g . x_k + c``, so its jackknife variance is exactly ``g^T C g`` with ``C``
  the jackknife covariance of the inputs (linearity of the sample mean);
* B. Efron, "The Jackknife, the Bootstrap and Other Resampling Plans", SIAM
  (1982): for a smooth function of means the jackknife variance agrees, to
  leading order in 1/n, with the delta-method (infinitesimal jackknife)
  variance ``g^T Sigma g / n``;
* astropy.stats.jackknife_stats, a general-purpose delete-one jackknife;
* exact: the ratio of two perfectly correlated quantities ``y = 3 x`` is 3 in
  every jackknife sample, so its jackknife error is 0.

The data are invented: correlated Gaussian pairs with a fixed seed.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from astropy.stats import jackknife_stats

from plateaufit.fit.derived import DerivedInput, evaluate_derived

SEED = 19_82


def _correlated_means(n: int, seed: int = SEED) -> np.ndarray:
    """(n, 2) invented measurements of two positive, correlated quantities."""
    rng = np.random.default_rng(seed)
    cov = np.array([[0.04, 0.018], [0.018, 0.09]])
    return rng.multivariate_normal([1.3, 2.1], cov, size=n)


def _delete_one_means(data: np.ndarray) -> np.ndarray:
    """Jackknife samples of the column means: mean of all rows but row k (numpy only)."""
    n = data.shape[0]
    return (data.sum(axis=0)[None, :] - data) / (n - 1)


def _inputs(data: np.ndarray, names=("m.x", "m.y"), sys=(0.0, 0.0)) -> dict[str, DerivedInput]:
    jk = _delete_one_means(data)
    mean = data.mean(axis=0)
    return {name: DerivedInput(float(mean[i]), jk[:, i], sys[i]) for i, name in enumerate(names)}


def test_linear_combination_equals_exact_propagation_with_the_jackknife_covariance():
    data = _correlated_means(400)
    jk = _delete_one_means(data)
    n = jk.shape[0]
    dev = jk - jk.mean(axis=0)
    cov_jk = (n - 1) / n * dev.T @ dev
    g = np.array([2.5, -1.5])
    result = evaluate_derived("2.5 * m.x - 1.5 * m.y + 7", _inputs(data))
    # exact: linear f, jackknife variance = g^T C_jk g (the correlation term included)
    assert result.stat_error == pytest.approx(math.sqrt(g @ cov_jk @ g), rel=1e-12)
    assert result.value == pytest.approx(g @ data.mean(axis=0) + 7, rel=1e-14)
    # the correlation matters here: without the off-diagonal term the error differs
    uncorrelated = math.sqrt(g ** 2 @ np.diag(cov_jk))
    assert abs(result.stat_error - uncorrelated) > 0.1 * uncorrelated


def test_ratio_agrees_with_the_delta_method():
    data = _correlated_means(4000)
    n = data.shape[0]
    mx, my = data.mean(axis=0)
    sigma = np.cov(data.T)            # per-measurement covariance
    r = my / mx
    grad = np.array([-my / mx ** 2, 1.0 / mx])
    # Efron (1982): delta-method variance of f(means) = g^T Sigma g / n
    delta = math.sqrt(grad @ sigma @ grad / n)
    result = evaluate_derived("m.y / m.x", _inputs(data))
    assert result.value == pytest.approx(r, rel=1e-14)
    assert result.stat_error == pytest.approx(delta, rel=0.03)


def test_ratio_agrees_with_astropy_jackknife_stats():
    data = _correlated_means(300, seed=SEED + 1)

    def ratio(d: np.ndarray) -> float:
        return d[:, 1].mean() / d[:, 0].mean()

    # astropy.stats.jackknife_stats resamples 1-d data: resample the row indices
    rows = np.arange(data.shape[0])
    _, _, astropy_error, _ = jackknife_stats(rows, lambda idx: ratio(data[idx.astype(int)]),
                                             0.95)
    result = evaluate_derived("m.y / m.x", _inputs(data))
    assert result.stat_error == pytest.approx(float(astropy_error), rel=1e-10)
    assert result.value == pytest.approx(ratio(data), rel=1e-14)


def test_perfectly_correlated_ratio_has_zero_stat_error():
    data = _correlated_means(200)[:, :1]
    both = np.hstack([data, 3.0 * data])
    result = evaluate_derived("m.y / m.x", _inputs(both))
    # exact: (3 x_k) / x_k = 3 in every sample (up to rounding of the sample means)
    assert result.value == pytest.approx(3.0, rel=1e-14)
    assert result.stat_error < 1e-13
    # the same inputs with the correlation broken (y's samples permuted) have a clear
    # error, the first-order one from their jackknife covariance (Efron 1982)
    inputs = _inputs(both)
    rng = np.random.default_rng(SEED)
    y = inputs["m.y"]
    inputs["m.y"] = DerivedInput(y.value, rng.permutation(y.samples), 0.0)
    broken = evaluate_derived("m.y / m.x", inputs)
    jk = np.column_stack([inputs["m.x"].samples, inputs["m.y"].samples])
    dev = jk - jk.mean(axis=0)
    cov_jk = (jk.shape[0] - 1) / jk.shape[0] * dev.T @ dev
    x0 = inputs["m.x"].value
    grad = np.array([-3.0 / x0, 1.0 / x0])
    assert broken.stat_error == pytest.approx(math.sqrt(grad @ cov_jk @ grad), rel=0.02)
    assert broken.stat_error > 0.01     # about sqrt(2) * 3 * 0.2 / 1.3 / sqrt(200)


def test_systematic_errors_propagate_linearly_in_quadrature():
    data = _correlated_means(100)
    inputs = _inputs(data, sys=(0.01, 0.03))
    mx, my = inputs["m.x"].value, inputs["m.y"].value
    diff = evaluate_derived("m.y - 2 * m.x", inputs)
    # exact for a linear f: sys^2 = sum (df/dx_i)^2 sys_i^2
    assert diff.sys_error == pytest.approx(math.hypot(2 * 0.01, 0.03), rel=1e-8)
    ratio = evaluate_derived("m.y / m.x", inputs)
    # first-order propagation with the exact derivatives of y/x
    expected = math.hypot(my / mx ** 2 * 0.01, 0.03 / mx)
    assert ratio.sys_error == pytest.approx(expected, rel=1e-7)
    assert ratio.error == pytest.approx(math.hypot(ratio.stat_error, ratio.sys_error), rel=1e-15)
