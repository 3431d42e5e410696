"""Shrinkage intensities and matrices checked against scikit-learn and numpy."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.covariance import OAS, LedoitWolf, ledoit_wolf_shrinkage

from plateaufit.stats.covariance import (
    covariance_of_mean,
    ledoit_wolf_intensity,
    oas_intensity,
    per_sample_covariances,
)


def correlator_like_samples(n_bins: int, p: int, seed: int) -> np.ndarray:
    """Invented binned correlator: exponentially falling means, strongly
    correlated neighbouring timeslices, variances spanning decades."""
    rng = np.random.default_rng(seed)
    t = np.arange(p)
    corr = 0.9 ** np.abs(t[:, None] - t[None, :])
    sd = 0.02 * np.exp(-0.25 * t)
    noise = rng.multivariate_normal(np.zeros(p), corr, size=n_bins) * sd
    return np.exp(-0.3 * t) + noise


def standardised(x: np.ndarray) -> np.ndarray:
    return (x - x.mean(axis=0)) / x.std(axis=0)


@pytest.mark.parametrize("n_bins,p", [(40, 10), (25, 30), (200, 5)])
def test_ledoit_wolf_intensity_matches_sklearn(n_bins, p):
    x = correlator_like_samples(n_bins, p, seed=n_bins + p)
    assert ledoit_wolf_intensity(x) == pytest.approx(ledoit_wolf_shrinkage(x), rel=1e-10)  # scikit-learn
    res = covariance_of_mean(x, "ledoit-wolf", "identity")
    assert res.shrinkage == pytest.approx(ledoit_wolf_shrinkage(x), rel=1e-10)  # scikit-learn, raw samples
    res = covariance_of_mean(x, "ledoit-wolf", "diagonal")
    assert res.shrinkage == pytest.approx(ledoit_wolf_shrinkage(standardised(x)), rel=1e-10)  # scikit-learn


@pytest.mark.parametrize("n_bins,p", [(40, 10), (25, 30), (200, 5)])
def test_oas_intensity_matches_sklearn(n_bins, p):
    x = correlator_like_samples(n_bins, p, seed=3 * n_bins + p)
    assert oas_intensity(x) == pytest.approx(OAS().fit(x).shrinkage_, rel=1e-10)  # scikit-learn
    res = covariance_of_mean(x, "oas", "identity")
    assert res.shrinkage == pytest.approx(OAS().fit(x).shrinkage_, rel=1e-10)  # scikit-learn
    res = covariance_of_mean(x, "oas", "diagonal")
    assert res.shrinkage == pytest.approx(OAS().fit(standardised(x)).shrinkage_, rel=1e-10)  # scikit-learn


def test_identity_target_matrix_matches_sklearn_ledoit_wolf():
    # scikit-learn shrinks the 1/n empirical covariance; ours shrinks the ddof=1
    # covariance of the mean, cov/(n-1) = emp/(n-1): matched, the matrices agree.
    x = correlator_like_samples(30, 12, seed=5)
    n = x.shape[0]
    ours = covariance_of_mean(x, "ledoit-wolf", "identity").matrix
    np.testing.assert_allclose(ours * (n - 1), LedoitWolf().fit(x).covariance_, rtol=1e-10)  # scikit-learn
    ours = covariance_of_mean(x, "oas", "identity").matrix
    np.testing.assert_allclose(ours * (n - 1), OAS().fit(x).covariance_, rtol=1e-10)  # scikit-learn


def test_diagonal_target_matches_sklearn_on_standardised_samples():
    # diagonal target = shrink the correlation matrix toward 1 and rescale
    x = correlator_like_samples(30, 12, seed=6)
    n = x.shape[0]
    sd = x.std(axis=0)  # 1/n normalisation, as scikit-learn's empirical covariance
    lw_corr = LedoitWolf().fit(standardised(x)).covariance_  # scikit-learn
    expected = lw_corr * np.outer(sd, sd) / (n - 1)
    np.testing.assert_allclose(covariance_of_mean(x, "ledoit-wolf", "diagonal").matrix, expected, rtol=1e-10)


def test_no_shrinkage_is_numpy_cov_over_n_bins():
    x = correlator_like_samples(50, 8, seed=7)
    res = covariance_of_mean(x, "none")
    np.testing.assert_array_equal(res.matrix, res.raw_matrix)
    np.testing.assert_allclose(res.matrix, np.cov(x, rowvar=False) / 50, rtol=1e-12)  # numpy
    assert res.shrinkage == 0.0


def test_per_sample_covariances_match_sklearn_on_each_subset():
    x = correlator_like_samples(20, 6, seed=8)
    out, lam = per_sample_covariances(x, "ledoit-wolf", "identity", return_intensities=True)
    for i in (0, 7, 19):
        sub = np.delete(x, i, axis=0)
        assert lam[i] == pytest.approx(ledoit_wolf_shrinkage(sub), rel=1e-9)  # scikit-learn
        np.testing.assert_allclose(out[i] * 18, LedoitWolf().fit(sub).covariance_, rtol=1e-9)  # scikit-learn
