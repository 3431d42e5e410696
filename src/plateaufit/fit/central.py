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
from plateaufit.fit.batched import batched_refits
from plateaufit.fit.constraints import bound_pairs, internal_bounds, prior_terms
from plateaufit.fit.criteria import aic, chi2_p_value, hotelling_p_value
from plateaufit.fit.minimise import LeastSquaresProblem, minimise
from plateaufit.fit.models import CorrelatorModel
from plateaufit.fit.whitening import cholesky_factor, whitener

__all__ = ["CentralFit", "correlated_fit", "fit_with_factor", "finish_central", "choose_start",
           "bounded_fallback", "needs_bounded_minimiser", "gauss_newton_distance",
           "lmfit_budget", "DEFAULT_TOL"]

#: Default stopping tolerances of the lmfit/scipy minimiser (relative).
DEFAULT_TOL = 1e-10


@dataclass
class CentralFit:
    """Result of one correlated fit to the central (mean) data.

    Attributes
    ----------
    theta : ndarray
        Internal parameters at the minimum.
    reported : dict
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
        Number of model evaluations (iterations of the batched engine summed
        over the starts, or lmfit's evaluations).
    names : tuple of str
        Reported names, in the order of ``param_covariance``.
    at_bound : tuple of str
        Reported names of the parameters that ended on (or within round-off
        of) a bound: the point is then not a minimum of the chi2.
    """

    theta: np.ndarray
    reported: dict[str, float]
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
    at_bound: tuple[str, ...] = ()
    n_numerical_warnings: int = 0
    numerical_warnings: tuple[str, ...] = ()

    @property
    def chi2_per_dof(self) -> float:
        return self.chi2_data / self.dof if self.dof > 0 else float("nan")

    @property
    def values(self) -> np.ndarray:
        """Reported parameters as an array, in ``names`` order."""
        return np.array([self.reported[n] for n in self.names])

    @property
    def errors(self) -> dict[str, float]:
        """Errors from ``param_covariance`` (the central fit's curvature)."""
        d = np.sqrt(np.abs(np.diagonal(self.param_covariance)))
        return dict(zip(self.names, d.tolist()))


def lmfit_budget(model: CorrelatorModel) -> int:
    """Model evaluations allowed to the lmfit minimiser for one fit: ``200 (p + 1)``.

    lmfit's own default, ``2000 (p + 1)``, lets a flat-valley fit (an excited
    state the data cannot resolve) run for tens of seconds; a fit with a
    minimum converges in far fewer evaluations from any of our starts.
    """
    return 200 * (int(model.n_params) + 1)


#: Evaluations per (parameter + 1) allowed to lmfit after the engine found no
#: minimum inside the bounds.
FALLBACK_EVALUATIONS = 100
#: Iteration budget of the batched engine for a central fit (per start).
CENTRAL_MAX_ITER = 200
#: Statistical tolerance of the central fit, in units of the parameter errors.
CENTRAL_STAT_TOL = 1e-5
#: A point is a minimum when the Gauss-Newton step from it is below this many
#: standard errors (in the fit's own curvature metric) in the free parameters.
STATIONARITY_TOL = 1e-2


def gauss_newton_distance(problem: LeastSquaresProblem, theta: np.ndarray,
                          free: np.ndarray | None = None) -> float:
    """Length of the Gauss-Newton step from ``theta``, in standard errors.

    ``sqrt(g^T A^{-1} g)`` with ``A = J^T J`` and ``g = J^T r`` over the free
    parameters (all when ``free`` is None): the distance to the minimum of the
    local quadratic model, measured in the metric of the fit's own parameter
    covariance. Infinite where it cannot be computed.
    """
    with np.errstate(all="ignore"):
        r = problem.residual(theta)
        j = problem.jac(theta)
        if free is not None:
            j = j[:, free]
        if not (np.all(np.isfinite(r)) and np.all(np.isfinite(j))) or j.shape[1] == 0:
            return 0.0 if j.shape[1] == 0 and np.all(np.isfinite(r)) else float("inf")
        g = j.T @ r
        a = j.T @ j
        d = np.sqrt(np.diagonal(a))
        d = np.where(d > 0, d, 1.0)
        try:
            z = np.linalg.lstsq(a / np.outer(d, d), g / d, rcond=1e-13)[0]
        except np.linalg.LinAlgError:
            return float("inf")
        return float(np.sqrt(max(z @ (g / d), 0.0)))


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
    p0 : ndarray, (n_params,) or (k, n_params)
        Internal starting parameters: one start (e.g. from
        :func:`~plateaufit.fit.guesses.starting_values`) or several (from
        :func:`~plateaufit.fit.guesses.starting_points`), minimised side by
        side; the converged one with the lowest chi2 is kept.
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
        ``ftol = xtol = gtol`` of the lmfit minimiser (the path for models
        without an analytic Jacobian and for minima on a bound).
    max_nfev : int, optional
        Model evaluations allowed per start: iterations of the batched engine
        (default :data:`CENTRAL_MAX_ITER`) and evaluations of lmfit (default
        :func:`lmfit_budget`).

    Returns
    -------
    CentralFit
        ``converged=False`` with a message when no start reaches a minimum
        within the budget, the end point is non-finite, or it is not
        stationary (:data:`STATIONARITY_TOL`); never raises for numerical
        trouble. ``at_bound`` names parameters that ended on a bound.

    Raises
    ------
    plateaufit.errors.FitError
        For unusable input: shapes that do not match the model, a singular or
        non-finite covariance (naming the number of points and bins), unknown
        prior or bound names.

    Notes
    -----
    Models with an analytic Jacobian are minimised by the batched
    Levenberg-Marquardt engine (:func:`plateaufit.fit.batched.batched_refits`),
    every start one row of the batch, with the statistical stopping rule at
    :data:`CENTRAL_STAT_TOL` standard errors and at most
    :data:`CENTRAL_MAX_ITER` iterations. Where no start converges inside the
    bounds, lmfit continues from the lowest chi2 reached, with its
    evaluation budget.

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
    return fit_with_factor(y, chol, model, p0, priors=priors, bounds=bounds, n_bins=n_bins,
                           n_total_points=n_total_points, tol=tol, max_nfev=max_nfev)


def _starts(model: CorrelatorModel, p0: np.ndarray) -> np.ndarray:
    p0 = np.asarray(p0, dtype=float)
    if p0.ndim == 1:
        p0 = p0[None, :]
    if p0.ndim != 2 or p0.shape[1] != model.n_params or p0.shape[0] < 1:
        raise FitError("start", f"expected {model.n_params} starting values "
                       f"{list(model.param_names)} (or a stack of such rows), got shape "
                       f"{np.shape(p0)}")
    return p0


def _on_bound(theta: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
    """Per parameter: at (or within round-off of) a finite bound."""
    span = np.where(np.isfinite(hi - lo), hi - lo, np.abs(theta) + 1.0)
    slack = 1e-9 * span + 1e-12
    return (np.isfinite(lo) & (theta <= lo + slack)) | (np.isfinite(hi) & (theta >= hi - slack))


def fit_with_factor(y: np.ndarray, chol: np.ndarray, model: CorrelatorModel, p0: np.ndarray,
                    *, priors: Mapping[str, Any] | None = None,
                    bounds: Mapping[str, Any] | None = None, n_bins: int | None = None,
                    n_total_points: int | None = None, tol: float = DEFAULT_TOL,
                    max_nfev: int | None = None) -> CentralFit:
    """:func:`correlated_fit` with the Cholesky factor of the covariance given."""
    prior = prior_terms(model, priors)
    lo, hi = internal_bounds(model, bounds)
    starts = _starts(model, p0)
    if n_total_points is not None and n_total_points < model.n_points:
        raise FitError("", f"n_total_points={n_total_points} is smaller than the "
                       f"{model.n_points} points in the fit")
    problem = LeastSquaresProblem(model, y, whitener(chol), prior)
    theta, ok, message, nfev = None, False, "", 0
    if model.has_analytic_jacobian:
        k = starts.shape[0]
        info: dict = {}
        max_iter = CENTRAL_MAX_ITER if max_nfev is None else max(1, int(max_nfev))
        th, conv = batched_refits(np.broadcast_to(y, (k, y.size)), model, starts, chol=chol,
                                  priors=priors, bounds=bounds, max_iter=max_iter,
                                  stol=CENTRAL_STAT_TOL, info=info)
        with np.errstate(all="ignore"):
            chi2 = np.array([sum(problem.chi2_parts(row)) if np.all(np.isfinite(row))
                             else np.inf for row in th])
        theta, ok, message, start = choose_start(th, conv, chi2)
        nfev = int(np.sum(info.get("iterations", 0)))
        if not ok and needs_bounded_minimiser(lo, hi):
            theta, ok, message, n_more = bounded_fallback(problem, start, lo, hi, tol,
                                                          max_nfev)
            nfev += n_more
    else:
        budget = lmfit_budget(model) if max_nfev is None else int(max_nfev)
        best_chi2 = np.inf
        for row in starts:
            th_r, ok_r, msg_r, nfev_r = minimise(problem, row, lo, hi, tol=tol,
                                                 max_nfev=budget)
            nfev += nfev_r
            with np.errstate(all="ignore"):
                c2 = sum(problem.chi2_parts(th_r))
            if theta is None or (ok_r and (not ok or c2 < best_chi2)) or \
                    (ok_r == ok and c2 < best_chi2):
                theta, ok, message, best_chi2 = th_r, ok_r, msg_r, c2
    return finish_central(problem, theta, ok, message, nfev, bounds=bounds, n_bins=n_bins,
                          n_total_points=n_total_points)


def choose_start(theta: np.ndarray, converged: np.ndarray, chi2: np.ndarray
                 ) -> tuple[np.ndarray, bool, str, np.ndarray]:
    """Pick the result of several starts: the converged one with the lowest chi2.

    Returns ``(theta, ok, message, best)``: ``best`` is the lowest-chi2 end
    point among all starts (for a bounded minimiser to continue from when
    none converged).
    """
    chi2 = np.where(np.isfinite(chi2), chi2, np.inf)
    k = theta.shape[0]
    if converged.any():
        i = int(np.flatnonzero(converged)[np.argmin(chi2[converged])])
        return theta[i], True, f"batched engine, best of {k} start(s)", theta[i]
    if not np.isfinite(chi2).any():
        return theta[0], False, ("the model is not finite at the starting values nor where "
                                 "the minimiser went; give starting values under start:"), \
            theta[0]
    i = int(np.argmin(chi2))
    with np.errstate(all="ignore"):
        shown = ", ".join(f"{v:.4g}" for v in theta[i])
    return theta[i], False, (f"no start of {k} reached a minimum within the iteration budget "
                             f"(the best ended at internal parameters [{shown}]: a parameter "
                             "may run away)"), theta[i]


def needs_bounded_minimiser(lo: np.ndarray, hi: np.ndarray) -> bool:
    """Whether the fit has bounds (the batched engine hands minima on them back)."""
    return bool(np.isfinite(lo).any() or np.isfinite(hi).any())


def bounded_fallback(problem: LeastSquaresProblem, start: np.ndarray, lo: np.ndarray,
                     hi: np.ndarray, tol: float, max_nfev: int | None
                     ) -> tuple[np.ndarray, bool, str, int]:
    """lmfit's bounded minimiser from the engine's best point, with a short budget.

    Without bounds it is not tried: measured on fits the engine could not
    finish (collapsed ground states, runaway excited states), lmfit never
    found a minimum from the engine's end point either.
    """
    budget = FALLBACK_EVALUATIONS * (problem.model.n_params + 1) if max_nfev is None \
        else int(max_nfev)
    start = start if np.all(np.isfinite(start)) else np.zeros_like(start)
    return minimise(problem, start, lo, hi, tol=tol, max_nfev=budget)


def finish_central(problem: LeastSquaresProblem, theta: np.ndarray, ok: bool, message: str,
                   nfev: int, *, bounds: Mapping[str, Any] | None = None,
                   n_bins: int | None = None, n_total_points: int | None = None
                   ) -> CentralFit:
    """The :class:`CentralFit` at ``theta``: chi2, p-values, AIC, curvature, checks.

    The point must be stationary (:func:`gauss_newton_distance` below
    :data:`STATIONARITY_TOL` in the parameters not on a bound) to count as
    converged.
    """
    model = problem.model
    lo, hi = internal_bounds(model, bounds)
    with np.errstate(all="ignore"):
        chi2_data, chi2_prior = problem.chi2_parts(theta)
    if not (np.isfinite(chi2_data) and np.isfinite(chi2_prior)):
        ok = False
        message = message or "chi2 is not finite"
    bound_mask = _on_bound(theta, lo, hi)
    if ok:
        distance = gauss_newton_distance(problem, theta, free=~bound_mask)
        if not distance <= STATIONARITY_TOL:
            ok = False
            message = (f"the fit ended {distance:.2g} standard errors from a minimum "
                       f"(not stationary); {message}")
    n, p = model.n_points, model.n_params
    dof = n - p
    # covariance of the parameters from the curvature of chi2 at the minimum
    with np.errstate(all="ignore"):
        jw = problem.jac(theta)
        try:
            theta_cov = np.linalg.inv(jw.T @ jw)
        except np.linalg.LinAlgError:
            theta_cov = np.full((p, p), np.nan)
        pj = model.reported_jacobian(theta)
        param_cov = pj @ theta_cov @ pj.T
        reported = model.to_reported(theta)
    at_bound = tuple(model.reported_names[i] for i in np.flatnonzero(bound_mask))
    # bounds on E_n (n >= 1) are enforced only through the gaps: report a violation
    if bounds:
        lo_ph, hi_ph = bound_pairs(model, bounds)
        outside = [model.reported_names[i] for i in range(p)
                   if not (lo_ph[i] <= reported[i] <= hi_ph[i])]
        if outside:
            message = (message + "; " if message else "") + (
                f"{', '.join(outside)} ended outside the given bounds (bounds on higher "
                "energies act on the gaps)")
    p_value = chi2_p_value(chi2_data, dof)
    n_cut = 0 if n_total_points is None else int(n_total_points) - n
    chi2 = chi2_data + chi2_prior
    return CentralFit(
        theta=theta, reported=dict(zip(model.reported_names, reported.tolist())),
        chi2=chi2, chi2_data=chi2_data, chi2_prior=chi2_prior, dof=dof, n_points=n,
        n_params=p, n_priors=int(problem.p_idx.size), p_value=p_value,
        p_value_hotelling=hotelling_p_value(chi2_data, dof, n_bins),
        aic=aic(chi2, p, n_cut), converged=bool(ok), message=message,
        param_covariance=param_cov, theta_covariance=theta_cov, n_cut=n_cut, nfev=nfev,
        names=tuple(model.reported_names), at_bound=at_bound)
