"""Behaviour of plateaufit.stats.covariance: targets, diagnostics, errors, per-sample."""

from __future__ import annotations

import numpy as np
import pytest

from plateaufit.errors import FitError, SpecError
from plateaufit.stats.covariance import (
    MeanCovariance,
    covariance_of_mean,
    per_sample_covariances,
)


def samples(n_bins, p, seed):
    rng = np.random.default_rng(seed)
    t = np.arange(p)
    corr = 0.95 ** np.abs(t[:, None] - t[None, :])
    sd = 0.01 * np.exp(-0.3 * t)
    return np.exp(-0.4 * t) + rng.multivariate_normal(np.zeros(p), corr, size=n_bins) * sd


def test_diagonal_target_leaves_variances_and_improves_conditioning():
    x = samples(24, 20, seed=1)
    res = covariance_of_mean(x)  # defaults: ledoit-wolf, diagonal
    assert res.target == "diagonal" and 0 < res.shrinkage < 1
    np.testing.assert_allclose(np.diag(res.matrix), np.diag(res.raw_matrix), rtol=1e-13)
    assert res.condition_number < res.condition_number_raw
    assert res.eigenvalues_raw[-1] < res.eigenvalues[-1]  # smallest correlation eigenvalue raised
    assert np.all(np.diff(res.eigenvalues) <= 0) and np.all(np.diff(res.eigenvalues_raw) <= 0)
    assert res.eigenvalues.sum() == pytest.approx(20)  # trace of a correlation matrix
    assert res.n_samples == 24
    np.testing.assert_allclose(np.diag(res.correlation), 1.0)
    # shrunk correlation = (1 - lambda) R + lambda I
    r_raw = res.raw_matrix / np.sqrt(np.outer(np.diag(res.raw_matrix), np.diag(res.raw_matrix)))
    np.testing.assert_allclose(res.correlation, (1 - res.shrinkage) * r_raw + res.shrinkage * np.eye(20), atol=1e-12)


def test_fixed_intensity_and_identity_target():
    x = samples(30, 6, seed=2)
    raw = covariance_of_mean(x, "none").matrix
    res = covariance_of_mean(x, 0.25, "identity")
    mu = np.trace(raw) / 6
    np.testing.assert_allclose(res.matrix, 0.75 * raw + 0.25 * mu * np.eye(6), rtol=1e-12)
    res = covariance_of_mean(x, 1.0, "diagonal")
    np.testing.assert_allclose(res.matrix, np.diag(np.diag(raw)), rtol=1e-12)


def test_eigenvalue_floor_raises_small_eigenvalues_only():
    x = samples(60, 12, seed=3)
    plain = covariance_of_mean(x, "none")
    floored = covariance_of_mean(x, "none", eigenvalue_floor=1e-2)
    assert floored.eigenvalues[-1] > plain.eigenvalues_raw[-1]
    assert floored.condition_number < plain.condition_number
    # variances can only grow (conservative)
    assert np.all(np.diag(floored.matrix) >= np.diag(plain.matrix) * (1 - 1e-12))
    # the floor is at 1e-2 of the largest eigenvalue of the correlation matrix
    r = floored.matrix / np.sqrt(np.outer(np.diag(plain.matrix), np.diag(plain.matrix)))
    w = np.linalg.eigvalsh(r)
    assert w[0] == pytest.approx(1e-2 * w[-1], rel=1e-8)


def test_too_few_bins_without_shrinkage_names_both_counts():
    x = samples(8, 10, seed=4)
    with pytest.raises(FitError) as err:
        covariance_of_mean(x, "none")
    msg = err.value.message
    assert "10 points" in msg and "8 bins" in msg and "ledoit-wolf" in msg
    covariance_of_mean(x, "ledoit-wolf")  # shrinkage rescues it


def test_numerically_singular_covariance_is_a_fit_error():
    x = samples(40, 5, seed=5)
    x = np.column_stack([x, x[:, 0] + x[:, 1]])  # exactly dependent point
    with pytest.raises(FitError, match="6 points from 40 bins"):
        covariance_of_mean(x, "none")


def test_constant_component_names_the_component():
    x = samples(30, 5, seed=6)
    x[:, 3] = 1.0
    with pytest.raises(FitError, match="point 3 "):
        covariance_of_mean(x)
    with pytest.raises(FitError, match="point 3 "):
        per_sample_covariances(x)


def test_bad_options_name_their_own_argument():
    x = samples(30, 4, seed=7)
    for kw, key in [
        ({"shrinkage": "ridge"}, "shrinkage"),
        ({"shrinkage": 1.5}, "shrinkage"),
        ({"target": "unit"}, "target"),
        ({"eigenvalue_floor": 2.0}, "eigenvalue_floor"),
    ]:
        with pytest.raises(SpecError) as err:
            covariance_of_mean(x, **kw)
        assert err.value.where == key
    with pytest.raises(FitError, match="at least 2 bins"):
        covariance_of_mean(x[:1])
    bad = x.copy()
    bad[2, 1] = np.nan
    with pytest.raises(FitError, match="bin 2 of point 1"):
        covariance_of_mean(bad)


def test_class_matches_function():
    x = samples(25, 8, seed=8)
    est = MeanCovariance(shrinkage="oas", target="identity").fit(x)
    res = covariance_of_mean(x, "oas", "identity")
    np.testing.assert_array_equal(est.covariance_, res.matrix)
    assert est.shrinkage_ == res.shrinkage and est.n_samples_ == 25
    assert est.condition_number_ == res.condition_number
    np.testing.assert_array_equal(est.per_sample(x), per_sample_covariances(x, "oas", "identity"))


@pytest.mark.parametrize("shrinkage", ["ledoit-wolf", "oas", "none", 0.4])
@pytest.mark.parametrize("target", ["diagonal", "identity"])
def test_per_sample_equals_covariance_of_each_delete_one_subset(shrinkage, target):
    x = samples(15, 6, seed=9)
    out, lam = per_sample_covariances(x, shrinkage, target, return_intensities=True)
    assert out.shape == (15, 6, 6)
    for i in range(15):
        ref = covariance_of_mean(np.delete(x, i, axis=0), shrinkage, target)
        np.testing.assert_allclose(out[i], ref.matrix, rtol=1e-10, atol=1e-14 * np.abs(ref.matrix).max())
        assert lam[i] == pytest.approx(ref.shrinkage, abs=1e-12)


def test_per_sample_with_floor_and_errors():
    x = samples(12, 5, seed=10)
    out = per_sample_covariances(x, "ledoit-wolf", "diagonal", 1e-3)
    ref = covariance_of_mean(np.delete(x, 4, axis=0), "ledoit-wolf", "diagonal", 1e-3).matrix
    np.testing.assert_allclose(out[4], ref, rtol=1e-10)
    with pytest.raises(FitError, match="4 bins"):
        per_sample_covariances(x[:5], "none")  # subsets of 4 bins for 5 points
    with pytest.raises(FitError, match="at least 3 bins"):
        per_sample_covariances(x[:2])
