"""Diagnostic flags of a fit (plateaufit.fit.diagnostics), each on a constructed case."""

from __future__ import annotations

import numpy as np
import pytest

from hard_ensembles import TRUTH, precise_two_state
from plateaufit.data.transforms import fold
from plateaufit.fit.correlator_fit import fit_correlator
from plateaufit.fit.diagnostics import (FLAG_CODES, Flag, diagnose, is_degenerate,
                                        undetermined_parameters)
from plateaufit.stats.resample import bin_samples

NAMES = ("E0", "E1", "A0.pion", "A1.pion")


def _clean(**over):
    values = {"E0": 0.3, "E1": 0.8, "A0.pion": 1.0, "A1.pion": 0.5}
    errors = {"E0": 1e-3, "E1": 2e-2, "A0.pion": 1e-2, "A1.pion": 5e-2}
    kw = dict(names=NAMES, states=2, values=values, errors=errors,
              curvature_errors=dict(errors))
    for key, value in over.items():
        if key in ("values", "errors", "curvature_errors"):
            kw[key] = {**kw[key], **value}
        else:
            kw[key] = value
    return kw


def _codes(flags):
    return [f.code for f in flags]


def test_a_clean_fit_has_no_flags():
    assert diagnose(**_clean()) == ()


def test_every_code_has_an_effect_and_a_meaning():
    for code, (effect, meaning) in FLAG_CODES.items():
        assert effect in ("degenerate", "undetermined", "info") and meaning


def test_failed_central_fit_and_failed_refits_are_degenerate():
    flags = diagnose(**_clean(converged=False, central_message="no minimum",
                              n_refit_failed=3, n_samples=200))
    assert _codes(flags) == ["central-failed", "refits-failed"]
    assert "3 of 200" in flags[1].message and is_degenerate(flags)


def test_a_parameter_on_a_bound_is_degenerate():
    flags = diagnose(**_clean(at_bound=("E0",)))
    assert _codes(flags) == ["at-bound"] and flags[0].parameters == ("E0",)
    assert is_degenerate(flags)


@pytest.mark.parametrize("over", [
    {"values": {"E0": -0.01}},                                        # not positive
    {"values": {"A0.pion": 0.004}, "errors": {"A0.pion": 0.06}},      # amplitude ~ 0
])
def test_a_collapsed_ground_state_is_degenerate(over):
    flags = diagnose(**_clean(**over))
    assert "ground-collapsed" in _codes(flags) and is_degenerate(flags)


def test_a_ground_energy_far_below_every_effective_mass_is_collapsed():
    # effective masses of the data at 0.30 +- 0.001 over the range; E0 at 0.22
    meff = (np.full(8, 0.30), np.full(8, 1e-3))
    flags = diagnose(**_clean(values={"E0": 0.22}, effective_masses=[meff]))
    assert _codes(flags) == ["ground-collapsed"] and "below every effective mass" in \
        flags[0].message
    # from above (excited states contaminate the effective mass upwards) is fine
    assert diagnose(**_clean(values={"E0": 0.2995}, effective_masses=[meff])) == ()
    # very precise data: a good two-state fit lies 1% below every effective mass of
    # its range, by 30 tiny errors -- contamination, not a collapse
    precise = (np.full(8, 0.30), np.full(8, 1e-4))
    assert diagnose(**_clean(values={"E0": 0.297}, errors={"E0": 1e-5}, curvature_errors={"E0": 1e-5},
                             effective_masses=[precise])) == ()


def test_an_excited_state_compatible_with_zero_is_undetermined_not_degenerate():
    flags = diagnose(**_clean(values={"A1.pion": 8.0}, errors={"A1.pion": 186.0}))
    assert _codes(flags) == ["state-unresolved"]
    assert not is_degenerate(flags)
    assert undetermined_parameters(flags) == {"E1", "A1.pion"}


def test_a_state_that_contributes_nothing_is_undetermined():
    # E1 ran off to 1e62 with A1 following: its amplitude looks significant, but
    # nothing of the state reaches the data at the first timeslice
    flags = diagnose(**_clean(values={"E1": 5.8e62, "A1.pion": 412.0},
                              errors={"A1.pion": 2e-11}, state_signals={1: [(0.0, 0.0)]}))
    assert _codes(flags) == ["state-unresolved"]


def test_energies_closer_than_their_errors_are_merged():
    rng = np.random.default_rng(1)
    samples = np.array([0.3, 0.32, 1.0, 0.5]) + rng.normal(0, [1e-3, 0.05, 1e-2, 5e-2],
                                                           size=(100, 4)) / np.sqrt(99)
    flags = diagnose(**_clean(values={"E1": 0.32}, samples=samples))
    assert _codes(flags) == ["energies-merged"] and is_degenerate(flags)
    # well separated: clean
    assert diagnose(**_clean(samples=samples + [0, 0.5, 0, 0])) == ()


def test_refits_far_wider_or_narrower_than_the_curvature_are_degenerate():
    wide = diagnose(**_clean(errors={"E0": 4e-3}))            # 4x the curvature error
    assert _codes(wide) == ["refits-wide"] and wide[0].parameters == ("E0",)
    narrow = diagnose(**_clean(errors={"E0": 2e-4}))          # refits that did not move
    assert _codes(narrow) == ["refits-narrow"]
    # a prior narrows the refits legitimately: no narrow flag then
    assert diagnose(**_clean(errors={"E0": 2e-4}, priors={"E1": (0.8, 10.0)})) == ()


def test_a_misfit_is_not_judged_by_the_spread_of_its_refits():
    # chi2/dof = 9: the model does not describe the data, its refits swing with the
    # (per-sample) weighting; the AIC already discounts it, the width test says nothing
    assert diagnose(**_clean(errors={"E0": 4e-3}, chi2_per_dof=9.0)) == ()
    assert _codes(diagnose(**_clean(errors={"E0": 4e-3}, chi2_per_dof=1.1))) == ["refits-wide"]


def test_a_prior_that_determines_its_parameter_is_reported():
    flags = diagnose(**_clean(curvature_errors={"E1": 0.45}, errors={"E1": 0.45},
                              priors={"E1": (0.8, 0.5)}))
    assert _codes(flags) == ["prior-dominated"] and not is_degenerate(flags)
    assert diagnose(**_clean(priors={"E1": (0.8, 0.5)})) == ()


def test_a_model_that_vanishes_on_the_data_is_degenerate():
    # a minimiser that ran off to E0 ~ 1700 with A0 ~ 1e-30: chi2 flat, model zero
    flags = diagnose(**_clean(model_scale=(1e-30, 0.8)))
    assert _codes(flags) == ["model-vanishes"] and is_degenerate(flags)
    assert diagnose(**_clean(model_scale=(0.79, 0.8))) == ()


def test_flags_print_as_short_codes():
    assert str(Flag("ground-collapsed", "x", ("E0",))) == "ground-collapsed:E0"
    assert str(Flag("central-failed", "x")) == "central-failed"


# --- the flags on real fits of an invented ensemble --------------------------

@pytest.fixture(scope="module")
def binned():
    return bin_samples(fold(precise_two_state(1), "periodic"), 5)


def test_a_fit_pinned_at_a_bound_is_flagged(binned):
    # the data say E0 = 0.3; a bound [0.5, 1.0] pins it (common practice: not a result)
    fit = fit_correlator(binned, form="cosh", states=1, tmin=10, tmax=20, time_extent=48,
                         shrinkage="none", bounds={"E0": (0.5, 1.0)})
    assert "at-bound:E0" in fit.flag_codes and fit.degenerate


def test_an_excited_state_the_data_cannot_see_is_unresolved(binned):
    fit = fit_correlator(binned, form="cosh", states=2, tmin=12, tmax=23, time_extent=48,
                         shrinkage="none")
    assert "E1" in fit.undetermined and not fit.degenerate
    # the ground state is still a result: within 3 sigma of the truth
    assert abs(fit.values["E0"] - TRUTH["E0"]) < 3 * fit.errors["E0"]


def test_a_resolved_excited_state_is_clean(binned):
    fit = fit_correlator(binned, form="cosh", states=2, tmin=4, tmax=23, time_extent=48,
                         shrinkage="none")
    assert fit.flags == () and fit.converged
    for name in ("E0", "E1"):
        assert abs(fit.values[name] - TRUTH[name]) < 3 * fit.errors[name]
