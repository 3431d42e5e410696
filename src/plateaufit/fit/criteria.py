"""Goodness of fit and information criteria of a correlated fit.

References
----------
H. Hotelling, "The generalization of Student's ratio", Ann. Math. Statist. 2
(1931) 360 -- the T^2 distribution when the covariance is estimated from the
same samples.

W. I. Jay, E. T. Neil, "Bayesian model averaging for analysis of lattice field
theory results", Phys. Rev. D 103 (2021) 114502 -- AIC with the data-subset
penalty.
"""

from __future__ import annotations

import numpy as np

__all__ = ["chi2_p_value", "hotelling_p_value", "aic"]


def chi2_p_value(chi2: float, dof: int) -> float:
    """``P(X >= chi2)`` for ``X ~ chi2(dof)``; NaN when ``dof < 1``."""
    if dof < 1 or not np.isfinite(chi2):
        return float("nan")
    import scipy.stats   # deferred: scipy.stats takes ~0.6 s to import

    return float(scipy.stats.chi2.sf(chi2, dof))


def hotelling_p_value(chi2: float, dof: int, n_samples: int | None) -> float:
    """p-value of chi2 when the covariance was estimated from ``n_samples`` samples.

    With ``T^2 = chi2`` and ``d = dof``, ``(N - d) / (d (N - 1)) T^2`` follows
    the F distribution ``F(d, N - d)`` (Hotelling 1931); the p-value is its
    survival function. NaN when ``N <= d``, ``d < 1`` or ``N`` is unknown.

    Notes
    -----
    The distribution is exact for Gaussian data fitted with the unshrunk
    sample covariance of the mean; with shrinkage it is only an
    approximation.

    References
    ----------
    H. Hotelling, "The generalization of Student's ratio", Ann. Math. Statist.
    2 (1931) 360. Its use for correlated lattice fits, where the covariance of
    the mean is estimated from the same N bins, is common practice (from
    memory).
    """
    if n_samples is None or dof < 1 or n_samples <= dof or not np.isfinite(chi2):
        return float("nan")
    import scipy.stats   # deferred (see chi2_p_value)

    n, d = float(n_samples), float(dof)
    return float(scipy.stats.f.sf((n - d) / (d * (n - 1.0)) * chi2, d, n - d))


def aic(chi2: float, n_params: int, n_cut: int = 0) -> float:
    """Akaike information criterion with the data-subset penalty, ``chi2 + 2k + 2 n_cut``.

    References
    ----------
    W. I. Jay, E. T. Neil, "Bayesian model averaging for analysis of lattice
    field theory results", Phys. Rev. D 103 (2021) 114502.
    """
    return float(chi2 + 2.0 * n_params + 2.0 * n_cut)
