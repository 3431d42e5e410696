"""The autocorrelation matrix of multi-component Monte Carlo data: lag sums and one window.

``Gamma_ij(tau) = 1/n(tau) sum_r sum_t d_i(r, t) d_j(r, t + tau)`` with
``d = x - mean`` (the overall mean), pairs inside the streams only and
``n(tau)`` their number: Wolff's replica formulas for several streams, as
:mod:`plateaufit.stats.autocorr` uses them for one component. Here the
window sums ``sum_{|tau| <= W} Gamma(tau)`` of all components at once, and the
choice of one common window ``W`` by Wolff's automatic windowing on the most
autocorrelated component. Used by :mod:`plateaufit.stats.gamma_covariance`
(the covariance of the mean) and :mod:`plateaufit.stats.replicas` (the noise
model of synthetic ensembles).

References
----------
.. [1] U. Wolff, "Monte Carlo errors with less errors",
   Comput. Phys. Commun. 156 (2004) 143; erratum ibid. 176 (2007) 383.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np

from plateaufit.errors import DataError, SpecError
from plateaufit.stats.autocorr import ShortChainWarning, _check_s, _pairs_sorted, tau_int
from plateaufit.stats.resample import stream_blocks

__all__ = [
    "CommonWindow",
    "common_window",
    "lagged_covariances",
    "windowed_covariance",
    "check_data",
    "check_streams",
]


@dataclass(frozen=True)
class CommonWindow:
    """The one window of the autocorrelation matrix and where it came from.

    Attributes
    ----------
    window : int
        ``W``, the largest lag summed.
    component : int
        Index of the component the window was chosen on (the largest tau_int).
    tau : float
        tau_int of that component (``1/2 + sum rho`` convention).
    tau_error : float
        Its Madras-Sokal error.
    taus : ndarray (p,)
        tau_int of every component at its *own* automatic window.
    windows : ndarray of int (p,)
        Those own windows.
    reliable : bool
        False when the chosen component's tau_int is only a lower bound
        (chain too short, see :class:`~plateaufit.stats.autocorr.ShortChainWarning`).
    forced : bool
        True when the window was given rather than chosen.
    """

    window: int
    component: int
    tau: float
    tau_error: float
    taus: np.ndarray
    windows: np.ndarray
    reliable: bool
    forced: bool = False


# ------------------------------------------------------------------ checks


def check_data(data: np.ndarray, where: str = "data") -> np.ndarray:
    """(n, p) float array of finite values; a 1-d series becomes (n, 1)."""
    x = np.asarray(data, dtype=float)
    if x.ndim == 1:
        x = x[:, None]
    if x.ndim != 2 or x.shape[0] == 0 or x.shape[1] == 0:
        raise DataError(where, f"expected per-configuration data of shape (n_configs, n_components), got {np.shape(data)}")
    if not np.all(np.isfinite(x)):
        i, j = np.argwhere(~np.isfinite(x))[0]
        raise DataError(where, f"configuration {i} of component {j} is NaN or infinite; remove or fix that configuration")
    return x


def check_streams(streams: np.ndarray | None, n: int, where: str = "streams") -> list[tuple[int, int]]:
    """Stream blocks of ``n`` configurations, with the error naming ``where``."""
    if streams is not None and np.asarray(streams).reshape(-1).shape[0] != n:
        raise DataError(
            where,
            f"{np.asarray(streams).reshape(-1).shape[0]} stream labels for {n} configurations; "
            "give exactly one label per configuration",
        )
    return stream_blocks(streams, n)


def _fluctuating(dev: np.ndarray, x: np.ndarray) -> np.ndarray:
    """Boolean mask of the components that fluctuate (not constant to round-off)."""
    sd = np.sqrt(np.mean(dev * dev, axis=0))
    scale = np.max(np.abs(x), axis=0)
    return (sd > 64 * np.finfo(float).eps * scale) & (sd > 0)


def _check_window(window: object, lengths: np.ndarray, where: str = "window") -> int:
    if isinstance(window, (bool, np.bool_)) or not isinstance(window, (int, np.integer)):
        raise SpecError(where, f"the window must be a non-negative integer (a lag in configurations), got {window!r}")
    w = int(window)
    longest = int(lengths.max())
    if w < 0 or w >= longest:
        raise SpecError(where, f"the window must lie in 0 .. {longest - 1} (below the longest stream, {longest} configurations), got {w}")
    return w


# ------------------------------------------------------------- the sums


def lagged_covariances(dev: np.ndarray, blocks: list[tuple[int, int]], window: int) -> tuple[np.ndarray, np.ndarray]:
    """``Gamma(0)`` and ``sum_{tau=1}^{W} Gamma(tau)`` of centred data.

    ``Gamma(tau)_ij = 1/n(tau) sum d_i(t) d_j(t + tau)``, pairs inside the
    streams only, ``n(tau)`` their number (Wolff's replica normalisation).
    The lag sum is one product ``D^T Z`` with ``Z(t) = sum_tau d(t + tau) /
    n(tau)``, a filter along the chain: cost ``O(N p W + N p^2)`` instead of
    ``O(N p^2 W)``.

    Parameters
    ----------
    dev : ndarray (n, p)
        Data minus the overall mean.
    blocks : list of (start, stop)
        Streams.
    window : int
        ``W >= 0``.

    Returns
    -------
    gamma0 : ndarray (p, p)
    lag_sum : ndarray (p, p)
        Not symmetric; ``C = gamma0 + lag_sum + lag_sum.T``.
    """
    n, p = dev.shape
    gamma0 = dev.T @ dev / n
    lag_sum = np.zeros((p, p))
    if window == 0:
        return gamma0, lag_sum
    lengths = np.array([b - a for a, b in blocks])
    pairs = _pairs_sorted(lengths, np.arange(window + 1)).astype(float)
    if pairs[window] <= 0:
        raise SpecError("window", f"no pair of configurations inside a stream at lag {window}; use a smaller window")
    weights = 1.0 / pairs[1:]
    for a, b in blocks:
        seg = dev[a:b]
        length = b - a
        taps = min(window, length - 1)
        if taps < 1:
            continue
        kernel = np.concatenate(([0.0], weights[:taps]))
        rev = seg[::-1]
        if taps <= 64:
            from scipy.signal import lfilter   # deferred: scipy.signal ~1 s to import

            z = lfilter(kernel, [1.0], rev, axis=0)
        else:
            from scipy.signal import fftconvolve

            z = fftconvolve(rev, kernel[:, None], axes=0)[:length]
        lag_sum += seg.T @ z[::-1]
    return gamma0, lag_sum


def common_window(
    data: np.ndarray,
    streams: np.ndarray | None = None,
    S: float = 1.5,
    *,
    window: int | None = None,
) -> CommonWindow:
    """One window for the autocorrelation matrix of all components.

    Each component is analysed by :func:`plateaufit.stats.autocorr.tau_int`
    (Wolff's automatic windowing); the window of the component with the
    largest tau_int is the common one (why: see the notes of
    :mod:`plateaufit.stats.gamma_covariance`).

    Parameters
    ----------
    data : ndarray (n, p)
    streams : array of int (n,), optional
        Stream label of each configuration.
    S : float, default 1.5
        Wolff's window parameter.
    window : int, optional
        Use this window; the per-component analysis is still made
        (``taus``, ``windows``), ``component`` is the largest tau_int.

    Returns
    -------
    CommonWindow

    References
    ----------
    .. [1] U. Wolff, Comput. Phys. Commun. 156 (2004) 143.
    """
    S = _check_s(S)
    x = check_data(data)
    n, p = x.shape
    blocks = check_streams(streams, n)
    lengths = np.array([b - a for a, b in blocks])
    w_forced = None if window is None else _check_window(window, lengths)
    taus = np.full(p, 0.5)
    errors = np.zeros(p)
    windows = np.zeros(p, dtype=int)
    reliable = np.ones(p, dtype=bool)
    with warnings.catch_warnings():
        # reported once, for the chosen component, through `reliable`
        warnings.simplefilter("ignore", ShortChainWarning)
        for j in range(p):
            r = tau_int(x[:, j], S, streams)
            taus[j], errors[j], windows[j], reliable[j] = r.tau, r.error, r.window, r.reliable
    k = int(np.argmax(taus))
    return CommonWindow(
        window=int(windows[k]) if w_forced is None else w_forced,
        component=k,
        tau=float(taus[k]),
        tau_error=float(errors[k]),
        taus=taus,
        windows=windows,
        reliable=bool(reliable[k]),
        forced=w_forced is not None,
    )


def windowed_covariance(
    x: np.ndarray,
    blocks: list[tuple[int, int]],
    window: int,
    bias_correction: bool = True,
) -> tuple[np.ndarray, np.ndarray]:
    """``Gamma(0)`` and the symmetric window sum ``sum_{|tau|<=W} Gamma(tau)``.

    With ``bias_correction``, every ``Gamma(tau)`` is raised by ``C / N``
    (``C`` the window sum), the matrix form of Wolff's correction for the
    bias of subtracting the estimated mean; its diagonal is exactly what
    :func:`plateaufit.stats.autocorr.tau_int` does to ``Gamma_ii``.

    Returns
    -------
    gamma0, long_run : ndarray (p, p)
        Per configuration (not divided by ``N``).
    """
    n = x.shape[0]
    dev = x - x.mean(axis=0)
    gamma0, lag_sum = lagged_covariances(dev, blocks, window)
    long_run = gamma0 + lag_sum + lag_sum.T
    long_run = 0.5 * (long_run + long_run.T)
    if bias_correction:
        gamma0 = gamma0 + long_run / n
        long_run = long_run * (1.0 + (2 * window + 1) / n)
    return gamma0, long_run
