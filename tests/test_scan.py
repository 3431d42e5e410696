"""Fit-range scans (plateaufit.fit.scan) on invented data with a known truth."""

from __future__ import annotations

import math

import numpy as np
import pytest

from plateaufit.errors import FitError
from plateaufit.fit.average import model_average
from plateaufit.fit.scan import ScanPoint, expand_range, scan, scan_points
from plateaufit.parallel import make_executor

E0, E1, A0, A1 = 0.35, 0.80, 1.0, 0.9
T = 32


def two_state_samples(n: int = 80, seed: int = 7) -> np.ndarray:
    """Invented measurements C(t) = A0 e^{-E0 t} + A1 e^{-E1 t}, t = 0..T-1.

    Multiplicative zero-mean noise, correlated across t (AR(1) in t), relative
    size growing with t; independent configurations (so no binning is needed).
    """
    rng = np.random.default_rng(seed)
    t = np.arange(T)
    truth = A0 * np.exp(-E0 * t) + A1 * np.exp(-E1 * t)
    z = rng.standard_normal((n, T))
    eta = np.empty_like(z)
    eta[:, 0] = z[:, 0]
    a = 0.9
    for k in range(1, T):
        eta[:, k] = a * eta[:, k - 1] + math.sqrt(1 - a * a) * z[:, k]
    return truth * (1.0 + 0.02 * np.exp(0.08 * t) * eta)


# ---------------------------------------------------------------- scan_points


def test_scan_points_keeps_only_ranges_with_a_degree_of_freedom():
    points = scan_points([2, 5], [6, 8, 2], [1, 2], n_obs=1, n_params_fn=lambda s: 2 * s)
    # number of points tmax - tmin + 1: (2,6)=5 (2,8)=7 (3,6)=4 (3,8)=6 (4,6)=3 (4,8)=5
    # (5,6)=2 (5,8)=4. One state (2 parameters) needs >= 3 points: all but (5,6) -> 7.
    # Two states (4 parameters) need >= 5: (2,6) (2,8) (3,8) (4,8) -> 4.
    got = [(p.tmin, p.tmax, p.states) for p in points]
    assert got == [(2, 6, 1), (2, 8, 1), (3, 6, 1), (3, 8, 1), (4, 6, 1), (4, 8, 1), (5, 8, 1),
                   (2, 6, 2), (2, 8, 2), (3, 8, 2), (4, 8, 2)]
    assert all(p.dof >= 1 for p in points)
    assert points[0] == ScanPoint(2, 6, 1, n_points=5, n_params=2)


def test_scan_points_counts_parameters_from_the_model_names():
    # two observables, exp: states n -> n energies + 2n amplitudes
    pts = scan_points(3, [4, 8, 2], [1, 2, 3], observables=["ss", "sl"])
    assert {(p.states, p.n_params) for p in pts} == {(1, 3), (2, 6), (3, 9)}
    assert all(p.n_points == 2 * (p.tmax - p.tmin + 1) for p in pts)
    # (3,4): 4 points -> 1 state; (3,6): 8 -> 1, 2 states; (3,8): 12 -> 1, 2, 3 states
    assert [(p.tmax, p.states) for p in pts] == [(4, 1), (6, 1), (8, 1), (6, 2), (8, 2), (8, 3)]
    # factorised: E0, E1, Z0.S, Z0.L, Z1.S, Z1.L
    fact = scan_points(2, 10, 2, observables=["ss", "sl"],
                       operators={"ss": ("S", "S"), "sl": ("S", "L")})
    assert fact[0].n_params == 6
    # constant term per observable, one oscillating state
    extra = scan_points(2, 10, 1, observables=["x"], constant=True, oscillating=1)
    assert extra[0].n_params == 5   # E0, A0.x, Eosc0, Aosc0.x, c.x


@pytest.mark.parametrize("spec, expected", [(4, [4]), ([2, 5], [2, 3, 4, 5]),
                                            ([2, 9, 3], [2, 5, 8]), ((1, 1), [1])])
def test_ranges_include_both_ends(spec, expected):
    assert expand_range(spec, "tmin") == expected


@pytest.mark.parametrize("bad, match", [("3", "expected an integer"), ([5, 2], "lo > hi"),
                                        ([1, 4, 0], "step"), (-1, "start at 0"),
                                        ([1, 2, 3, 4], "expected"), (2.5, "expected"),
                                        (True, "expected")])
def test_malformed_ranges_are_clear_errors(bad, match):
    with pytest.raises(FitError, match=match) as info:
        scan_points(bad, 10, 1, n_obs=1)
    assert info.value.where == "tmin"


def test_bad_states_and_an_empty_scan_are_errors():
    with pytest.raises(FitError) as info:
        scan_points(2, 10, [0, 1], n_obs=1)
    assert info.value.where == "states"
    with pytest.raises(FitError, match="degree of freedom"):
        scan_points(5, 6, 2, n_obs=1)   # 2 points, 4 parameters


# ---------------------------------------------------------------- scan


@pytest.fixture(scope="module")
def data():
    return two_state_samples()


@pytest.fixture(scope="module")
def two_state_scan(data):
    # a loose prior on the excited state keeps the two-state fits at large tmin, where
    # the data cannot resolve E1, from running away (common practice)
    return scan(data, tmin=[1, 8], tmax=14, states=[1, 2], form="exp", time_extent=T,
                priors={"E1": (0.9, 0.3)})


def test_scan_returns_one_fit_per_point_in_order(two_state_scan):
    expected = [(p.tmin, p.tmax, p.states)
                for p in scan_points([1, 8], 14, [1, 2], n_obs=1, n_params_fn=lambda s: 2 * s)]
    assert [(f.tmin, f.tmax, f.states) for f in two_state_scan] == expected


def test_average_recovers_the_ground_state_and_weights_move_to_two_states(two_state_scan):
    fits = two_state_scan
    aic = np.array([f.central.aic for f in fits])
    converged = np.array([f.converged for f in fits])
    central = np.array([[f.central.reported["E0"]] for f in fits])
    samples = np.stack([f.samples[:, [f.model.reported_names.index("E0")]] for f in fits])
    avg = model_average(central, samples, aic, converged, ["E0"])
    assert abs(avg.value["E0"] - E0) < 3 * avg.error["E0"]
    assert avg.error["E0"] < 0.02   # the data do pin E0 down
    small = np.array([f.tmin <= 3 for f in fits])
    two = np.array([f.states == 2 for f in fits])
    # at small tmin the excited state is visible: the 2-state fits must carry the weight
    assert avg.weights[small & two].sum() > avg.weights[small & ~two].sum()
    # and a one-state fit from tmin = 1 is visibly bad
    one_from_1 = next(f for f in fits if f.tmin == 1 and f.states == 1)
    assert one_from_1.central.p_value < 1e-3
@pytest.mark.slow   # a process pool or subprocess
def test_scan_is_bitwise_the_same_on_two_processes(data):
    kwargs = dict(tmin=[2, 5], tmax=[12, 13], states=[1, 2], form="exp", time_extent=T)
    serial = scan(data, **kwargs)
    with make_executor(jobs=2) as ex:
        pooled = scan(data, executor=ex, **kwargs)
    assert len(serial) == len(pooled) == 16
    for a, b in zip(serial, pooled):
        assert (a.tmin, a.tmax, a.states) == (b.tmin, b.tmax, b.states)
        assert a.central.theta.tobytes() == b.central.theta.tobytes()
        assert a.samples.tobytes() == b.samples.tobytes()
        assert a.central.chi2 == b.central.chi2 and a.central.aic == b.central.aic
        assert a.errors == b.errors


def test_priors_on_excited_states_reach_only_the_fits_that_have_them(data):
    fits = scan(data, tmin=4, tmax=12, states=[1, 2], form="exp", time_extent=T,
                priors={"E1": (0.9, 0.3)})
    by_states = {f.states: f for f in fits}
    assert by_states[1].central.n_priors == 0
    assert by_states[2].central.n_priors == 1
    with pytest.raises(FitError) as info:
        scan(data, tmin=4, tmax=12, states=[1, 2], form="exp", time_extent=T,
             priors={"E7": (0.9, 0.3)})
    assert info.value.where == "priors.E7"


def test_tmax_beyond_the_data_is_refused(data):
    with pytest.raises(FitError) as info:
        scan(data, tmin=2, tmax=[10, T], states=1, form="exp", time_extent=T)
    assert info.value.where == "tmax"
    assert f"last timeslice is {T - 1}" in info.value.message


def test_a_point_that_cannot_be_fitted_is_named(data):
    # 8 samples and 11 points without shrinkage: the covariance is singular
    with pytest.raises(FitError, match=r"tmin=2, tmax=12, states=1"):
        scan(data[:8], tmin=2, tmax=12, states=1, form="exp", time_extent=T, shrinkage="none")
