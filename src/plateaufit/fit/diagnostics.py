"""Diagnostics of one fit: short flags for what a careful analyst would check.

A multi-state fit can return numbers that are not a result: the ground state
parked at zero amplitude while an excited state plays its part, two states
merged into one, a parameter pinned to a bound, refits that wander between
minima. Each such condition is a :class:`Flag` with a short code (stored in
results as ``scan[i].flags``), a sentence for the log and the report, and
whether it makes the fit *degenerate* (weight 0 in a model average) or only
marks some parameters as *undetermined* (left out of those parameters'
averages) or is informational.

Codes (thresholds are module constants):

``central-failed`` (degenerate)
    The central fit did not reach a minimum.
``model-vanishes`` (degenerate)
    The fitted model is at most :data:`VANISHING` of the data everywhere in
    the range: a minimiser that ran off to where the model is zero (a huge
    energy, a vanishing amplitude) describes none of the data, however flat
    its chi2 is there.
``refits-failed`` (degenerate)
    Some jackknife refits did not converge; a jackknife error needs every
    sample.
``at-bound`` (degenerate)
    A parameter ended on (or within round-off of) a bound: not a minimum.
``ground-collapsed`` (degenerate)
    ``E0 <= 0``, or every ground-state amplitude is compatible with zero
    (within :data:`ZERO_SIGMAS` errors), or ``E0`` lies more than
    :data:`PLATEAU_SIGMAS` combined errors and :data:`PLATEAU_FRACTION` below
    the lowest effective mass of the data in the fit range.
``energies-merged`` (degenerate)
    Two neighbouring energies closer than the error of their difference.
``refits-wide`` (degenerate)
    The jackknife error of a determined energy exceeds its curvature error by
    more than :data:`WIDTH_RATIO`: the refits spread far beyond what the
    fit's own chi2 allows (refits in different minima, bimodal samples).
``refits-narrow`` (degenerate)
    The jackknife error of a determined energy is below its curvature error
    by more than :data:`WIDTH_RATIO` (refits that did not move; fits without
    priors only, since a prior narrows the refits legitimately).
``state-unresolved`` (parameters undetermined)
    Every amplitude of an excited state is compatible with zero: its energy
    and amplitudes are left out of their averages; the fit still counts for
    the others.
``prior-dominated`` (informational)
    A parameter's error is at least :data:`PRIOR_DOMINANCE` of its prior's
    width: the prior, not the data, determines it.

References
----------
G. P. Lepage et al., "Constrained curve fitting", Nucl. Phys. B (Proc.
Suppl.) 106 (2002) 12 -- excited states that the data do not constrain, and
the role of priors.

W. I. Jay, E. T. Neil, "Bayesian model averaging for analysis of lattice field
theory results", Phys. Rev. D 103 (2021) 114502 -- which fits may enter an
average.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

__all__ = ["Flag", "diagnose", "is_degenerate", "undetermined_parameters", "FLAG_CODES",
           "ZERO_SIGMAS", "PLATEAU_SIGMAS", "PLATEAU_FRACTION", "VANISHING", "WIDTH_RATIO", "PRIOR_DOMINANCE"]

#: An amplitude within this many errors of zero is compatible with zero
#: (common practice: a 2 sigma band).
ZERO_SIGMAS = 2.0
#: A ground energy this many combined errors below the lowest effective mass in
#: the fit range, and at least PLATEAU_FRACTION of it below, has collapsed
#: (common practice). The fraction keeps precise data honest: a good
#: multi-state fit puts E0 below every effective mass of its range (they are
#: contaminated from above), on very precise data by many tiny errors, but by
#: the size of the contamination only, a few per cent at most; a collapsed
#: fit lands tens of per cent below.
PLATEAU_SIGMAS = 5.0
PLATEAU_FRACTION = 0.1
#: Jackknife and curvature errors of a healthy correlated fit agree within tens
#: of per cent; a factor this large means the refits did not sample one minimum
#: (common practice).
WIDTH_RATIO = 3.0
#: A model no larger than this fraction of the data at every point describes
#: none of them (common practice).
VANISHING = 1e-3
#: chi2/dof above which a fit is a misfit and the refit-width tests are skipped.
MISFIT_CHI2 = 3.0
#: Posterior error / prior width at or above which the prior dominates: with
#: Gaussian data and prior the ratio is 1/sqrt(1 + w^2/sigma_data^2), so 0.75
#: means the data constrain the parameter less well than the prior does.
PRIOR_DOMINANCE = 0.75

#: code -> (effect, meaning); effect is "degenerate", "undetermined" or "info"
FLAG_CODES: dict[str, tuple[str, str]] = {
    "central-failed": ("degenerate", "the central fit did not reach a minimum"),
    "model-vanishes": ("degenerate", "the fitted model is zero on the data"),
    "refits-failed": ("degenerate", "jackknife refits did not converge"),
    "at-bound": ("degenerate", "a parameter ended on a bound"),
    "ground-collapsed": ("degenerate", "the ground state collapsed"),
    "energies-merged": ("degenerate", "two energies are closer than their errors"),
    "refits-wide": ("degenerate", "refits spread far beyond the curvature error"),
    "refits-narrow": ("degenerate", "refits spread far less than the curvature error"),
    "state-unresolved": ("undetermined", "an excited state's amplitudes are all "
                                         "compatible with zero"),
    "prior-dominated": ("info", "the prior determines a parameter"),
}


@dataclass(frozen=True)
class Flag:
    """One diagnostic of a fit.

    Attributes
    ----------
    code : str
        A key of :data:`FLAG_CODES`.
    message : str
        One sentence with the numbers, for the log and the report.
    parameters : tuple of str
        The reported parameters it concerns (for ``state-unresolved``: those
        left out of their averages).
    """

    code: str
    message: str
    parameters: tuple[str, ...] = ()

    @property
    def effect(self) -> str:
        """``degenerate``, ``undetermined`` or ``info``."""
        return FLAG_CODES[self.code][0]

    @property
    def degenerate(self) -> bool:
        return self.effect == "degenerate"

    def __str__(self) -> str:
        return f"{self.code}:{','.join(self.parameters)}" if self.parameters else self.code


def is_degenerate(flags: Sequence[Flag]) -> bool:
    """Whether any flag makes the fit unusable in an average."""
    return any(f.degenerate for f in flags)


def undetermined_parameters(flags: Sequence[Flag]) -> set[str]:
    """Parameters the flags leave out of their averages."""
    return {p for f in flags if f.effect == "undetermined" for p in f.parameters}


def _state_names(names: Sequence[str], n: int, oscillating: bool = False) -> list[str]:
    """Amplitude names of ordinary state ``n`` (A{n}.obs or Z{n}.op)."""
    prefixes = (f"Aosc{n}.", f"Zosc{n}.") if oscillating else (f"A{n}.", f"Z{n}.")
    return [name for name in names if name.startswith(prefixes)]


def _compatible_with_zero(values: Mapping[str, float], errors: Mapping[str, float],
                          names: Sequence[str]) -> bool:
    if not names:
        return False
    for name in names:
        v, e = values.get(name, np.nan), errors.get(name, np.nan)
        if not (np.isfinite(v) and np.isfinite(e)):
            return False
        if abs(v) > ZERO_SIGMAS * e:
            return False
    return True


def diagnose(*, names: Sequence[str], states: int, values: Mapping[str, float],
             errors: Mapping[str, float], curvature_errors: Mapping[str, float],
             samples: np.ndarray | None = None, converged: bool = True,
             central_message: str = "", at_bound: Sequence[str] = (),
             n_refit_failed: int = 0, n_samples: int = 0,
             priors: Mapping[str, Any] | None = None,
             effective_masses: Sequence[tuple[np.ndarray, np.ndarray]] = (),
             oscillating: int = 0,
             state_signals: Mapping[int, Sequence[tuple[float, float]]] | None = None,
             model_scale: tuple[float, float] | None = None,
             chi2_per_dof: float | None = None) -> tuple[Flag, ...]:
    """All flags of one fit.

    Parameters
    ----------
    names : sequence of str
        Reported parameter names, in the order of the columns of ``samples``.
    states : int
        Number of ordinary states (0 for a formula model: only the generic
        checks apply).
    values, errors, curvature_errors : mapping
        Reported name -> central value, jackknife error, and error from the
        central fit's curvature (including priors).
    samples : ndarray (S, p), optional
        Jackknife samples of the reported parameters (NaN rows failed), for
        the error of energy differences.
    converged : bool
        Whether the central fit reached a minimum.
    central_message : str
        The central fit's message (shown with ``central-failed``).
    at_bound : sequence of str
        Parameters that ended on a bound.
    n_refit_failed, n_samples : int
        Failed refits and the number of jackknife samples.
    priors : mapping, optional
        Reported name -> ``(mean, width)`` or an object with ``.width``.
    effective_masses : sequence of (value, error) arrays
        The data's effective masses over the fit range, one pair per
        observable, for the plateau test of ``E0`` (skipped when empty or
        with oscillating states).
    oscillating : int
        Number of oscillating states.
    state_signals : mapping, optional
        State ``n`` -> per observable ``(contribution, jackknife error)`` of that
        state to the model at the fit's first timeslice. A state whose
        contribution is compatible with zero in every observable is
        unresolved even when its amplitude is not (an energy run off to large
        values with the amplitude following, so that nothing of the state
        reaches the data).

    model_scale : (float, float), optional
        The largest ``|model|`` and the largest ``|data|`` over the fit's points
        (the ``model-vanishes`` test).
    chi2_per_dof : float, optional
        Of the central fit. Above :data:`MISFIT_CHI2` the model does not describe
        the data: its refits move with every change of the data and, with
        per-sample covariances, of the weighting, so the width tests say nothing
        about the minimiser (and the fit's AIC weight is negligible anyway);
        they are skipped.

    Returns
    -------
    tuple of Flag
        Empty when the fit is clean.
    """
    flags: list[Flag] = []
    names = list(names)
    if not converged:
        flags.append(Flag("central-failed", f"the central fit did not reach a minimum"
                                            f"{': ' + central_message if central_message else ''}"))
    if model_scale is not None:
        f_max, y_max = model_scale
        if not f_max > VANISHING * y_max:
            flags.append(Flag("model-vanishes", f"the fitted model is at most {f_max:.3g} where "
                                                f"the data reach {y_max:.3g}: it describes none "
                                                "of them (a parameter ran away); give start "
                                                "values or priors"))
    if n_refit_failed:
        flags.append(Flag("refits-failed", f"{n_refit_failed} of {n_samples} jackknife refits "
                                           "did not converge"))
    if at_bound:
        flags.append(Flag("at-bound", f"{', '.join(at_bound)} ended on a bound, so the fit is "
                                      "not a minimum of chi2; widen the bounds or drop them",
                          tuple(at_bound)))
    undetermined: set[str] = set()
    if states >= 1:
        e = [values.get(f"E{n}", np.nan) for n in range(states)]
        # excited states whose amplitudes are all compatible with zero
        for n in range(1, states):
            amps = _state_names(names, n)
            params = (f"E{n}", *amps)
            reason = ""
            if _compatible_with_zero(values, errors, amps):
                reason = (f"every amplitude of state {n} is compatible with zero "
                          f"({_show(values, errors, amps)})")
            elif state_signals and n in state_signals and state_signals[n] and all(
                    np.isfinite(c) and np.isfinite(e) and abs(c) <= ZERO_SIGMAS * e
                    for c, e in state_signals[n]):
                shown = ", ".join(f"{c:.3g} +- {e:.2g}" for c, e in state_signals[n])
                reason = (f"state {n} contributes nothing measurable at the first timeslice "
                          f"({shown})")
            elif not all(np.isfinite(curvature_errors.get(name, np.nan)) for name in params):
                reason = f"the data do not constrain state {n} (singular curvature)"
            if reason:
                undetermined.update(params)
                flags.append(Flag("state-unresolved", f"{reason}; E{n} is not determined",
                                  params))
        # the ground state
        amps0 = _state_names(names, 0)
        reason = ""
        if not e[0] > 0:
            reason = f"E0 = {e[0]:.6g} is not positive"
        elif _compatible_with_zero(values, errors, amps0):
            reason = (f"every ground-state amplitude is compatible with zero "
                      f"({_show(values, errors, amps0)})")
        elif effective_masses and not oscillating:
            lowest = _lowest_plateau(effective_masses, e[0], errors.get("E0", np.nan))
            if lowest is not None:
                reason = lowest
        if reason:
            flags.append(Flag("ground-collapsed", reason + "; another state took its place",
                              ("E0",)))
        # neighbouring energies closer than their errors
        if samples is not None and samples.ndim == 2 and samples.shape[1] == len(names):
            for n in range(states - 1):
                if f"E{n + 1}" in undetermined or f"E{n}" in undetermined:
                    continue
                i, j = names.index(f"E{n}"), names.index(f"E{n + 1}")
                gap = e[n + 1] - e[n]
                good = np.all(np.isfinite(samples[:, [i, j]]), axis=1)
                if good.sum() < 2:
                    continue
                d = samples[good, j] - samples[good, i]
                m = d.size
                gap_err = float(np.sqrt((m - 1) / m * np.sum((d - d.mean()) ** 2)))
                if not gap > gap_err:
                    flags.append(Flag("energies-merged",
                                      f"E{n + 1} - E{n} = {gap:.3g} +- {gap_err:.3g}: the two "
                                      "states are not separated", (f"E{n}", f"E{n + 1}")))
    # refits far wider or narrower than the curvature allows
    energies = [f"E{n}" for n in range(states)] if states >= 1 else list(names)
    wide, narrow = [], []
    misfit = chi2_per_dof is not None and chi2_per_dof > MISFIT_CHI2
    for name in ([] if misfit else energies):
        if name in undetermined:
            continue
        jk, cv = errors.get(name, np.nan), curvature_errors.get(name, np.nan)
        if not (np.isfinite(jk) and np.isfinite(cv) and cv > 0):
            continue
        if jk > WIDTH_RATIO * cv:
            wide.append((name, jk, cv))
        elif not priors and jk * WIDTH_RATIO < cv:
            narrow.append((name, jk, cv))
    for code, found, what in (("refits-wide", wide, "wider"), ("refits-narrow", narrow,
                                                               "narrower")):
        if found:
            shown = ", ".join(f"{n}: jackknife {jk:.2g} vs curvature {cv:.2g}"
                              for n, jk, cv in found)
            flags.append(Flag(code, f"the refits spread {what} than the fit's curvature "
                                    f"allows ({shown})", tuple(n for n, _, _ in found)))
    # priors that dominate their parameter
    dominated = []
    for name, prior in (priors or {}).items():
        width = getattr(prior, "width", None)
        if width is None:
            try:
                width = float(prior[1])
            except (TypeError, ValueError, IndexError):
                continue
        err = curvature_errors.get(name, np.nan)
        if np.isfinite(err) and width > 0 and err >= PRIOR_DOMINANCE * width:
            dominated.append((name, err, width))
    if dominated:
        shown = ", ".join(f"{n}: error {e:.2g} of prior width {w:.2g}" for n, e, w in dominated)
        flags.append(Flag("prior-dominated", f"the prior, not the data, determines {shown}",
                          tuple(n for n, _, _ in dominated)))
    return tuple(flags)


def _show(values: Mapping[str, float], errors: Mapping[str, float],
          names: Sequence[str]) -> str:
    return ", ".join(f"{n} = {values[n]:.3g} +- {errors[n]:.2g}" for n in names)


def _lowest_plateau(effective_masses: Sequence[tuple[np.ndarray, np.ndarray]], e0: float,
                    e0_error: float) -> str | None:
    """A reason when E0 lies far below the lowest effective mass of the range."""
    best = None
    for value, error in effective_masses:
        value, error = np.asarray(value, float), np.asarray(error, float)
        ok = np.isfinite(value) & np.isfinite(error) & (error > 0)
        if not ok.any():
            continue
        combined = np.sqrt(error[ok] ** 2 + (e0_error ** 2 if np.isfinite(e0_error) else 0.0))
        pull = (value[ok] - e0) / combined
        k = int(np.argmin(pull))
        if best is None or pull[k] < best[0]:
            best = (float(pull[k]), float(value[ok][k]), float(error[ok][k]))
    if best is not None and best[0] > PLATEAU_SIGMAS and \
            best[1] - e0 > PLATEAU_FRACTION * abs(best[1]):
        return (f"E0 = {e0:.6g} lies {best[0]:.1f} errors below every effective mass of the "
                f"data in the fit range (the lowest is {best[1]:.6g} +- {best[2]:.2g})")
    return None
