"""Jackknife refits: the fit of one range refitted on every jackknife sample.

:func:`jackknife_refits` is the one seam through which refits run: the
batched Levenberg-Marquardt engine (:mod:`plateaufit.fit.batched`) for models
with an analytic Jacobian, the lmfit minimiser (:mod:`plateaufit.fit.minimise`)
one sample at a time for the others and for the samples the engine hands back.
Every refit starts from the central fit.

References
----------
B. Efron, "The jackknife, the bootstrap and other resampling plans", SIAM
(1982) -- the jackknife.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from plateaufit.errors import FitError
from plateaufit.fit.batched import STAT_TOL, batched_refits
from plateaufit.fit.central import DEFAULT_TOL, lmfit_budget
from plateaufit.fit.constraints import internal_bounds, prior_terms
from plateaufit.fit.minimise import LeastSquaresProblem, minimise
from plateaufit.fit.models import CorrelatorModel
from plateaufit.fit.whitening import batched_cholesky, cholesky_factor, whitener

__all__ = ["RefitResult", "jackknife_refits", "refit_iterations", "FALLBACK_FRACTION",
           "FALLBACK_BUDGET"]

#: At most this fraction of the samples (and at least one) is refitted by lmfit
#: after the batched engine; beyond it the unconverged samples count as failed.
FALLBACK_FRACTION = 0.1
#: Model evaluations allowed to lmfit per fallback sample, per parameter + 1.
FALLBACK_BUDGET = 100


def refit_iterations(n_params: int) -> int:
    """Iteration budget of the batched engine for the refits of a fit: ``50 (p + 2)``.

    Most samples stop within ten iterations of their warm start. The rest sit
    in the long, curved valley of an excited state the data barely resolve
    (its energy and amplitude trading off); measured on the demo's two-state,
    two-observable fit (six parameters) they needed up to 390 iterations.
    Only those few samples are still in the working set, so the budget costs
    little where it is not needed.
    """
    return 50 * (int(n_params) + 2)


@dataclass
class RefitResult:
    """Refits of a fit on every jackknife sample.

    Attributes
    ----------
    theta : ndarray, (S, p)
        Internal parameters per sample (NaN rows where not converged).
    reported : ndarray, (S, p)
        Reported parameters per sample (NaN rows where not converged).
    converged : ndarray of bool, (S,)
    n_fallback : int
        Samples the batched engine did not converge and the lmfit loop refitted.
    engine : str
        ``"lmfit"`` or ``"batched"``.
    """

    theta: np.ndarray
    reported: np.ndarray
    converged: np.ndarray
    n_fallback: int
    engine: str

    @property
    def n_failed(self) -> int:
        return int(np.count_nonzero(~self.converged))


def _lmfit_loop(y_samples, model, start, winv_of, rows, prior, lo, hi, tol, max_nfev):
    theta = np.full((y_samples.shape[0], model.n_params), np.nan)
    conv = np.zeros(y_samples.shape[0], dtype=bool)
    for s in rows:
        w = winv_of(s)
        if w is None:
            continue
        problem = LeastSquaresProblem(model, y_samples[s], w, prior)
        th, ok, _, _ = minimise(problem, start, lo, hi, tol=tol, max_nfev=max_nfev)
        if ok:
            theta[s], conv[s] = th, True
    return theta, conv


def jackknife_refits(y_samples: np.ndarray, model: CorrelatorModel, start: np.ndarray, *,
                     cov: np.ndarray | None = None, cov_samples: np.ndarray | None = None,
                     priors: Mapping[str, Any] | None = None,
                     bounds: Mapping[str, Any] | None = None, engine: str = "auto",
                     tol: float = DEFAULT_TOL, max_nfev: int | None = None,
                     stol: float | None = STAT_TOL, fallback: bool = True,
                     max_iter: int | None = None) -> RefitResult:
    """Refit every jackknife sample, warm-started from the central fit.

    Parameters
    ----------
    y_samples : ndarray, (S, n_points)
        Jackknife samples of the data vector.
    model : CorrelatorModel
    start : ndarray, (n_params,)
        Internal parameters to start every refit from (the central fit).
    cov : ndarray, (n_points, n_points), optional
        One frozen covariance for all samples.
    cov_samples : ndarray, (S, n_points, n_points), optional
        One covariance per sample. Give exactly one of ``cov`` and ``cov_samples``.
    priors, bounds : mapping, optional
        As for :func:`correlated_fit` (the same priors in every refit).
    engine : {"auto", "batched", "lmfit"}
        ``lmfit``: each sample its own lmfit fit. ``batched``: all samples at
        once with :func:`plateaufit.fit.batched.batched_refits`; samples it
        flags not converged are refitted by the lmfit loop (counted in
        ``n_fallback``). ``auto``: batched when that module is available and
        the model's jacobian is analytic, else lmfit.
    tol : float, optional
        Tolerance of the lmfit path (``ftol = xtol = gtol``).
    max_nfev : int, optional
        Model evaluations allowed to lmfit per sample (default
        :func:`plateaufit.fit.central.lmfit_budget`).
    stol : float or None, optional
        Statistical tolerance of the batched engine, in standard errors
        (see :func:`plateaufit.fit.batched.batched_refits`); None iterates to
        the rounding floor.
    fallback : bool, optional
        Refit the samples the batched engine leaves unconverged with lmfit,
        when they are at most :data:`FALLBACK_FRACTION` of all (else they
        count as failed).
    max_iter : int, optional
        Iteration budget of the batched engine (default
        :func:`refit_iterations`).

    Returns
    -------
    RefitResult
        Samples that fail stay NaN with ``converged[s] = False``; a sample
        whose own covariance is not positive definite fails too.

    Raises
    ------
    plateaufit.errors.FitError
        For inconsistent shapes, a singular frozen covariance, or an unknown
        engine.
    """
    y_samples = np.asarray(y_samples, dtype=float)
    if y_samples.ndim != 2 or y_samples.shape[1] != model.n_points:
        raise FitError("", f"jackknife samples must have shape (S, {model.n_points}), "
                       f"got {y_samples.shape}")
    if (cov is None) == (cov_samples is None):
        raise FitError("", "give exactly one of cov (frozen) and cov_samples (per sample)")
    if engine not in ("auto", "batched", "lmfit"):
        raise FitError("engine", f"unknown refit engine '{engine}'; use auto, batched "
                       "or lmfit")
    start = np.asarray(start, dtype=float).ravel()
    n_s = y_samples.shape[0]
    if max_nfev is None:
        max_nfev = lmfit_budget(model) if engine == "lmfit" else \
            FALLBACK_BUDGET * (model.n_params + 1)
    prior = prior_terms(model, priors)
    lo, hi = internal_bounds(model, bounds)
    # The whitening matrices are needed only by the lmfit loop (the engine, or
    # the fallback for samples the batched engine hands back): formed on demand.
    whiteners: dict[int, np.ndarray] = {}
    if cov is not None:
        chol = cholesky_factor(np.asarray(cov, dtype=float), n_s)
        chol_samples = None

        def winv_of(s: int) -> np.ndarray:
            if -1 not in whiteners:
                whiteners[-1] = whitener(chol)
            return whiteners[-1]
    else:
        cov_samples = np.asarray(cov_samples, dtype=float)
        if cov_samples.shape != (n_s, model.n_points, model.n_points):
            raise FitError("", f"per-sample covariances must have shape ({n_s}, "
                           f"{model.n_points}, {model.n_points}), got {cov_samples.shape}")
        chol = None
        chol_samples, ok_s = batched_cholesky(cov_samples)

        def winv_of(s: int) -> np.ndarray | None:
            if not ok_s[s]:
                return None
            if s not in whiteners:
                whiteners[s] = whitener(chol_samples[s])
            return whiteners[s]

    use_batched = engine == "batched" or (engine == "auto" and model.has_analytic_jacobian)

    if not use_batched or not np.all(np.isfinite(start)):
        theta, conv = _lmfit_loop(y_samples, model, start, winv_of, range(n_s), prior,
                                  lo, hi, tol, max_nfev)
        used, n_fallback = "lmfit", 0
    else:
        theta, conv = batched_refits(y_samples, model, start, chol=chol,
                                     chol_samples=chol_samples, priors=priors, bounds=bounds,
                                     stol=stol, max_iter=refit_iterations(model.n_params)
                                     if max_iter is None else int(max_iter))
        theta = np.array(theta, dtype=float)
        conv = np.array(conv, dtype=bool)
        redo = np.flatnonzero(~conv)
        # The bounded minimiser refits stragglers; when the engine leaves more
        # than FALLBACK_FRACTION of the samples unconverged the fit itself is
        # at fault (a flat direction, a bound that is active), and refitting
        # them one by one would cost minutes for nothing: they are counted as
        # failed instead.
        if redo.size > max(1, int(FALLBACK_FRACTION * n_s)) or not fallback:
            redo = redo[:0]
        n_fallback = int(redo.size)
        if redo.size:
            th2, conv2 = _lmfit_loop(y_samples, model, start, winv_of, redo, prior,
                                     lo, hi, tol, max_nfev)
            theta[redo], conv[redo] = th2[redo], conv2[redo]
        used = "batched"
    theta[~conv] = np.nan
    with np.errstate(all="ignore"):
        reported = model.to_reported(theta)
    reported[~conv] = np.nan
    return RefitResult(theta=theta, reported=reported, converged=conv,
                       n_fallback=n_fallback, engine=used)

