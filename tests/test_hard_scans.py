"""Scans a new user runs first: two states, no priors, an excited state the data
cannot resolve at large tmin (the invented ensemble of hard_ensembles.py)."""

from __future__ import annotations

import pytest

from hard_ensembles import TRUTH, precise_two_state
from plateaufit.data.transforms import fold
from plateaufit.fit.average import average_fits
from plateaufit.fit.scan import scan
from plateaufit.stats.resample import bin_samples


@pytest.fixture(scope="module", params=[1, 2])
def scanned(request):
    binned = bin_samples(fold(precise_two_state(request.param), "periodic"), 5)
    fits = scan(binned, tmin=[4, 13], tmax=[18, 23], states=[1, 2], form="cosh",
                time_extent=48, shrinkage="none")
    return fits, average_fits(fits)


def test_every_point_finishes_and_degenerate_points_get_no_weight(scanned):
    fits, avg = scanned
    assert len(fits) == 120
    for fit, w in zip(fits, avg.weights):
        if fit.degenerate or not fit.converged:
            assert w == 0.0
        # no fit reports a collapsed ground state as a clean result
        if fit.values["E0"] < 0.25 or (fit.states == 2 and abs(fit.values["A0.corr"]) < 0.5):
            assert fit.degenerate, (fit.tmin, fit.tmax, fit.flag_codes)


def test_the_average_recovers_the_truth_with_an_honest_error(scanned):
    fits, avg = scanned
    e0, err = avg.value["E0"], avg.error["E0"]
    assert abs(e0 - TRUTH["E0"]) < 3 * err
    # the averaged statistical error is no larger than a few times the largest
    # error among the points that carry the weight
    heavy = avg.weights > 0.01
    largest = max(f.errors["E0"] for f, h in zip(fits, heavy) if h)
    assert avg.stat_error["E0"] <= 3 * largest
    # E1 is averaged over the fits that resolve it only
    assert abs(avg.value["E1"] - TRUTH["E1"]) < 3 * avg.error["E1"]
    assert avg.error["E1"] < 0.1


def test_unresolved_excited_states_are_left_out_of_the_e1_average(scanned):
    fits, avg = scanned
    late = [f for f in fits if f.states == 2 and f.tmin >= 12]
    assert late and all("E1" in f.undetermined or f.degenerate for f in late)
