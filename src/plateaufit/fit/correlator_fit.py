"""The fit of one range: central fit plus a refit on every jackknife sample.

The steps, each a function usable on its own (the scan runs the central fits
of many ranges before any refit):

1. :func:`prepare_range` -- the model, the data vector and its covariance;
2. :func:`central_of_range` -- the central fit from several starts, among them
   the fit with one state fewer on the same range plus a state on top;
3. :func:`refit_range` -- a refit on every jackknife sample, the jackknife
   errors and the diagnostic flags (:mod:`plateaufit.fit.diagnostics`).

Numerical warnings raised by numpy, scipy or lmfit inside a fit are caught
there, counted on the result (``n_numerical_warnings``) and never reach the
terminal.

References
----------
G. P. Lepage et al., "Constrained curve fitting", Nucl. Phys. B (Proc.
Suppl.) 106 (2002) 12; W. I. Jay, E. T. Neil, Phys. Rev. D 103 (2021) 114502.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from plateaufit.fit.central import DEFAULT_TOL, CentralFit
from plateaufit.fit.diagnostics import Flag, diagnose, is_degenerate, undetermined_parameters
from plateaufit.fit.models import CorrelatorModel
from plateaufit.fit.numerics import CaughtWarnings, merge_messages
from plateaufit.fit.range_stack import central_fits
from plateaufit.fit.ranges import RangeProblem, prepare_range
from plateaufit.fit.refits import jackknife_refits
from plateaufit.stats import covariance as covmod
from plateaufit.stats.resample import jackknife_covariance, jackknife_error, jackknife_samples

#: Iteration budget of the refits of a fit already degenerate by its central fit.
DEGENERATE_REFIT_ITERATIONS = 30

__all__ = ["CorrelatorFit", "fit_correlator", "central_of_range", "refit_range", "with_warnings",
           "RangeProblem", "prepare_range"]


@dataclass
class CorrelatorFit:
    """A correlated fit of one fit range with jackknife errors.

    Attributes
    ----------
    model : CorrelatorModel
    tmin, tmax : int
        The fit range (inclusive), the same for every observable.
    states : int
    form : str
    central : CentralFit
        The fit to the mean; its parameters are the reported values.
    samples : ndarray, (S, p)
        Reported parameters refitted on every jackknife sample (NaN rows for
        refits that failed).
    errors : dict
        Reported name -> jackknife error (over the converged refits).
    covariance : CovarianceResult
        The data covariance used (from :mod:`plateaufit.stats.covariance`).
    converged : bool
        The central fit and every refit converged.
    n_refit_failed : int
    param_covariance : ndarray, (p, p)
        Jackknife covariance of the reported parameters.
    n_fallback : int
        Refits the batched engine handed back to lmfit.
    engine : str
        Refit engine used.
    observables : tuple of str
    n_bins : int
    per_sample : bool
        Whether each refit used its own covariance.
    flags : tuple of Flag
        Diagnostics (:mod:`plateaufit.fit.diagnostics`); empty when clean.
    n_numerical_warnings : int
        Warnings numpy, scipy or lmfit raised during the fit (caught).
    numerical_warnings : tuple of str
        The distinct messages among them (at most five).
    """

    model: CorrelatorModel
    tmin: int
    tmax: int
    states: int
    form: str
    central: CentralFit
    samples: np.ndarray
    errors: dict[str, float]
    covariance: Any
    converged: bool
    n_refit_failed: int
    param_covariance: np.ndarray = field(repr=False, default_factory=lambda: np.zeros((0, 0)))
    n_fallback: int = 0
    engine: str = "lmfit"
    observables: tuple[str, ...] = ()
    n_bins: int = 0
    per_sample: bool = False
    flags: tuple[Flag, ...] = ()
    n_numerical_warnings: int = 0
    numerical_warnings: tuple[str, ...] = ()

    @property
    def names(self) -> tuple[str, ...]:
        return tuple(self.model.reported_names)

    @property
    def degenerate(self) -> bool:
        """A flag makes this fit unusable in an average (weight 0)."""
        return is_degenerate(self.flags)

    @property
    def undetermined(self) -> set[str]:
        """Parameters the flags leave out of their averages (unresolved states)."""
        return undetermined_parameters(self.flags)

    @property
    def flag_codes(self) -> list[str]:
        """The flags as the short strings results store."""
        return [str(f) for f in self.flags]

    @property
    def values(self) -> dict[str, float]:
        return dict(self.central.reported)

    chi2 = property(lambda self: self.central.chi2)
    dof = property(lambda self: self.central.dof)
    p_value = property(lambda self: self.central.p_value)
    p_value_hotelling = property(lambda self: self.central.p_value_hotelling)
    aic = property(lambda self: self.central.aic)


def central_of_range(problem: RangeProblem, lower: Mapping[str, float] | None = None,
                     *, lower_states: bool = True) -> CentralFit:
    """The central fit of one range, minimised from several starts.

    Parameters
    ----------
    problem : RangeProblem
    lower : mapping, optional
        Reported parameters of the central fit with one state fewer on the
        same range. When not given (and ``lower_states``), that fit is made
        here first (recursively), so a fit of ``n`` states always also starts
        from the best fit of ``n - 1`` states plus one.
    lower_states : bool, optional
        Whether to make the fit with one state fewer when ``lower`` is None.

    Returns
    -------
    CentralFit
    """
    model = problem.model
    if lower is None and lower_states and model.form != "formula" and problem.states >= 2:
        below = central_of_range(problem.with_states(problem.states - 1))
        if below.converged:
            lower = below.reported
    return central_fits([problem], [lower])[0]


def refit_range(problem: RangeProblem, central: CentralFit) -> CorrelatorFit:
    """Refits on every jackknife sample, errors and diagnostics of one range.

    When the central fit is already degenerate by its own curvature (it
    failed, a parameter is on a bound, or the ground state collapsed), the
    refits run in the batched engine only, for at most
    :data:`DEGENERATE_REFIT_ITERATIONS` iterations: their errors serve the
    diagnostics, and a full budget (or refitting stragglers one by one) would
    cost much for a fit that gets weight 0 anyway.
    """
    model = problem.model
    x = problem.x
    y_samples = jackknife_samples(x)
    early = diagnose(names=model.reported_names, states=model.states,
                     values=central.reported, errors=central.errors,
                     curvature_errors=central.errors, converged=central.converged,
                     at_bound=central.at_bound, oscillating=model.oscillating,
                     model_scale=_model_scale(model, central.theta, problem.y))
    hopeless = is_degenerate(early)
    kwargs = dict(priors=problem.priors, bounds=problem.bounds, engine=problem.engine,
                  tol=problem.tol, fallback=not hopeless,
                  max_iter=DEGENERATE_REFIT_ITERATIONS if hopeless else None)
    if problem.per_sample:
        cov_samples = covmod.per_sample_covariances(x, **problem.covariance_options)
        refits = jackknife_refits(y_samples, model, central.theta, cov_samples=cov_samples,
                                  **kwargs)
    else:
        refits = jackknife_refits(y_samples, model, central.theta,
                                  cov=problem.covariance.matrix, **kwargs)
    samples = refits.reported
    good = refits.converged
    if good.sum() >= 2:
        err = np.asarray(jackknife_error(samples[good]), dtype=float)
        pcov = np.asarray(jackknife_covariance(samples[good]), dtype=float)
    else:
        err = np.full(model.n_params, np.nan)
        pcov = np.full((model.n_params, model.n_params), np.nan)
    n_failed = int(np.count_nonzero(~good))
    names = tuple(model.reported_names)
    errors = dict(zip(names, err.tolist()))
    signals = state_signals(model, central.theta, refits.theta[good]) if good.sum() >= 2 \
        else None
    flags = diagnose(names=names, states=model.states, values=central.reported,
                     errors=errors, curvature_errors=central.errors, samples=samples,
                     converged=central.converged, central_message=central.message,
                     at_bound=central.at_bound, n_refit_failed=n_failed,
                     n_samples=samples.shape[0], priors=problem.priors,
                     effective_masses=problem.effective_masses,
                     oscillating=model.oscillating, state_signals=signals,
                     model_scale=_model_scale(model, central.theta, problem.y),
                     chi2_per_dof=central.chi2_per_dof)
    return CorrelatorFit(
        model=model, tmin=problem.tmin, tmax=problem.tmax, states=problem.states,
        form=problem.form, central=central, samples=samples, errors=errors,
        covariance=problem.covariance,
        converged=bool(central.converged and n_failed == 0),
        n_refit_failed=n_failed, param_covariance=pcov, n_fallback=refits.n_fallback,
        engine=refits.engine, observables=problem.observables, n_bins=problem.n_bins,
        per_sample=problem.per_sample, flags=flags)


def _model_scale(model: CorrelatorModel, theta: np.ndarray, y: np.ndarray
                 ) -> tuple[float, float]:
    """(largest |model|, largest |data|) over the fit's points."""
    with np.errstate(all="ignore"):
        f = np.asarray(model.predict(theta), dtype=float)
    f_max = float(np.max(np.abs(f))) if np.all(np.isfinite(f)) else float("nan")
    return f_max, float(np.max(np.abs(y)))


def state_signals(model: CorrelatorModel, theta: np.ndarray, theta_samples: np.ndarray
                  ) -> dict[int, list[tuple[float, float]]]:
    """Each excited state's contribution to the model at each observable's first
    timeslice, with its jackknife error over the refits.

    The model is evaluated with every amplitude but those of state ``n`` set
    to zero, so whatever the form (plain or factorised amplitudes) the number
    is what the state adds to the prediction.
    """
    if model.form == "formula" or model.states < 2:
        return {}
    layout = model.layout
    amp = layout.internal["amplitudes"]
    n_labels = len(model.amplitude_labels)
    first = [sl.start for sl in model.point_slices().values()]
    out: dict[int, list[tuple[float, float]]] = {}
    for n in range(1, model.states):
        keep = np.zeros(model.n_params, dtype=bool)
        keep[: amp.start] = True             # energies
        start = amp.start + n * n_labels
        keep[start:start + n_labels] = True  # this state's amplitudes
        keep[layout.internal["oscillating_amplitudes"]] = False
        keep[layout.internal["constants"]] = False
        keep[layout.internal["oscillating_energies"]] = True
        with np.errstate(all="ignore"):
            c = model.predict(np.where(keep, theta, 0.0))[first]
            cs = model.predict(np.where(keep, theta_samples, 0.0))[:, first]
        m = cs.shape[0]
        err = np.sqrt((m - 1) / m * np.sum((cs - cs.mean(axis=0)) ** 2, axis=0))
        out[n] = [(float(a), float(b)) for a, b in zip(c, err)]
    return out


def fit_correlator(binned, *, form: str, states: int, tmin: int, tmax: int,
                   time_extent: int, priors: Mapping[str, Any] | None = None,
                   bounds: Mapping[str, Any] | None = None,
                   shrinkage: str | float = "ledoit-wolf", target: str = "diagonal",
                   per_sample: bool | str = "auto", oscillating: int = 0,
                   constant: bool = False,
                   operators: Mapping[str, tuple[str, str]] | None = None,
                   formula: Mapping | None = None, start: Mapping[str, float] | None = None,
                   engine: str = "auto", n_total_points: int | None = None,
                   eigenvalue_floor: float | None = None,
                   tol: float = DEFAULT_TOL,
                   central: Mapping[str, np.ndarray] | np.ndarray | None = None,
                   covariance_matrix: Any = None
                   ) -> CorrelatorFit:
    """Correlated fit of one fit range, with jackknife refits for the errors.

    Parameters
    ----------
    binned : ndarray (n_bins, n_t) or dict NAME -> ndarray (n_bins, n_t)
        Binned (folded) correlator data; a dict gives a simultaneous fit with
        the observables concatenated in dict order. A plain array is called
        ``corr`` (parameters ``A0.corr`` ...).
    form : {"exp", "cosh", "sinh", "formula"}
    states : int
    tmin, tmax : int
        Fit range, both included, in the folded time index, for every observable.
    time_extent : int
        Lattice time extent ``T``.
    priors, bounds : mapping, optional
        Reported name -> ``(mean, width)`` / ``(lower, upper)``.
    shrinkage, target, eigenvalue_floor
        Passed to :func:`plateaufit.stats.covariance.covariance_of_mean`.
    per_sample : bool or "auto", optional
        Refit every jackknife sample with its own covariance
        (:func:`plateaufit.stats.covariance.per_sample_covariances`) instead of
        the one from all bins; ``"auto"`` (default) where the range has fewer
        than :data:`plateaufit.fit.ranges.PER_SAMPLE_BINS_PER_POINT` bins per
        point.
    oscillating, constant, operators, formula
        See :func:`~plateaufit.fit.models.make_model`.
    start : mapping, optional
        Reported name -> starting value, overriding the automatic one.
    engine : {"auto", "batched", "lmfit"}
        Refit engine, see :func:`jackknife_refits`.
    n_total_points : int, optional
        Size of the full data set for the AIC penalty; by default all
        timeslices of the fit's observables, ``sum n_t``.
    tol : float, optional
        Minimiser tolerance.
    central : ndarray or dict NAME -> ndarray, optional
        The data of the central fit when it is not the mean of ``binned``:
        with ``binned`` the pseudo-values of jackknife samples
        (:func:`plateaufit.stats.resample.pseudo_values`), the fit of an
        estimate known only through its jackknife samples (a principal
        correlator of the GEVP); the refits then run on exactly those samples.
    covariance_matrix : ndarray or covariance result, optional
        A covariance of the mean over all timeslices of the fit's observables
        (e.g. :func:`plateaufit.stats.gamma_covariance.gamma_covariance` of the
        unbinned data) used instead of the bins' covariance; the range takes
        its block, and every refit uses it (see :func:`prepare_range`).

    Returns
    -------
    CorrelatorFit
        ``converged`` is False (never an exception) when the central fit or
        any refit fails; values and errors are then still filled where known.
        ``flags`` says what a careful analyst would check (a collapsed ground
        state, merged or unresolved states, a bound, wandering refits, a
        dominating prior); see :mod:`plateaufit.fit.diagnostics`.

    Raises
    ------
    plateaufit.errors.FitError
        For a fit range outside the data (``where="tmin"``/``"tmax"``), more
        parameters than points without priors, a singular covariance, or a
        bad model set-up.

    References
    ----------
    G. P. Lepage et al., "Constrained curve fitting", Nucl. Phys. B (Proc.
    Suppl.) 106 (2002) 12; W. I. Jay, E. T. Neil, Phys. Rev. D 103 (2021)
    114502.
    """
    with CaughtWarnings() as caught:
        problem = prepare_range(binned, form=form, states=states, tmin=tmin, tmax=tmax,
                                time_extent=time_extent, priors=priors, bounds=bounds,
                                shrinkage=shrinkage, target=target, per_sample=per_sample,
                                oscillating=oscillating, constant=constant,
                                operators=operators, formula=formula, start=start,
                                engine=engine, n_total_points=n_total_points,
                                eigenvalue_floor=eigenvalue_floor, tol=tol,
                                central=central, covariance_matrix=covariance_matrix)
        fit = refit_range(problem, central_of_range(problem))
    return with_warnings(fit, caught)


def with_warnings(fit: CorrelatorFit, caught: CaughtWarnings) -> CorrelatorFit:
    """Add the warnings caught around a fit to those its central fit caught."""
    fit.n_numerical_warnings = caught.count + fit.central.n_numerical_warnings
    fit.numerical_warnings = merge_messages(fit.central.numerical_warnings, caught.messages)
    return fit
