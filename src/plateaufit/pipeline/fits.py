"""One fit of a spec: the spec's keys as the fit core's arguments, the scan, the summary.

:func:`fit_kwargs` is the one translation of a fit entry and the
``covariance:`` keys into :func:`plateaufit.fit_correlator` keyword arguments
(every key there reaches the fit: ``tests/test_spec_keys_reach_computation.py``);
:func:`covariance_kwargs` is the part ``check`` shares. :func:`run_fit` scans,
then chooses or averages (:func:`plateaufit.pipeline.summary.summarise_scan`).
"""

from __future__ import annotations

from typing import Any

from plateaufit.fit.constraints import Prior
from plateaufit.fit.scan import scan, scan_points
from plateaufit.pipeline.keys import located
from plateaufit.pipeline.prepare import Prepared
from plateaufit.pipeline.results import FitResult
from plateaufit.pipeline.summary import summarise_scan
from plateaufit.specfile import FitSpec, Spec

__all__ = ["covariance_kwargs", "fit_kwargs", "n_scan_points", "run_fit"]


def covariance_kwargs(spec: Spec) -> dict[str, Any]:
    """``covariance:`` as the keyword arguments of ``covariance_of_mean``."""
    c = spec.covariance
    return {"shrinkage": c.shrinkage, "target": c.target, "eigenvalue_floor": c.eigenvalue_floor}


def fit_kwargs(spec: Spec, fit: FitSpec) -> dict[str, Any]:
    """Keyword arguments of ``fit_correlator`` that are the same at every scan point."""
    formula = None
    if fit.formula is not None:
        formula = {"expression": fit.formula.expression, "params": dict(fit.formula.params)}
    priors = {k: Prior(float(v[0]), float(v[1])) for k, v in fit.priors.items()}
    return {
        "form": fit.form,
        "time_extent": spec.ensemble.time_extent,
        "priors": priors or None,
        "bounds": {k: tuple(v) for k, v in fit.bounds.items()} or None,
        **covariance_kwargs(spec),
        "per_sample": spec.covariance.per_sample,
        "oscillating": fit.oscillating,
        "constant": fit.constant,
        "operators": spec.operators(fit),
        "formula": formula,
        "start": dict(fit.start) or None,
        "n_total_points": spec.n_timeslices(fit),
    }


def n_scan_points(spec: Spec, fit: FitSpec) -> int:
    """How many (tmin, tmax, states) points of the fit leave a degree of freedom."""
    kwargs = fit_kwargs(spec, fit)
    return len(scan_points(fit.tmin, fit.tmax, fit.states_values, observables=fit.correlators,
                           oscillating=kwargs["oscillating"], constant=kwargs["constant"],
                           operators=kwargs["operators"], formula=kwargs["formula"]))


def run_fit(spec: Spec, index: int, prepared: Prepared, *, executor: Any = None,
            progress: Any = False, solutions: Any = None,
            effective_masses: bool = True, cache: Any = None) -> FitResult:
    """Scan fit ``fits[index]`` of ``spec`` on the prepared data; choose or average.

    A fit of a matrix level goes to :func:`plateaufit.pipeline.matrices.run_level_fit`
    (``solutions``: its shared :class:`~plateaufit.pipeline.matrices.GevpSolutions`).
    ``effective_masses=False`` leaves the (display-only) effective masses out of
    the result; ``plateaufit calibrate``'s replicas need none. ``cache`` (a
    :class:`~plateaufit.pipeline.cache.CacheSession`) serves and keeps the scan
    points (:func:`plateaufit.fit.scan.scan`).

    Returns
    -------
    FitResult
        Without warnings (:mod:`plateaufit.pipeline.warnings` adds them).

    Raises
    ------
    SpecError, DataError, FitError
        At the spec key (``fits[i].tmin``, ``covariance.shrinkage``, ...).
    """
    fit = spec.fits[index]
    if fit.matrix is not None:
        from plateaufit.pipeline.matrices import run_level_fit   # it imports this module

        return run_level_fit(spec, index, prepared, solutions=solutions, executor=executor,
                             progress=progress, cache=cache)
    data = {name: prepared.binned[name] for name in fit.observables}
    kwargs = fit_kwargs(spec, fit)
    if spec.covariance.estimator == "gamma":    # one covariance from the unbinned data
        from plateaufit.pipeline.gamma import gamma_fit_covariance

        kwargs["covariance_matrix"] = gamma_fit_covariance(spec, fit, prepared)
    with located(fit_index=index):
        fits = scan(data, tmin=fit.tmin, tmax=fit.tmax, states=fit.states_values,
                    executor=executor, progress=progress, label=fit.name, cache=cache,
                    **kwargs)
        point = fit.chosen_point()
        return summarise_scan(fits, name=fit.name, choose=point,
                              binned=data if effective_masses else None,
                              time_extent=spec.ensemble.time_extent)
