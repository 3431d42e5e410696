"""The fit of one range: central fit plus a refit on every jackknife sample.

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

from plateaufit.errors import FitError
from plateaufit.fit.central import DEFAULT_TOL, CentralFit, correlated_fit
from plateaufit.fit.guesses import starting_values
from plateaufit.fit.models import CorrelatorModel, make_model
from plateaufit.fit.refits import jackknife_refits
from plateaufit.stats import covariance as covmod
from plateaufit.stats.resample import jackknife_covariance, jackknife_error, jackknife_samples

__all__ = ["CorrelatorFit", "fit_correlator"]


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

    @property
    def names(self) -> tuple[str, ...]:
        return tuple(self.model.physical_names)

    @property
    def values(self) -> dict[str, float]:
        return dict(self.central.physical)

    chi2 = property(lambda self: self.central.chi2)
    dof = property(lambda self: self.central.dof)
    p_value = property(lambda self: self.central.p_value)
    p_value_hotelling = property(lambda self: self.central.p_value_hotelling)
    aic = property(lambda self: self.central.aic)


def _as_observables(binned) -> dict[str, np.ndarray]:
    if isinstance(binned, Mapping):
        data = {str(k): np.asarray(v, dtype=float) for k, v in binned.items()}
    else:
        data = {"corr": np.asarray(binned, dtype=float)}
    if not data:
        raise FitError("observables", "a fit needs at least one observable")
    n_bins = None
    for name, arr in data.items():
        if arr.ndim != 2:
            raise FitError(f"observables.{name}", f"binned data must have shape "
                           f"(n_bins, n_t), got {arr.shape}")
        if n_bins is not None and arr.shape[0] != n_bins:
            raise FitError(f"observables.{name}", f"has {arr.shape[0]} bins but the other "
                           f"observables of the fit have {n_bins}; bin them alike")
        n_bins = arr.shape[0]
    return data


def fit_correlator(binned, *, form: str, states: int, tmin: int, tmax: int,
                   time_extent: int, priors: Mapping[str, Any] | None = None,
                   bounds: Mapping[str, Any] | None = None,
                   shrinkage: str | float = "ledoit-wolf", target: str = "diagonal",
                   per_sample: bool = False, oscillating: int = 0, constant: bool = False,
                   factorised: Mapping[str, tuple[str, str]] | None = None,
                   formula: Mapping | None = None, start: Mapping[str, float] | None = None,
                   engine: str = "auto", n_total_points: int | None = None,
                   eigenvalue_floor: float | None = None,
                   tol: float = DEFAULT_TOL) -> CorrelatorFit:
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
    per_sample : bool, optional
        Refit every jackknife sample with its own covariance
        (:func:`plateaufit.stats.covariance.per_sample_covariances`) instead of
        the one from all bins.
    oscillating, constant, factorised, formula
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

    Returns
    -------
    CorrelatorFit
        ``converged`` is False (never an exception) when the central fit or
        any refit fails; values and errors are then still filled where known.

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
    data = _as_observables(binned)
    names = list(data)
    tmin, tmax = int(tmin), int(tmax)
    for name, arr in data.items():
        n_t = arr.shape[1]
        if tmin < 0 or tmin >= n_t:
            raise FitError("tmin", f"tmin={tmin} is outside the data of '{name}' "
                           f"(timeslices 0..{n_t - 1})")
        if tmax < tmin or tmax >= n_t:
            raise FitError("tmax", f"tmax={tmax} must lie in {tmin}..{n_t - 1} for '{name}' "
                           f"(tmin={tmin}, {n_t} timeslices)")
    t = np.arange(tmin, tmax + 1)
    model = make_model(form, states, names, {n: t for n in names}, time_extent,
                       oscillating=oscillating, constant=constant, factorised=factorised,
                       formula=formula)
    if model.n_points < model.n_params and not priors:
        raise FitError("tmax", f"the range {tmin}..{tmax} gives {model.n_points} points for "
                       f"{model.n_params} parameters; widen the range, use fewer states or "
                       "add priors")
    x = np.concatenate([data[n][:, tmin:tmax + 1] for n in names], axis=1)
    n_bins = x.shape[0]
    if n_bins < 2:
        raise FitError("", f"a jackknife needs at least 2 bins, got {n_bins}")
    if not np.all(np.isfinite(x)):
        raise FitError("", "the binned data in the fit range hold non-finite values")
    if n_total_points is None:
        n_total_points = int(sum(arr.shape[1] for arr in data.values()))
    cov_kw: dict[str, Any] = {"shrinkage": shrinkage, "target": target}
    if eigenvalue_floor is not None:
        cov_kw["eigenvalue_floor"] = eigenvalue_floor
    cov_result = covmod.covariance_of_mean(x, **cov_kw)
    y = x.mean(axis=0)
    slices = model.point_slices()
    p0 = starting_values(model, {n: y[slices[n]] for n in names}, {n: t for n in names},
                         overrides=start)
    central = correlated_fit(y, cov_result.matrix, model, p0, priors=priors, bounds=bounds,
                             n_bins=n_bins, n_total_points=n_total_points, tol=tol)
    y_samples = jackknife_samples(x)
    if per_sample:
        cov_samples = covmod.per_sample_covariances(x, **cov_kw)
        refits = jackknife_refits(y_samples, model, central.theta, cov_samples=cov_samples,
                                  priors=priors, bounds=bounds, engine=engine, tol=tol)
    else:
        refits = jackknife_refits(y_samples, model, central.theta, cov=cov_result.matrix,
                                  priors=priors, bounds=bounds, engine=engine, tol=tol)
    samples = refits.physical
    good = refits.converged
    if good.sum() >= 2:
        err = np.asarray(jackknife_error(samples[good]), dtype=float)
        pcov = np.asarray(jackknife_covariance(samples[good]), dtype=float)
    else:
        err = np.full(model.n_params, np.nan)
        pcov = np.full((model.n_params, model.n_params), np.nan)
    n_failed = int(np.count_nonzero(~good))
    return CorrelatorFit(
        model=model, tmin=tmin, tmax=tmax, states=int(states), form=form, central=central,
        samples=samples, errors=dict(zip(model.physical_names, err.tolist())),
        covariance=cov_result, converged=bool(central.converged and n_failed == 0),
        n_refit_failed=n_failed, param_covariance=pcov, n_fallback=refits.n_fallback,
        engine=refits.engine, observables=tuple(names), n_bins=n_bins,
        per_sample=bool(per_sample))
