"""Jackknife checked against astropy.stats and the exact standard-error identity."""

from __future__ import annotations

import numpy as np
import pytest
from astropy.stats import jackknife_resampling, jackknife_stats
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays

from plateaufit.stats.resample import (
    jackknife_bias_corrected,
    jackknife_covariance,
    jackknife_error,
    jackknife_samples,
)


def test_jackknife_mean_and_error_match_astropy():
    data = np.random.default_rng(1).gamma(2.0, 1.5, size=57)
    samples = jackknife_samples(data)
    # astropy returns (bias-corrected estimate, bias, standard error, interval)
    estimate, bias, std_err, _ = jackknife_stats(data, np.mean, 0.95)  # source: astropy.stats
    np.testing.assert_allclose(samples, np.mean(jackknife_resampling(data), axis=1), rtol=1e-13)  # astropy
    assert float(jackknife_error(samples)) == pytest.approx(std_err, rel=1e-12)
    assert float(jackknife_bias_corrected(data.mean(), samples)) == pytest.approx(estimate, rel=1e-12)
    assert bias == pytest.approx(0.0, abs=1e-12)  # the mean is unbiased


@pytest.mark.parametrize("func", [lambda m: m**2, np.exp, lambda m: 1.0 / m])
def test_bias_correction_of_a_nonlinear_statistic_matches_astropy(func):
    data = np.random.default_rng(2).normal(1.3, 0.8, size=40)
    samples = func(jackknife_samples(data))
    full = func(data.mean())
    # source: astropy.stats.jackknife_stats with the statistic f(mean)
    estimate, bias, std_err, _ = jackknife_stats(data, lambda x: func(np.mean(x)), 0.95)
    corrected = float(jackknife_bias_corrected(full, samples))
    assert corrected == pytest.approx(estimate, rel=1e-11)
    assert full - corrected == pytest.approx(bias, rel=1e-8, abs=1e-14)
    assert abs(bias) > 1e-6  # a nonlinear statistic of the mean is biased
    assert float(jackknife_error(samples)) == pytest.approx(std_err, rel=1e-11)


def test_jackknife_covariance_of_the_mean_is_the_covariance_over_n():
    # exact: the jackknife covariance of the mean equals np.cov(ddof=1) / n
    x = np.random.default_rng(3).normal(size=(30, 4)) @ np.array(
        [[1, 0.5, 0, 0], [0, 1, 0.3, 0], [0, 0, 1, 0.2], [0, 0, 0, 1.0]]
    )
    np.testing.assert_allclose(jackknife_covariance(jackknife_samples(x)), np.cov(x, rowvar=False) / 30, rtol=1e-12)


@settings(max_examples=200, deadline=None)
@given(arrays(np.float64, st.integers(2, 60), elements=st.floats(-1e3, 1e3, allow_nan=False, allow_infinity=False)))
def test_jackknife_error_of_the_mean_is_the_standard_error(x):
    # exact identity: sqrt((n-1)/n sum (xbar_i - xbar)^2) = std(x, ddof=1)/sqrt(n)
    # (Efron 1982).
    expected = np.std(x, ddof=1) / np.sqrt(len(x))
    got = float(jackknife_error(jackknife_samples(x)))
    assert got == pytest.approx(expected, rel=1e-7, abs=1e-9 * (1.0 + np.max(np.abs(x))))


def test_pseudo_values_reproduce_the_jackknife_samples_and_their_covariance():
    # source: Tukey (1958) pseudo-values p_s = N m - (N - 1) y_s; their delete-one
    # means are the y_s again, and the covariance of their mean is the jackknife
    # covariance (N-1)/N sum (y_s - m)(y_s - m)^T (Efron 1982)
    from plateaufit.stats.covariance import covariance_of_mean
    from plateaufit.stats.resample import jackknife_covariance, jackknife_samples, pseudo_values

    rng = np.random.default_rng(12)
    y = rng.normal(size=(40, 5)) @ np.diag([1.0, 2.0, 3.0, 4.0, 5.0]) * 1e-3 + 0.5
    p = pseudo_values(y)
    np.testing.assert_allclose(jackknife_samples(p), y, rtol=1e-12, atol=1e-15)
    np.testing.assert_allclose(covariance_of_mean(p, shrinkage="none").matrix,
                               jackknife_covariance(y), rtol=1e-10)
