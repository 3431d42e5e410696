"""Integrated autocorrelation times by the Gamma method, and binning studies.

Convention: ``tau_int = 1/2 + sum_{t=1}^{W} rho(t)``, so the variance of the
mean of ``N`` correlated measurements is ``2 tau_int`` times the naive
``var / N``. (emcee and several textbooks quote ``1 + 2 sum rho``, twice ours.)

Several Monte Carlo streams are treated as replicas (Wolff 2004): the
autocorrelation function is summed over the streams using only pairs of
configurations within one stream, normalised by the number of such pairs, with
the overall mean subtracted. Streams are given as one integer label per
configuration; a new stream starts wherever the label changes. Because the
overall mean is subtracted, streams whose means differ by more than their
errors *do* raise tau_int: the spread between streams is part of the error of
the overall mean, and an inflated tau is the visible sign of it.

References
----------
.. [1] U. Wolff, "Monte Carlo errors with less errors",
   Comput. Phys. Commun. 156 (2004) 143; erratum ibid. 176 (2007) 383.
.. [2] N. Madras, A. D. Sokal, "The pivot algorithm: a highly efficient Monte
   Carlo method for the self-avoiding walk", J. Stat. Phys. 50 (1988) 109.
.. [3] H. Flyvbjerg, H. G. Petersen, "Error estimates on averages of correlated
   data", J. Chem. Phys. 91 (1989) 461.

One module of about 600 lines on purpose: tau_int, its derived-quantity form, the
binning study and the bin-size rule share the windowing and the stream handling, and
the rule is justified against the estimator it sizes.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass
from typing import Callable, Sequence

import numpy as np

from plateaufit.errors import DataError, SpecError
from plateaufit.stats.resample import (
    bin_samples,
    jackknife_error,
    jackknife_samples,
    stream_blocks,
)

__all__ = [
    "TauIntResult",
    "ShortChainWarning",
    "BinningWarning",
    "tau_int",
    "tau_int_derived",
    "BinningStudy",
    "binning_study",
    "choose_bin_size",
    "binning_correction",
]


class ShortChainWarning(UserWarning):
    """The chain is too short for a reliable tau_int; the value is a lower bound."""


class BinningWarning(UserWarning):
    """The bin-size rule could not be met (too few configurations)."""


@dataclass(frozen=True)
class TauIntResult:
    """Integrated autocorrelation time from the Gamma method.

    Attributes
    ----------
    tau : float
        ``1/2 + sum_{t=1}^{W} rho(t)`` at the chosen window; always positive,
        or NaN when the series is too short to estimate it (see ``tau_int``).
    error : float
        Madras-Sokal error of ``tau``; never negative, NaN with ``tau``.
    window : int
        The window ``W`` chosen by the automatic criterion (parameter ``S``).
    rho : ndarray
        Normalised autocorrelation function ``rho(0), rho(1), ...`` (lags up
        to ``max(2 W, 20)`` or the largest usable lag, whichever is smaller).
    tau_by_window : ndarray
        ``tau_int(W')`` for ``W' = 0 .. len(rho) - 1``.
    n : int
        Number of measurements.
    reliable : bool
        False when no window was found before the chain ran out, or the chain
        is shorter than ``min_length * tau``: then ``tau`` is a lower bound.
        Also False when ``tau`` is NaN.
    value : float or None
        The mean (``tau_int``) or the derived quantity (``tau_int_derived``).
    value_error : float or None
        Its error including autocorrelations, ``sqrt(2 tau Gamma(0) / N)``;
        NaN when ``tau`` is.
    """

    tau: float
    error: float
    window: int
    rho: np.ndarray
    tau_by_window: np.ndarray
    n: int
    reliable: bool
    value: float | None = None
    value_error: float | None = None


def _max_lag(lengths: np.ndarray) -> int:
    """Largest lag with at least half as many pairs as measurements.

    For one stream this is ``N // 2`` (Wolff's choice); with several streams
    the lag may exceed half the shortest stream as long as the streams
    together still supply ``N / 2`` pairs.
    """
    n = int(lengths.sum())
    lmax = int(lengths.max())
    t = np.arange(lmax)
    pairs = _pairs_sorted(lengths, t)
    ok = np.flatnonzero(pairs * 2 >= n)
    return int(ok[-1]) if ok.size else 0


def _pairs_sorted(lengths: np.ndarray, t: np.ndarray) -> np.ndarray:
    """Number of within-stream pairs at each lag ``t``: sum_r max(N_r - t, 0)."""
    srt = np.sort(lengths)
    suffix = np.concatenate((np.cumsum(srt[::-1])[::-1], [0]))
    idx = np.searchsorted(srt, t, side="right")
    return suffix[idx] - t * (srt.size - idx)


def _gamma(dev: np.ndarray, blocks: list[tuple[int, int]], max_lag: int) -> np.ndarray:
    """Autocovariance ``Gamma(t)``, t = 0..max_lag, summed within streams.

    Pairs never cross a stream boundary; the sum is divided by the number of
    pairs at each lag (Wolff 2004, the replica formula). FFT per group of
    equal-length streams.
    """
    acc = np.zeros(max_lag + 1)
    pairs = np.zeros(max_lag + 1)
    lengths = np.array([b - a for a, b in blocks])
    for length in np.unique(lengths):
        members = [blk for blk, ln in zip(blocks, lengths) if ln == length]
        seg = np.stack([dev[a:b] for a, b in members])
        nfft = 1 << int(2 * length - 1).bit_length()
        f = np.fft.rfft(seg, n=nfft, axis=1)
        ac = np.fft.irfft(f.real**2 + f.imag**2, n=nfft, axis=1)
        m = min(int(length), max_lag + 1)
        acc[:m] += ac[:, :m].sum(axis=0)
        pairs[:m] += len(members) * (length - np.arange(m))
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(pairs > 0, acc / np.where(pairs > 0, pairs, 1), 0.0)


def _check_series(series: np.ndarray, name: str = "series") -> np.ndarray:
    x = np.asarray(series, dtype=float)
    if x.size == 0:
        raise DataError("", f"the {name} is empty; an autocorrelation needs measurements")
    if not np.all(np.isfinite(x)):
        bad = int(np.flatnonzero(~np.isfinite(x.reshape(x.shape[0], -1)).any(axis=1))[0])
        raise DataError("", f"the {name} has a NaN or infinite value at configuration {bad}; remove or fix it")
    return x


def _check_s(S: float) -> float:
    if not (isinstance(S, (int, float, np.floating, np.integer)) and math.isfinite(S) and S > 0):
        raise SpecError("", f"the window parameter S must be a positive number (Wolff suggests 1-2), got {S!r}")
    return float(S)


def _gamma_analysis(
    x: np.ndarray,
    S: float,
    streams: np.ndarray | None,
    bias_correction: bool,
    min_length: float,
    stacklevel: int,
) -> tuple[TauIntResult, float]:
    """Gamma-method analysis of a 1-d series; returns the result and Gamma(0)."""
    n = x.shape[0]
    if n < 2:
        raise DataError("series", f"tau_int needs at least 2 measurements, got {n}; "
                        "an autocorrelation (and an error of the mean) needs a chain")
    blocks = stream_blocks(streams, n)
    mean = float(x.mean())
    dev = x - mean
    scale = float(np.max(np.abs(x)))
    if float(np.max(np.abs(dev))) <= 64 * np.finfo(float).eps * scale:
        # No fluctuation at all: the variance of the mean is exactly zero, which
        # is consistent with tau = 1/2; nothing to window, nothing uncertain.
        res = TauIntResult(
            tau=0.5, error=0.0, window=0, rho=np.ones(1), tau_by_window=np.full(1, 0.5),
            n=n, reliable=True, value=mean, value_error=0.0,
        )
        return res, 0.0

    lengths = np.array([b - a for a, b in blocks])
    max_lag = _max_lag(lengths)
    gam = _gamma(dev, blocks, max_lag)

    # Automatic windowing (Wolff 2004): W is the first window with
    #   g(W) = exp(-W / tau_W) - tau_W / sqrt(W N) < 0,
    #   tau_W = S / log((2 tau_int(W) + 1) / (2 tau_int(W) - 1)),
    # and tau_W -> 0 (immediate stop) when tau_int(W) <= 1/2.
    found = False
    window = max_lag
    if max_lag >= 1:
        gint = np.cumsum(gam[1:] / gam[0])  # tau_int(W) - 1/2 for W = 1..max_lag
        w = np.arange(1, max_lag + 1)
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            tau_w = np.where(gint > 0, S / np.log((gint + 1.0) / np.where(gint > 0, gint, 1.0)), 0.0)
            g = np.where(tau_w > 0, np.exp(-w / np.where(tau_w > 0, tau_w, 1.0)) - tau_w / np.sqrt(w * n), -1.0)
        neg = np.flatnonzero(g < 0)
        if neg.size:
            found = True
            window = int(w[neg[0]])

    cf = gam[0] + 2.0 * gam[1 : window + 1].sum()
    if bias_correction:
        # Bias of Gamma from subtracting the estimated mean, corrected as in
        # Wolff 2004 (formula from memory): Gamma(t) -> Gamma(t) + C_F / N, with
        # C_F = Gamma(0) + 2 sum_{t=1}^{W} Gamma(t) at the chosen window.
        gam = gam + cf / n
        cf = gam[0] + 2.0 * gam[1 : window + 1].sum()
    if not (cf > 0.0 and gam[0] > 0.0):
        # The estimated variance of the mean is not positive: the negative
        # autocovariances of a very short (or strictly alternating) series
        # outweigh Gamma(0). Always so for N = 2 (Gamma(1) = -Gamma(0)); the
        # Gamma method has no estimate here, and a negative tau would be nonsense.
        warnings.warn(
            f"the series ({n} measurements in {len(blocks)} stream(s)) is too short, or too "
            "strongly anticorrelated, to estimate tau_int: the estimated variance of the mean "
            "is not positive; tau_int is NaN",
            ShortChainWarning,
            stacklevel=stacklevel,
        )
        keep = min(max_lag, max(2 * window, 20)) + 1
        with np.errstate(divide="ignore", invalid="ignore"):
            rho = (gam / gam[0])[:keep].copy() if gam[0] > 0 else np.full(keep, np.nan)
        res = TauIntResult(
            tau=math.nan, error=math.nan, window=int(window), rho=rho,
            tau_by_window=0.5 + np.concatenate(([0.0], np.cumsum(rho[1:]))), n=n,
            reliable=False, value=mean, value_error=math.nan,
        )
        return res, float(gam[0])
    rho = gam / gam[0]
    tau = float(cf / (2.0 * gam[0]))
    # Madras-Sokal approximation in the form Wolff 2004 uses (from memory):
    #   (delta tau)^2 ~= 4/N (W + 1/2 - tau) tau^2;
    # Madras & Sokal 1988 give the leading term 2 (2W + 1)/N tau^2.
    error = float(tau * 2.0 * math.sqrt(max(window + 0.5 - tau, 0.0) / n))
    value_error = float(math.sqrt(max(cf, 0.0) / n))

    keep = min(max_lag, max(2 * window, 20)) + 1
    rho = rho[:keep].copy()
    tau_by_window = 0.5 + np.concatenate(([0.0], np.cumsum(rho[1:])))

    reliable = found
    if not found:
        warnings.warn(
            f"no autocorrelation window found up to W = {max_lag} (chain of {n} "
            f"measurements in {len(blocks)} stream(s) too short); tau_int = {tau:.3g} "
            "at the largest usable window is a lower bound",
            ShortChainWarning,
            stacklevel=stacklevel,
        )
    elif n < min_length * tau:
        reliable = False
        warnings.warn(
            f"the chain ({n} measurements) is shorter than {min_length:g} x tau_int "
            f"(tau_int = {tau:.3g}, 1/2 + sum rho convention); the estimate is "
            "unreliable and probably a lower bound",
            ShortChainWarning,
            stacklevel=stacklevel,
        )
    res = TauIntResult(
        tau=tau, error=error, window=int(window), rho=rho, tau_by_window=tau_by_window,
        n=n, reliable=bool(reliable), value=mean, value_error=value_error,
    )
    return res, float(gam[0])


def tau_int(
    series: np.ndarray,
    S: float = 1.5,
    streams: np.ndarray | None = None,
    *,
    bias_correction: bool = True,
    min_length: float = 50.0,
) -> TauIntResult:
    """Integrated autocorrelation time of a series by the Gamma method.

    Parameters
    ----------
    series : ndarray, shape (n,)
        Measurements in Monte Carlo order.
    S : float, default 1.5
        Wolff's window parameter: ``tau_W = S / log((2 tau_int + 1)/(2 tau_int - 1))``
        (S = 1..2 is Wolff's recommended range).
    streams : array of int, shape (n,), optional
        Stream label of each measurement; streams are treated as replicas
        (pairs never cross a stream boundary).
    bias_correction : bool, default True
        Apply Wolff's correction ``Gamma(t) += C_F / N`` for the bias caused by
        subtracting the estimated mean.
    min_length : float, default 50
        The estimate is flagged unreliable (``ShortChainWarning``) when the
        chain has fewer than ``min_length * tau`` measurements. (emcee's
        ``integrated_time`` makes the same check with ``tol = 50`` times its
        own tau, which is twice ours, so it is twice as strict.)

    Returns
    -------
    TauIntResult
        ``value`` and ``value_error`` hold the mean and its error
        ``sqrt(2 tau Gamma(0) / N)``.

    Raises
    ------
    DataError
        Fewer than 2 measurements (``where="series"``), NaN or inf in the series.

    Warns
    -----
    ShortChainWarning
        When no window is found before the largest usable lag (``tau`` is then
        the value at that lag, a lower bound) or the chain is shorter than
        ``min_length * tau``; ``reliable`` is False. Also when ``tau`` is NaN.

    Notes
    -----
    The largest lag used is the largest ``t`` at which the streams still
    supply at least ``N/2`` pairs (``N // 2`` for one stream, as in Wolff's
    reference implementation). A constant series has no fluctuation: the
    result is ``tau = 0.5``, ``error = 0``, ``window = 0``, ``reliable = True``
    and ``value_error = 0`` (the variance of the mean is exactly zero).

    Too short to estimate: when the estimated variance of the mean,
    ``C_F = Gamma(0) + 2 sum_{t=1}^{W} Gamma(t)`` (after the bias correction),
    is not positive, the result has ``tau``, ``error`` and ``value_error`` NaN
    and ``reliable = False``, with a ``ShortChainWarning``; ``value`` is still
    the mean. This is always the case for 2 measurements (then
    ``Gamma(1) = -Gamma(0)``), often for 3 (never for 3 in monotone order),
    and for a strictly alternating series of any length. ``tau``
    is therefore never zero or negative, and ``error`` never negative. A single
    measurement is an error: there is no chain to speak of.

    References
    ----------
    .. [1] U. Wolff, "Monte Carlo errors with less errors",
       Comput. Phys. Commun. 156 (2004) 143.
    .. [2] N. Madras, A. D. Sokal, J. Stat. Phys. 50 (1988) 109.
    """
    S = _check_s(S)
    x = _check_series(series)
    if x.ndim != 1:
        raise DataError("", f"tau_int takes a 1-d series, got shape {x.shape}; use tau_int_derived for several components")
    res, _ = _gamma_analysis(x, S, streams, bias_correction, min_length, stacklevel=3)
    return res


def tau_int_derived(
    series: np.ndarray,
    func: Callable[[np.ndarray], float],
    S: float = 1.5,
    streams: np.ndarray | None = None,
    *,
    bias_correction: bool = True,
    min_length: float = 50.0,
) -> TauIntResult:
    """Autocorrelation time and error of a function of several means.

    The function is linearised at the means (Wolff 2004): the
    series is projected on the gradient, ``p_i = sum_a f_a (x_ia - xbar_a)``,
    and the Gamma method is applied to the projected series.

    Parameters
    ----------
    series : ndarray, shape (n, k)
        Measurements of ``k`` primary observables in Monte Carlo order.
    func : callable
        ``func(means) -> float`` with ``means`` of shape ``(k,)``.
    S, streams, bias_correction, min_length
        As in :func:`tau_int`.

    Returns
    -------
    TauIntResult
        ``value = func(means)``; ``value_error = sqrt(2 tau Gamma_F(0) / N)``,
        the error of the derived quantity including autocorrelations.

    Notes
    -----
    The gradient is taken by central differences with a step equal to the
    naive error of each component's mean, ``sigma_a / sqrt(N)``: a step of the
    order of the statistical error keeps the linearisation error far below
    the statistical one (Wolff 2004 takes a step of this order; from memory). Components without
    fluctuation do not enter the projection.

    References
    ----------
    .. [1] U. Wolff, "Monte Carlo errors with less errors",
       Comput. Phys. Commun. 156 (2004) 143.
    .. [2] N. Madras, A. D. Sokal, J. Stat. Phys. 50 (1988) 109.
    """
    S = _check_s(S)
    x = _check_series(series)
    if x.ndim == 1:
        x = x[:, None]
    if x.ndim != 2:
        raise DataError("", f"tau_int_derived takes a series of shape (n, k), got {x.shape}")
    n, k = x.shape
    means = x.mean(axis=0)

    def f(m: np.ndarray) -> float:
        # non-finite values are reported below as a DataError, not as warnings
        with np.errstate(all="ignore"):
            return float(np.asarray(func(m), dtype=float))

    value = f(means.copy())
    if not math.isfinite(value):
        raise DataError("", "the derived quantity is not finite at the means of the data; check the function")
    dev = x - means
    step = np.sqrt(np.mean(dev * dev, axis=0) / n)
    grad = np.zeros(k)
    for a in range(k):
        if step[a] == 0.0:
            continue
        e = np.zeros(k)
        e[a] = step[a]
        up = f(means + e)
        down = f(means - e)
        grad[a] = (up - down) / (2.0 * step[a])
    if not np.all(np.isfinite(grad)):
        raise DataError("", "the derived quantity is not finite near the means; its gradient cannot be taken")
    projected = dev @ grad
    res, _ = _gamma_analysis(projected, S, streams, bias_correction, min_length, stacklevel=3)
    return TauIntResult(
        tau=res.tau, error=res.error, window=res.window, rho=res.rho,
        tau_by_window=res.tau_by_window, n=res.n, reliable=res.reliable,
        value=value, value_error=res.value_error,
    )


@dataclass(frozen=True)
class BinningStudy:
    """Jackknife error of the mean against the bin size.

    Attributes
    ----------
    sizes : ndarray of int, shape (n_sizes,)
    errors : ndarray, shape (n_sizes,) or (n_sizes, k)
        Jackknife error of the mean of the binned data.
    naive_error : float or ndarray (k,)
        ``std(ddof=1) / sqrt(n)`` of the unbinned data.
    n_bins : ndarray of int, shape (n_sizes,)
        Number of bins at each size.
    """

    sizes: np.ndarray
    errors: np.ndarray
    naive_error: float | np.ndarray
    n_bins: np.ndarray | None = None


def _default_sizes(max_size: int) -> np.ndarray:
    sizes = [1, 2, 3]
    p = 4
    while p <= max_size:
        sizes.append(p)
        if p * 3 // 2 <= max_size:
            sizes.append(p * 3 // 2)
        p *= 2
    return np.array([s for s in sizes if s <= max_size], dtype=int)


def _n_bins(lengths: np.ndarray, size: int) -> int:
    return int(np.sum(lengths // size))


def _largest_size(lengths: np.ndarray, min_bins: int, upper: int) -> int:
    """Largest size <= upper leaving at least ``min_bins`` bins (1 if none does)."""
    lo, hi = 1, max(1, upper)
    if _n_bins(lengths, hi) >= min_bins:
        return hi
    while hi - lo > 1:  # invariant: n_bins(lo) >= min_bins or lo == 1; n_bins(hi) < min_bins
        mid = (lo + hi) // 2
        if _n_bins(lengths, mid) >= min_bins:
            lo = mid
        else:
            hi = mid
    return lo


def binning_study(
    series: np.ndarray,
    sizes: Sequence[int] | np.ndarray | None = None,
    streams: np.ndarray | None = None,
    *,
    min_bins: int = 10,
) -> BinningStudy:
    """Jackknife error of the mean as a function of the bin size.

    For bins much longer than the autocorrelation time the error reaches a
    plateau at ``sqrt(2 tau_int)`` times the naive error; the relative bias
    below the plateau falls off like ``tau / B`` (Flyvbjerg & Petersen 1989).

    Parameters
    ----------
    series : ndarray, shape (n,) or (n, k)
    sizes : sequence of int, optional
        Bin sizes. Default ``1, 2, 3, 4, 6, 8, 12, 16, ...`` up to the largest
        size that leaves at least ``min_bins`` bins.
    streams : array of int, shape (n,), optional
        Stream labels; bins never cross a stream boundary.
    min_bins : int, default 10
        Fewest bins for a default size.

    Returns
    -------
    BinningStudy

    References
    ----------
    .. [1] H. Flyvbjerg, H. G. Petersen, J. Chem. Phys. 91 (1989) 461.
    .. [2] U. Wolff, Comput. Phys. Commun. 156 (2004) 143.
    """
    x = _check_series(series)
    n = x.shape[0]
    blocks = stream_blocks(streams, n)
    lengths = np.array([b - a for a, b in blocks])
    if sizes is None:
        max_size = _largest_size(lengths, min_bins, int(lengths.max()))
        sizes_arr = _default_sizes(max_size)
    else:
        sizes_arr = np.asarray(sizes, dtype=int).reshape(-1)
    errors = []
    counts = []
    for size in sizes_arr:
        binned = bin_samples(x, int(size), streams)
        if binned.shape[0] < 2:
            raise DataError(
                "sizes",
                f"bin size {int(size)} leaves {binned.shape[0]} bin; a binning study needs at least 2 bins per size",
            )
        errors.append(jackknife_error(jackknife_samples(binned)))
        counts.append(binned.shape[0])
    naive = np.std(x, axis=0, ddof=1) / math.sqrt(n) if n > 1 else np.zeros(x.shape[1:])
    return BinningStudy(
        sizes=sizes_arr,
        errors=np.array(errors),
        naive_error=float(naive) if x.ndim == 1 else np.asarray(naive),
        n_bins=np.array(counts, dtype=int),
    )


def choose_bin_size(
    taus: Sequence[float] | np.ndarray,
    n_configs: int | Sequence[int] | np.ndarray,
    *,
    factor: float = 5.0,
    min_bins: int = 20,
) -> int:
    """Bin size from the integrated autocorrelation times, capped to keep bins.

    Rule: ``B = ceil(factor * (tau - 1/(4 tau)))`` with ``tau`` the largest
    tau_int (1/2 + sum rho convention) over the timeslices, at least 1; then
    capped so that at least ``min_bins`` bins remain.

    Why: treating bins of size ``B`` as independent underestimates the
    variance of the mean by the relative amount
    ``sum_t t rho(t) / (B tau_int)`` (expand the variance of a bin mean in
    ``rho``; Flyvbjerg & Petersen 1989, Wolff 2004: the bias of
    binning decays only like ``1/B``). For exponential autocorrelation
    ``rho(t) = phi^t`` (AR(1)) this is exactly ``(tau - 1/(4 tau)) / B``
    -- zero for uncorrelated data, ``~tau/B`` for long times. The default
    ``factor = 5`` keeps that bias of the variance at 20 % or less, i.e.
    the error underestimated by at most ~10 %, for exponential
    autocorrelation. Uncorrelated data (tau = 1/2) get ``B = 1``.

    Cap: the jackknife error from ``n_b`` bins has a relative statistical
    uncertainty of about ``1/sqrt(2 (n_b - 1))``; with 20 bins that is ~16 %,
    and a covariance over many timeslices needs still more (without
    shrinkage more bins than fitted points). The bin size is therefore
    reduced to the largest size that leaves ``min_bins`` bins, with a
    :class:`BinningWarning`. Pass ``min_bins = max(20, n_points + 1)`` when
    the covariance is used unshrunk.

    Parameters
    ----------
    taus : sequence of float
        tau_int of each timeslice (non-finite entries are ignored).
    n_configs : int or sequence of int
        Number of configurations, or the counts of each stream (bins never
        cross a stream boundary, so the number of bins is
        ``sum_r floor(N_r / B)``).
    factor : float, default 5
        Bin size in units of ``tau - 1/(4 tau)``.
    min_bins : int, default 20
        Fewest bins to keep.

    Returns
    -------
    int
        The bin size.

    Warns
    -----
    BinningWarning
        When the cap binds (the rule's size would leave fewer than
        ``min_bins`` bins) or there are fewer than ``min_bins`` configurations.

    References
    ----------
    .. [1] H. Flyvbjerg, H. G. Petersen, "Error estimates on averages of
       correlated data", J. Chem. Phys. 91 (1989) 461.
    .. [2] U. Wolff, "Monte Carlo errors with less errors",
       Comput. Phys. Commun. 156 (2004) 143.
    """
    t = np.asarray(taus, dtype=float).reshape(-1)
    t = t[np.isfinite(t)]
    if t.size == 0:
        raise DataError("taus", "no finite tau_int to choose a bin size from; give the bin size explicitly")
    if not (math.isfinite(factor) and factor > 0):
        raise SpecError("", f"factor must be a positive number, got {factor!r}")
    lengths = np.asarray(n_configs, dtype=int).reshape(-1)
    if lengths.size == 0 or np.any(lengths < 0) or lengths.sum() == 0:
        raise DataError("n_configs", f"no configurations to bin (counts {lengths.tolist()})")
    tau = max(float(t.max()), 0.5)
    wanted = max(1, math.ceil(factor * (tau - 1.0 / (4.0 * tau)) - 1e-12))
    if _n_bins(lengths, wanted) >= min_bins:
        return int(wanted)
    size = _largest_size(lengths, min_bins, wanted)
    if _n_bins(lengths, size) < min_bins:
        warnings.warn(
            f"only {int(lengths.sum())} configurations: fewer than {min_bins} bins even "
            f"without binning; tau_int = {tau:.3g} asks for bins of {wanted}, using 1 "
            "(errors may be underestimated)",
            BinningWarning,
            stacklevel=2,
        )
        return 1
    bias = (tau - 1.0 / (4.0 * tau)) / size
    warnings.warn(
        f"tau_int = {tau:.3g} asks for bins of {wanted} configurations, but that leaves "
        f"{_n_bins(lengths, wanted)} bins; using {size} to keep at least {min_bins} bins "
        f"(the variance of the mean may be underestimated by about {100 * min(bias, 1):.0f} %)",
        BinningWarning,
        stacklevel=2,
    )
    return int(size)


def binning_correction(tau: float, size: int, *, limit: float = 0.5) -> float | None:
    """Factor on errors from bins of ``size`` for the autocorrelation left between them.

    Bins of ``B`` configurations of a series with integrated autocorrelation
    time ``tau`` (1/2 + sum rho convention) still underestimate the variance
    of the mean, by the relative amount ``(tau - 1/(4 tau)) / B`` for an
    exponential autocorrelation function (the bias :func:`choose_bin_size`
    keeps below 20%). The jackknife errors from those bins are then too small
    by ``sqrt(1 - (tau - 1/(4 tau)) / B)``; this returns the inverse.

    Parameters
    ----------
    tau : float
        The largest tau_int of the data.
    size : int
        Bin size.
    limit : float, optional
        Largest relative bias corrected; above it the bins are too short for
        the first-order formula to be trusted and None is returned.

    Returns
    -------
    float or None
        ``1 / sqrt(1 - (tau - 1/(4 tau)) / size)``; 1 for ``size == 1`` (nothing
        to correct: unbinned data have no inter-bin autocorrelation formula to
        apply, and the estimate of tau near 1/2 is biased upwards) or a
        non-finite tau; None when the bias exceeds ``limit``.

    References
    ----------
    H. Flyvbjerg, H. G. Petersen, J. Chem. Phys. 91 (1989) 461; U. Wolff,
    Comput. Phys. Commun. 156 (2004) 143 -- the bias of binned error
    estimates. Its use as a correction, checked on replicas with the
    coverage it restores, is common practice.
    """
    if size <= 1 or not np.isfinite(tau) or tau <= 0.5:
        return 1.0
    bias = (tau - 1.0 / (4.0 * tau)) / size
    if bias > limit:
        return None
    return float(1.0 / np.sqrt(1.0 - bias))
