"""Synthetic replicas of a Monte Carlo ensemble, for calibrating error estimates.

A replica has the shape and stream structure of the measured ensemble
``x`` (``n_cfg`` configurations, ``p`` components: all timeslices of all
observables), a known truth ``mu`` (the fitted model's prediction, or the data
mean), and noise that reproduces what was measured:

* the covariance ``Gamma(0)`` across all ``p`` components (hence the growth
  of the noise with ``t``, which it carries);
* the Monte Carlo autocorrelation: the integrated autocorrelation time of
  every component and, more than that, the whole *long-run* covariance
  ``sum_tau Gamma(tau)``, i.e. the covariance of the mean that the error
  analysis of a replica has to find;
* the streams: each stream of a replica is generated independently, with the
  length of the measured one.

Default method: ``"ar1-factors"``
---------------------------------
1. ``Gamma(0)`` and the long-run covariance ``C = sum_{|tau| <= W} Gamma(tau)``
   are estimated with one window ``W`` (:mod:`plateaufit.stats.gamma_covariance`,
   Wolff 2004), both shrunk toward their diagonals with one intensity
   (Ledoit-Wolf on bins of ``ceil(2 tau)``, the same rule as
   :func:`~plateaufit.stats.gamma_covariance.gamma_covariance`). Diagonal
   shrinkage keeps every variance and every tau_int.
2. The pair is diagonalised *simultaneously* (the symmetric-definite
   generalised eigenproblem ``C v = mu Gamma(0) v``, Golub & Van Loan):
   ``f = V^T d`` are factors that are uncorrelated with unit variance *and*
   have uncorrelated long-run sums, each with ``2 tau_k = mu_k``.
3. Each factor is simulated as an independent Gaussian AR(1) process with
   ``phi_k = (mu_k - 1) / (mu_k + 1)``, whose tau_int is exactly
   ``(1 + phi) / (2 (1 - phi)) = mu_k / 2`` (Brockwell & Davis 1991, Sec. 3.3),
   started from its stationary distribution in every stream, and rotated
   back: ``noise = f V^{-1}``.

Then the replicas' ``Gamma(0)`` and long-run covariance equal the estimated
ones exactly (in expectation over replicas; unless factors were clipped,
``ReplicaModel.n_clipped``, which only raises the long-run variance), so tau_int of every component
*and of every linear combination* (the projections a fit makes) is
reproduced, not only approximately.

Why not independent AR processes in the principal components of
``Gamma(0)`` (the first candidate of the design)? Principal components are
uncorrelated at lag 0 but in general not at other lags: when the chain has
several modes with different autocorrelation times mixed differently across
timeslices (the common case: a slow topological mode weighs most on some
timeslices, fast noise on others), treating them as independent drops their
lagged cross-correlations and gets tau_int of the timeslices and the
off-diagonal covariance of the mean wrong. The generalised basis has no
lag-0 and no long-run cross-correlation by construction; what it still drops
are the cross-correlations at individual lags that sum to zero, and the
*shape* of each factor's autocorrelation function (an exponential here):
the integral, which sets the errors, is right; the Gamma method's window on
a replica can differ somewhat from the one on the data.

What it gets wrong: the noise is Gaussian. Correlators at large ``t`` have
skewed, heavy-tailed distributions (D. B. Kaplan, M. G. Endres, J.-W. Lee,
A. N. Nicholson, Phys. Rev. Lett. 107 (2011) 201601); an analysis that is
fragile to outliers looks better on these replicas than on real data.
Autocorrelation functions that oscillate (over-relaxation) become monotonic.

Option: ``"stationary-bootstrap"``
----------------------------------
The stationary bootstrap of Politis & Romano (1994): the deviations of the
data from their stream means are resampled in blocks of geometric length
(mean ``block_length``, wrapping around inside each stream), stream by
stream, and added to the truth. It keeps non-Gaussian shapes and the exact
lag structure inside a block, but the replicas are *not independent of the
measured data* (they are rearrangements of its noise, so a coverage study on
them is optimistic where the data happen to be lucky), and autocorrelation
beyond the block length is lost: a lag-``tau`` correlation is damped by
``(1 - 1/L)^tau``, so tau_int is biased low unless ``L >> tau``. The default
``L = 20 tau_max`` keeps that bias near 5 % for exponential autocorrelation.

Rank problem: with more components than configurations (``p >= n``),
``Gamma(0)`` is singular; the shrinkage intensity is then large and makes it
full rank. With ``shrinkage="none"`` only the principal directions carrying
variance (eigenvalues above ``1e-12`` of the largest, in the correlation
scale) are kept: replicas then have exactly the measured rank.

Components that do not fluctuate at all (a correlator normalised at one
timeslice) get no noise.

One module although a little over 500 lines, most of them this discussion:
the two methods fill one frozen :class:`ReplicaModel`, which draws.

References
----------
.. [1] U. Wolff, "Monte Carlo errors with less errors",
   Comput. Phys. Commun. 156 (2004) 143.
.. [2] P. J. Brockwell, R. A. Davis, "Time Series: Theory and Methods",
   2nd ed., Springer, New York (1991).
.. [3] G. H. Golub, C. F. Van Loan, "Matrix Computations", 4th ed.,
   Johns Hopkins University Press (2013), Sec. 8.7 (the symmetric-definite
   generalised eigenproblem).
.. [4] L. Molgedey, H. G. Schuster, "Separation of a mixture of independent
   signals using time delayed correlations", Phys. Rev. Lett. 72 (1994) 3634
   (simultaneous diagonalisation of lagged covariances).
.. [5] D. N. Politis, J. P. Romano, "The stationary bootstrap",
   J. Amer. Statist. Assoc. 89 (1994) 1303.
.. [6] O. Ledoit, M. Wolf, J. Multivar. Anal. 88 (2004) 365.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Iterator, Sequence

import numpy as np

from plateaufit.errors import DataError, SpecError
from plateaufit.stats.autocorr import _check_s
from plateaufit.stats.autocov_matrix import (
    CommonWindow,
    _fluctuating,
    check_data,
    check_streams,
    common_window,
    windowed_covariance,
)
from plateaufit.stats.gamma_covariance import shrinkage_intensity

__all__ = [
    "REPLICA_METHODS",
    "ReplicaModel",
    "fit_replica_model",
    "stream_labels",
]

REPLICA_METHODS = ("ar1-factors", "stationary-bootstrap")

# 2 tau of a factor is kept >= this (phi >= -0.9): a non-positive long-run
# variance is estimation noise, never a property of a Markov chain's mean.
_MIN_TWO_TAU = (1.0 - 0.9) / (1.0 + 0.9)
_RANK_RTOL = 1e-12

@dataclass(frozen=True)
class ReplicaModel:
    """A fitted noise model; draws replicas of the ensemble it was fitted to.

    Made by :func:`fit_replica_model`. Frozen and made of arrays only, so it
    pickles cheaply to worker processes; drawing needs only a seed.

    Attributes
    ----------
    method : str
        ``"ar1-factors"`` or ``"stationary-bootstrap"``.
    truth : ndarray (p,)
        Added to the noise.
    stream_sizes : tuple of int
        Configurations per stream, in order.
    window : int
        Common window ``W`` of the long-run covariance.
    taus : ndarray (p,)
        tau_int of each component of the data at the window ``W``
        (``1/2 + sum rho`` convention).
    covariance : ndarray (p, p)
        Covariance per configuration, ``Gamma(0)``, of the replicas' noise
        (ar1-factors: exact; bootstrap: the resampled deviations').
    long_run : ndarray (p, p)
        ``sum_tau Gamma(tau)`` of the replicas' noise (ar1-factors: exact;
        bootstrap: the data's windowed estimate). ``long_run / n_cfg`` is the
        covariance of the mean of a replica.
    shrinkage : float
        Intensity applied to both matrices (ar1-factors).
    n_factors : int
        Independent factors (ar1-factors; ``p`` unless the rank is limited).
    n_clipped : int
        Factors whose ``2 tau`` was raised to the minimum (0.053).
    mixing : ndarray (n_factors, p)
        noise = factors @ mixing (ar1-factors).
    phi : ndarray (n_factors,)
        AR(1) coefficient of each factor (ar1-factors).
    residuals : ndarray (n_cfg, p) or None
        Deviations from the stream means (bootstrap).
    block_length : float
        Mean block length (bootstrap; 0 otherwise).
    reliable : bool
        False when the data's most autocorrelated component has a tau_int that
        is only a lower bound (chain too short): the replicas then have too
        little autocorrelation.
    """

    method: str
    truth: np.ndarray
    stream_sizes: tuple[int, ...]
    window: int
    taus: np.ndarray
    covariance: np.ndarray
    long_run: np.ndarray
    shrinkage: float
    n_factors: int
    n_clipped: int
    mixing: np.ndarray
    phi: np.ndarray
    residuals: np.ndarray | None = None
    block_length: float = 0.0
    reliable: bool = True

    @property
    def n_configs(self) -> int:
        """Configurations of a replica."""
        return int(sum(self.stream_sizes))

    @property
    def streams(self) -> np.ndarray:
        """Stream label (0, 1, ...) of each configuration of a replica."""
        return stream_labels(self.stream_sizes)

    @property
    def model_taus(self) -> np.ndarray:
        """Exact tau_int of each component of the replicas: ``long_run_ii / (2 Gamma_ii(0))``.

        Components without noise get 1/2.
        """
        g = np.diag(self.covariance)
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(g > 0, np.diag(self.long_run) / (2.0 * np.where(g > 0, g, 1.0)), 0.5)

    @property
    def mean_covariance(self) -> np.ndarray:
        """Covariance of the mean of one replica, ``long_run / n_cfg``."""
        return self.long_run / self.n_configs

    def draw(self, seed: int | np.random.SeedSequence | np.random.Generator) -> np.ndarray:
        """One replica, shape (n_cfg, p).

        Parameters
        ----------
        seed : int, SeedSequence or Generator
            The same seed gives bitwise the same replica. A Generator is
            advanced.
        """
        rng = np.random.default_rng(seed)
        if self.method == "stationary-bootstrap":
            return self._draw_bootstrap(rng)
        return self._draw_factors(rng)

    def draws(
        self, n_replicas: int, seed: int | np.random.SeedSequence
    ) -> Iterator[np.ndarray]:
        """``n_replicas`` independent replicas, one at a time.

        Replica ``k`` is ``draw(SeedSequence(seed).spawn(n_replicas)[k])``,
        so a worker can make replica ``k`` alone (see :meth:`replica_seeds`).
        """
        for child in self.replica_seeds(n_replicas, seed):
            yield self.draw(child)

    @staticmethod
    def replica_seeds(n_replicas: int, seed: int | np.random.SeedSequence) -> list[np.random.SeedSequence]:
        """The independent seed of each replica (``SeedSequence.spawn``)."""
        if isinstance(n_replicas, (bool, np.bool_)) or not isinstance(n_replicas, (int, np.integer)) or n_replicas < 0:
            raise SpecError("n_replicas", f"the number of replicas must be a non-negative integer, got {n_replicas!r}")
        if isinstance(seed, np.random.Generator):
            raise SpecError("seed", "give an integer or a SeedSequence (a Generator cannot be split into replica seeds)")
        ss = seed if isinstance(seed, np.random.SeedSequence) else np.random.SeedSequence(seed)
        return ss.spawn(int(n_replicas))

    # -------------------------------------------------------------- drawing

    def _draw_factors(self, rng: np.random.Generator) -> np.ndarray:
        r = self.n_factors
        p = self.truth.shape[0]
        out = np.empty((self.n_configs, p))
        if r == 0:
            out[:] = self.truth
            return out
        innov = np.sqrt(1.0 - self.phi**2)[:, None]
        start = 0
        for length in self.stream_sizes:
            # factors along rows: each AR(1) filter runs on contiguous memory
            e = rng.standard_normal((r, length))
            e[:, 1:] *= innov  # e[:, 0] is the stationary start (unit variance)
            for k in range(r):
                if self.phi[k] != 0.0:
                    from scipy.signal import lfilter   # deferred: ~1 s to import

                    e[k] = lfilter([1.0], [1.0, -self.phi[k]], e[k])
            np.matmul(e.T, self.mixing, out=out[start : start + length])
            start += length
        out += self.truth
        return out

    def _draw_bootstrap(self, rng: np.random.Generator) -> np.ndarray:
        res = self.residuals
        out = np.empty_like(res)
        q = 1.0 / self.block_length
        start = 0
        for length in self.stream_sizes:
            new = rng.random(length) < q
            new[0] = True
            heads = np.flatnonzero(new)
            origins = rng.integers(0, length, size=heads.size)
            block = np.cumsum(new) - 1
            pos = np.arange(length)
            idx = (origins[block] + pos - heads[block]) % length
            out[start : start + length] = res[start + idx]
            start += length
        out += self.truth
        return out


def stream_labels(stream_sizes: Sequence[int]) -> np.ndarray:
    """Labels 0, 1, ... repeated by the stream sizes."""
    sizes = np.asarray(stream_sizes, dtype=int).reshape(-1)
    return np.repeat(np.arange(sizes.size), sizes)


def _resolve_streams(
    streams: np.ndarray | None, stream_sizes: Sequence[int] | None, n: int
) -> tuple[np.ndarray | None, list[tuple[int, int]]]:
    if streams is not None and stream_sizes is not None:
        raise SpecError("stream_sizes", "give either stream labels (streams) or stream sizes, not both")
    if stream_sizes is not None:
        sizes = np.asarray(stream_sizes).reshape(-1)
        if sizes.size == 0 or not np.issubdtype(sizes.dtype, np.integer) or np.any(sizes < 1) or int(sizes.sum()) != n:
            raise DataError(
                "stream_sizes",
                f"stream sizes {sizes.tolist()} must be positive integers adding up to the {n} configurations",
            )
        streams = stream_labels(sizes)
    blocks = check_streams(streams, n)
    return streams, blocks


def _check_truth(truth: np.ndarray | None, x: np.ndarray) -> np.ndarray:
    if truth is None:
        return x.mean(axis=0)
    mu = np.asarray(truth, dtype=float).reshape(-1)
    if mu.shape[0] != x.shape[1]:
        raise DataError("truth", f"the truth has {mu.shape[0]} components but the data have {x.shape[1]}; give one value per component")
    if not np.all(np.isfinite(mu)):
        raise DataError("truth", f"component {int(np.flatnonzero(~np.isfinite(mu))[0])} of the truth is NaN or infinite")
    return mu


def fit_replica_model(
    data: np.ndarray,
    truth: np.ndarray | None = None,
    *,
    streams: np.ndarray | None = None,
    stream_sizes: Sequence[int] | None = None,
    method: str = "ar1-factors",
    S: float = 1.5,
    window: int | None = None,
    shrinkage: str | float | None = "ledoit-wolf",
    block_length: float | None = None,
) -> ReplicaModel:
    """Fit the noise model of an ensemble, to draw synthetic replicas of it.

    Parameters
    ----------
    data : ndarray, shape (n_cfg, p)
        Measured per-configuration data of all components (all timeslices of
        all observables concatenated), in Monte Carlo order.
    truth : ndarray, shape (p,), optional
        The replicas' truth (the fitted model's prediction; the data mean
        where no model applies). Default: the data mean.
    streams : array of int, shape (n_cfg,), optional
        Stream label of each configuration (a new stream wherever it changes).
    stream_sizes : sequence of int, optional
        Or the number of configurations of each stream, in order.
    method : {"ar1-factors", "stationary-bootstrap"}
        See the module notes.
    S : float, default 1.5
        Wolff's window parameter for the common window.
    window : int, optional
        Common window; default chosen on the most autocorrelated component.
    shrinkage : {"ledoit-wolf", "oas", "none"} or float in [0, 1]
        Toward the diagonal, for both ``Gamma(0)`` and the long-run covariance
        (ar1-factors).
    block_length : float, optional
        Mean block length of the stationary bootstrap (> 1); default
        ``20 * tau_max``, at most the shortest stream.

    Returns
    -------
    ReplicaModel
        ``model.draw(seed)`` gives one replica; ``model.draws(M, seed)`` M.

    Raises
    ------
    DataError
        Malformed data, truth or streams; fewer than 8 configurations or a
        stream of fewer than 2.
    SpecError
        An unknown method or a bad option (``where`` names the argument).

    References
    ----------
    .. [1] U. Wolff, Comput. Phys. Commun. 156 (2004) 143.
    .. [2] P. J. Brockwell, R. A. Davis, "Time Series: Theory and Methods",
       Springer (1991).
    .. [3] D. N. Politis, J. P. Romano, J. Amer. Statist. Assoc. 89 (1994) 1303.
    """
    if method not in REPLICA_METHODS:
        raise SpecError("method", f"unknown replica method {method!r}; use one of {', '.join(REPLICA_METHODS)}")
    S = _check_s(S)
    x = check_data(data)
    n, p = x.shape
    mu = _check_truth(truth, x)
    streams, blocks = _resolve_streams(streams, stream_sizes, n)
    sizes = tuple(b - a for a, b in blocks)
    if n < 8 or min(sizes) < 2:
        raise DataError(
            "data",
            f"{n} configurations in streams of {list(sizes)} are too few to model the noise; "
            "replicas need at least 8 configurations and 2 per stream",
        )
    dev = x - x.mean(axis=0)
    active = _fluctuating(dev, x)
    cols = np.flatnonzero(active)
    taus = np.full(p, 0.5)
    gamma0 = np.zeros((p, p))
    long_run = np.zeros((p, p))
    if cols.size == 0:
        return ReplicaModel(
            method=method, truth=mu, stream_sizes=sizes, window=0, taus=taus, covariance=gamma0,
            long_run=long_run, shrinkage=0.0, n_factors=0, n_clipped=0, mixing=np.zeros((0, p)),
            phi=np.zeros(0), residuals=np.zeros((n, p)) if method == "stationary-bootstrap" else None,
            block_length=1.0 if method == "stationary-bootstrap" else 0.0,
        )
    xa = x[:, cols]
    cw = common_window(xa, streams, S, window=window)
    g0a, lra = windowed_covariance(xa, blocks, cw.window, bias_correction=True)
    taus[cols] = np.diag(lra) / (2.0 * np.diag(g0a))
    tau_max = max(float(taus.max()), 0.5)

    if method == "stationary-bootstrap":
        return _bootstrap_model(x, mu, blocks, sizes, cw, taus, lra, cols, tau_max, block_length)

    lam = shrinkage_intensity(xa, streams, tau_max, shrinkage, "diagonal")
    if lam > 0:
        g0a = (1.0 - lam) * g0a + lam * np.diag(np.diag(g0a))
        lra = (1.0 - lam) * lra + lam * np.diag(np.diag(lra))
    mixing_a, phi, n_clipped = _factorise(g0a, lra)
    mixing = np.zeros((mixing_a.shape[0], p))
    mixing[:, cols] = mixing_a
    two_tau = (1.0 + phi) / (1.0 - phi)
    return ReplicaModel(
        method=method,
        truth=mu,
        stream_sizes=sizes,
        window=int(cw.window),
        taus=taus,
        covariance=mixing.T @ mixing,
        long_run=(mixing.T * two_tau) @ mixing,
        shrinkage=float(lam),
        n_factors=int(mixing.shape[0]),
        n_clipped=n_clipped,
        mixing=mixing,
        phi=phi,
        reliable=cw.reliable,
    )


def _factorise(gamma0: np.ndarray, long_run: np.ndarray) -> tuple[np.ndarray, np.ndarray, int]:
    """Simultaneous diagonalisation of ``Gamma(0)`` and the long-run covariance.

    In the correlation scale (``s = sqrt(diag Gamma(0))``): whiten by the
    principal directions of ``Gamma(0)`` that carry variance, diagonalise the
    whitened long-run matrix, and return ``mixing`` (r, p) with
    ``mixing^T mixing = Gamma(0)`` and ``mixing^T diag(2 tau) mixing = long_run``
    (up to the clipped factors), and the AR(1) coefficients.
    """
    s = np.sqrt(np.diag(gamma0))
    r0 = gamma0 / np.outer(s, s)
    c0 = long_run / np.outer(s, s)
    lam, u = np.linalg.eigh(0.5 * (r0 + r0.T))
    keep = lam > _RANK_RTOL * lam[-1]
    lam, u = lam[keep], u[:, keep]
    half = u * np.sqrt(lam)  # (p, r): r0 ~= half half^T
    whiten = u / np.sqrt(lam)  # (p, r)
    cw = whiten.T @ c0 @ whiten
    mu, q = np.linalg.eigh(0.5 * (cw + cw.T))
    # a non-positive long-run variance is noise; raise to the noise level shown
    # by the most negative eigenvalue, and to at least _MIN_TWO_TAU (phi >= -0.9)
    floor = max(_MIN_TWO_TAU, -float(mu[0]))
    low = mu < floor
    mu = np.where(low, floor, mu)
    mixing = (q.T @ half.T) * s  # (r, p)
    phi = (mu - 1.0) / (mu + 1.0)
    return mixing, phi, int(np.count_nonzero(low))


def _bootstrap_model(
    x: np.ndarray,
    mu: np.ndarray,
    blocks: list[tuple[int, int]],
    sizes: tuple[int, ...],
    cw: CommonWindow,
    taus: np.ndarray,
    long_run_active: np.ndarray,
    cols: np.ndarray,
    tau_max: float,
    block_length: float | None,
) -> ReplicaModel:
    n, p = x.shape
    if block_length is None:
        length = min(20.0 * tau_max, float(min(sizes)))
    else:
        if isinstance(block_length, (bool, np.bool_)) or not isinstance(block_length, (int, float, np.integer, np.floating)) \
                or not math.isfinite(block_length) or block_length < 1:
            raise SpecError("block_length", f"the mean block length must be a number >= 1 (configurations), got {block_length!r}")
        length = float(block_length)
    res = np.empty_like(x)
    for a, b in blocks:
        res[a:b] = x[a:b] - x[a:b].mean(axis=0)
    res[:, np.setdiff1d(np.arange(p), cols)] = 0.0
    long_run = np.zeros((p, p))
    long_run[np.ix_(cols, cols)] = long_run_active
    return ReplicaModel(
        method="stationary-bootstrap",
        truth=mu,
        stream_sizes=sizes,
        window=int(cw.window),
        taus=taus,
        covariance=res.T @ res / n,
        long_run=long_run,
        shrinkage=0.0,
        n_factors=0,
        n_clipped=0,
        mixing=np.zeros((0, p)),
        phi=np.zeros(0),
        residuals=res,
        block_length=max(length, 1.0),
        reliable=cw.reliable,
    )
