"""Behaviour of AIC weights and the model average (plateaufit.fit.average)."""

from __future__ import annotations

import math

import numpy as np
import pytest

from plateaufit.errors import FitError
from plateaufit.fit.average import aic_weights, model_average


def test_non_converged_fit_gets_zero_weight_even_with_lowest_aic():
    w = aic_weights([1.0, 10.0, 12.0], [False, True, True])
    assert w[0] == 0.0
    # the remaining two: exp(0) and exp(-1), normalised
    np.testing.assert_allclose(w[1:], np.array([1.0, math.exp(-1.0)]) / (1 + math.exp(-1.0)))
    assert math.isclose(w.sum(), 1.0)


def test_weights_do_not_depend_on_a_common_aic_offset_and_do_not_overflow():
    aic = np.array([3000.0, 3002.0, 3010.0])
    np.testing.assert_allclose(aic_weights(aic, [True] * 3), aic_weights(aic - 3000, [True] * 3))
    assert np.all(np.isfinite(aic_weights(aic, [True] * 3)))


def test_non_finite_aic_is_treated_as_unusable():
    w = aic_weights([np.nan, 4.0, np.inf], [True, True, True])
    np.testing.assert_array_equal(w, [0.0, 1.0, 0.0])


def test_no_converged_fit_is_a_clear_error():
    with pytest.raises(FitError, match="none of the 2 fits"):
        aic_weights([1.0, 2.0], [False, False])


def test_non_converged_fit_does_not_move_the_average_and_is_counted():
    central = np.array([[0.50], [9.0]])
    samples = np.stack([np.full((4, 1), 0.5) + np.arange(4)[:, None] * 1e-3,
                        np.full((4, 1), np.nan)])
    avg = model_average(central, samples, [5.0, 0.0], [True, False], ["E0"])
    assert avg.value["E0"] == 0.5
    assert avg.sys_error["E0"] == 0.0
    assert avg.n_excluded == 1
    np.testing.assert_array_equal(avg.weights, [1.0, 0.0])


def test_fits_with_different_jackknife_sample_counts_are_refused():
    with pytest.raises(FitError, match="share the same jackknife samples"):
        model_average(np.zeros((2, 1)), np.zeros((3, 10, 1)), [1, 2], [True, True], ["E0"])
    with pytest.raises(FitError, match="shape"):
        model_average(np.zeros((2, 2)), np.zeros((2, 10, 2)), [1, 2], [True, True], ["E0"])


def test_parameter_missing_in_some_fits_is_averaged_over_the_fits_that_have_it():
    # fit 0: one state (no E1), fits 1 and 2: two states
    central = np.array([[0.20, np.nan], [0.21, 0.70], [0.22, 0.80]])
    rng = np.random.default_rng(0)
    samples = central[:, None, :] + rng.normal(0, 1e-3, size=(3, 8, 2))
    samples[0, :, 1] = np.nan
    aic = [2.0, 2.0 + 2 * math.log(2.0), 2.0 + 2 * math.log(4.0)]   # raw weights 1 : 1/2 : 1/4
    avg = model_average(central, samples, aic, [True] * 3, ["E0", "E1"])
    np.testing.assert_allclose(avg.weights, np.array([4, 2, 1]) / 7)
    assert math.isclose(avg.value["E0"], (4 * 0.20 + 2 * 0.21 + 1 * 0.22) / 7)
    # E1: weights 2:1 among the two-state fits
    assert math.isclose(avg.value["E1"], (2 * 0.70 + 1 * 0.80) / 3)
    sys_e1 = math.sqrt(2 / 3 * 0.70 ** 2 + 1 / 3 * 0.80 ** 2 - avg.value["E1"] ** 2)
    assert math.isclose(avg.sys_error["E1"], sys_e1, rel_tol=1e-9)
    assert np.isfinite(avg.stat_error["E1"])


def test_non_finite_samples_of_a_weighted_fit_are_refused():
    central = np.array([[0.2], [0.2]])
    samples = np.zeros((2, 5, 1)) + 0.2
    samples[1, 3, 0] = np.nan
    with pytest.raises(FitError, match=r"not finite in fit\(s\) \[1\]"):
        model_average(central, samples, [1.0, 1.0], [True, True], ["E0"])


def test_identical_fits_average_to_themselves_with_no_systematic():
    rng = np.random.default_rng(2)
    one = rng.normal(0.4, 0.01, size=(20, 1))
    central = np.array([[0.4], [0.4], [0.4]])
    samples = np.stack([one, one, one])
    avg = model_average(central, samples, [1.0, 3.0, 7.0], [True] * 3, ["E0"])
    assert math.isclose(avg.value["E0"], 0.4)
    assert avg.sys_error["E0"] == pytest.approx(0.0, abs=1e-15)
    expected = math.sqrt(19 / 20 * np.sum((one - one.mean()) ** 2))
    assert math.isclose(avg.stat_error["E0"], expected, rel_tol=1e-12)
    assert math.isclose(avg.error["E0"], avg.stat_error["E0"], rel_tol=1e-9)


def test_a_fit_with_a_non_positive_ground_state_gets_no_weight():
    # a runaway fit (E0 <= 0) is excluded like a non-converged one (common practice)
    from types import SimpleNamespace

    from plateaufit.fit.average import average_fits

    rng = np.random.default_rng(5)

    def fake(e0, aic):
        samples = e0 + 1e-3 * rng.standard_normal((20, 1))
        return SimpleNamespace(model=SimpleNamespace(reported_names=("E0",)),
                               central=SimpleNamespace(reported={"E0": e0}, aic=aic),
                               samples=samples, converged=True)

    fits = [fake(0.30, 10.0), fake(-0.05, 2.0), fake(0.31, 11.0)]
    avg = average_fits(fits)
    assert avg.weights[1] == 0.0
    assert avg.n_excluded == 1
    w = np.exp(-0.5 * np.array([0.0, 1.0]))
    w /= w.sum()
    assert avg.value["E0"] == pytest.approx(w @ [0.30, 0.31])
