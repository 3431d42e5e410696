"""Coverage statistics against exact Gaussian results and scipy.

Source: for estimates v ~ N(theta, sigma) with error bars e = sigma / k, the
coverage at c sigma is P(|z| < c k) = 2 Phi(c k) - 1 (exact; Phi from
scipy.stats.norm), the rms pull is k and the scatter over the error is k; the
binomial standard error of a fraction is sqrt(c (1 - c) / M) (exact). The KS
test is scipy.stats.kstest's.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from plateaufit.stats.coverage import (coverage_band, coverage_stats, nominal_coverage,
                                       p_value_uniformity)

M = 40_000


@pytest.mark.parametrize("k", [1.0, 3.0, 0.5])
def test_coverage_of_gaussian_estimates_with_scaled_errors(k):
    rng = np.random.default_rng(11)
    theta, sigma = 0.42, 0.013
    v = theta + sigma * rng.standard_normal(M)
    e = np.full(M, sigma / k)
    res = coverage_stats(v, e, theta)
    for c, got in ((1.0, res.coverage_1sigma), (2.0, res.coverage_2sigma)):
        exact = 2 * stats.norm.cdf(c / k) - 1          # source: exact Gaussian (scipy.stats.norm)
        sd = math.sqrt(exact * (1 - exact) / M)
        assert abs(got - exact) < 4 * sd
    assert res.coverage_1sigma_error == pytest.approx(           # exact binomial formula
        math.sqrt(res.coverage_1sigma * (1 - res.coverage_1sigma) / M))
    # rms pull and scatter / error are k (exact), within the sampling error of a
    # standard deviation, sqrt(1 / (2 M)) relative
    assert res.pull_rms == pytest.approx(k, rel=4 / math.sqrt(2 * M))
    assert res.scatter_over_error == pytest.approx(k, rel=4 / math.sqrt(2 * M))
    assert abs(res.bias_over_error) < 4 * res.bias_over_error_error


def test_bias_in_units_of_the_error():
    rng = np.random.default_rng(12)
    sigma = 2.0
    v = 10.0 + 0.5 * sigma + sigma * rng.standard_normal(M)   # biased by half an error
    res = coverage_stats(v, np.full(M, sigma), 10.0)
    assert res.bias_over_error == pytest.approx(0.5, abs=4 / math.sqrt(M))   # exact: 0.5
    # a shifted Gaussian covers less: Phi(1 - 0.5) - Phi(-1 - 0.5) (exact, scipy.stats.norm)
    exact = stats.norm.cdf(0.5) - stats.norm.cdf(-1.5)
    assert res.coverage_1sigma == pytest.approx(exact, abs=4 * math.sqrt(exact * (1 - exact) / M))
    # the scatter does not see a bias; the rms pull does: sqrt(1 + 0.5^2) (exact)
    assert res.scatter_over_error == pytest.approx(1.0, rel=4 / math.sqrt(2 * M))
    assert res.pull_rms == pytest.approx(math.sqrt(1.25), rel=4 / math.sqrt(2 * M))


def test_nominal_coverage_and_band():
    assert nominal_coverage(1.0) == pytest.approx(stats.norm.cdf(1) - stats.norm.cdf(-1))  # scipy
    assert nominal_coverage(2.0) == pytest.approx(stats.norm.cdf(2) - stats.norm.cdf(-2))  # scipy
    lo, hi = coverage_band(0.6827, 200)
    half = 2 * math.sqrt(0.6827 * 0.3173 / 200)       # exact binomial standard error
    assert (lo, hi) == pytest.approx((0.6827 - half, 0.6827 + half))
    lo, hi = coverage_band(0.9545, 10)
    assert lo == pytest.approx(0.9545 - 2 * math.sqrt(0.9545 * 0.0455 / 10))
    assert hi == 1.0     # clipped to [0, 1]


def test_unusable_replicas_are_left_out_and_too_few_give_nan():
    res = coverage_stats([1.0, np.nan, 1.2, 0.9], [0.1, 0.1, -1.0, 0.1], 1.0)
    assert res.n == 2
    assert res.coverage_1sigma == 1.0
    few = coverage_stats([1.0], [0.1], 1.0)
    assert few.n == 1 and math.isnan(few.coverage_1sigma)


def test_p_value_uniformity_against_scipy_kstest():
    rng = np.random.default_rng(13)
    uniform = rng.random(500)
    d, p = p_value_uniformity(np.append(uniform, np.nan))
    ref = stats.kstest(uniform, "uniform")                    # source: scipy.stats.kstest
    assert (d, p) == pytest.approx((ref.statistic, ref.pvalue))
    skewed = rng.random(500) ** 3          # p-values piled up at 0: a chi2 too large
    d2, p2 = p_value_uniformity(skewed)
    assert p2 < 1e-6 < p and d2 > 0.2
