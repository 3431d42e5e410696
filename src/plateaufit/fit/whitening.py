"""Cholesky factors and whitening matrices of fit covariances.

A correlated chi-square ``(f - y)^T C^{-1} (f - y)`` is evaluated as the squared
norm of the whitened residual ``L^{-1} (f - y)``, with ``C = L L^T`` the lower
Cholesky factor. Forming ``W = L^{-1}`` once turns the whitening of every
residual vector and Jacobian of every iteration into a matrix product. This
module is the one place that factorises: the frozen covariance of a fit (an
error when it cannot be used) and stacks of per-sample covariances (a mask of
the usable ones).

References
----------
G. H. Golub, C. F. Van Loan, "Matrix Computations", Johns Hopkins (1996),
section 4.2 -- the Cholesky factorisation (from memory).
"""

from __future__ import annotations

import numpy as np
import scipy.linalg
import scipy.linalg.lapack

from plateaufit.errors import FitError

__all__ = ["cholesky_factor", "whitener", "batched_cholesky", "whitening_matrices"]


def cholesky_factor(cov: np.ndarray, n_bins: int | None = None, where: str = "cov"
                    ) -> np.ndarray:
    """Lower Cholesky factor of one covariance matrix, or a clear error.

    Parameters
    ----------
    cov : ndarray, (n, n)
    n_bins : int, optional
        Number of bins the covariance was estimated from (named in errors).
    where : str, optional
        Argument named in errors.

    Raises
    ------
    plateaufit.errors.FitError
        For non-finite entries or a matrix that is not positive definite.
    """
    cov = np.asarray(cov, dtype=float)
    counts = (f" ({cov.shape[0]} points from {n_bins} bins)" if n_bins is not None
              else f" ({cov.shape[0]} points)")
    if not np.all(np.isfinite(cov)):
        raise FitError(where, f"the covariance matrix{counts} holds non-finite values; "
                       "check the data for NaN or infinite entries")
    try:
        chol = np.linalg.cholesky(cov)
    except np.linalg.LinAlgError:
        raise FitError(where, f"the covariance matrix{counts} is not positive definite "
                       "(singular); use more bins, fewer timeslices, or shrinkage (a larger "
                       "one if some is applied)") from None
    if not np.all(np.diagonal(chol) > 0):
        raise FitError(where, f"the covariance matrix{counts} is singular; use more bins, "
                       "fewer timeslices, or shrinkage (a larger one if some is applied)")
    return chol


def whitener(chol: np.ndarray) -> np.ndarray:
    """``L^{-1}`` of one lower Cholesky factor; NaN when it cannot be inverted.

    LAPACK's triangular inverse (``dtrtri``) rather than a triangular solve
    against the identity: the same result to rounding, and the solve goes
    through a multi-threaded BLAS call that, on a busy machine, measured 6-11
    ms instead of 20 us for a 16 x 16 factor (threads spinning).
    """
    chol = np.asarray(chol, dtype=float)
    if not (np.isfinite(chol).all() and np.all(np.diagonal(chol) != 0)):
        return np.full(chol.shape, np.nan)
    inv, info = scipy.linalg.lapack.dtrtri(chol, lower=1)
    return np.tril(inv) if info == 0 else np.full(chol.shape, np.nan)


def batched_cholesky(cov_samples: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Lower Cholesky factors of a stack of covariance matrices.

    Parameters
    ----------
    cov_samples : ndarray, shape (S, n, n)
        Symmetric covariance matrices, e.g. one per jackknife sample.

    Returns
    -------
    chol : ndarray, shape (S, n, n)
        ``chol[s] @ chol[s].T == cov_samples[s]``, lower triangular. Rows of
        ``ok == False`` are filled with NaN.
    ok : ndarray of bool, shape (S,)
        False where the matrix holds non-finite values or is not positive
        definite; such a sample cannot be fitted with its own covariance.

    Notes
    -----
    The whole stack is factorised in one call; only when that call reports a
    failure is the stack factorised one matrix at a time, to find which
    matrices failed.
    """
    cov = np.asarray(cov_samples, dtype=float)
    if cov.ndim != 3 or cov.shape[1] != cov.shape[2]:
        raise ValueError(f"cov_samples must have shape (S, n, n), got {cov.shape}")
    ok = np.isfinite(cov).all(axis=(1, 2))
    work = np.where(ok[:, None, None], cov, np.eye(cov.shape[1]))
    try:
        chol = np.linalg.cholesky(work)
    except np.linalg.LinAlgError:
        chol = np.zeros_like(work)
        for s in range(work.shape[0]):
            try:
                chol[s] = np.linalg.cholesky(work[s])
            except np.linalg.LinAlgError:
                ok[s] = False
    # A zero or negative diagonal (semi-definite input let through) cannot whiten.
    ok &= np.all(np.diagonal(chol, axis1=1, axis2=2) > 0, axis=1)
    ok &= np.isfinite(chol).all(axis=(1, 2))
    chol[~ok] = np.nan
    return chol, ok


def whitening_matrices(chol: np.ndarray) -> np.ndarray:
    """Inverses of lower Cholesky factors: the matrices that whiten residuals.

    Parameters
    ----------
    chol : ndarray, shape (n, n) or (S, n, n)
        Lower Cholesky factor(s) ``L`` of the covariance, ``C = L L^T``.

    Returns
    -------
    ndarray, same shape
        ``L^{-1}`` (lower triangular), so that
        ``|L^{-1} (f - y)|^2 = (f - y)^T C^{-1} (f - y)``. NaN for a factor
        that holds non-finite values or a zero on its diagonal.
    """
    chol = np.asarray(chol, dtype=float)
    if chol.ndim not in (2, 3) or chol.shape[-1] != chol.shape[-2]:
        raise ValueError(f"a Cholesky factor must have shape (n, n) or (S, n, n), "
                         f"got {chol.shape}")
    if chol.ndim == 2:
        return whitener(chol)
    out = np.full(chol.shape, np.nan)
    for s in range(chol.shape[0]):
        out[s] = whitener(np.tril(chol[s]))
    return out
