"""Covariance of the mean of binned data, regularised by shrinkage.

The covariance a correlated fit needs is that of the *mean* of the binned data:
``S = cov(bins, ddof=1) / n_bins``. With few bins and many timeslices ``S`` is
noisy and ill-conditioned (singular when ``n_bins <= p``); shrinkage replaces it
by ``(1 - lambda) S + lambda T`` with a well-conditioned target ``T`` and an
intensity ``lambda`` estimated from the data.

Targets
-------
``"identity"``
    The intensity is computed on the raw samples and ``T = mu I`` with
    ``mu = trace(S) / p`` (as scikit-learn's ``LedoitWolf`` and ``OAS``).
``"diagonal"``
    The samples are standardised per component, the intensity is computed on
    the standardised samples, i.e. the *correlation* matrix is shrunk toward
    the identity; rescaling by the standard deviations gives
    ``(1 - lambda) S + lambda diag(S)``: the variances are untouched. This is
    the natural choice for correlators, whose variances span orders of
    magnitude across timeslices.

The intensities are scikit-learn's (``ledoit_wolf_shrinkage`` and
``OAS().shrinkage_``), i.e. computed from the ``1/n`` empirical covariance of
the samples, which is the standard estimator; the intensity is applied to the
``ddof=1`` covariance of the mean. Implemented here in numpy (scikit-learn is
used only in the tests, as the reference).

References
----------
.. [1] O. Ledoit, M. Wolf, "A well-conditioned estimator for large-dimensional
   covariance matrices", J. Multivar. Anal. 88 (2004) 365.
.. [2] Y. Chen, A. Wiesel, Y. C. Eldar, A. O. Hero, "Shrinkage algorithms for
   MMSE covariance estimation", IEEE Trans. Signal Process. 58 (2010) 5016.
.. [3] J. Schäfer, K. Strimmer, "A shrinkage approach to large-scale covariance
   matrix estimation and implications for functional genomics",
   Stat. Appl. Genet. Mol. Biol. 4 (2005) 32 (shrinking the correlation matrix).

One module of about 600 lines on purpose: the shrinkage intensities, the targets, the
eigenvalue floor and the per-sample covariances are one estimator with options, and
the checks against scikit-learn test them together.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from plateaufit.errors import FitError, SpecError

__all__ = [
    "CovarianceResult",
    "covariance_of_mean",
    "MeanCovariance",
    "ledoit_wolf_intensity",
    "oas_intensity",
    "per_sample_covariances",
]

_SHRINKAGE_NAMES = ("none", "ledoit-wolf", "oas")
_TARGETS = ("diagonal", "identity")


@dataclass(frozen=True)
class CovarianceResult:
    """Covariance of the mean, with its diagnostics.

    Attributes
    ----------
    matrix : ndarray (p, p)
        Covariance of the mean after shrinkage (and eigenvalue floor): the one
        the fit uses.
    raw_matrix : ndarray (p, p)
        ``cov(samples, ddof=1) / n_bins``, unshrunk.
    shrinkage : float
        Intensity in [0, 1].
    target : str
        ``"diagonal"`` or ``"identity"``.
    condition_number : float
        Of ``matrix`` (largest / smallest eigenvalue).
    condition_number_raw : float
        Of ``raw_matrix`` (``inf`` when singular).
    eigenvalues : ndarray (p,)
        Of the correlation matrix of ``matrix``, descending.
    eigenvalues_raw : ndarray (p,)
        Of the correlation matrix of ``raw_matrix``, descending.
    n_samples : int
        Number of bins.
    """

    matrix: np.ndarray
    raw_matrix: np.ndarray
    shrinkage: float
    target: str
    condition_number: float
    condition_number_raw: float
    eigenvalues: np.ndarray
    eigenvalues_raw: np.ndarray
    n_samples: int

    @property
    def correlation(self) -> np.ndarray:
        """Correlation matrix of ``matrix``."""
        return _correlation(self.matrix)


# ---------------------------------------------------------------- options


def _parse_shrinkage(shrinkage: str | float | None) -> str | float:
    if shrinkage is None:
        return "none"
    if isinstance(shrinkage, str):
        name = shrinkage.strip().lower().replace("_", "-")
        if name in _SHRINKAGE_NAMES:
            return name
    elif not isinstance(shrinkage, (bool, np.bool_)) and isinstance(shrinkage, (int, float, np.integer, np.floating)):
        value = float(shrinkage)
        if 0.0 <= value <= 1.0:
            return value
    raise SpecError(
        "shrinkage",
        f"unknown shrinkage {shrinkage!r}; use none, ledoit-wolf, oas or a number in [0, 1]",
    )


def _parse_target(target: str) -> str:
    if isinstance(target, str) and target.strip().lower() in _TARGETS:
        return target.strip().lower()
    raise SpecError("target", f"unknown shrinkage target {target!r}; use diagonal or identity")


def _parse_floor(floor: float | None) -> float | None:
    if floor is None:
        return None
    if (
        not isinstance(floor, (bool, np.bool_))
        and isinstance(floor, (int, float, np.integer, np.floating))
        and 0.0 < float(floor) < 1.0
    ):
        return float(floor)
    raise SpecError(
        "eigenvalue_floor",
        f"eigenvalue_floor must be a number between 0 and 1 (a fraction of the largest "
        f"eigenvalue of the correlation matrix, e.g. 1e-3), got {floor!r}",
    )


def _check_samples(samples: np.ndarray) -> np.ndarray:
    x = np.asarray(samples, dtype=float)
    if x.ndim == 1:
        x = x[:, None]
    if x.ndim != 2:
        raise FitError("", f"the covariance needs samples of shape (n_bins, n_points), got {x.shape}")
    n, p = x.shape
    if n < 2:
        raise FitError("", f"the covariance of {p} points needs at least 2 bins, got {n}; use a smaller bin size")
    if not np.all(np.isfinite(x)):
        i, j = np.argwhere(~np.isfinite(x))[0]
        raise FitError("", f"bin {i} of point {j} is NaN or infinite; the covariance cannot be estimated")
    return x


def _constant_error(j: int, n: int, p: int) -> FitError:
    return FitError(
        "",
        f"point {j} of the {p} points has zero variance across the {n} bins (a constant, "
        "e.g. a correlator normalised at that timeslice); leave it out of the fit range",
    )


def _check_variances(dev: np.ndarray, x: np.ndarray) -> np.ndarray:
    """Per-component ddof=0 variances; FitError for a constant component."""
    var = np.mean(dev * dev, axis=0)
    scale = np.max(np.abs(x), axis=0)
    tiny = np.sqrt(var) <= 64 * np.finfo(float).eps * scale
    tiny |= var == 0
    if np.any(tiny):
        raise _constant_error(int(np.flatnonzero(tiny)[0]), x.shape[0], x.shape[1])
    return var


# ----------------------------------------------------- intensities (batched)


def _lw_from_moments(emp: np.ndarray, s4: np.ndarray, n: int) -> np.ndarray:
    """Ledoit-Wolf intensity from the empirical covariance and fourth moments.

    ``emp`` (..., p, p) is the 1/n empirical covariance of centred samples,
    ``s4`` (...) is ``mean_k ||x_k||^4``. Same formula as scikit-learn's
    ``ledoit_wolf_shrinkage`` (Ledoit & Wolf 2004, Lemmas 3.2-3.4): with
    ``mu = tr(emp)/p``, ``delta = ||emp - mu I||_F^2 / p`` and
    ``beta = (s4 - ||emp||_F^2) / (p n)``, the intensity is
    ``min(beta, delta) / delta``.
    """
    p = emp.shape[-1]
    if p == 1:
        return np.zeros(emp.shape[:-2])
    mu = np.trace(emp, axis1=-2, axis2=-1) / p
    fro2 = np.sum(emp * emp, axis=(-2, -1))
    delta = fro2 / p - mu * mu
    beta = (s4 - fro2) / (p * n)
    beta = np.minimum(beta, delta)
    with np.errstate(divide="ignore", invalid="ignore"):
        lam = np.where((beta > 0) & (delta > 0), beta / np.where(delta > 0, delta, 1.0), 0.0)
    return np.clip(lam, 0.0, 1.0)


def _oas_from_emp(emp: np.ndarray, n: int) -> np.ndarray:
    """OAS intensity as scikit-learn computes it.

    Chen et al. 2010, eq. (23), with the ``2/p`` terms dropped as in
    scikit-learn (>= 1.3): ``rho = (tr(S^2) + tr(S)^2) /
    ((n + 1) (tr(S^2) - tr(S)^2 / p))``, capped at 1.
    """
    p = emp.shape[-1]
    if p == 1:
        return np.zeros(emp.shape[:-2])
    alpha = np.mean(emp * emp, axis=(-2, -1))
    mu = np.trace(emp, axis1=-2, axis2=-1) / p
    num = alpha + mu * mu
    den = (n + 1) * (alpha - mu * mu / p)
    with np.errstate(divide="ignore", invalid="ignore"):
        lam = np.where(den != 0, np.minimum(num / np.where(den != 0, den, 1.0), 1.0), 1.0)
    return np.clip(lam, 0.0, 1.0)


def ledoit_wolf_intensity(X: np.ndarray) -> float:
    """Ledoit-Wolf shrinkage intensity toward ``mu I`` (scikit-learn's value).

    Parameters
    ----------
    X : ndarray, shape (n, p)
        Samples (centred here).

    Returns
    -------
    float
        Equal to ``sklearn.covariance.ledoit_wolf_shrinkage(X)``.

    References
    ----------
    .. [1] O. Ledoit, M. Wolf, "A well-conditioned estimator for
       large-dimensional covariance matrices", J. Multivar. Anal. 88 (2004) 365.
    """
    x = np.asarray(X, dtype=float)
    if x.ndim == 1:
        x = x[:, None]
    n = x.shape[0]
    d = x - x.mean(axis=0)
    emp = d.T @ d / n
    s4 = np.mean(np.sum(d * d, axis=1) ** 2)
    return float(_lw_from_moments(emp, np.asarray(s4), n))


def oas_intensity(X: np.ndarray) -> float:
    """Oracle-approximating shrinkage intensity toward ``mu I`` (scikit-learn's value).

    Parameters
    ----------
    X : ndarray, shape (n, p)
        Samples (centred here).

    Returns
    -------
    float
        Equal to ``sklearn.covariance.OAS().fit(X).shrinkage_``.

    References
    ----------
    .. [1] Y. Chen, A. Wiesel, Y. C. Eldar, A. O. Hero, "Shrinkage algorithms
       for MMSE covariance estimation", IEEE Trans. Signal Process. 58 (2010) 5016.
    """
    x = np.asarray(X, dtype=float)
    if x.ndim == 1:
        x = x[:, None]
    n = x.shape[0]
    d = x - x.mean(axis=0)
    return float(_oas_from_emp(d.T @ d / n, n))


# ------------------------------------------------------------ matrix helpers


def _correlation(m: np.ndarray) -> np.ndarray:
    d = np.sqrt(np.diagonal(m, axis1=-2, axis2=-1))
    return m / (d[..., :, None] * d[..., None, :])


def _condition(m: np.ndarray) -> float:
    w = np.linalg.eigvalsh(m)
    if w[0] <= 0:
        return math.inf
    return float(w[-1] / w[0])


def _apply_target(s: np.ndarray, lam: np.ndarray, target: str) -> np.ndarray:
    lam = np.asarray(lam, dtype=float)[..., None, None]
    p = s.shape[-1]
    eye = np.eye(p)
    diag = np.diagonal(s, axis1=-2, axis2=-1)
    if target == "diagonal":
        t = diag[..., :, None] * eye
    else:
        t = (diag.sum(axis=-1) / p)[..., None, None] * eye
    return (1.0 - lam) * s + lam * t


def _apply_floor(m: np.ndarray, floor: float) -> np.ndarray:
    """Raise correlation-matrix eigenvalues below ``floor * max`` to that value.

    The correlation matrix (of ``m``, normalised by its own diagonal) is
    rebuilt from the raised spectrum and rescaled by the same standard
    deviations; raising eigenvalues can only increase the variances, so the
    errors this covariance produces can only grow (a conservative choice).
    """
    d = np.sqrt(np.diagonal(m, axis1=-2, axis2=-1))
    r = m / (d[..., :, None] * d[..., None, :])
    w, v = np.linalg.eigh(r)
    w = np.maximum(w, floor * w[..., -1:])
    r2 = (v * w[..., None, :]) @ np.swapaxes(v, -1, -2)
    r2 = 0.5 * (r2 + np.swapaxes(r2, -1, -2))
    return r2 * (d[..., :, None] * d[..., None, :])


def _singular_error(n_bins: int, p: int, detail: str, method: str | float | None = None,
                    intensity: float = 0.0) -> FitError:
    """The error of a singular covariance, with advice that fits the shrinkage in use."""
    if method == "none" or method is None:
        advice = "use shrinkage 'ledoit-wolf', fewer timeslices, or more bins"
    elif isinstance(method, str) and not intensity > 0:   # an estimate that came out 0
        advice = (f"the {method} estimate of the shrinkage intensity is 0 here, so give a fixed "
                  "shrinkage (a number in (0, 1]), use fewer timeslices, or more bins")
    else:
        advice = "use a larger (fixed) shrinkage, fewer timeslices, or more bins"
    return FitError("", f"the covariance of the mean of {p} points from {n_bins} bins is "
                    f"singular ({detail}); {advice} (a smaller bin size)")


def _is_singular(eig_desc: np.ndarray) -> bool:
    p = eig_desc.shape[-1]
    return bool(eig_desc[-1] <= 100 * p * np.finfo(float).eps * eig_desc[0])


# --------------------------------------------------------------- public API


def covariance_of_mean(
    samples: np.ndarray,
    shrinkage: str | float | None = "ledoit-wolf",
    target: str = "diagonal",
    eigenvalue_floor: float | None = None,
) -> CovarianceResult:
    """Covariance of the mean of binned data, with optional shrinkage.

    Parameters
    ----------
    samples : ndarray, shape (n_bins, p)
        Binned data: one row per bin, one column per fitted point (all
        timeslices of all observables of a fit, concatenated).
    shrinkage : {"ledoit-wolf", "oas", "none"} or float in [0, 1]
        Intensity estimator, or a fixed intensity.
    target : {"diagonal", "identity"}
        ``diagonal``: shrink the correlation matrix toward the identity
        (variances untouched); ``identity``: shrink toward ``trace(S)/p * I``.
    eigenvalue_floor : float in (0, 1), optional
        Eigenvalues of the (shrunk) correlation matrix below
        ``eigenvalue_floor * largest eigenvalue`` are raised to that value;
        the variances can only grow.

    Returns
    -------
    CovarianceResult

    Raises
    ------
    FitError
        When the result is singular (no shrinkage and ``n_bins <= p``, or
        numerically singular), naming both counts; when a component is
        constant across bins, naming it; with fewer than 2 bins.
    SpecError
        For an unknown ``shrinkage``, ``target`` or a bad ``eigenvalue_floor``
        (``where`` is the argument's name).

    References
    ----------
    .. [1] O. Ledoit, M. Wolf, J. Multivar. Anal. 88 (2004) 365.
    .. [2] Y. Chen, A. Wiesel, Y. C. Eldar, A. O. Hero,
       IEEE Trans. Signal Process. 58 (2010) 5016.
    """
    method = _parse_shrinkage(shrinkage)
    target = _parse_target(target)
    floor = _parse_floor(eigenvalue_floor)
    x = _check_samples(samples)
    n, p = x.shape
    dev = x - x.mean(axis=0)
    var = _check_variances(dev, x)
    raw = dev.T @ dev / ((n - 1) * n)
    raw = 0.5 * (raw + raw.T)

    if method == "none":
        lam = 0.0
    elif isinstance(method, float):
        lam = method
    else:
        z = dev / np.sqrt(var) if target == "diagonal" else dev
        emp = z.T @ z / n
        if method == "ledoit-wolf":
            s4 = np.mean(np.sum(z * z, axis=1) ** 2)
            lam = float(_lw_from_moments(emp, np.asarray(s4), n))
        else:
            lam = float(_oas_from_emp(emp, n))
    if lam == 0.0 and n <= p:
        what = "no shrinkage" if method == "none" else "shrinkage intensity 0"
        raise _singular_error(n, p, f"{what} and no more bins than points", method)

    matrix = _apply_target(raw, lam, target) if lam > 0 else raw.copy()
    if floor is not None:
        matrix = _apply_floor(matrix, floor)
    eig_raw = np.linalg.eigvalsh(_correlation(raw))[::-1]
    eig = np.linalg.eigvalsh(_correlation(matrix))[::-1]
    if _is_singular(eig):
        raise _singular_error(n, p, f"smallest correlation eigenvalue {eig[-1]:.3g}", method,
                              lam)
    return CovarianceResult(
        matrix=matrix,
        raw_matrix=raw,
        shrinkage=float(lam),
        target=target,
        condition_number=_condition(matrix),
        condition_number_raw=_condition(raw),
        eigenvalues=eig,
        eigenvalues_raw=eig_raw,
        n_samples=int(n),
    )


class MeanCovariance:
    """Covariance of the mean with shrinkage, as a small estimator object.

    The class form of :func:`covariance_of_mean` (in the manner of
    scikit-learn's covariance estimators): configure, then ``fit(samples)``.

    Parameters
    ----------
    shrinkage : {"ledoit-wolf", "oas", "none"} or float in [0, 1]
    target : {"diagonal", "identity"}
    eigenvalue_floor : float in (0, 1), optional

    Attributes
    ----------
    covariance_ : ndarray (p, p)
        Shrunk covariance of the mean.
    raw_covariance_ : ndarray (p, p)
    shrinkage_ : float
    condition_number_, condition_number_raw_ : float
    eigenvalues_, eigenvalues_raw_ : ndarray (p,)
    n_samples_ : int
    result_ : CovarianceResult

    References
    ----------
    .. [1] O. Ledoit, M. Wolf, J. Multivar. Anal. 88 (2004) 365.
    .. [2] Y. Chen, A. Wiesel, Y. C. Eldar, A. O. Hero,
       IEEE Trans. Signal Process. 58 (2010) 5016.
    """

    def __init__(
        self,
        shrinkage: str | float | None = "ledoit-wolf",
        target: str = "diagonal",
        eigenvalue_floor: float | None = None,
    ) -> None:
        self.shrinkage = shrinkage
        self.target = target
        self.eigenvalue_floor = eigenvalue_floor

    def fit(self, samples: np.ndarray) -> "MeanCovariance":
        """Estimate from binned data ``samples`` (n_bins, p); returns self."""
        res = covariance_of_mean(samples, self.shrinkage, self.target, self.eigenvalue_floor)
        self.result_ = res
        self.covariance_ = res.matrix
        self.raw_covariance_ = res.raw_matrix
        self.shrinkage_ = res.shrinkage
        self.condition_number_ = res.condition_number
        self.condition_number_raw_ = res.condition_number_raw
        self.eigenvalues_ = res.eigenvalues
        self.eigenvalues_raw_ = res.eigenvalues_raw
        self.n_samples_ = res.n_samples
        return self

    def per_sample(self, samples: np.ndarray) -> np.ndarray:
        """Delete-one covariances of the mean, see :func:`per_sample_covariances`."""
        return per_sample_covariances(samples, self.shrinkage, self.target, self.eigenvalue_floor)

    def __repr__(self) -> str:
        return (
            f"MeanCovariance(shrinkage={self.shrinkage!r}, target={self.target!r}, "
            f"eigenvalue_floor={self.eigenvalue_floor!r})"
        )


def per_sample_covariances(
    samples_binned: np.ndarray,
    shrinkage: str | float | None = "ledoit-wolf",
    target: str = "diagonal",
    eigenvalue_floor: float | None = None,
    *,
    return_intensities: bool = False,
) -> np.ndarray | tuple[np.ndarray, np.ndarray]:
    """Covariance of the mean of every delete-one subset of the bins.

    Element ``i`` is what :func:`covariance_of_mean` returns for the bins
    without bin ``i`` -- including a shrinkage intensity *recomputed* on that
    subset, so it is the honest covariance of jackknife sample ``i``.
    Vectorised: the subset scatter matrices are rank-one downdates of the
    full one, ``A - n/(n-1) d_i d_i^T`` (``d_i`` the deviation of bin ``i``
    from the full mean), and the Ledoit-Wolf fourth moments of every subset
    come from one Gram matrix of the deviations; cost O(n^2 p + n p^2).

    Parameters
    ----------
    samples_binned : ndarray, shape (n_bins, p)
        Binned data (n_bins >= 3).
    shrinkage, target, eigenvalue_floor
        As in :func:`covariance_of_mean`.
    return_intensities : bool, default False
        Also return the intensity of each subset, shape (n_bins,).

    Returns
    -------
    ndarray, shape (n_bins, p, p)

    Raises
    ------
    FitError
        As :func:`covariance_of_mean`, for any subset (singular without
        shrinkage when ``n_bins - 1 <= p``; a component constant on a subset).

    References
    ----------
    .. [1] O. Ledoit, M. Wolf, J. Multivar. Anal. 88 (2004) 365.
    .. [2] Y. Chen, A. Wiesel, Y. C. Eldar, A. O. Hero,
       IEEE Trans. Signal Process. 58 (2010) 5016.
    """
    method = _parse_shrinkage(shrinkage)
    target = _parse_target(target)
    floor = _parse_floor(eigenvalue_floor)
    x = _check_samples(samples_binned)
    n, p = x.shape
    if n < 3:
        raise FitError("", f"per-sample covariances need at least 3 bins (each subset at least 2), got {n}")
    m = n - 1  # bins per subset
    d = x - x.mean(axis=0)
    _check_variances(d, x)
    a = d.T @ d
    # scatter of subset i about its own mean: A - n/(n-1) d_i d_i^T
    scatter = a[None, :, :] - (n / m) * d[:, :, None] * d[:, None, :]
    emp_raw = scatter / m  # 1/m empirical covariance of each subset
    var = np.diagonal(emp_raw, axis1=1, axis2=2)  # (n, p)
    scale = np.max(np.abs(x), axis=0)
    bad = (var <= 0) | (np.sqrt(np.clip(var, 0, None)) <= 64 * np.finfo(float).eps * scale)
    if np.any(bad):
        i, j = np.argwhere(bad)[0]
        raise FitError(
            "",
            f"point {j} of the {p} points is constant on the bins without bin {i} "
            f"({n} bins); leave it out of the fit range or use more bins",
        )
    cov = scatter / (m * (m - 1)) if m > 1 else scatter
    cov = 0.5 * (cov + np.swapaxes(cov, 1, 2))

    if method == "none":
        lam = np.zeros(n)
    elif isinstance(method, float):
        lam = np.full(n, method)
    else:
        if target == "diagonal":
            sd = np.sqrt(var)
            emp = emp_raw / (sd[:, :, None] * sd[:, None, :])
            w = 1.0 / var  # (n, p) weight of each component in subset i
        else:
            emp = emp_raw
            w = np.ones((n, p))
        if method == "ledoit-wolf":
            # rows of subset i centred on its mean: x_k - m_i = d_k + e_i, e_i = d_i/(n-1)
            e = d / m
            q = (d * d) @ w.T + 2.0 * d @ (w * e).T + np.sum(w * e * e, axis=1)[None, :]
            q2 = q * q
            s4 = (q2.sum(axis=0) - np.diagonal(q2)) / m
            lam = _lw_from_moments(emp, s4, m)
        else:
            lam = _oas_from_emp(emp, m)
    if np.any(lam == 0.0) and m <= p:
        what = "no shrinkage" if method == "none" else "shrinkage intensity 0"
        raise _singular_error(m, p, f"{what} and no more bins than points in a delete-one "
                              "subset", method)

    out = _apply_target(cov, lam, target)
    if floor is not None:
        out = _apply_floor(out, floor)
    zero = np.flatnonzero(lam == 0.0) if floor is None else np.zeros(0, dtype=int)
    if zero.size:
        eig = np.linalg.eigvalsh(_correlation(out[zero]))[:, ::-1]
        for k, i in enumerate(zero):
            if _is_singular(eig[k]):
                raise _singular_error(m, p, f"delete-one subset {i}, smallest correlation "
                                      f"eigenvalue {eig[k, -1]:.3g}", method)
    if return_intensities:
        return out, np.asarray(lam, dtype=float)
    return out
