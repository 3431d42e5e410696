"""The general-purpose minimiser of one correlated fit: lmfit's least_squares.

Used for the central fit of models without an analytic Jacobian (user
formulas), for fits whose minimum lies on a bound, and for the jackknife
samples the batched engine (:mod:`plateaufit.fit.batched`) hands back. It
minimises the whitened residuals of :class:`LeastSquaresProblem` with scipy's
trust-region reflective algorithm (which keeps bounds natively) through lmfit,
with the model's Jacobian, then takes a few Gauss-Newton steps to the
stationary point.

References
----------
M. Newville et al., "LMFIT: Non-Linear Least-Square Minimization and
Curve-Fitting for Python", Zenodo (2014), doi:10.5281/zenodo.11813.

M. A. Branch, T. F. Coleman, Y. Li, "A subspace, interior, and conjugate
gradient method for large-scale bound-constrained minimization problems",
SIAM J. Sci. Comput. 21 (1999) 1 -- scipy's trust-region reflective method.
"""

from __future__ import annotations

import numpy as np

from plateaufit.fit.constraints import clip_into
from plateaufit.fit.models import CorrelatorModel

__all__ = ["LeastSquaresProblem", "minimise", "polish"]


class LeastSquaresProblem:
    """Whitened residuals and Jacobian of one fit, priors appended as extra rows.

    Parameters
    ----------
    model : CorrelatorModel
    y : ndarray, (n_points,)
        Data vector.
    winv : ndarray, (n_points, n_points)
        Whitening matrix ``L^{-1}`` of the data covariance.
    prior : tuple of ndarray
        ``(index, mean, width)`` from :func:`plateaufit.fit.constraints.prior_terms`.
    """

    def __init__(self, model: CorrelatorModel, y: np.ndarray, winv: np.ndarray,
                 prior: tuple[np.ndarray, np.ndarray, np.ndarray]) -> None:
        self.model, self.y, self.winv = model, y, winv
        self.p_idx, self.p_mean, self.p_width = prior

    def residual(self, theta: np.ndarray) -> np.ndarray:
        with np.errstate(all="ignore"):
            r = self.winv @ (self.model.predict(theta) - self.y)
            if self.p_idx.size:
                phys = self.model.to_reported(theta)
                r = np.concatenate([r, (phys[self.p_idx] - self.p_mean) / self.p_width])
        return r

    def jac(self, theta: np.ndarray) -> np.ndarray:
        with np.errstate(all="ignore"):
            j = self.winv @ self.model.jacobian(theta)
            if self.p_idx.size:
                pj = self.model.reported_jacobian(theta)[self.p_idx] / self.p_width[:, None]
                j = np.concatenate([j, pj], axis=0)
        return j

    def chi2_parts(self, theta: np.ndarray) -> tuple[float, float]:
        """(data chi2, prior chi2) at ``theta``."""
        r = self.residual(theta)
        n = self.y.size
        return float(r[:n] @ r[:n]), float(r[n:] @ r[n:])


def polish(problem: LeastSquaresProblem, theta: np.ndarray, lo: np.ndarray, hi: np.ndarray,
           steps: int = 40) -> np.ndarray:
    """Gauss-Newton steps from the minimiser's end point, to the stationary point.

    The trust-region minimiser stops when its chi2 decrease is small, which in
    a flat direction can leave the parameters 1e-6 (relative) from the
    minimum. Gauss-Newton converges to the stationary point ``J^T r = 0``
    (quadratically for small residuals, linearly otherwise); a step is kept
    only when it stays strictly inside the bounds and does not raise chi2
    beyond its rounding, and the iteration stops once the step is at the
    rounding level of the parameters.
    """
    with np.errstate(all="ignore"):
        r = problem.residual(theta)
        chi2 = float(r @ r)
        for _ in range(steps):
            j = problem.jac(theta)
            if not (np.all(np.isfinite(j)) and np.all(np.isfinite(r))):
                break
            try:
                delta = -np.linalg.lstsq(j, r, rcond=None)[0]
            except np.linalg.LinAlgError:
                break
            trial = theta + delta
            if not np.all((trial > lo) & (trial < hi)):
                break
            r_new = problem.residual(trial)
            chi2_new = float(r_new @ r_new)
            # chi2 itself is known only to rounding (~1e-13 relative when the
            # whitened data are large): allow that much, no more
            if not np.isfinite(chi2_new) or chi2_new > chi2 * (1.0 + 1e-10) + 1e-12:
                break
            theta, r, chi2 = trial, r_new, chi2_new
            if np.all(np.abs(delta) <= 1e-13 * (np.abs(theta) + 1e-13)):
                break
    return theta


def minimise(problem: LeastSquaresProblem, p0: np.ndarray, lo: np.ndarray, hi: np.ndarray, *,
             tol: float, max_nfev: int | None) -> tuple[np.ndarray, bool, str, int]:
    """Run lmfit's least_squares; never raises for numerical trouble.

    Returns
    -------
    theta, ok, message, nfev
    """
    import lmfit   # deferred: ~0.6 s to import, and most fits never need it

    model = problem.model
    start = clip_into(np.asarray(p0, dtype=float), lo, hi)
    params = lmfit.Parameters()
    for k in range(model.n_params):
        params.add(f"p{k}", value=float(start[k]),
                   min=float(lo[k]) if np.isfinite(lo[k]) else -np.inf,
                   max=float(hi[k]) if np.isfinite(hi[k]) else np.inf)

    def vector(par: lmfit.Parameters) -> np.ndarray:
        return np.fromiter((par[f"p{k}"].value for k in range(model.n_params)), float,
                           count=model.n_params)

    def residual(par: lmfit.Parameters) -> np.ndarray:
        return problem.residual(vector(par))

    def dfun(par: lmfit.Parameters) -> np.ndarray:
        return problem.jac(vector(par))

    if not np.all(np.isfinite(problem.residual(start))):
        return start, False, "the model is not finite at the starting values", 1
    minimizer = lmfit.Minimizer(residual, params, nan_policy="propagate")
    try:
        res = minimizer.minimize(method="least_squares", Dfun=dfun, max_nfev=max_nfev,
                                 ftol=tol, xtol=tol, gtol=tol, x_scale="jac")
    except (ValueError, np.linalg.LinAlgError, FloatingPointError, OverflowError) as exc:
        return start, False, f"the minimiser failed: {exc}", 0
    theta = vector(res.params)
    status = getattr(res, "status", None)
    ok = bool(res.success) and status is not None and status > 0
    message = str(getattr(res, "message", "") or "")
    if ok:
        theta = polish(problem, theta, lo, hi)
    if not np.all(np.isfinite(theta)) or not np.all(np.isfinite(problem.residual(theta))):
        ok, message = False, "the fit ended at non-finite parameters or residuals"
    return theta, ok, message, int(getattr(res, "nfev", 0) or 0)
