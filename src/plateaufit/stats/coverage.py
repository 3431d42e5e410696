"""Coverage of error bars on replicas with a known truth, and the uniformity of p-values.

Given ``M`` independent estimates ``v_r`` with error bars ``e_r`` of a known
truth ``theta`` (replicas of an ensemble, :mod:`plateaufit.stats.replicas`):

* the pull ``z_r = (v_r - theta) / e_r``;
* the coverage at ``k`` sigma, the fraction of replicas with ``|z_r| < k``,
  against the Gaussian ``erf(k / sqrt 2)`` (0.6827 at 1 sigma, 0.9545 at 2);
  its binomial standard error ``sqrt(c (1 - c) / M)`` (``c`` the measured
  coverage), and the band ``nominal +- 2 sqrt(nominal (1 - nominal) / M)``
  inside which an honest error falls 95 % of the time;
* the bias in units of the error, ``mean(v - theta) / rms(e)``, with its
  standard error ``std(v) / sqrt(M) / rms(e)``;
* the rms pull (1 for honest Gaussian errors);
* the ratio of the replica scatter ``std(v)`` to the rms error ``rms(e)``
  (1 when the errors measure the spread; independent of the truth, so of a
  bias).

The p-values of honest fits are uniform: :func:`p_value_uniformity` gives the
Kolmogorov-Smirnov distance to the uniform distribution and its p-value
(scipy.stats.kstest).

References
----------
.. [1] J. Neyman, "Outline of a theory of statistical estimation based on the
   classical theory of probability", Phil. Trans. R. Soc. A 236 (1937) 333 --
   coverage of confidence intervals.
.. [2] A. N. Kolmogorov, Giornale dell'Istituto Italiano degli Attuari 4 (1933) 83;
   N. Smirnov, Ann. Math. Stat. 19 (1948) 279 -- the KS test.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import stats as _sps

from plateaufit.errors import DataError

__all__ = ["CoverageStats", "coverage_stats", "nominal_coverage", "coverage_band",
           "p_value_uniformity"]


def nominal_coverage(k: float) -> float:
    """Gaussian coverage of ``+- k`` sigma, ``erf(k / sqrt 2)``."""
    return math.erf(k / math.sqrt(2.0))


def coverage_band(nominal: float, n: int, width: float = 2.0) -> tuple[float, float]:
    """``nominal +- width sqrt(nominal (1 - nominal) / n)``, clipped to [0, 1]."""
    if n < 1:
        return (0.0, 1.0)
    half = width * math.sqrt(nominal * (1.0 - nominal) / n)
    return (max(0.0, nominal - half), min(1.0, nominal + half))


@dataclass(frozen=True)
class CoverageStats:
    """Coverage, bias and spread of one parameter over replicas (see the module notes).

    Attributes
    ----------
    n : int
        Replicas used (finite value and positive finite error).
    coverage_1sigma, coverage_2sigma : float
    coverage_1sigma_error, coverage_2sigma_error : float
        Binomial standard errors of the measured coverages.
    band_1sigma, band_2sigma : tuple of float
        The nominal 2-standard-error bands.
    bias_over_error, bias_over_error_error : float
    pull_rms : float
    scatter_over_error : float
    mean_error : float
        rms of the error bars.
    pulls : ndarray (n,)
    """

    n: int
    coverage_1sigma: float
    coverage_2sigma: float
    coverage_1sigma_error: float
    coverage_2sigma_error: float
    band_1sigma: tuple[float, float]
    band_2sigma: tuple[float, float]
    bias_over_error: float
    bias_over_error_error: float
    pull_rms: float
    scatter_over_error: float
    mean_error: float
    pulls: np.ndarray

    @property
    def outside_1sigma(self) -> bool:
        lo, hi = self.band_1sigma
        return self.n > 0 and not lo <= self.coverage_1sigma <= hi

    @property
    def outside_2sigma(self) -> bool:
        lo, hi = self.band_2sigma
        return self.n > 0 and not lo <= self.coverage_2sigma <= hi

    @property
    def outside(self) -> bool:
        """Either coverage outside its band."""
        return self.outside_1sigma or self.outside_2sigma


def coverage_stats(values: np.ndarray, errors: np.ndarray, truth: float) -> CoverageStats:
    """Coverage statistics of estimates ``values`` with error bars ``errors`` of ``truth``.

    Parameters
    ----------
    values, errors : array (M,)
        One estimate and its error per replica; replicas with a non-finite
        value or a non-positive or non-finite error are left out.
    truth : float

    Returns
    -------
    CoverageStats
        NaN statistics when fewer than 2 replicas are usable.

    Raises
    ------
    DataError
        ``values`` and ``errors`` of different shapes, or a non-finite truth.

    References
    ----------
    J. Neyman, Phil. Trans. R. Soc. A 236 (1937) 333.
    """
    v = np.asarray(values, dtype=float).ravel()
    e = np.asarray(errors, dtype=float).ravel()
    if v.shape != e.shape:
        raise DataError("errors", f"{e.size} errors for {v.size} values; give one per replica")
    if not math.isfinite(float(truth)):
        raise DataError("truth", f"the truth must be finite, got {truth!r}")
    ok = np.isfinite(v) & np.isfinite(e) & (e > 0)
    v, e = v[ok], e[ok]
    n = int(v.size)
    band1 = coverage_band(nominal_coverage(1.0), n)
    band2 = coverage_band(nominal_coverage(2.0), n)
    if n < 2:
        nan = math.nan
        return CoverageStats(n, nan, nan, nan, nan, band1, band2, nan, nan, nan, nan, nan,
                             (v - truth) / e)
    z = (v - truth) / e
    c1 = float(np.mean(np.abs(z) < 1.0))
    c2 = float(np.mean(np.abs(z) < 2.0))
    rms_e = float(np.sqrt(np.mean(e * e)))
    sd = float(np.std(v, ddof=1))
    return CoverageStats(
        n=n, coverage_1sigma=c1, coverage_2sigma=c2,
        coverage_1sigma_error=math.sqrt(c1 * (1.0 - c1) / n),
        coverage_2sigma_error=math.sqrt(c2 * (1.0 - c2) / n),
        band_1sigma=band1, band_2sigma=band2,
        bias_over_error=float(np.mean(v - truth)) / rms_e,
        bias_over_error_error=sd / math.sqrt(n) / rms_e,
        pull_rms=float(np.sqrt(np.mean(z * z))),
        scatter_over_error=sd / rms_e, mean_error=rms_e, pulls=z)


def p_value_uniformity(p_values: np.ndarray) -> tuple[float, float]:
    """Kolmogorov-Smirnov distance of ``p_values`` to the uniform distribution, and its p-value.

    Non-finite p-values are left out; NaN for fewer than 2.

    References
    ----------
    scipy.stats.kstest; Kolmogorov (1933), Smirnov (1948).
    """
    p = np.asarray(p_values, dtype=float).ravel()
    p = p[np.isfinite(p)]
    if p.size < 2:
        return math.nan, math.nan
    res = _sps.kstest(p, "uniform")
    return float(res.statistic), float(res.pvalue)
