"""Typed results from the fit core's objects: the same code for a spec run and a notebook.

:func:`summarise_scan` turns the list of
:class:`~plateaufit.fit.correlator_fit.CorrelatorFit` that
:func:`plateaufit.scan` returns (or one fit of
:func:`plateaufit.fit_correlator`) into a :class:`~plateaufit.pipeline.results.FitResult`:
the scan points, the chosen point or the AIC-weighted model average
(:func:`plateaufit.fit.average.average_fits`), the covariance of the point
behind it and, given the binned data, the effective masses. The report's plot
functions take that result::

    fits = pf.scan(binned, tmin=[4, 8], tmax=20, states=[1, 2], form="cosh",
                   time_extent=48)
    result = summarise_scan(fits, name="pion", binned=binned, time_extent=48)
    fig = plot_stability(result)

References
----------
W. I. Jay, E. T. Neil, "Bayesian model averaging for analysis of lattice field
theory results", Phys. Rev. D 103 (2021) 114502.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from plateaufit.errors import FitError
from plateaufit.fit.average import average_fits
from plateaufit.fit.derived import DerivedInput
from plateaufit.fit.models import EFFECTIVE_MASS_KIND
from plateaufit.pipeline.results import (ChosenResult, CovarianceSummary, EffectiveMassResult,
                                         FitResult, ParamEstimate, PointEstimate, PointSummary,
                                         ScanPointResult)
from plateaufit.stats.effmass import effective_mass_jackknife

__all__ = ["summarise_scan", "scan_point_result", "effective_mass_results", "reported_names",
           "withheld_parameters", "central_failed"]


def reported_names(fit: Any) -> list[str]:
    """The reported parameter names of a CorrelatorFit (E0, E1, A0.NAME, ...)."""
    model = fit.model
    names = getattr(model, "reported_names", None)
    return list(names if names is not None else model.reported_names)


def _reported_values(fit: Any) -> Mapping[str, float]:
    central = fit.central
    values = getattr(central, "reported", None)
    return values if values is not None else central.reported


def central_failed(fit: Any) -> bool:
    """Whether the central fit of a CorrelatorFit reached no minimum: its parameters are
    where the minimiser stopped (often the start values), never results."""
    codes = {str(c).split(":")[0] for c in getattr(fit, "flag_codes", ())}
    return "central-failed" in codes or not bool(getattr(fit.central, "converged", True))


def withheld_parameters(fit: Any) -> tuple[list[str], list[str]]:
    """The parameters of a chosen single fit that are not results, and why.

    A fit that did not converge (central fit or a refit) or carries a flag that
    makes it degenerate (``at-bound``, ``ground-collapsed``, ...) is not a fit:
    every parameter is withheld. Otherwise the parameters of states the data do
    not resolve (``state-unresolved``) are. Returns ``(names, reasons)``.
    """
    names = reported_names(fit)
    flags = tuple(getattr(fit, "flags", ()) or ())
    reasons = [str(getattr(f, "message", f)) for f in flags
               if getattr(f, "effect", "") == "degenerate"]
    if not bool(fit.converged) and not reasons:
        reasons.append("the fit did not converge")
    if reasons or bool(getattr(fit, "degenerate", False)):
        return names, reasons or [str(c) for c in getattr(fit, "flag_codes", ())]
    unresolved = set(getattr(fit, "undetermined", ()) or ())
    withheld = [n for n in names if n in unresolved]
    reasons = [str(getattr(f, "message", f)) for f in flags
               if getattr(f, "effect", "") == "undetermined"] if withheld else []
    return withheld, reasons


def scan_point_result(fit: Any, weight: float) -> ScanPointResult:
    """One scan point, with its diagnostic flags and caught numerical warnings.

    A point whose central fit failed gets no parameter values (NaN; null in
    results.json): where its minimiser stopped is not a result.
    """
    central = fit.central
    values = _reported_values(fit)
    failed = central_failed(fit)
    flags = tuple(getattr(fit, "flags", ()) or ())
    return ScanPointResult(
        tmin=int(fit.tmin), tmax=int(fit.tmax), form=str(fit.form), states=int(fit.states),
        chi2=float(central.chi2), chi2_data=float(central.chi2_data),
        chi2_prior=float(central.chi2_prior), dof=int(central.dof),
        n_points=int(central.n_points), n_priors=int(central.n_priors),
        p_value=float(central.p_value), p_value_hotelling=float(central.p_value_hotelling),
        aic=float(central.aic), weight=float(weight), converged=bool(fit.converged),
        n_refit_failed=int(fit.n_refit_failed),
        params={name: (PointEstimate(math.nan, math.nan) if failed
                       else PointEstimate(float(values[name]), float(fit.errors[name])))
                for name in reported_names(fit)},
        flags=tuple(str(c) for c in getattr(fit, "flag_codes", [str(f) for f in flags])),
        flag_messages=tuple(str(getattr(f, "message", f)) for f in flags),
        n_numerical_warnings=int(getattr(fit, "n_numerical_warnings", 0)),
        numerical_warnings=tuple(str(w) for w in getattr(fit, "numerical_warnings", ())),
    )


def _point_summary(fit: Any, weight: float) -> PointSummary:
    c = fit.central
    return PointSummary(tmin=int(fit.tmin), tmax=int(fit.tmax), states=int(fit.states),
                        weight=float(weight), chi2=float(c.chi2), dof=int(c.dof),
                        p_value=float(c.p_value), p_value_hotelling=float(c.p_value_hotelling),
                        converged=bool(fit.converged))


def _covariance_summary(fit: Any) -> CovarianceSummary:
    cov = fit.covariance
    sd = np.sqrt(np.diag(cov.matrix))
    return CovarianceSummary(
        correlation=cov.matrix / np.outer(sd, sd), eigenvalues=np.asarray(cov.eigenvalues),
        eigenvalues_raw=np.asarray(cov.eigenvalues_raw), shrinkage=float(cov.shrinkage),
        target=str(cov.target), condition_number=float(cov.condition_number),
        condition_number_raw=float(cov.condition_number_raw), n_bins=int(cov.n_samples),
        n_points=int(cov.matrix.shape[0]), tmin=int(fit.tmin), tmax=int(fit.tmax),
        states=int(fit.states))


def effective_mass_results(binned: Mapping[str, np.ndarray] | np.ndarray, kind: str,
                           time_extent: int) -> dict[str, EffectiveMassResult]:
    """Jackknife effective masses of binned data (a plain array is called ``corr``)."""
    data = binned if isinstance(binned, Mapping) else {"corr": binned}
    out = {}
    for name, values in data.items():
        em = effective_mass_jackknife(np.asarray(values), kind=kind, time_extent=time_extent)
        out[name] = EffectiveMassResult(t=em.t, value=em.value, error=em.error, kind=em.kind)
    return out


def _find(fits: Sequence[Any], choose: tuple[int, int, int | None]) -> Any:
    tmin, tmax, states = choose
    for fit in fits:
        if (fit.tmin, fit.tmax) == (tmin, tmax) and states in (None, fit.states):
            return fit
    raise FitError("choose", f"no scan point has tmin = {tmin}, tmax = {tmax}"
                   + (f", states = {states}" if states is not None else ""))


def _why_unusable(fits: Sequence[Any]) -> str:
    """``3 of 3 points: at-bound 2, not converged 1`` -- why points got weight 0."""
    counts: dict[str, int] = {}
    for fit in fits:
        codes = {str(c).split(":")[0] for c in getattr(fit, "flag_codes", ())}
        degenerate = {str(getattr(f, "code", "")) for f in getattr(fit, "flags", ())
                      if getattr(f, "effect", "") == "degenerate"}
        shown = (codes & degenerate) or ({"not converged"} if not fit.converged else set())
        for code in shown or {"no usable parameter"}:
            counts[code] = counts.get(code, 0) + 1
    listed = ", ".join(f"{code} {n}" for code, n in sorted(counts.items()))
    return f"{len(fits)} point(s): {listed}"


def summarise_scan(fits: Sequence[Any] | Any, *, name: str = "fit",
                   choose: tuple[int, int] | tuple[int, int, int | None] | None = None,
                   binned: Mapping[str, np.ndarray] | np.ndarray | None = None,
                   time_extent: int | None = None) -> FitResult:
    """The typed result of a scan: its points, and the chosen point or the model average.

    Parameters
    ----------
    fits : sequence of CorrelatorFit, or one CorrelatorFit
        What :func:`plateaufit.scan` (or :func:`plateaufit.fit_correlator`) returned,
        all on the same binned data.
    name : str
        The fit's name (titles, tables).
    choose : (tmin, tmax) or (tmin, tmax, states), optional
        Report that point; default: the model average over the scan (a scan of
        one point reports that point).
    binned : array or mapping NAME -> array, optional
        The binned data the fits were made on: gives the effective masses.
    time_extent : int, optional
        ``T``, needed with ``binned`` for cosh and sinh effective masses.

    Returns
    -------
    FitResult
        With ``derived_inputs`` (for :func:`plateaufit.evaluate_derived`) and
        no warnings (those are the pipeline's, :mod:`plateaufit.pipeline.warnings`).
        A chosen single point that is not a fit (not converged, or flagged
        degenerate: at a bound, collapsed, ...) reports no values: its
        parameters are NaN (null in results.json), listed in
        ``chosen.withheld`` with the reasons, the point has weight 0, and
        they are no input of derived quantities; so are the parameters of
        states it does not resolve.

    Raises
    ------
    FitError
        No point of the scan converged (``where`` empty), or ``choose`` names no
        point (``where="choose"``).

    References
    ----------
    W. I. Jay, E. T. Neil, Phys. Rev. D 103 (2021) 114502 -- the average.
    """
    fits = list(fits) if isinstance(fits, Sequence) else [fits]
    if not fits:
        raise FitError("fits", "no fits to summarise; give the list scan() returned")
    weights = np.zeros(len(fits))
    if len(fits) == 1 or choose is not None:
        point = tuple(choose) + (None,) * (3 - len(choose)) if choose is not None else None
        shown = fits[0] if point is None else _find(fits, point)
        withheld, reasons = withheld_parameters(shown)
        names = reported_names(shown)
        whole = len(withheld) == len(names)
        # a degenerate or unconverged point has weight 0, as in an average
        weights[fits.index(shown)] = 0.0 if whole else 1.0
        values = _reported_values(shown)
        params = {n: (ParamEstimate(math.nan, math.nan, math.nan, 0.0) if n in withheld
                      else ParamEstimate.of(values[n], shown.errors[n])) for n in names}
        inputs = {n: DerivedInput(float(values[n]), shown.samples[:, j], 0.0)
                  for j, n in enumerate(names) if n not in withheld}
        chosen = ChosenResult(method="single", params=params,
                              point=_point_summary(shown, weights[fits.index(shown)]),
                              converged=bool(shown.converged),
                              band=(int(shown.tmin), int(shown.tmax)),
                              withheld=tuple(withheld), withheld_reasons=tuple(reasons))
    else:
        avg = None
        try:
            avg = average_fits(fits)
        except FitError:
            pass
        params, inputs = {}, {}
        if avg is not None:
            for n in avg.names:
                if np.isfinite(avg.value[n]):   # some contributing fit has the parameter
                    params[n] = ParamEstimate.of(avg.value[n], avg.stat_error[n],
                                                 avg.sys_error[n])
                    inputs[n] = DerivedInput(avg.value[n], avg.samples[n], avg.sys_error[n])
        if not params:
            raise FitError("", f"no point of the scan is a usable fit ({_why_unusable(fits)}),"
                               " so there is no result; narrow the ranges, add priors on the "
                               "excited states, give start values near the answer, or widen "
                               "or drop bounds the fits ended on")
        weights = np.asarray(avg.weights, dtype=float)
        shown = fits[int(np.argmax(weights))]
        contributing = [f for f, w in zip(fits, weights) if w > 0]
        chosen = ChosenResult(
            method="average", params=params, point=_point_summary(shown, float(weights.max())),
            converged=bool(contributing) and all(bool(f.converged) for f in contributing),
            band=(min(int(f.tmin) for f in fits), max(int(f.tmax) for f in fits)),
            n_fits=len(fits), n_excluded=int(avg.n_excluded))
    form = str(fits[0].form)
    observables = list(getattr(fits[0], "observables", ()) or ["corr"])
    effective_mass = {}
    if binned is not None:
        data = binned if isinstance(binned, Mapping) else {observables[0]: binned}
        effective_mass = effective_mass_results({n: data[n] for n in observables if n in data},
                                                EFFECTIVE_MASS_KIND[form], time_extent)
    return FitResult(name=name, observables=observables, form=form, chosen=chosen,
                     scan=[scan_point_result(f, w) for f, w in zip(fits, weights)],
                     effective_mass=effective_mass, covariance=_covariance_summary(shown),
                     derived_inputs=inputs)
