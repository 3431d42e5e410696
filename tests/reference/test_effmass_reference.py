"""Effective masses checked against exact single-state correlators."""

from __future__ import annotations

import numpy as np
import pytest

from plateaufit.stats.effmass import effective_mass

T = 48


@pytest.mark.parametrize("m", [0.08, 0.37, 1.2])
def test_pure_exponential_gives_the_mass_at_every_t(m):
    t = np.arange(30)
    c = 3.1 * np.exp(-m * t)  # exact: log(C(t)/C(t+1)) = m
    np.testing.assert_allclose(effective_mass(c, "log"), m, rtol=1e-12)


@pytest.mark.parametrize("m", [0.08, 0.37, 1.2])
def test_pure_cosh_gives_the_mass_exactly(m):
    t = np.arange(T)
    c = 0.7 * (np.exp(-m * t) + np.exp(-m * (T - t)))
    folded = c[: T // 2 + 1]
    # exact: C(t)/C(t+1) = cosh(m(T/2-t))/cosh(m(T/2-t-1)) for a single state
    np.testing.assert_allclose(effective_mass(folded, "cosh", T), m, rtol=1e-12)
    # unfolded: the mirrored half gives the same mass (except at no point of even T)
    np.testing.assert_allclose(effective_mass(c, "cosh", T), m, rtol=1e-12)
    # the log mass is biased low near T/2 by the backward-propagating state
    log_mass = effective_mass(folded, "log")
    assert log_mass[-1] < 0.5 * m
    if m > 0.3:
        assert log_mass[2] == pytest.approx(m, rel=1e-6)  # far from T/2 they agree


@pytest.mark.parametrize("m", [0.15, 0.37, 1.2])
def test_pure_sinh_gives_the_mass_exactly(m):
    t = np.arange(T)
    c = 1.9 * (np.exp(-m * t) - np.exp(-m * (T - t)))
    folded = c[: T // 2 + 1]
    em = effective_mass(folded, "sinh", T)
    # exact up to the last pair, where C(T/2) = 0 leaves no equation
    np.testing.assert_allclose(em[:-1], m, rtol=1e-12)
    assert np.isnan(em[-1])
    # the log mass overshoots near T/2: there it is log(sinh(2m)/sinh(m)) = log(2 cosh m) (exact)
    log_mass = effective_mass(folded, "log")[-2]
    assert log_mass == pytest.approx(np.log(2 * np.cosh(m)), rel=1e-10)
    assert log_mass > m


def test_odd_time_extent_cosh():
    Tod = 47
    t = np.arange(Tod)
    m = 0.3
    c = np.exp(-m * t) + np.exp(-m * (Tod - t))
    em = effective_mass(c, "cosh", Tod)
    nan = np.flatnonzero(np.isnan(em))
    np.testing.assert_array_equal(nan, [23])  # the pair (23, 24) is symmetric about T/2
    np.testing.assert_allclose(np.delete(em, nan), m, rtol=1e-12)


def test_batched_leading_axes():
    masses = np.array([[0.2, 0.5], [0.9, 1.4]])
    t = np.arange(T // 2 + 1)
    c = np.exp(-masses[..., None] * t) + np.exp(-masses[..., None] * (T - t))
    em = effective_mass(c, "cosh", T)
    assert em.shape == (2, 2, T // 2)
    np.testing.assert_allclose(em, np.broadcast_to(masses[..., None], em.shape), rtol=1e-12)
