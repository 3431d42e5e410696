"""Batched Levenberg-Marquardt refits: every jackknife sample of a fit at once.

A fit-range scan refits each of its fits on every jackknife sample: 120 fit
ranges and 200 samples make 24,000 small least-squares problems, all with the
same model, the same points, and a starting point (the central fit) that is
already within a fraction of an error bar of every sample's minimum. Looping a
general-purpose minimiser over them costs milliseconds per refit in
interpreter overhead, while the arithmetic of one refit is a few thousand
flops. Here the Levenberg-Marquardt iteration runs on the whole stack of
samples with numpy array operations: one model evaluation, one Jacobian and
one batched linear solve per iteration serve every sample, and each sample
keeps its own damping, accept/reject decision and convergence test.

Problem solved for every sample ``s``::

    chi2_s(theta) = | L_s^{-1} (f(theta) - y_s) |^2
                    + sum_k ((P_k(theta) - mean_k) / width_k)^2

with ``L_s`` the lower Cholesky factor of the covariance used for that sample
(one frozen matrix shared by all samples, or one per sample), ``f`` the model,
and optional Gaussian priors on the *reported* parameters
``P = model.to_reported(theta)``.

Bounds follow the central fit (:mod:`plateaufit.fit.central`), which maps
bounds on reported parameters to a box on the internal ones
(:func:`~plateaufit.fit.constraints.internal_bounds`) and minimises inside that
box. Here trial points are projected onto the same box, and a sample whose
solution ends on a face of the box is reported *not converged*, so that the
caller refits it with the central fit's bounded minimiser. A solution strictly
inside the box is a minimum of the bounded problem as well, so nothing is lost
for the samples that are reported converged.

Stopping rule. Near a minimum, chi2 itself can no longer tell a better point
from a worse one: its rounding error (from the cancellation in ``f - y``,
amplified by the whitening) is typically 1e-13 to 1e-11 in absolute terms,
which a step of about 1e-6 of a standard error already falls below. Minimisers
that accept or reject steps by comparing chi2 values therefore stop about
there. This engine judges such steps by the quadratic model instead and keeps
taking Gauss-Newton steps until the distance left, extrapolated from the
observed rate of convergence, is ``xtol`` small, so a converged sample sits at
the zero of the chi2 gradient to about 1e-10 of a standard error
(``tests/reference/test_batched_agreement.py`` checks this with central
differences of an independently built chi2).

Implementation. The iteration works batch-last (the sample axis last in every
array, see :class:`_Stack`), and takes the model's prediction and Jacobian
from one call where the model offers ``predict_and_jacobian``. With a few
hundred samples of a few parameters the cost is dominated by the number of
array operations per iteration (about 130, of 1-3 us each), not by their
size: a scan's two-state fits whose excited state the data barely constrain
converge linearly at a rate near 1/2 (large residuals) and take most of the
iterations. ``benchmarks/run_benchmarks.py`` measures it.

One module of about 650 lines on purpose: the iteration's state (damping,
rates, rounding floors, the working set) is shared by every step of the loop,
and splitting it would pass a dozen arrays between modules.

References
----------
K. Levenberg, "A method for the solution of certain non-linear problems in
least squares", Quart. Appl. Math. 2 (1944) 164.

D. W. Marquardt, "An algorithm for least-squares estimation of nonlinear
parameters", J. Soc. Indust. Appl. Math. 11 (1963) 431.

J. J. More, "The Levenberg-Marquardt algorithm: implementation and theory",
in Numerical Analysis, Lecture Notes in Mathematics 630 (1978) 105 -- the
scaling of the damping by the diagonal of the normal matrix.

H. B. Nielsen, "Damping parameter in Marquardt's method", report
IMM-REP-1999-05, Technical University of Denmark (1999) -- the update of the
damping from the gain ratio (citation from memory).
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any, Protocol

import numpy as np

from plateaufit.fit.constraints import internal_bounds, prior_terms
from plateaufit.fit.whitening import whitening_matrices

__all__ = ["batched_refits", "BatchedModel"]

# Damping schedule. The first trial of every sample is a pure Gauss-Newton
# step (lam = 0; the warm start is close to the minimum). A rejected step sets
# the damping to _LAM_START, or multiplies it by nu (2, doubling on each further
# rejection); an accepted damped step scales it by max(1/3, 1 - (2 rho - 1)^3),
# rho the ratio of the actual to the predicted gain (Nielsen 1999), and below
# _LAM_ZERO the damping returns to 0 (Gauss-Newton).
_LAM_START = 1e-3
_LAM_ZERO = 1e-7
_LAM_GIVE_UP = 1e16
# Added to the unit-diagonal scaled normal matrix so the batched solve never
# meets an exactly singular matrix (a parameter the data do not constrain at
# all, e.g. the energy of a state with zero amplitude). It changes the step,
# never the fixed point.
_REGULARISATION = 1e-14
# With 3 to this many parameters the damped normal equations are solved by
# elimination vectorised over the samples, with more by LAPACK one matrix at a
# time. The choice depends on the number of parameters only, never on how many
# samples are in the working set, so a sample's iteration does not switch
# algorithms when others finish. (Bitwise independence of the other samples is
# not achievable batch-last: numpy's einsum reductions round differently for
# different batch sizes and positions; results are reproducible for the same
# batch, and agree with any other batch within the stopping tolerance.)
# (Measured: at 200 samples
# elimination is 1.3-1.7x faster for 3-4 parameters, even at 6 and slower
# from about 10; at 20 samples LAPACK is 2-3x faster).
_ELIMINATION_MAX = 6
# Finished samples are dropped from the working arrays once they are at least
# 1/_COMPACT_EVERY of them, and carried along masked until then. Compacting
# every iteration, at 1/8, or never (compact=False) measured the same within
# the noise on the scan of benchmarks/ (compact=True is marginally ahead);
# 1/8 keeps the index bookkeeping rare.
_COMPACT_EVERY = 8
# The rounding floor of chi2 is estimated as this many units of round-off of
# |r| * | |L^{-1}| |y| | (see the module notes).
_ROUNDING_UNITS = 8.0
#: Default statistical tolerance: steps below this many standard errors (in the
#: metric of the fit's own curvature) end the iteration; see batched_refits.
STAT_TOL = 1e-5


class BatchedModel(Protocol):
    """What :func:`batched_refits` needs of a model (CorrelatorModel has it).

    Optional: ``predict_and_jacobian(theta) -> (prediction, jacobian)``.
    """

    n_params: int
    reported_names: tuple[str, ...]

    def predict(self, theta: np.ndarray) -> np.ndarray: ...
    def jacobian(self, theta: np.ndarray) -> np.ndarray: ...
    def to_reported(self, theta: np.ndarray) -> np.ndarray: ...
    def reported_jacobian(self, theta: np.ndarray) -> np.ndarray: ...


class _Stack:
    """Whitened residuals and normal equations of the samples still iterating.

    Arrays are batch-last: parameters ``(p, m)``, data and residuals
    ``(n, m)``, Jacobians ``(p, n, m)``, normal matrices ``(p, p, m)``, per-sample
    whitening matrices ``(n, n, m)``. Every array operation then runs along the
    long sample axis instead of the short point and parameter axes, which for
    a few hundred samples of a few parameters is several times faster.
    """

    def __init__(self, model: BatchedModel, y: np.ndarray, winv: np.ndarray,
                 prior: tuple[np.ndarray, np.ndarray, np.ndarray] | None) -> None:
        self.model = model
        self.y = y                # (n, m)
        self.winv = winv          # (n, n) shared, or (n, n, m) per sample
        self.prior = prior        # (index, mean, width) or None
        # A model that evaluates prediction and Jacobian together (sharing the
        # exponentials) saves one pass per iteration; optional.
        self.together = getattr(model, "predict_and_jacobian", None)

    def keep(self, rows: np.ndarray) -> _Stack:
        winv = self.winv if self.winv.ndim == 2 else self.winv[:, :, rows]
        return _Stack(self.model, self.y[:, rows], winv, self.prior)

    def _winv(self, rows: np.ndarray | None) -> np.ndarray:
        if rows is None or self.winv.ndim == 2:
            return self.winv
        return self.winv[:, :, rows]

    @staticmethod
    def whiten(winv: np.ndarray, d: np.ndarray) -> np.ndarray:
        """``L^{-1} d`` for residuals (n, m) or Jacobians (p, n, m)."""
        if winv.ndim == 2:
            # (n, n) @ (n, m), once per parameter for a Jacobian
            return np.matmul(winv, d)
        if d.ndim == 2:
            return np.einsum("ijm,jm->im", winv, d)
        return np.einsum("ijm,ajm->aim", winv, d)

    def residuals(self, theta: np.ndarray
                  ) -> tuple[np.ndarray, np.ndarray | None, np.ndarray, np.ndarray | None]:
        """Whitened data residuals (n, m), prior residuals (k, m), chi2 (m,), and
        the model Jacobian (p, n, m) at ``theta`` (p, m) when the model gives it
        with the prediction."""
        jac = None
        if self.together is not None:
            f, jac = self.together(theta.T)
            jac = jac.transpose(2, 1, 0)
        else:
            f = self.model.predict(theta.T)
        r = self.whiten(self.winv, f.T - self.y)
        chi2 = np.einsum("im,im->m", r, r)
        rp = None
        if self.prior is not None:
            index, mean, width = self.prior
            rp = (self.model.to_reported(theta.T)[:, index].T - mean[:, None]) / width[:, None]
            chi2 += np.einsum("km,km->m", rp, rp)
        return r, rp, chi2, jac

    def whitened_jacobian(self, theta: np.ndarray, rows: np.ndarray | None = None,
                          jac: np.ndarray | None = None
                          ) -> tuple[np.ndarray, np.ndarray | None]:
        """Whitened Jacobian (p, n, m) and prior Jacobian (k, p, m) at ``theta`` (p, m).

        ``jac``, the model Jacobian (p, n, m) at ``theta`` if already known,
        saves its evaluation.
        """
        winv = self._winv(rows)
        if jac is None:
            jac = self.model.jacobian(theta.T).transpose(2, 1, 0)
        jw = self.whiten(winv, jac)
        jp = None
        if self.prior is not None:
            index, _, width = self.prior
            jp = (self.model.reported_jacobian(theta.T)[:, index, :].transpose(1, 2, 0)
                  / width[:, None, None])
        return jw, jp

    @staticmethod
    def normal(jw: np.ndarray, jp: np.ndarray | None, r: np.ndarray,
               rp: np.ndarray | None) -> tuple[np.ndarray, np.ndarray]:
        """Normal matrix J^T J (p, p, m) and gradient J^T r (p, m)."""
        # contraction over the middle axis: twice as fast as over the first
        a = np.einsum("aim,bim->abm", jw, jw)
        g = np.einsum("aim,im->am", jw, r)
        if jp is not None:
            a += np.einsum("kam,kbm->abm", jp, jp)
            g += np.einsum("kam,km->am", jp, rp)
        return a, g


def _solve_shifted(scaled: np.ndarray, shift: np.ndarray | float,
                   rhs: np.ndarray) -> np.ndarray:
    """Solve ``(scaled + shift I) z = rhs`` for a stack (p, p, m) of positive
    definite matrices, ``shift`` a scalar or one per matrix (m,).

    Gaussian elimination without pivoting, vectorised over the stack (stable
    for symmetric positive definite matrices; Golub & Van Loan, Matrix
    Computations, section 4.2, from memory). For more than
    ``_ELIMINATION_MAX`` parameters LAPACK's solve, one matrix at a time, is
    faster. The choice never depends on the number of matrices (see the
    module constants).
    """
    p = scaled.shape[0]
    diag = np.arange(p)
    if p > _ELIMINATION_MAX:
        mat = scaled.transpose(2, 0, 1).copy()
        mat[:, diag, diag] += np.reshape(shift, (-1, 1))
        return np.linalg.solve(mat, rhs.T[:, :, None])[:, :, 0].T
    a = scaled.copy()
    a[diag, diag] += shift
    b = rhs.copy()
    for k in range(p - 1):
        f = a[k + 1:, k] / a[k, k]                                  # (p-k-1, m)
        a[k + 1:, k + 1:] -= f[:, None] * a[k, k + 1:]
        b[k + 1:] -= f * b[k]
    z = np.empty_like(b)
    z[p - 1] = b[p - 1] / a[p - 1, p - 1]
    for k in range(p - 2, -1, -1):
        z[k] = (b[k] - np.einsum("jm,jm->m", a[k, k + 1:], z[k + 1:])) / a[k, k]
    return z


class _Linearisation:
    """What one iteration needs of the normal equations at the current point.

    ``scaled`` is ``A`` in the variables ``D delta`` (``D = sqrt(diag A)``, unit
    diagonal), in which Marquardt's damping ``lam diag(A)`` is ``lam I``;
    ``rhs = -g / D``; ``tol2`` is the squared step tolerance
    ``(xtol (|D theta| + xtol))^2``; ``finite`` flags usable samples. Batch-last:
    ``d``, ``rhs`` (p, m), ``scaled`` (p, p, m), ``tol2``, ``finite`` (m,).
    """

    __slots__ = ("d", "scaled", "rhs", "tol2", "finite")

    def __init__(self, a: np.ndarray, g: np.ndarray, theta: np.ndarray, xtol: float) -> None:
        diag = np.arange(a.shape[0])
        d = np.sqrt(a[diag, diag])        # a diagonal of sums of squares: never negative
        self.finite = np.isfinite(g.sum(axis=0) + a.sum(axis=(0, 1)))
        d = np.where(d > 0, d, 1.0)
        self.d = d
        self.scaled = a / (d[:, None] * d[None, :])
        self.rhs = -g / d
        dt = d * theta
        size = np.sqrt(np.einsum("pm,pm->m", dt, dt))
        self.tol2 = (xtol * (size + xtol)) ** 2

    def take(self, rows: np.ndarray) -> None:
        for name in self.__slots__:
            setattr(self, name, getattr(self, name)[..., rows])

    def put(self, rows: np.ndarray, other: _Linearisation) -> None:
        for name in self.__slots__:
            getattr(self, name)[..., rows] = getattr(other, name)

    def steps(self, lam: np.ndarray, damped: bool) -> tuple[np.ndarray, np.ndarray]:
        """Scaled steps ``z = D delta`` and steps ``delta``, (p, m) each."""
        p = self.scaled.shape[0]
        shift = (lam + _REGULARISATION) if damped else _REGULARISATION
        if p == 1:
            z = self.rhs / (self.scaled[0] + shift)
        elif p == 2:
            # Closed form (unit diagonal): det = (1 + s)^2 - c^2 > 0 for s > 0.
            c = self.scaled[0, 1]
            diag = 1.0 + shift
            det = diag * diag - c * c
            b0, b1 = self.rhs[0], self.rhs[1]
            z = np.stack([(diag * b0 - c * b1) / det, (diag * b1 - c * b0) / det])
        else:
            z = _solve_shifted(self.scaled, shift, self.rhs)
        return z, z / self.d


def batched_refits(y_samples: np.ndarray, model: BatchedModel, start: np.ndarray, *,
                   chol: np.ndarray | None = None, chol_samples: np.ndarray | None = None,
                   whiteners: np.ndarray | None = None,
                   priors: Mapping[str, Any] | None = None,
                   bounds: Mapping[str, Any] | None = None,
                   max_iter: int = 100, xtol: float = 1e-12, ftol: float = 1e-14,
                   stol: float | None = STAT_TOL, compact: bool = True,
                   info: dict | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Refit a correlated chi-square fit on every jackknife sample at once.

    Levenberg-Marquardt on the whole stack of samples: each iteration makes one
    batched model evaluation, one batched Jacobian and one batched solve of the
    damped normal equations ``(J^T J + lam diag(J^T J)) delta = -J^T r``; each
    sample has its own damping ``lam``, accept/reject decision and convergence
    test, and a sample that has converged (or failed) is no longer updated.

    Parameters
    ----------
    y_samples : ndarray, shape (S, n)
        Data of each jackknife sample at the fit's points (all observables
        concatenated in the model's order).
    model : CorrelatorModel
        Anything with batched ``predict(theta (m, p)) -> (m, n)``,
        ``jacobian(theta) -> (m, n, p)`` (derivative of the prediction),
        ``to_reported`` and ``reported_jacobian`` (used with priors), and
        ``reported_names``; bounds need a :class:`CorrelatorModel`. A model
        that also has ``predict_and_jacobian(theta) -> (f, J)`` (one pass for
        both) is evaluated through it, which saves a model evaluation per
        iteration.
    start : ndarray, shape (p,) or (S, p)
        Internal parameters to start from: the central fit (the usual warm
        start), or one start per sample.
    chol : ndarray, shape (n, n), optional
        Lower Cholesky factor of the frozen covariance shared by all samples.
    chol_samples : ndarray, shape (S, n, n), optional
        One lower Cholesky factor per sample (see
        :func:`plateaufit.fit.whitening.batched_cholesky`); a
        sample whose factor holds NaN is reported not converged.
    whiteners : ndarray, shape (S, n_w, n), optional
        One whitening matrix per sample, given directly instead of a factor:
        the whitened residual of sample ``s`` is ``whiteners[s] @ (f - y_s)``.
        It may be rectangular: rows of zeros pad, columns of zeros leave
        points out, so samples fitting different subsets of the model's
        points (the central fits of several fit ranges) share one call.
        Give exactly one of ``chol``, ``chol_samples`` and ``whiteners``.
    priors : mapping, optional
        Reported parameter name -> ``Prior`` (``.mean``, ``.width``) or
        ``(mean, width)``; adds ``((P_k - mean) / width)^2`` to chi2.
    bounds : mapping, optional
        Reported parameter name -> ``(lower, upper)`` (either may be None),
        mapped to internal parameters as the central fit does. A sample whose
        result lies on a bound is reported not converged.
    max_iter : int, optional
        Maximum number of trial steps per sample.
    xtol : float, optional
        Converged when an accepted Gauss-Newton step, or the step after it as
        extrapolated from the observed rate of convergence, is at most
        ``xtol * (|D theta| + xtol)`` in the scaled norm ``|D delta|``,
        ``D = sqrt(diag(J^T J))``. Also converged when the steps stop
        shrinking below the rounding floor of chi2 (round-off reached).
    ftol : float, optional
        Converged also when an accepted Gauss-Newton step lowers chi2 by at
        most ``ftol * chi2`` and was predicted to; applied only where
        ``ftol * chi2`` is above the rounding floor of chi2, since below it a
        change of chi2 is not measurable.
    compact : bool, optional
        Drop finished samples from the working arrays (the default), or keep
        the arrays at full size and only stop updating finished samples. The
        results are identical; ``benchmarks/run_benchmarks.py`` times both.

    Returns
    -------
    theta : ndarray, shape (S, p)
        Internal parameters of each refit. Where not converged this is the
        last accepted point (the start if none was accepted).
    converged : ndarray of bool, shape (S,)
        False where the test was not met within ``max_iter``, where values
        became non-finite (NaN data, overflow, no usable covariance factor),
        the damping grew without bound, or the result lies on a bound.

    Notes
    -----
    When ``start`` has shape ``(p,)`` every sample starts at the same point, so
    the first normal equations are shared and formed once. The convergence
    tests apply only to undamped steps, so a heavily damped (hence short) step
    is never taken for convergence. Damping never moves the fixed point: a
    converged sample is at a zero of the chi2 gradient, the point any
    least-squares minimiser converges to from the same start.

    References
    ----------
    K. Levenberg, Quart. Appl. Math. 2 (1944) 164.
    D. W. Marquardt, J. Soc. Indust. Appl. Math. 11 (1963) 431.
    J. J. More, Lecture Notes in Mathematics 630 (1978) 105.
    """
    y = np.asarray(y_samples, dtype=float)
    if y.ndim != 2:
        raise ValueError(f"y_samples must have shape (S, n), got {y.shape}")
    n_samples, n_points = y.shape
    p = int(model.n_params)
    start = np.asarray(start, dtype=float)
    shared_start = start.shape == (p,)
    if not shared_start and start.shape != (n_samples, p):
        raise ValueError(f"start must have shape ({p},) or ({n_samples}, {p}), "
                         f"got {start.shape}")
    theta = np.array(np.broadcast_to(start, (n_samples, p)), dtype=float)
    converged = np.zeros(n_samples, dtype=bool)
    if sum(a is not None for a in (chol, chol_samples, whiteners)) != 1:
        raise ValueError("give exactly one of chol (frozen covariance), chol_samples (one "
                         "covariance per sample) and whiteners (one whitening matrix per "
                         "sample)")
    if whiteners is not None:
        winv = np.asarray(whiteners, dtype=float)
        if winv.ndim != 3 or winv.shape[0] != n_samples or winv.shape[2] != n_points:
            raise ValueError(f"whiteners must have shape ({n_samples}, n_w, {n_points}), "
                             f"got {winv.shape}")
        usable = np.isfinite(winv).all(axis=(1, 2))
    elif chol is not None:
        chol = np.asarray(chol, dtype=float)
        if chol.shape != (n_points, n_points):
            raise ValueError(f"chol must have shape ({n_points}, {n_points}), "
                             f"got {chol.shape}")
        winv = whitening_matrices(chol)
        usable = np.full(n_samples, bool(np.isfinite(winv).all()))
    else:
        chol_samples = np.asarray(chol_samples, dtype=float)
        if chol_samples.shape != (n_samples, n_points, n_points):
            raise ValueError(f"chol_samples must have shape ({n_samples}, {n_points}, "
                             f"{n_points}), got {chol_samples.shape}")
        winv = whitening_matrices(chol_samples)
        usable = np.isfinite(winv).all(axis=(1, 2))
    usable &= np.isfinite(y).all(axis=1) & np.isfinite(theta).all(axis=1)
    index, mean, width = prior_terms(model, priors)
    prior = (index, mean, width) if index.size else None
    box = internal_bounds(model, bounds) if bounds else None
    if box is not None and not (np.isfinite(box[0]).any() or np.isfinite(box[1]).any()):
        box = None
    rows = np.flatnonzero(usable)      # output row of each working sample
    if max_iter < 1 or rows.size == 0:
        return theta, converged
    if info is None:
        info = {}
    info["iterations"] = np.zeros(n_samples, dtype=np.int64)
    info["flat"] = np.zeros(n_samples, dtype=bool)

    with np.errstate(all="ignore"):
        return _iterate(model, y, winv, theta, converged, rows, prior, box, shared_start,
                        max_iter, xtol, ftol, stol, compact, info)


def _iterate(model, y, winv, theta, converged, rows, prior, box, shared_start,
             max_iter, xtol, ftol, stol, compact, info):
    """The Levenberg-Marquardt loop of :func:`batched_refits` (fills theta, converged).

    Works batch-last (see :class:`_Stack`): ``th`` is (p, m).
    """
    th = np.ascontiguousarray(theta[rows].T)
    if box is not None:
        lo, hi = box[0][:, None], box[1][:, None]
        th = np.clip(th, lo, hi)
        shared_start = shared_start and rows.size == theta.shape[0]
    y_t = np.ascontiguousarray(y[rows].T)                                   # (n, m)
    winv_t = winv if winv.ndim == 2 else np.ascontiguousarray(
        winv[rows].transpose(1, 2, 0))                                      # (n, n, m)
    stack = _Stack(model, y_t, winv_t, prior)
    m = rows.size
    if shared_start and winv.ndim == 2:
        # One point for all: the residuals differ only through the data, and
        # the normal matrix is common, so the first linearisation is formed once.
        one = th[:, :1]
        if stack.together is not None:
            f1, jac1 = stack.together(one.T)
            jac1 = jac1.transpose(2, 1, 0)
        else:
            f1, jac1 = model.predict(one.T), None
        r = winv @ (f1[0][:, None] - y_t)
        chi2 = np.einsum("im,im->m", r, r)
        jw1, jp1 = stack.whitened_jacobian(one, jac=jac1)
        a1 = np.einsum("aim,bim->abm", jw1, jw1)
        g = jw1[:, :, 0] @ r
        rp = None
        if prior is not None:
            index, mean, width = prior
            rp0 = (model.to_reported(one.T)[:, index].T - mean[:, None]) / width[:, None]
            rp = np.repeat(rp0, m, axis=1)
            chi2 += np.einsum("km,km->m", rp, rp)
            a1 += np.einsum("kam,kbm->abm", jp1, jp1)
            g += jp1[:, :, 0].T @ rp
        lin = _Linearisation(np.repeat(a1, m, axis=2), g, th, xtol)
    else:
        r, rp, chi2, jac0 = stack.residuals(th)
        jw, jp = stack.whitened_jacobian(th, jac=jac0)
        lin = _Linearisation(*stack.normal(jw, jp, r, rp), th, xtol)
    # |L^{-1}| |y| scales the round-off of the whitened residuals (module notes).
    if winv.ndim == 2:
        zscale = np.abs(winv) @ np.abs(y_t)
    else:
        zscale = np.einsum("ijm,jm->im", np.abs(winv_t), np.abs(y_t))
    zscale = np.sqrt(np.einsum("im,im->m", zscale, zscale))
    units = _ROUNDING_UNITS * np.finfo(float).eps

    def floors(chi2, zscale):
        floor = units * (np.sqrt(chi2) * zscale + chi2)
        gain = ftol * chi2
        # the chi2-change test applies only where chi2 can resolve it; no
        # rounding test can fire for a predicted gain above both floors
        gain_floor = np.where(gain > floor, gain, -1.0)
        return floor, gain_floor, np.maximum(floor, gain_floor)

    floor, gain_floor, near_floor = floors(chi2, zscale)
    lam = np.zeros(m)
    nu = np.full(m, 2.0)
    last2 = np.full(m, np.inf)        # |D delta|^2 of the last accepted GN step
    last_ratio2 = np.ones(m)          # its ratio to the one before
    ok = np.zeros(m, dtype=bool)
    done = ~(np.isfinite(chi2) & lin.finite)
    damped = False                    # any lam > 0 in the working set
    stol2 = -1.0 if stol is None else float(stol) ** 2
    n_quiet = np.zeros(m, dtype=np.int64)   # consecutive accepted steps below stol
    flat = np.zeros(m, dtype=bool)
    iters = np.zeros(m, dtype=np.int64)

    for _ in range(max_iter):
        if done.all():
            break
        masked = bool(done.any())        # finished samples still in the arrays
        z, step = lin.steps(lam, damped)
        if masked:
            z[:, done] = 0.0
            step[:, done] = 0.0
        trial = th + step
        if box is not None:
            trial = np.clip(trial, lo, hi)
            step = trial - th
            z = lin.d * step
        r_t, rp_t, chi2_t, jac_t = stack.residuals(trial)

        zz = np.einsum("pm,pm->m", z, z)                           # |D delta|^2
        # Predicted gain of the quadratic model chi2 + 2 g.delta + delta.A.delta;
        # with (A + (lam + reg) D^2) delta = -g it is -g.delta + (lam + reg)|D delta|^2.
        if box is None:
            pred = np.einsum("pm,pm->m", lin.rhs, z) + (lam + _REGULARISATION) * zz
        else:     # the step may have been cut by the box
            pred = 2.0 * np.einsum("pm,pm->m", lin.rhs, z) - np.einsum(
                "pm,pqm,qm->m", z, lin.scaled, z)
        diff = chi2 - chi2_t                                       # NaN for a bad trial
        # A step whose predicted gain is below the rounding floor of chi2
        # cannot be judged by chi2: take it on the quadratic model's word.
        near = bool((pred <= near_floor).any())    # else no rounding test applies
        if near:
            unresolved = (pred <= floor) & (diff >= -4.0 * floor)
            accept = (diff > 0) | unresolved
        else:
            accept = diff > 0
        # Convergence, on undamped steps only. With linear convergence at rate
        # q (the larger of the last two ratios of successive undamped steps)
        # the distance left after this step is about |step| q / (1 - q); with
        # no rate known yet, it is taken to be |step|.
        gn_accept = accept & (lam == 0.0) if damped else accept
        ratio2 = np.minimum(zz / last2, 1.0)          # 0 when no step is known yet
        q = np.sqrt(np.maximum(ratio2, last_ratio2))
        small = zz * (q / (1.0 - q)) ** 2 <= lin.tol2
        small |= (zz <= lin.tol2) & (last_ratio2 == 1.0)
        if near:
            # Round-off reached: unresolvable steps that no longer shrink.
            small |= unresolved & (ratio2 >= 1.0)
            small |= (pred <= gain_floor) & (diff <= gain_floor)  # ftol test
        if masked:
            accept = accept & ~done
            gn_accept = gn_accept & ~done
        conv = gn_accept & small
        if stol2 > 0:
            # Statistical stopping rule: the step measured in units of the
            # fit's own parameter errors, |delta|_A = sqrt(delta^T A delta)
            # (A = J^T J, the inverse curvature covariance), bounds the change
            # of every parameter in units of its error. An undamped step whose
            # length, extrapolated with the observed rate (capped at q = 0.9),
            # is below stol is converged; so is any accepted step after which
            # both the step and the chi2 change have stayed below stol (and
            # stol^2) twice in a row: a flat valley, where chi2 no longer
            # distinguishes the points.
            if box is None:
                mah2 = np.einsum("pm,pm->m", lin.rhs, z) - (
                    (lam + _REGULARISATION) if damped else _REGULARISATION) * zz
            else:
                mah2 = np.einsum("pm,pqm,qm->m", z, lin.scaled, z)
            qc = np.minimum(q, 0.9)
            ext2 = np.where(last_ratio2 == 1.0, 1.0, (qc / (1.0 - qc)) ** 2)
            stat = gn_accept & (mah2 * np.maximum(ext2, 1.0) <= stol2)
            quiet = accept & (mah2 <= stol2) & (diff <= stol2)
            n_quiet = np.where(quiet, n_quiet + 1, np.where(accept, 0, n_quiet))
            is_flat = (n_quiet >= 2) & ~stat & ~conv
            conv = conv | stat | is_flat
            flat |= is_flat
        iters += ~done
        last_ratio2 = np.where(gn_accept, np.where(ratio2 > 0, ratio2, 1.0), last_ratio2)
        last2 = np.where(gn_accept, zz, last2)

        all_accepted = bool(accept.all())
        if all_accepted:
            th, r, rp, chi2 = trial, r_t, rp_t, chi2_t
        elif accept.any():
            th = np.where(accept, trial, th)
            r = np.where(accept, r_t, r)
            if rp is not None:
                rp = np.where(accept, rp_t, rp)
            chi2 = np.where(accept, chi2_t, chi2)
        if damped or not all_accepted:
            # Nielsen's update on accepted damped steps; nu-fold increase on rejection.
            rho = np.where(unresolved, 1.0, diff / pred) if near else diff / pred
            shrink = np.maximum(1.0 / 3.0, 1.0 - (2.0 * np.clip(rho, 0.0, 1.0) - 1.0) ** 3)
            lam = np.where(accept, lam * shrink, np.where(lam == 0.0, _LAM_START, lam * nu))
            nu = np.where(accept | (lam == _LAM_START), 2.0, 2.0 * nu)
            lam[lam < _LAM_ZERO] = 0.0
            if masked:
                lam[done] = 0.0
            damped = bool(lam.any())
            done |= lam > _LAM_GIVE_UP
        ok |= conv
        done |= conv

        # Drop finished samples from the working arrays once enough of them
        # have gathered (each compaction is a fixed cost; until then they are
        # carried along, masked).
        n_done = int(np.count_nonzero(done))
        if compact and n_done and (n_done * _COMPACT_EVERY >= done.size or n_done == done.size):
            fin = np.flatnonzero(done)
            theta[rows[fin]] = th[:, fin].T
            converged[rows[fin]] = ok[fin]
            info["iterations"][rows[fin]] = iters[fin]
            info["flat"][rows[fin]] = flat[fin]
            keep = np.flatnonzero(~done)
            rows = rows[keep]
            if keep.size == 0:
                break
            th, r, chi2, accept = th[:, keep], r[:, keep], chi2[keep], accept[keep]
            jac_t = None if jac_t is None else jac_t[..., keep]
            rp = None if rp is None else rp[:, keep]
            stack = stack.keep(keep)
            lin.take(keep)
            lam, nu, zscale = lam[keep], nu[keep], zscale[keep]
            floor, gain_floor, near_floor = floor[keep], gain_floor[keep], near_floor[keep]
            last2, last_ratio2, ok, done = last2[keep], last_ratio2[keep], ok[keep], done[keep]
            n_quiet, flat, iters = n_quiet[keep], flat[keep], iters[keep]
            n_done = 0

        # Fresh linearisation where a step was accepted and work goes on.
        need = accept & ~done if n_done else accept
        if need.all():
            jw, jp = stack.whitened_jacobian(th, jac=jac_t)
            lin = _Linearisation(*stack.normal(jw, jp, r, rp), th, xtol)
            floor, gain_floor, near_floor = floors(chi2, zscale)
        elif need.any():
            idx = np.flatnonzero(need)
            jw, jp = stack.whitened_jacobian(th[:, idx], rows=idx,
                                             jac=None if jac_t is None else jac_t[..., idx])
            fresh = _Linearisation(*stack.normal(jw, jp, r[:, idx],
                                                 None if rp is None else rp[:, idx]),
                                   th[:, idx], xtol)
            lin.put(idx, fresh)
            floor[idx], gain_floor[idx], near_floor[idx] = floors(chi2[idx], zscale[idx])
        else:
            continue
        done |= ~lin.finite

    if rows.size:
        theta[rows] = th.T
        converged[rows] = ok & done
        info["iterations"][rows] = iters
        info["flat"][rows] = flat & ok & done
    converged &= np.isfinite(theta).all(axis=1)
    if box is not None:
        # On a face of the box the minimum has active constraints, which this
        # engine does not solve for: leave it to the bounded minimiser.
        lo, hi = box
        span = np.where(np.isfinite(hi - lo), hi - lo, np.abs(theta) + 1.0)
        on_bound = np.any((theta <= lo + 1e-10 * span) | (theta >= hi - 1e-10 * span),
                          axis=1)
        converged &= ~on_bound
    return theta, converged
