"""Effective masses of two-point correlators.

``log``:  ``m(t) = log(C(t) / C(t+1))`` -- exact for a single exponential.
``cosh``: the ``m`` solving ``C(t)/C(t+1) = cosh(m (T/2 - t)) / cosh(m (T/2 - t - 1))``
-- exact for a single state in a periodic box, ``A (e^{-mt} + e^{-m(T-t)})``.
``sinh``: the same with ``sinh`` -- exact for ``A (e^{-mt} - e^{-m(T-t)})``.

``t`` is the (folded) time index and ``T`` the time extent of the lattice.
Where the equation has no positive solution (a noisy or negative ratio, a
ratio on the wrong side of the turn at ``T/2``) the mass is NaN; no
floating-point warning is emitted.

The effective mass itself is common practice of the trade (no single source).

References
----------
.. [1] M. H. Quenouille, "Notes on bias in estimation", Biometrika 43 (1956) 353.
.. [2] B. Efron, "The Jackknife, the Bootstrap and Other Resampling Plans",
   SIAM, Philadelphia (1982).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from plateaufit.errors import DataError, SpecError
from plateaufit.stats.resample import jackknife_samples

__all__ = ["effective_mass", "EffectiveMass", "effective_mass_jackknife"]

_KINDS = ("log", "cosh", "sinh")


@dataclass(frozen=True)
class EffectiveMass:
    """Effective mass with jackknife errors.

    Attributes
    ----------
    t : ndarray of int, shape (n_t - 1,)
        The time of each mass (from the pair ``t, t+1``).
    value : ndarray, shape (n_t - 1,)
        Effective mass of the mean correlator (NaN where undefined).
    error : ndarray, shape (n_t - 1,)
        Jackknife error; NaN where the mean's mass or any sample's is undefined.
    kind : str
        ``log``, ``cosh`` or ``sinh``.
    """

    t: np.ndarray
    value: np.ndarray
    error: np.ndarray
    kind: str


def _logcosh(x: np.ndarray) -> np.ndarray:
    ax = np.abs(x)
    return ax + np.log1p(np.exp(-2.0 * ax)) - np.log(2.0)


def _logsinh(x: np.ndarray) -> np.ndarray:
    # x > 0; -expm1(-2x) keeps precision for small x
    return x + np.log(-np.expm1(-2.0 * x)) - np.log(2.0)


def _solve(log_r: np.ndarray, a: np.ndarray, b: np.ndarray, kind: str) -> np.ndarray:
    """Solve ``log f(m a) - log f(m b) = log_r`` for m > 0, f = cosh or sinh.

    Requires ``a = b + 1`` and ``b >= 0``; then the left side increases
    monotonically in m. Brackets: cosh -- ``[log r, arccosh r]`` (from
    ``cosh m <= f(m a)/f(m b) <= e^m``); sinh -- ``(0, log r]`` (from
    ``f(m a)/f(m b) >= e^m``). Newton steps, replaced by bisection when they
    leave the bracket.
    """
    r = np.exp(log_r)
    if kind == "cosh":
        lo = log_r.copy()
        hi = np.arccosh(np.maximum(r, 1.0))
        logf = _logcosh
        dlog = np.tanh
    else:
        lo = np.zeros_like(log_r)
        hi = log_r.copy()
        logf = _logsinh

        def dlog(x: np.ndarray) -> np.ndarray:
            return 1.0 / np.tanh(x)

    m = np.clip(log_r, lo, hi)
    if kind == "sinh":
        m = 0.5 * (lo + hi)
    for _ in range(100):
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            ma, mb = m * a, m * b
            fb = np.where(b > 0, logf(np.where(b > 0, mb, 1.0)), 0.0 if kind == "cosh" else np.nan)
            g = logf(ma) - fb - log_r
            dfb = np.where(b > 0, b * dlog(np.where(b > 0, mb, 1.0)), 0.0)
            dg = a * dlog(ma) - dfb
        lo = np.where(g < 0, m, lo)
        hi = np.where(g > 0, m, hi)
        with np.errstate(divide="ignore", invalid="ignore"):
            newton = m - g / dg
        bisect = 0.5 * (lo + hi)
        ok = np.isfinite(newton) & (newton > lo) & (newton < hi)
        new = np.where(ok, newton, bisect)
        done = np.abs(new - m) <= 4 * np.finfo(float).eps * np.maximum(np.abs(m), 1e-300)
        m = new
        if np.all(done | (g == 0)):
            break
    return m


def effective_mass(
    corr: np.ndarray,
    kind: str = "log",
    time_extent: int | None = None,
) -> np.ndarray:
    """Effective mass of a correlator, from each pair of neighbouring timeslices.

    Parameters
    ----------
    corr : ndarray, shape (..., n_t)
        Correlator(s) on timeslices ``t = 0 .. n_t - 1`` (folded index);
        leading batch axes (e.g. jackknife samples) are kept.
    kind : {"log", "cosh", "sinh"}
        ``log``: ``log(C(t)/C(t+1))``; ``cosh``/``sinh``: the exact solution
        of ``C(t)/C(t+1) = f(m (T/2 - t)) / f(m (T/2 - t - 1))``.
    time_extent : int
        ``T``; required for ``cosh`` and ``sinh``.

    Returns
    -------
    ndarray, shape (..., n_t - 1)
        Element ``t`` uses ``C(t)`` and ``C(t+1)``. NaN where undefined:
        ``log`` -- ratio not positive (a negative effective mass from a ratio
        in (0, 1) is returned as is); ``cosh`` -- ratio not above 1 (before
        ``T/2``; mirrored after it) or the pair straddles the midpoint of an
        odd ``T``; ``sinh`` -- ratio not above ``(T/2-t)/(T/2-t-1)`` (the
        ``m -> 0`` limit), or ``C(t+1) = 0`` at the midpoint.

    Raises
    ------
    SpecError
        Unknown ``kind``, or ``time_extent`` missing for ``cosh``/``sinh``.
    DataError
        Fewer than two timeslices.

    Notes
    -----
    The root is found by safeguarded Newton iteration inside the brackets
    ``[log r, arccosh r]`` (cosh) and ``(0, log r]`` (sinh), which follow
    from ``cosh m <= cosh(m a)/cosh(m b) <= e^m`` and
    ``sinh(m a)/sinh(m b) >= e^m`` for ``a = b + 1``, ``b >= 0``; it is
    exact to rounding on a pure single-state correlator. The effective mass
    is common practice of the trade (no single source).
    """
    if kind not in _KINDS:
        raise SpecError("", f"unknown effective-mass kind {kind!r}; use log, cosh or sinh")
    c = np.asarray(corr, dtype=float)
    if c.ndim == 0 or c.shape[-1] < 2:
        raise DataError("", "an effective mass needs at least two timeslices")
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        ratio = c[..., :-1] / c[..., 1:]
        valid = np.isfinite(ratio) & (ratio > 0)
        log_r = np.log(np.where(valid, ratio, 1.0))
    if kind == "log":
        return np.where(valid, log_r, np.nan)

    if time_extent is None:
        raise SpecError("time_extent", f"the {kind} effective mass needs the time extent T of the lattice")
    T = float(time_extent)
    if not np.isfinite(T) or T <= 0:
        raise SpecError("time_extent", f"time extent must be a positive integer, got {time_extent!r}")
    n_t = c.shape[-1]
    t = np.arange(n_t - 1, dtype=float)
    a = T / 2.0 - t
    b = a - 1.0
    # Past the midpoint (a + b < 0) the correlator rises: mirror the pair,
    # f(m a)/f(m b) = r  <=>  f(m |b|)/f(m |a|) = 1/r.
    mirror = (a + b) < 0
    aa = np.where(mirror, -b, a)
    bb = np.where(mirror, -a, b)
    middle = (a + b) == 0
    lr = np.where(mirror, -log_r, log_r)
    aa_b = np.broadcast_to(aa, lr.shape)
    bb_b = np.broadcast_to(bb, lr.shape)
    if kind == "cosh":
        threshold = np.zeros_like(bb_b)
    else:
        with np.errstate(divide="ignore"):
            threshold = np.where(bb_b > 0, np.log(aa_b / np.where(bb_b > 0, bb_b, 1.0)), np.inf)
    solvable = valid & ~np.broadcast_to(middle, lr.shape) & (lr > threshold) & (bb_b >= 0)
    out = np.full(lr.shape, np.nan)
    if np.any(solvable):
        out[solvable] = _solve(lr[solvable], aa_b[solvable], bb_b[solvable], kind)
    return out


def effective_mass_jackknife(
    binned: np.ndarray,
    kind: str = "log",
    time_extent: int | None = None,
) -> EffectiveMass:
    """Effective mass of the mean correlator with jackknife errors over bins.

    Parameters
    ----------
    binned : ndarray, shape (n_bins, n_t)
        Binned correlator data.
    kind, time_extent
        As in :func:`effective_mass`.

    Returns
    -------
    EffectiveMass
        ``value`` from the mean correlator; ``error`` the delete-one
        jackknife error ``sqrt((N-1)/N sum (m_i - mbar)^2)``, NaN at any ``t``
        where the mean's mass or a jackknife sample's mass is undefined (an
        error from part of the samples would be too small).

    References
    ----------
    .. [1] B. Efron, "The Jackknife, the Bootstrap and Other Resampling Plans",
       SIAM (1982).
    """
    x = np.asarray(binned, dtype=float)
    if x.ndim != 2:
        raise DataError("", f"binned correlator data must have shape (n_bins, n_t), got {x.shape}")
    value = effective_mass(x.mean(axis=0), kind, time_extent)
    samples = effective_mass(jackknife_samples(x), kind, time_extent)
    n = samples.shape[0]
    ok = np.all(np.isfinite(samples), axis=0) & np.isfinite(value)
    safe = np.where(ok[None, :], samples, 0.0)
    dev = safe - safe.mean(axis=0)
    err = np.sqrt((n - 1) / n * np.sum(dev * dev, axis=0))
    error = np.where(ok, err, np.nan)
    return EffectiveMass(t=np.arange(x.shape[1] - 1), value=value, error=error, kind=kind)
