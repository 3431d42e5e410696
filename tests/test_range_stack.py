"""The central fits of many ranges in one engine call (plateaufit.fit.range_stack).

Each range's result agrees with the range fitted alone to well within the
stopping tolerance (not bit for bit: numpy's batched reductions round
differently for different batch sizes), and the same call twice gives the
same bits."""

from __future__ import annotations

import numpy as np
import pytest

from hard_ensembles import precise_two_state
from plateaufit.data.transforms import fold
from plateaufit.fit.correlator_fit import fit_correlator
from plateaufit.fit.range_stack import central_fits
from plateaufit.fit.ranges import prepare_range
from plateaufit.fit.scan import scan
from plateaufit.stats.resample import bin_samples


@pytest.fixture(scope="module")
def binned():
    return bin_samples(fold(precise_two_state(3), "periodic"), 5)


def _problems(binned, states=1):
    return [prepare_range(binned, form="cosh", states=states, tmin=a, tmax=b, time_extent=48,
                          shrinkage="none") for a in range(4, 12, 2) for b in (18, 21, 23)]


@pytest.mark.parametrize("states", [1, 2])
def test_a_range_gets_the_same_fit_whatever_shares_its_call(binned, states):
    problems = _problems(binned, states)
    full = central_fits(problems)
    again = central_fits(problems)
    for a, b in zip(full, again):                       # reproducible: the same bits
        assert np.array_equal(a.theta, b.theta)
    for subset in ([0], [1, 7], [2, 5, 11], list(range(len(problems)))[::-1]):
        part = central_fits([problems[i] for i in subset])
        for i, fit in zip(subset, part):
            sigma = np.sqrt(np.diag(full[i].param_covariance))
            assert np.all(np.abs(fit.values - full[i].values) <= 1e-4 * sigma)
            assert abs(fit.chi2 - full[i].chi2) < 1e-8


def test_every_start_of_a_range_is_a_row_and_the_lowest_chi2_wins(binned):
    (fit,) = central_fits(_problems(binned, states=2)[:1])
    assert fit.converged and "best of" in fit.message


def test_a_scan_point_is_the_fit_of_its_range(binned):
    fits = scan(binned, tmin=[4, 8], tmax=[18, 21, 3], states=[1, 2], form="cosh",
                time_extent=48, shrinkage="none")
    for point in (fits[0], fits[-1]):
        alone = fit_correlator(binned, form="cosh", states=point.states, tmin=point.tmin,
                               tmax=point.tmax, time_extent=48, shrinkage="none")
        for name in point.names:
            assert abs(alone.values[name] - point.values[name]) <= 1e-4 * point.errors[name]
            assert alone.errors[name] == pytest.approx(point.errors[name], rel=1e-3)
