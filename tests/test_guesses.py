"""Tests of the automatic starting values."""

from __future__ import annotations

import numpy as np
import pytest

from plateaufit.errors import FitError
from plateaufit.fit.guesses import pair_energies, starting_values
from plateaufit.fit.models import make_model

T = 32


@pytest.mark.parametrize("form", ["exp", "cosh", "sinh"])
def test_pair_energies_exact_for_single_state(form):
    # exact: a pure single-state correlator has a constant effective energy
    t = np.arange(1, 15)
    m = make_model(form, 1, ["a"], {"a": t}, T)
    y = m.predict(np.array([0.37, 2.5]))
    np.testing.assert_allclose(pair_energies(y, t, form, T), 0.37, rtol=1e-10)


def test_pair_energies_skip_unusable_points():
    y = np.array([1.0, 0.5, -0.1, 0.05, np.nan, 0.01])
    e = pair_energies(y, np.arange(6.0))
    assert np.isfinite(e[0]) and np.all(np.isnan(e[1:]))


@pytest.mark.parametrize("form", ["exp", "cosh", "sinh"])
def test_single_state_start_is_the_truth(form):
    t = np.arange(3, 14)
    m = make_model(form, 1, ["a"], {"a": t}, T)
    y = m.predict(np.array([0.42, 1.3]))
    np.testing.assert_allclose(m.to_reported(starting_values(m, y, t)), [0.42, 1.3],
                               rtol=1e-8)


def test_two_state_start_is_ordered_and_close():
    t = np.arange(1, 16)
    m = make_model("cosh", 2, ["a", "b"], {"a": t, "b": t}, T)
    truth = np.array([0.3, 0.9, 1.0, 2.0, 0.6, -0.5])
    y = m.predict(m.from_reported(truth))
    phys = m.to_reported(starting_values(m, {"a": y[:15], "b": y[15:]}, {"a": t, "b": t}))
    assert phys[0] < phys[1]
    assert abs(phys[0] - 0.3) < 0.02          # ground state from the later half
    np.testing.assert_allclose(phys[2:4], truth[2:4], rtol=0.1)


def test_negative_correlator_gives_negative_amplitude():
    t = np.arange(2, 10)
    m = make_model("exp", 1, ["a"], {"a": t}, T)
    y = m.predict(np.array([0.5, -3.0]))
    np.testing.assert_allclose(m.to_reported(starting_values(m, y, t)), [0.5, -3.0],
                               rtol=1e-8)


def test_noise_and_garbage_never_give_nan():
    rng = np.random.default_rng(3)
    t = np.arange(2, 12)
    m = make_model("cosh", 3, ["a", "b"], {"a": t, "b": t}, T, oscillating=2, constant=True)
    for y in [rng.normal(size=20), np.full(20, -1.0), np.zeros(20),
              np.r_[np.full(10, np.nan), rng.normal(size=10)]]:
        theta = starting_values(m, {"a": y[:10], "b": y[10:]}, {"a": t, "b": t})
        assert np.all(np.isfinite(theta)) and theta.shape == (m.n_params,)
        assert np.all(np.diff(m.energies(theta)) > 0)


def test_factorised_start_recovers_overlaps_and_signs():
    ops = {"ll": ("l", "l"), "ls": ("l", "s"), "ss": ("s", "s")}
    t = np.arange(3, 12)
    m = make_model("exp", 1, list(ops), {k: t for k in ops}, T, operators=ops)
    truth = np.array([0.4, 1.2, -0.8])
    y = m.predict(truth).reshape(3, -1)
    phys = m.to_reported(starting_values(m, dict(zip(ops, y)), {k: t for k in ops}))
    # the overall sign of Z is not determined by the data: compare products
    np.testing.assert_allclose(phys[0], 0.4, rtol=1e-8)
    np.testing.assert_allclose(phys[1] * phys[2], 1.2 * -0.8, rtol=1e-8)
    np.testing.assert_allclose(abs(phys[1]), 1.2, rtol=1e-8)


def test_oscillating_start_has_the_right_sign():
    t = np.arange(2, 14)
    m = make_model("exp", 1, ["a"], {"a": t}, T, oscillating=1)
    truth = np.array([0.3, 1.0, 0.6, 0.2])   # E0, A0, Eosc0, Aosc0
    y = m.predict(m.from_reported(truth))
    phys = m.to_reported(starting_values(m, y, t))
    assert phys[3] > 0 and phys[2] > phys[0]


def test_overrides_replace_values_and_are_checked():
    t = np.arange(3, 14)
    m = make_model("exp", 2, ["a"], {"a": t}, T)
    y = m.predict(m.from_reported([0.4, 1.0, 1.0, 0.5]))
    phys = m.to_reported(starting_values(m, y, t, overrides={"E1": 1.1, "A1.a": 0.3}))
    assert phys[1] == 1.1 and phys[3] == 0.3
    with pytest.raises(FitError) as err:
        starting_values(m, y, t, overrides={"E7": 1.0})
    assert err.value.where == "start.E7" and "E0" in err.value.message
    with pytest.raises(FitError, match="increasing"):
        starting_values(m, y, t, overrides={"E1": 0.1})


def test_formula_starts_from_declared_params():
    t = np.arange(3, 10)
    m = make_model("formula", 1, ["a"], {"a": t}, T,
                   formula={"expression": "b * exp(-m * t)", "params": {"b": 2.0, "m": 0.3}})
    np.testing.assert_allclose(starting_values(m, np.ones(7), t, overrides={"m": 0.5}),
                               [2.0, 0.5])
