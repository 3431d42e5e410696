"""The central fit: a correlated chi-square fit of a model to the mean of the data.

It minimises the augmented chi-square

    chi2(theta) = (y - f(theta))^T C^{-1} (y - f(theta))
                  + sum_k ((P_k(theta) - mean_k) / width_k)^2

where ``C`` is the covariance of the mean of the binned data, ``f`` the model
and ``P_k`` reported parameters with Gaussian priors, and reports the
goodness of fit (chi2, p-values, AIC) and the curvature covariance of the
parameters.

References
----------
G. P. Lepage, B. Clark, C. T. H. Davies, K. Hornbostel, P. B. Mackenzie,
C. Morningstar, H. Trottier, "Constrained curve fitting", Nucl. Phys. B (Proc.
Suppl.) 106 (2002) 12 -- the augmented chi-square with Gaussian priors.

H. Hotelling, "The generalization of Student's ratio", Ann. Math. Statist. 2
(1931) 360; W. I. Jay, E. T. Neil, Phys. Rev. D 103 (2021) 114502.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from plateaufit.errors import FitError
from plateaufit.fit.constraints import bound_pairs, internal_bounds, prior_terms
from plateaufit.fit.criteria import aic, chi2_p_value, hotelling_p_value
from plateaufit.fit.minimise import LeastSquaresProblem, minimise
from plateaufit.fit.models import CorrelatorModel
from plateaufit.fit.whitening import cholesky_factor, whitener

__all__ = ["CentralFit", "correlated_fit", "DEFAULT_TOL"]

#: Default stopping tolerances of the lmfit/scipy minimiser (relative).
DEFAULT_TOL = 1e-10


@dataclass
class CentralFit:
    """Result of one correlated fit to the central (mean) data.

    Attributes
    ----------
    theta : ndarray
        Internal parameters at the minimum.
    physical : dict
        Reported name -> value.
    chi2, chi2_data, chi2_prior : float
        Total (augmented) chi2, its data part and its prior part.
    dof : int
        ``n_points - n_params`` (priors not counted; see ``n_priors``).
    n_points, n_params, n_priors : int
    p_value : float
        ``scipy.stats.chi2.sf(chi2_data, dof)``.
    p_value_hotelling : float
        See :func:`hotelling_p_value`, with N the number of bins.
    aic : float
        ``chi2 + 2 n_params + 2 n_cut`` (total chi2).
    converged : bool
    message : str
    param_covariance : ndarray
        Covariance of the reported parameters from the inverse of the
        (whitened, prior-augmented) ``J^T J`` at the minimum, (p, p).
    theta_covariance : ndarray
        The same for the internal parameters.
    n_cut : int
        Points of the full data set outside the fit range (AIC penalty).
    nfev : int
        Number of model evaluations.
    names : tuple of str
        Reported names, in the order of ``param_covariance``.
    """

    theta: np.ndarray
    physical: dict[str, float]
    chi2: float
    chi2_data: float
    chi2_prior: float
    dof: int
    n_points: int
    n_params: int
    n_priors: int
    p_value: float
    p_value_hotelling: float
    aic: float
    converged: bool
    message: str
    param_covariance: np.ndarray = field(repr=False, default_factory=lambda: np.zeros((0, 0)))
    theta_covariance: np.ndarray = field(repr=False, default_factory=lambda: np.zeros((0, 0)))
    n_cut: int = 0
    nfev: int = 0
    names: tuple[str, ...] = ()

    @property
    def chi2_per_dof(self) -> float:
        return self.chi2_data / self.dof if self.dof > 0 else float("nan")

    @property
    def values(self) -> np.ndarray:
        """Reported parameters as an array, in ``names`` order."""
        return np.array([self.physical[n] for n in self.names])

    @property
    def errors(self) -> dict[str, float]:
        """Errors from ``param_covariance`` (the central fit's curvature)."""
        d = np.sqrt(np.abs(np.diagonal(self.param_covariance)))
        return dict(zip(self.names, d.tolist()))


def correlated_fit(y: np.ndarray, cov: np.ndarray, model: CorrelatorModel,
                   p0: np.ndarray, *, priors: Mapping[str, Any] | None = None,
                   bounds: Mapping[str, Any] | None = None, n_bins: int | None = None,
                   n_total_points: int | None = None, tol: float = DEFAULT_TOL,
                   max_nfev: int | None = None) -> CentralFit:
    """Correlated chi-square fit of a model to one data vector.

    Parameters
    ----------
    y : ndarray, (n_points,)
        Data, all observables concatenated in the model's order.
    cov : ndarray, (n_points, n_points)
        Covariance of ``y`` (the covariance of the mean of the binned data).
    model : CorrelatorModel
    p0 : ndarray, (n_params,)
        Internal starting parameters (e.g. from
        :func:`~plateaufit.fit.guesses.starting_values`).
    priors : mapping, optional
        Reported name -> :class:`Prior` or ``(mean, width)``.
    bounds : mapping, optional
        Reported name -> ``(lower, upper)``; see :func:`internal_bounds`.
    n_bins : int, optional
        Number of bins the covariance was estimated from (Hotelling p-value).
    n_total_points : int, optional
        Size of the full data set (all folded timeslices of the fit's
        observables), for the AIC's ``n_cut = n_total_points - n_points``;
        0 cut points when not given.
    tol : float, optional
        ``ftol = xtol = gtol`` of the minimiser.
    max_nfev : int, optional
        Maximum number of model evaluations (lmfit's default when None).

    Returns
    -------
    CentralFit
        ``converged=False`` with a message when the minimiser fails or ends at
        non-finite values; never raises for numerical trouble.

    Raises
    ------
    plateaufit.errors.FitError
        For unusable input: shapes that do not match the model, a singular or
        non-finite covariance (naming the number of points and bins), unknown
        prior or bound names.

    References
    ----------
    G. P. Lepage et al., "Constrained curve fitting", Nucl. Phys. B (Proc.
    Suppl.) 106 (2002) 12; H. Hotelling, Ann. Math. Statist. 2 (1931) 360;
    W. I. Jay, E. T. Neil, Phys. Rev. D 103 (2021) 114502.
    """
    y = np.asarray(y, dtype=float).ravel()
    cov = np.asarray(cov, dtype=float)
    if y.size != model.n_points or cov.shape != (model.n_points, model.n_points):
        raise FitError("", f"the model has {model.n_points} points but the data have "
                       f"{y.size} values and the covariance shape {cov.shape}")
    if not np.all(np.isfinite(y)):
        raise FitError("", "the data to fit hold non-finite values; check the input files")
    chol = cholesky_factor(cov, n_bins)
    return _fit_with_whitener(y, whitener(chol), model, p0, priors=priors, bounds=bounds,
                              n_bins=n_bins, n_total_points=n_total_points, tol=tol,
                              max_nfev=max_nfev)


def _fit_with_whitener(y, winv, model, p0, *, priors, bounds, n_bins, n_total_points,
                       tol, max_nfev) -> CentralFit:
    prior = prior_terms(model, priors)
    lo, hi = internal_bounds(model, bounds)
    p0 = np.asarray(p0, dtype=float).ravel()
    if p0.size != model.n_params:
        raise FitError("start", f"expected {model.n_params} starting values "
                       f"{list(model.param_names)}, got {p0.size}")
    if n_total_points is not None and n_total_points < model.n_points:
        raise FitError("", f"n_total_points={n_total_points} is smaller than the "
                       f"{model.n_points} points in the fit")
    problem = LeastSquaresProblem(model, y, winv, prior)
    theta, ok, message, nfev = minimise(problem, p0, lo, hi, tol=tol, max_nfev=max_nfev)
    with np.errstate(all="ignore"):
        chi2_data, chi2_prior = problem.chi2_parts(theta)
    if not (np.isfinite(chi2_data) and np.isfinite(chi2_prior)):
        ok = False
        message = message or "chi2 is not finite"
    n, p = model.n_points, model.n_params
    dof = n - p
    # covariance of the parameters from the curvature of chi2 at the minimum
    with np.errstate(all="ignore"):
        jw = problem.jac(theta)
        try:
            theta_cov = np.linalg.inv(jw.T @ jw)
        except np.linalg.LinAlgError:
            theta_cov = np.full((p, p), np.nan)
        pj = model.physical_jacobian(theta)
        param_cov = pj @ theta_cov @ pj.T
    physical = model.to_physical(theta)
    # bounds on E_n (n >= 1) are enforced only through the gaps: report a violation
    if bounds:
        lo_ph, hi_ph = bound_pairs(model, bounds)
        outside = [model.physical_names[i] for i in range(p)
                   if not (lo_ph[i] <= physical[i] <= hi_ph[i])]
        if outside:
            message = (message + "; " if message else "") + (
                f"{', '.join(outside)} ended outside the given bounds (bounds on higher "
                "energies act on the gaps)")
    p_value = chi2_p_value(chi2_data, dof)
    n_cut = 0 if n_total_points is None else int(n_total_points) - n
    chi2 = chi2_data + chi2_prior
    return CentralFit(
        theta=theta, physical=dict(zip(model.physical_names, physical.tolist())),
        chi2=chi2, chi2_data=chi2_data, chi2_prior=chi2_prior, dof=dof, n_points=n,
        n_params=p, n_priors=int(prior[0].size), p_value=p_value,
        p_value_hotelling=hotelling_p_value(chi2_data, dof, n_bins),
        aic=aic(chi2, p, n_cut), converged=bool(ok), message=message,
        param_covariance=param_cov, theta_covariance=theta_cov, n_cut=n_cut, nfev=nfev,
        names=tuple(model.physical_names))

