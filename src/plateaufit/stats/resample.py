"""Binning, jackknife and bootstrap resampling of Monte Carlo data.

Data are arrays whose first axis runs over configurations (or bins) in Monte
Carlo order; any further axes (timeslices, observables) are carried along.
Several independent Monte Carlo streams are described by one integer label per
configuration; a new stream starts wherever the label changes, and a bin never
contains configurations of two streams.

References
----------
.. [1] M. H. Quenouille, "Notes on bias in estimation", Biometrika 43 (1956) 353.
.. [2] B. Efron, "The Jackknife, the Bootstrap and Other Resampling Plans",
   SIAM, Philadelphia (1982).
.. [3] H. Flyvbjerg, H. G. Petersen, "Error estimates on averages of correlated
   data", J. Chem. Phys. 91 (1989) 461.
"""

from __future__ import annotations

import numpy as np

from plateaufit.errors import DataError

__all__ = [
    "stream_blocks",
    "bin_samples",
    "bin_streams",
    "jackknife_samples",
    "jackknife_error",
    "jackknife_covariance",
    "jackknife_bias_corrected",
    "bootstrap_samples",
    "pseudo_values",
]


def stream_blocks(streams: np.ndarray | None, n: int) -> list[tuple[int, int]]:
    """Split ``n`` configurations into contiguous streams.

    Parameters
    ----------
    streams : array of int, shape (n,), or None
        One stream label per configuration, in Monte Carlo order. A new stream
        starts wherever the label changes. ``None`` means one stream.
    n : int
        Number of configurations.

    Returns
    -------
    list of (start, stop)
        Half-open index ranges, one per stream, in order.

    Raises
    ------
    DataError
        When the number of labels differs from ``n``.
    """
    if streams is None:
        return [(0, n)] if n > 0 else []
    labels = np.asarray(streams).reshape(-1)
    if labels.shape[0] != n:
        raise DataError(
            "streams",
            f"{labels.shape[0]} stream labels for {n} configurations; give exactly "
            "one label per configuration (or stream counts that add up to the "
            "number of configurations)",
        )
    if n == 0:
        return []
    starts = np.concatenate(([0], np.flatnonzero(labels[1:] != labels[:-1]) + 1))
    stops = np.concatenate((starts[1:], [n]))
    return [(int(a), int(b)) for a, b in zip(starts, stops)]


def _check_size(size: object) -> int:
    if isinstance(size, (bool, np.bool_)) or not isinstance(size, (int, np.integer)):
        if isinstance(size, (float, np.floating)) and float(size).is_integer():
            size = int(size)
        else:
            raise DataError(
                "size",
                f"bin size must be a positive integer, got {size!r}; "
                "use an integer >= 1 or 'auto'",
            )
    size = int(size)
    if size < 1:
        raise DataError(
            "size",
            f"bin size must be at least 1, got {size}; use an integer >= 1 or 'auto'",
        )
    return size


def bin_samples(
    data: np.ndarray,
    size: int,
    streams: np.ndarray | None = None,
    *,
    return_dropped: bool = False,
) -> np.ndarray | tuple[np.ndarray, int]:
    """Average consecutive configurations into bins, stream by stream.

    Parameters
    ----------
    data : ndarray, shape (n, ...)
        Per-configuration measurements in Monte Carlo order.
    size : int
        Number of configurations per bin (>= 1).
    streams : array of int, shape (n,), optional
        Stream label of each configuration. Bins never cross a stream
        boundary; the configurations left over at the end of each stream
        (fewer than ``size``) are dropped.
    return_dropped : bool, default False
        Also return the number of dropped configurations.

    Returns
    -------
    binned : ndarray, shape (n_bins, ...)
        Bin means, the bins of the first stream first.
    n_dropped : int
        Only with ``return_dropped=True``.

    Raises
    ------
    DataError
        ``where="size"`` when the size is not a positive integer or
        exceeds the length of every stream (no bin could be formed).

    References
    ----------
    .. [1] H. Flyvbjerg, H. G. Petersen, J. Chem. Phys. 91 (1989) 461.
    """
    size = _check_size(size)
    data = np.asarray(data, dtype=float)
    if data.ndim == 0:
        raise DataError("", "binning needs an array with one entry per configuration")
    n = data.shape[0]
    blocks = stream_blocks(streams, n)
    pieces = []
    dropped = 0
    for start, stop in blocks:
        length = stop - start
        n_bins = length // size
        dropped += length - n_bins * size
        if n_bins:
            seg = data[start : start + n_bins * size]
            pieces.append(seg.reshape((n_bins, size) + data.shape[1:]).mean(axis=1))
    if not pieces:
        longest = max((b - a for a, b in blocks), default=0)
        raise DataError(
            "size",
            f"bin size {size} is larger than every stream (the longest has {longest} "
            f"configurations), so no bin can be formed; choose a size <= {longest}",
        )
    binned = np.concatenate(pieces, axis=0)
    if return_dropped:
        return binned, int(dropped)
    return binned


def bin_streams(streams: np.ndarray | None, size: int, n: int | None = None) -> np.ndarray:
    """Stream label of each bin formed by :func:`bin_samples`.

    Parameters
    ----------
    streams : array of int, shape (n,), or None
        Stream label of each configuration. ``None`` means one stream; then
        ``n`` must be given.
    size : int
        Bin size.
    n : int, optional
        Number of configurations (needed only when ``streams`` is None).

    Returns
    -------
    ndarray of int, shape (n_bins,)
        The label of the stream each bin comes from (0 for a single stream).
    """
    size = _check_size(size)
    if streams is None:
        if n is None:
            raise DataError("", "bin_streams needs the number of configurations when streams is None")
        return np.zeros(int(n) // size, dtype=int)
    labels = np.asarray(streams).reshape(-1)
    out = [
        np.full((stop - start) // size, labels[start], dtype=labels.dtype)
        for start, stop in stream_blocks(labels, labels.shape[0])
    ]
    return np.concatenate(out) if out else np.zeros(0, dtype=labels.dtype)


def jackknife_samples(data: np.ndarray) -> np.ndarray:
    """Delete-one jackknife means.

    Parameters
    ----------
    data : ndarray, shape (n, ...)
        Binned data (one row per bin).

    Returns
    -------
    ndarray, shape (n, ...)
        Row ``i`` is the mean of all rows but ``i``: ``(sum - x_i) / (n - 1)``.

    Raises
    ------
    DataError
        With fewer than two rows.

    References
    ----------
    .. [1] M. H. Quenouille, Biometrika 43 (1956) 353.
    .. [2] B. Efron, "The Jackknife, the Bootstrap and Other Resampling Plans",
       SIAM (1982).
    """
    data = np.asarray(data, dtype=float)
    if data.ndim == 0 or data.shape[0] < 2:
        n = 0 if data.ndim == 0 else data.shape[0]
        raise DataError(
            "",
            f"the jackknife needs at least 2 bins, got {n}; use more configurations "
            "or a smaller bin size",
        )
    n = data.shape[0]
    return (data.sum(axis=0) - data) / (n - 1)


def jackknife_error(samples: np.ndarray) -> np.ndarray:
    """Jackknife standard error from delete-one samples.

    ``sqrt((N-1)/N * sum_i (x_i - xbar)^2)`` along axis 0.

    Parameters
    ----------
    samples : ndarray, shape (N, ...)
        Jackknife samples of an estimator.

    Returns
    -------
    ndarray, shape (...)
        (A 0-d array for 1-d input.)

    References
    ----------
    .. [1] B. Efron, "The Jackknife, the Bootstrap and Other Resampling Plans",
       SIAM (1982).
    """
    samples = np.asarray(samples, dtype=float)
    n = samples.shape[0]
    dev = samples - samples.mean(axis=0)
    return np.sqrt((n - 1) / n * np.sum(dev * dev, axis=0))


def jackknife_covariance(samples: np.ndarray) -> np.ndarray:
    """Jackknife covariance matrix, ``(N-1)/N * sum_i (x_i - xbar)(x_i - xbar)^T``.

    Parameters
    ----------
    samples : ndarray, shape (N, p)
        Jackknife samples of ``p`` estimators.

    Returns
    -------
    ndarray, shape (p, p)

    References
    ----------
    .. [1] B. Efron, "The Jackknife, the Bootstrap and Other Resampling Plans",
       SIAM (1982).
    """
    samples = np.asarray(samples, dtype=float)
    if samples.ndim == 1:
        samples = samples[:, None]
    n = samples.shape[0]
    dev = samples - samples.mean(axis=0)
    return (n - 1) / n * (dev.T @ dev)


def jackknife_bias_corrected(full: np.ndarray, samples: np.ndarray) -> np.ndarray:
    """Bias-corrected jackknife estimate, ``N * full - (N-1) * mean(samples)``.

    Removes the O(1/N) bias of a nonlinear function of means.

    Parameters
    ----------
    full : ndarray, shape (...)
        The estimator on the full data set.
    samples : ndarray, shape (N, ...)
        Its jackknife samples.

    Returns
    -------
    ndarray, shape (...)

    References
    ----------
    .. [1] M. H. Quenouille, "Notes on bias in estimation", Biometrika 43 (1956) 353.
    .. [2] B. Efron, "The Jackknife, the Bootstrap and Other Resampling Plans",
       SIAM (1982).
    """
    samples = np.asarray(samples, dtype=float)
    n = samples.shape[0]
    return n * np.asarray(full, dtype=float) - (n - 1) * samples.mean(axis=0)


def bootstrap_samples(data: np.ndarray, n_boot: int, seed: int | np.random.SeedSequence) -> np.ndarray:
    """Bootstrap means of resampled bins.

    Each sample draws ``n`` rows with replacement (a multinomial count per
    row) and averages them. Reproducible: the same ``seed`` gives the same
    samples (``numpy.random.default_rng(seed)``).

    Parameters
    ----------
    data : ndarray, shape (n, ...)
        Binned data.
    n_boot : int
        Number of bootstrap samples (>= 1).
    seed : int or numpy.random.SeedSequence
        Seed of the random generator.

    Returns
    -------
    ndarray, shape (n_boot, ...)

    References
    ----------
    .. [1] B. Efron, "Bootstrap methods: another look at the jackknife",
       Ann. Statist. 7 (1979) 1.
    """
    data = np.asarray(data, dtype=float)
    if isinstance(n_boot, (bool, np.bool_)) or int(n_boot) != n_boot or n_boot < 1:
        raise DataError("", f"n_boot must be a positive integer, got {n_boot!r}")
    n_boot = int(n_boot)
    if data.ndim == 0 or data.shape[0] < 1:
        raise DataError("", "the bootstrap needs at least one bin")
    n = data.shape[0]
    rng = np.random.default_rng(seed)
    flat = data.reshape(n, -1)
    out = np.empty((n_boot, flat.shape[1]))
    chunk = max(1, min(n_boot, 2**22 // max(n, 1)))  # bounds the count matrix's memory
    for lo in range(0, n_boot, chunk):
        hi = min(n_boot, lo + chunk)
        counts = rng.multinomial(n, np.full(n, 1.0 / n), size=hi - lo)
        out[lo:hi] = counts @ flat / n
    return out.reshape((n_boot,) + data.shape[1:])


def pseudo_values(samples: np.ndarray) -> np.ndarray:
    """Jackknife pseudo-values: rows whose delete-one means are the given samples.

    For jackknife samples ``y_s`` (``s = 1..N``) of some estimate, with mean
    ``m``, the pseudo-values are ``p_s = N m - (N - 1) y_s``. They play the
    part of bins: :func:`jackknife_samples` of them returns ``y_s`` exactly,
    and the covariance of their mean is the jackknife covariance of ``y_s``.
    So anything computed from bins (a covariance of the mean with shrinkage,
    jackknife refits) can be computed for an estimate known only through its
    jackknife samples, e.g. a principal correlator of the GEVP.

    Parameters
    ----------
    samples : ndarray, shape (N, ...)
        Jackknife samples.

    Returns
    -------
    ndarray, shape (N, ...)

    References
    ----------
    .. [1] J. W. Tukey, "Bias and confidence in not-quite large samples", Ann.
       Math. Statist. 29 (1958) 614 -- the pseudo-values.
    """
    samples = np.asarray(samples, dtype=float)
    if samples.ndim == 0 or samples.shape[0] < 2:
        raise DataError("samples", "pseudo-values need at least 2 jackknife samples")
    n = samples.shape[0]
    return n * samples.mean(axis=0) - (n - 1) * samples
