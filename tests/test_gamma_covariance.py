"""Behaviour of the covariance of the mean from the autocorrelation matrix."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.signal import lfilter

from plateaufit.errors import DataError, FitError, SpecError
from plateaufit.stats import GammaCovariance, ShortChainWarning, gamma_covariance
from plateaufit.stats.autocov_matrix import common_window, lagged_covariances


def correlated_chain(n: int, p: int, phi: float, seed: int, rho: float = 0.6) -> np.ndarray:
    """AR(1) in Monte Carlo time, equicorrelated innovations across components."""
    rng = np.random.default_rng(seed)
    cov = np.full((p, p), rho) + (1 - rho) * np.eye(p)
    e = rng.standard_normal((n, p)) @ np.linalg.cholesky(cov).T
    e[0] /= np.sqrt(1 - phi**2)
    return 3.0 + lfilter([1.0], [1.0, -phi], e, axis=0) * np.linspace(1, 50, p)


def brute_force(x: np.ndarray, blocks, window: int) -> np.ndarray:
    """sum_{|tau|<=W} Gamma(tau) by the definition: loops over lags and streams."""
    d = x - x.mean(axis=0)
    p = x.shape[1]
    total = np.zeros((p, p))
    for tau in range(window + 1):
        acc = np.zeros((p, p))
        pairs = 0
        for a, b in blocks:
            if b - a > tau:
                acc += d[a : b - tau].T @ d[a + tau : b]
                pairs += b - a - tau
        g = acc / pairs
        total += g if tau == 0 else g + g.T
    return total


def test_window_sum_matches_the_definition_with_streams():
    x = correlated_chain(700, 4, 0.7, seed=1)
    blocks = [(0, 300), (300, 310), (310, 700)]  # a very short middle stream
    for window in (0, 1, 7, 9, 15, 80):
        g0, lag = lagged_covariances(x - x.mean(axis=0), blocks, window)
        np.testing.assert_allclose(g0 + lag + lag.T, brute_force(x, blocks, window), rtol=1e-10, atol=1e-12)


def test_result_is_symmetric_positive_definite_and_class_agrees():
    x = correlated_chain(3000, 6, 0.8, seed=2)
    res = gamma_covariance(x)
    assert np.array_equal(res.matrix, res.matrix.T)
    assert np.linalg.eigvalsh(res.matrix)[0] > 0
    assert res.window >= 1 and 0 <= res.component < 6
    assert res.tau == pytest.approx(res.taus[res.component])
    est = GammaCovariance().fit(x)
    np.testing.assert_array_equal(est.covariance_, res.matrix)
    assert est.window_ == res.window and est.tau_ == res.tau
    assert "GammaCovariance(" in repr(est)


def test_stream_order_does_not_matter():
    """Lags never cross a boundary: reordering whole streams changes nothing."""
    x = correlated_chain(1200, 3, 0.85, seed=3)
    labels = np.repeat([0, 1], [500, 700])
    swapped = np.concatenate([x[500:], x[:500]])
    a = gamma_covariance(x, labels, shrinkage="none")
    b = gamma_covariance(swapped, np.repeat([1, 0], [700, 500]), shrinkage="none")
    assert a.window == b.window
    np.testing.assert_allclose(a.matrix, b.matrix, rtol=1e-10)
    # and one stream differs: the boundary pair is counted there
    c = gamma_covariance(x, shrinkage="none", window=a.window)
    assert not np.allclose(a.raw_matrix, c.raw_matrix, rtol=1e-6)


def test_forced_window_is_used():
    x = correlated_chain(2000, 3, 0.5, seed=4)
    r5 = gamma_covariance(x, window=5, shrinkage="none")
    r0 = gamma_covariance(x, window=0, shrinkage="none", bias_correction=False)
    assert r5.window == 5 and r0.window == 0
    d = x - x.mean(axis=0)
    np.testing.assert_allclose(r0.raw_matrix, d.T @ d / 2000 / 2000, rtol=1e-12)
    np.testing.assert_allclose(r0.taus, 0.5)


def test_shrinkage_keeps_variances_and_is_reported():
    x = correlated_chain(3000, 10, 0.6, seed=5, rho=0.3)
    none = gamma_covariance(x, shrinkage="none")
    lw = gamma_covariance(x, shrinkage="ledoit-wolf")
    fixed = gamma_covariance(x, shrinkage=0.25)
    assert none.shrinkage == 0.0 and 0.0 < lw.shrinkage <= 1.0 and fixed.shrinkage == 0.25
    assert lw.n_clipped == 0 and fixed.n_clipped == 0
    np.testing.assert_allclose(np.diag(lw.matrix), np.diag(lw.raw_matrix), rtol=1e-12)
    off = ~np.eye(10, dtype=bool)
    np.testing.assert_allclose(fixed.matrix[off], 0.75 * fixed.raw_matrix[off], rtol=1e-10)
    np.testing.assert_allclose(np.diag(fixed.matrix), np.diag(fixed.raw_matrix), rtol=1e-12)
    assert lw.condition_number < none.condition_number


def test_indefinite_window_sum_is_made_positive_definite_and_reported():
    # few configurations, many components, a long window: the rectangular sum is indefinite
    x = correlated_chain(200, 40, 0.3, seed=6, rho=0.0)
    res = gamma_covariance(x, window=30, shrinkage="none")
    s = np.sqrt(np.diag(res.raw_matrix) / (2 * res.taus))  # sqrt(Gamma_ii(0) / N)
    raw_eig = np.linalg.eigvalsh(res.raw_matrix / np.outer(s, s))
    assert raw_eig[0] < 0  # the case is really indefinite
    assert res.condition_number_raw == np.inf
    assert res.n_clipped >= 1 and res.clipped_fraction > 0
    eig = np.linalg.eigvalsh(res.matrix / np.outer(s, s))
    # raised to the noise level shown by the most negative eigenvalue
    assert eig[0] == pytest.approx(-raw_eig[0], rel=1e-8)
    assert np.isfinite(res.condition_number)


def test_floor_option_and_untouched_positive_case():
    x = correlated_chain(5000, 3, 0.5, seed=7)
    res = gamma_covariance(x, shrinkage="none")
    assert res.n_clipped == 0 and res.clipped_fraction == 0.0
    np.testing.assert_array_equal(res.matrix, res.raw_matrix)
    floored = gamma_covariance(x, shrinkage="none", eigenvalue_floor=0.5)
    assert floored.n_clipped >= 1
    with pytest.raises(SpecError) as err:
        gamma_covariance(x, eigenvalue_floor=2.0)
    assert err.value.where == "eigenvalue_floor"


def test_short_chain_warns_and_is_flagged():
    x = correlated_chain(60, 2, 0.97, seed=8)
    with pytest.warns(ShortChainWarning):
        res = gamma_covariance(x, shrinkage="none")
    assert not res.reliable


def test_common_window_is_the_most_autocorrelated_components():
    rng = np.random.default_rng(9)
    n = 20000
    slow = lfilter([1.0], [1.0, -0.9], rng.standard_normal(n))
    fast = lfilter([1.0], [1.0, -0.3], rng.standard_normal(n))
    x = np.column_stack([fast, slow, rng.standard_normal(n)])
    cw = common_window(x)
    assert cw.component == 1
    assert cw.window == cw.windows[1] > cw.windows[0] >= cw.windows[2]


@pytest.mark.parametrize(
    "kwargs, where, exc",
    [
        ({"window": -1}, "window", SpecError),
        ({"window": 10_000}, "window", SpecError),
        ({"window": 2.5}, "window", SpecError),
        ({"shrinkage": "maximal"}, "shrinkage", SpecError),
        ({"target": "nowhere"}, "target", SpecError),
        ({"streams": np.zeros(10)}, "streams", DataError),
    ],
)
def test_bad_options_name_the_argument(kwargs, where, exc):
    x = correlated_chain(500, 3, 0.5, seed=10)
    with pytest.raises(exc) as err:
        gamma_covariance(x, **kwargs)
    assert err.value.where == where


def test_bad_data():
    x = correlated_chain(500, 3, 0.5, seed=11)
    bad = x.copy()
    bad[17, 2] = np.nan
    with pytest.raises(DataError, match="configuration 17"):
        gamma_covariance(bad)
    flat = x.copy()
    flat[:, 1] = 1.0
    with pytest.raises(FitError, match="component 1"):
        gamma_covariance(flat)
    with pytest.raises(DataError, match="too few"):
        gamma_covariance(x[:3])
    with pytest.raises(DataError):
        gamma_covariance(np.zeros((4, 3, 2)))
