"""Covariance of the mean from the windowed autocorrelation matrix (Gamma method).

The covariance of the mean of ``p`` components (all timeslices of all
observables of a fit) is estimated from the unbinned per-configuration data as

    C_ij = (1/N) sum_{|tau| <= W} Gamma_ij(tau),
    Gamma_ij(tau) = 1/n(tau) sum_r sum_t d_i(r, t) d_j(r, t + tau),

with ``d = x - mean`` (the overall mean), ``n(tau)`` the number of pairs at lag
``tau`` inside the streams, and ``Gamma_ij(-tau) = Gamma_ji(tau)`` (so ``C`` is
symmetric). Lags never cross a stream boundary: several streams are replicas in
the sense of Wolff (2004), exactly as :mod:`plateaufit.stats.autocorr` treats
them, and the diagonal of ``C`` is that module's variance of the mean,
``2 tau_int Gamma_ii(0) / N``, at the same window.

One window for all components
-----------------------------
``C`` is a matrix only if every element is summed to the same ``W``; a
different window per element does not give a symmetric positive semi-definite
estimate even in expectation. ``W`` is chosen by Wolff's automatic windowing
applied to the *most autocorrelated component* (the largest tau_int, each
component analysed with :func:`plateaufit.stats.autocorr.tau_int`). Why that
one: the window has to cover the decay of the slowest Monte Carlo mode the
data show; the component with the largest tau_int carries that mode most
strongly, and its Wolff window balances truncation bias against noise for it.
Components that decorrelate faster are summed further than they need: this
adds noise of relative size ``~sqrt(2 W / N)`` but no bias. Taking the largest
window over all components instead would let the windowing noise of weakly
correlated components set ``W``; a projection (e.g. on the leading principal
component) can miss a slow mode that lives in a low-variance direction.
A window can also be given explicitly.

Positive definiteness
---------------------
A rectangular-window sum of estimated autocovariances is symmetric but not
guaranteed positive semi-definite (unlike Bartlett-weighted sums,
Newey & West 1987). The estimate is therefore made positive definite in the
scale of ``Gamma(0)``: with ``s_i = sqrt(Gamma_ii(0))``, the eigenvalues of
``A = C_ij / (s_i s_j)`` (whose diagonal is ``2 tau_int`` of each component)
below ``floor = max(eigenvalue_floor * largest, -smallest)`` are raised to
``floor``. The second term is our choice: a negative eigenvalue shows the noise
level of the estimated eigenvalues, and no direction is given a smaller
variance than that noise can resolve (raising eigenvalues can only increase
errors, never shrink them). How many eigenvalues were raised and the relative
(Frobenius) change of the matrix are reported.

Shrinkage
---------
Optional shrinkage toward the diagonal (or ``trace/p`` identity) reuses the
intensity estimators of :mod:`plateaufit.stats.covariance` (Ledoit-Wolf, OAS).
Those assume independent samples; here they are applied to bins of
``ceil(2 tau)`` configurations (``tau`` the chosen component's tau_int), whose
number ``~N / (2 tau)`` is the effective number of independent measurements
(Wolff 2004). Shrinkage comes before the positive-definite step.

References
----------
.. [1] U. Wolff, "Monte Carlo errors with less errors",
   Comput. Phys. Commun. 156 (2004) 143; erratum ibid. 176 (2007) 383.
.. [2] W. K. Newey, K. D. West, "A simple, positive semi-definite,
   heteroskedasticity and autocorrelation consistent covariance matrix",
   Econometrica 55 (1987) 703.
.. [3] D. W. K. Andrews, "Heteroskedasticity and autocorrelation consistent
   covariance matrix estimation", Econometrica 59 (1991) 817.
.. [4] O. Ledoit, M. Wolf, J. Multivar. Anal. 88 (2004) 365.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass

import numpy as np

from plateaufit.errors import DataError, FitError, SpecError
from plateaufit.stats.autocorr import ShortChainWarning
from plateaufit.stats.autocov_matrix import (
    _fluctuating,
    check_data,
    check_streams,
    common_window,
    windowed_covariance,
)
from plateaufit.stats.covariance import (
    _apply_target,
    _condition,
    _parse_shrinkage,
    _parse_target,
    ledoit_wolf_intensity,
    oas_intensity,
)
from plateaufit.stats.resample import bin_samples, stream_blocks

__all__ = [
    "GammaCovarianceResult",
    "gamma_covariance",
    "GammaCovariance",
    "shrinkage_intensity",
    "make_positive_definite",
]

_DEFAULT_FLOOR = 1e-10


@dataclass(frozen=True)
class GammaCovarianceResult:
    """Covariance of the mean from the windowed autocorrelation matrix.

    Attributes
    ----------
    matrix : ndarray (p, p)
        Covariance of the mean after shrinkage and the positive-definite step:
        the one a fit uses. Symmetric positive definite.
    raw_matrix : ndarray (p, p)
        ``sum_{|tau| <= W} Gamma(tau) / N`` (bias-corrected when asked),
        symmetric, possibly indefinite.
    window : int
        The common window ``W``.
    component : int
        The component ``W`` was chosen on (largest tau_int); with a given
        window, the component with the largest tau_int at that window.
    tau : float
        tau_int of ``component`` at ``W`` (``1/2 + sum rho``).
    tau_error : float
        Its Madras-Sokal error, ``2 tau sqrt((W + 1/2 - tau) / N)``.
    taus : ndarray (p,)
        tau_int of every component at the common window ``W``:
        ``N C_ii / (2 Gamma_ii(0))`` (bias-corrected ``Gamma`` when asked).
    shrinkage : float
        Intensity in [0, 1].
    target : str
        ``"diagonal"`` or ``"identity"``.
    condition_number : float
        Of ``matrix``.
    condition_number_raw : float
        Of ``raw_matrix`` (``inf`` when it is not positive definite).
    n_clipped : int
        Eigenvalues raised by the positive-definite step (0: untouched).
    clipped_fraction : float
        ``||matrix after - before the step||_F / ||before||_F``.
    n : int
        Number of configurations.
    n_streams : int
    reliable : bool
        False when the chosen component's tau_int is only a lower bound.
    """

    matrix: np.ndarray
    raw_matrix: np.ndarray
    window: int
    component: int
    tau: float
    tau_error: float
    taus: np.ndarray
    shrinkage: float
    target: str
    condition_number: float
    condition_number_raw: float
    n_clipped: int
    clipped_fraction: float
    n: int
    n_streams: int
    reliable: bool

    @property
    def correlation(self) -> np.ndarray:
        """Correlation matrix of ``matrix``."""
        d = np.sqrt(np.diag(self.matrix))
        return self.matrix / np.outer(d, d)


def shrinkage_intensity(
    x: np.ndarray,
    streams: np.ndarray | None,
    tau: float,
    shrinkage: str | float | None,
    target: str,
) -> float:
    """Shrinkage intensity for a long-run covariance of autocorrelated data.

    A fixed number is returned as it is; ``"ledoit-wolf"`` and ``"oas"`` are
    the intensities of :mod:`plateaufit.stats.covariance` computed on bins of
    ``ceil(2 tau)`` configurations (about independent: ``N / (2 tau)`` is the
    effective number of measurements, Wolff 2004), standardised per component
    for the diagonal target.
    """
    method = _parse_option(_parse_shrinkage, shrinkage, "shrinkage")
    if method == "none":
        return 0.0
    if isinstance(method, float):
        return method
    size = max(1, math.ceil(2.0 * tau - 1e-12))
    lengths = np.array([b - a for a, b in stream_blocks(streams, x.shape[0])])
    if int(np.sum(lengths // size)) < 2:
        size = max(1, int(lengths.max()) // 2)
    bins = bin_samples(x, size, streams)
    if bins.shape[0] < 2 or x.shape[1] == 1:
        return 0.0
    dev = bins - bins.mean(axis=0)
    if target == "diagonal":
        sd = np.sqrt(np.mean(dev * dev, axis=0))
        dev = dev / np.where(sd > 0, sd, 1.0)
    lam = ledoit_wolf_intensity(dev) if method == "ledoit-wolf" else oas_intensity(dev)
    return float(np.clip(lam, 0.0, 1.0))


def _parse_option(parser, value, where: str):
    try:
        return parser(value)
    except SpecError as exc:  # the parsers name spec keys; the core names its argument
        raise SpecError(where, exc.message) from None


def make_positive_definite(
    matrix: np.ndarray, scale: np.ndarray, eigenvalue_floor: float | None = None
) -> tuple[np.ndarray, int, float]:
    """Raise small eigenvalues of ``matrix / outer(scale, scale)``.

    Eigenvalues below ``max(eigenvalue_floor * largest, -smallest)`` are
    raised to that value (``eigenvalue_floor`` defaults to 1e-10); see the
    module notes.

    Returns
    -------
    matrix : ndarray (p, p)
        Symmetric positive definite.
    n_clipped : int
    clipped_fraction : float
        Relative Frobenius change.
    """
    floor_rel = _DEFAULT_FLOOR if eigenvalue_floor is None else float(eigenvalue_floor)
    a = matrix / np.outer(scale, scale)
    a = 0.5 * (a + a.T)
    w, v = np.linalg.eigh(a)
    if w[-1] <= 0:
        raise FitError(
            "",
            "the windowed autocorrelation matrix has no positive eigenvalue; the data "
            "do not determine a covariance of the mean (check for a constant or anti-correlated series)",
        )
    floor = max(floor_rel * w[-1], -w[0])
    low = w < floor
    n_clipped = int(np.count_nonzero(low))
    if n_clipped == 0:
        return matrix.copy(), 0, 0.0
    w2 = np.where(low, floor, w)
    a2 = (v * w2) @ v.T
    a2 = 0.5 * (a2 + a2.T)
    out = a2 * np.outer(scale, scale)
    frac = float(np.linalg.norm(out - matrix) / np.linalg.norm(matrix))
    return out, n_clipped, frac


def _parse_floor(floor: float | None) -> float | None:
    if floor is None:
        return None
    if not isinstance(floor, (bool, np.bool_)) and isinstance(floor, (int, float, np.integer, np.floating)) and 0.0 < float(floor) < 1.0:
        return float(floor)
    raise SpecError("eigenvalue_floor", f"eigenvalue_floor must be a number between 0 and 1 (a fraction of the largest eigenvalue), got {floor!r}")


# --------------------------------------------------------------- public API


def gamma_covariance(
    data: np.ndarray,
    streams: np.ndarray | None = None,
    *,
    S: float = 1.5,
    window: int | None = None,
    bias_correction: bool = True,
    shrinkage: str | float | None = "ledoit-wolf",
    target: str = "diagonal",
    eigenvalue_floor: float | None = None,
) -> GammaCovarianceResult:
    """Covariance of the mean from the windowed autocorrelation matrix.

    ``C = sum_{|tau| <= W} Gamma(tau) / N`` over all ``p`` components, with
    one window ``W`` chosen by Wolff's automatic windowing on the most
    autocorrelated component, then optional shrinkage and a positive-definite
    step (see the module notes).

    Parameters
    ----------
    data : ndarray, shape (n, p)
        Unbinned per-configuration data in Monte Carlo order, all timeslices
        of all observables of a fit concatenated.
    streams : array of int, shape (n,), optional
        Stream label of each configuration; lags never cross a stream boundary.
    S : float, default 1.5
        Wolff's window parameter.
    window : int, optional
        Use this window instead of the automatic one.
    bias_correction : bool, default True
        Wolff's correction for subtracting the estimated mean, in matrix form:
        ``C -> C (1 + (2 W + 1) / N)``.
    shrinkage : {"ledoit-wolf", "oas", "none"} or float in [0, 1]
        As in :func:`plateaufit.stats.covariance.covariance_of_mean` (same
        default); the intensity is computed on bins of ``ceil(2 tau)``.
    target : {"diagonal", "identity"}
    eigenvalue_floor : float in (0, 1), optional
        Relative floor of the positive-definite step (default 1e-10).

    Returns
    -------
    GammaCovarianceResult

    Raises
    ------
    DataError
        Malformed data or stream labels, NaN, fewer than 4 configurations.
    FitError
        A component is constant (its covariance row is zero).
    SpecError
        A bad option (``where`` names the argument).

    Warns
    -----
    ShortChainWarning
        When the chosen component's tau_int is only a lower bound.

    References
    ----------
    .. [1] U. Wolff, "Monte Carlo errors with less errors",
       Comput. Phys. Commun. 156 (2004) 143.
    .. [2] O. Ledoit, M. Wolf, J. Multivar. Anal. 88 (2004) 365.
    """
    floor = _parse_floor(eigenvalue_floor)
    target = _parse_option(_parse_target, target, "target")
    _parse_option(_parse_shrinkage, shrinkage, "shrinkage")
    x = check_data(data)
    n, p = x.shape
    if n < 4:
        raise DataError("data", f"{n} configurations are too few for an autocorrelation analysis; at least 4 are needed")
    blocks = check_streams(streams, n)
    dev = x - x.mean(axis=0)
    flat = ~_fluctuating(dev, x)
    if np.any(flat):
        j = int(np.flatnonzero(flat)[0])
        raise FitError(
            "data",
            f"component {j} of {p} is constant over all {n} configurations; its covariance "
            "row is zero: leave it out (e.g. a timeslice the correlator is normalised at)",
        )
    cw = common_window(x, streams, S, window=window)
    w = cw.window
    gamma0, long_run = windowed_covariance(x, blocks, w, bias_correction)
    g0 = np.diag(gamma0).copy()
    taus = np.diag(long_run) / (2.0 * g0)
    if cw.forced:
        k = int(np.argmax(taus))
        tau = float(taus[k])
        tau_err = float(2.0 * abs(tau) * math.sqrt(max(w + 0.5 - tau, 0.0) / n))
    else:
        k, tau, tau_err = cw.component, float(taus[cw.component]), cw.tau_error
    if not cw.reliable:
        warnings.warn(
            f"component {cw.component} has the longest autocorrelation, but the chain ({n} "
            f"configurations) is too short for a reliable tau_int ({cw.tau:.3g}, 1/2 + sum rho "
            "convention): the window and the covariance are lower bounds",
            ShortChainWarning,
            stacklevel=2,
        )
    raw = long_run / n
    lam = shrinkage_intensity(x, streams, max(tau, 0.5), shrinkage, target)
    shrunk = _apply_target(raw, lam, target) if lam > 0 else raw
    matrix, n_clipped, frac = make_positive_definite(shrunk, np.sqrt(g0 / n), floor)
    return GammaCovarianceResult(
        matrix=matrix,
        raw_matrix=raw,
        window=int(w),
        component=k,
        tau=tau,
        tau_error=tau_err,
        taus=taus,
        shrinkage=float(lam),
        target=target,
        condition_number=_condition(matrix),
        condition_number_raw=_condition(raw),
        n_clipped=n_clipped,
        clipped_fraction=frac,
        n=int(n),
        n_streams=len(blocks),
        reliable=cw.reliable,
    )


class GammaCovariance:
    """Covariance of the mean from the autocorrelation matrix, as an estimator object.

    The class form of :func:`gamma_covariance` (in the manner of
    scikit-learn's covariance estimators and
    :class:`plateaufit.stats.covariance.MeanCovariance`): configure, then
    ``fit(data, streams)``.

    Parameters
    ----------
    S, window, bias_correction, shrinkage, target, eigenvalue_floor
        As in :func:`gamma_covariance`.

    Attributes
    ----------
    covariance_ : ndarray (p, p)
    raw_covariance_ : ndarray (p, p)
    window_ : int
    tau_ : float
    component_ : int
    shrinkage_ : float
    condition_number_ : float
    n_clipped_ : int
    result_ : GammaCovarianceResult

    References
    ----------
    .. [1] U. Wolff, Comput. Phys. Commun. 156 (2004) 143.
    """

    def __init__(
        self,
        S: float = 1.5,
        window: int | None = None,
        bias_correction: bool = True,
        shrinkage: str | float | None = "ledoit-wolf",
        target: str = "diagonal",
        eigenvalue_floor: float | None = None,
    ) -> None:
        self.S = S
        self.window = window
        self.bias_correction = bias_correction
        self.shrinkage = shrinkage
        self.target = target
        self.eigenvalue_floor = eigenvalue_floor

    def fit(self, data: np.ndarray, streams: np.ndarray | None = None) -> "GammaCovariance":
        """Estimate from unbinned data (n, p); returns self."""
        res = gamma_covariance(
            data, streams, S=self.S, window=self.window, bias_correction=self.bias_correction,
            shrinkage=self.shrinkage, target=self.target, eigenvalue_floor=self.eigenvalue_floor,
        )
        self.result_ = res
        self.covariance_ = res.matrix
        self.raw_covariance_ = res.raw_matrix
        self.window_ = res.window
        self.tau_ = res.tau
        self.component_ = res.component
        self.shrinkage_ = res.shrinkage
        self.condition_number_ = res.condition_number
        self.n_clipped_ = res.n_clipped
        return self

    def __repr__(self) -> str:
        return (
            f"GammaCovariance(S={self.S!r}, window={self.window!r}, bias_correction="
            f"{self.bias_correction!r}, shrinkage={self.shrinkage!r}, target={self.target!r}, "
            f"eigenvalue_floor={self.eigenvalue_floor!r})"
        )
