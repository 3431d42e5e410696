"""Behaviour of plateaufit.stats.effmass: NaN handling, jackknife errors, errors."""

from __future__ import annotations

import warnings

import numpy as np
import pytest

from plateaufit.errors import DataError, SpecError
from plateaufit.stats.effmass import effective_mass, effective_mass_jackknife
from plateaufit.stats.resample import jackknife_error, jackknife_samples

T = 32


def test_undefined_ratios_are_nan_without_warnings():
    c = np.array([1.0, -0.5, 0.2, 0.2, 0.25, 0.0, 0.1])
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        log_m = effective_mass(c, "log")
        cosh_m = effective_mass(c, "cosh", 12)
        sinh_m = effective_mass(c, "sinh", 12)
    assert np.isnan(log_m[[0, 1, 4, 5]]).all()
    assert log_m[2] == 0.0 and log_m[3] == pytest.approx(np.log(0.8))  # negative mass kept for log
    # cosh needs a ratio above 1 before T/2: none of these pairs has one
    assert np.isnan(cosh_m).all()
    assert np.isnan(sinh_m).all()


def test_sinh_needs_ratio_above_the_zero_mass_limit():
    # sinh(m a)/sinh(m b) -> a/b as m -> 0: a smaller ratio has no solution
    a, b = T / 2, T / 2 - 1
    c = np.array([a / b * 0.999, 1.0])
    assert np.isnan(effective_mass(c, "sinh", T)[0])
    c = np.array([a / b * 1.01, 1.0])
    assert effective_mass(c, "sinh", T)[0] > 0


def test_jackknife_effective_mass_value_and_error():
    rng = np.random.default_rng(1)
    m = 0.45
    t = np.arange(T // 2 + 1)
    exact = 2.0 * (np.exp(-m * t) + np.exp(-m * (T - t)))
    binned = exact * (1 + 0.01 * rng.standard_normal((50, t.size)))
    em = effective_mass_jackknife(binned, "cosh", T)
    assert em.kind == "cosh"
    np.testing.assert_array_equal(em.t, np.arange(T // 2))
    np.testing.assert_allclose(em.value, effective_mass(binned.mean(axis=0), "cosh", T))
    ref = jackknife_error(effective_mass(jackknife_samples(binned), "cosh", T))
    np.testing.assert_allclose(em.error, ref)
    assert np.all(np.abs(em.value - m) < 5 * em.error)


def test_jackknife_error_is_nan_where_samples_fail():
    rng = np.random.default_rng(2)
    t = np.arange(10)
    binned = np.exp(-0.5 * t) * (1 + 0.02 * rng.standard_normal((20, 10)))
    # at t = 8 the mean is positive, but without bin 5 it is negative
    binned[:, 8] = -1e-3
    binned[5, 8] = 0.05
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        em = effective_mass_jackknife(binned, "log")
    assert np.all(np.isfinite(em.value)) and np.all(np.isfinite(em.error[:7]))
    assert np.isnan(em.error[7]) and np.isnan(em.error[8])


def test_bad_arguments():
    c = np.exp(-0.3 * np.arange(8))
    with pytest.raises(SpecError, match="unknown effective-mass kind"):
        effective_mass(c, "exp")
    with pytest.raises(SpecError, match="time extent"):
        effective_mass(c, "cosh")
    with pytest.raises(DataError, match="two timeslices"):
        effective_mass(np.ones(1))
    with pytest.raises(DataError, match="n_bins, n_t"):
        effective_mass_jackknife(c, "log")
