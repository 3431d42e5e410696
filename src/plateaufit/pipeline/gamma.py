"""``covariance.estimator: gamma``: one fit's covariance of the mean from the unbinned data.

The default estimator (``binned``) takes the covariance of the mean of a fit range
from the covariance of its bins: with ``n_bins`` bins of ``p`` points it has
``n_bins - 1`` degrees of freedom, whatever the number of configurations, and
is noisy (and strongly shrunk) when the bins are few. ``gamma`` estimates it
from the windowed autocorrelation matrix of the per-configuration data
(:func:`plateaufit.stats.gamma_covariance.gamma_covariance`, Wolff 2004), which
uses every configuration and every lag inside the window: no statistics are
lost to binning.

What is estimated: the folded, aligned per-configuration data of the fit's
observables over the span of the scan (``min tmin .. max tmax``, every
observable), with the streams of the ensemble, one common window, the spec's
``shrinkage``, ``target`` and ``eigenvalue_floor`` (the intensity computed
once for the span, not per range), made positive definite. The result is
embedded in a matrix over all timeslices of the fit's observables (NaN outside
the span) and handed to the fit core as ``covariance_matrix``: each range takes
its block (a principal block of a positive-definite matrix is positive
definite). The central fit and every jackknife refit use that block; the
refits still run on the jackknife samples of the bins, so the parameter errors
are jackknife errors as with ``binned``.

References
----------
U. Wolff, "Monte Carlo errors with less errors", Comput. Phys. Commun. 156
(2004) 143.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np

from plateaufit.errors import PlateaufitError
from plateaufit.pipeline.prepare import Prepared
from plateaufit.specfile import FitSpec, Spec
from plateaufit.stats.autocorr import ShortChainWarning
from plateaufit.stats.gamma_covariance import GammaCovarianceResult, gamma_covariance

__all__ = ["EmbeddedCovariance", "gamma_fit_covariance", "ESTIMATOR_KEY"]

ESTIMATOR_KEY = "covariance.estimator"


@dataclass(frozen=True)
class EmbeddedCovariance:
    """A covariance of the mean over all timeslices of a fit's observables.

    Attributes
    ----------
    matrix, raw_matrix : ndarray (P, P)
        ``P = sum n_t`` over the fit's observables in its order; NaN outside
        the span ``tmin .. tmax`` that was estimated.
    shrinkage : float
    target : str
    tmin, tmax : int
        The span estimated (every observable).
    estimate : GammaCovarianceResult
        The estimate over the span (window, tau_int, clipped eigenvalues).
    """

    matrix: np.ndarray
    raw_matrix: np.ndarray
    shrinkage: float
    target: str
    tmin: int
    tmax: int
    estimate: GammaCovarianceResult


def gamma_fit_covariance(spec: Spec, fit: FitSpec, prepared: Prepared) -> EmbeddedCovariance:
    """The Gamma-method covariance of the mean of fit ``fit``, for ``covariance_matrix``.

    Raises
    ------
    FitError, DataError
        At ``covariance.estimator``, naming the fit, when the data do not
        give a covariance (a constant timeslice, too few configurations).
    """
    ens = prepared.ensemble
    lo, hi = min(fit.tmin_values), max(fit.tmax_values)
    sizes = [int(ens.correlators[name].shape[1]) for name in fit.observables]
    hi = min(hi, min(sizes) - 1)
    span = np.concatenate([ens.correlators[name][:, lo:hi + 1] for name in fit.observables],
                          axis=1)
    c = spec.covariance
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", ShortChainWarning)   # prepare reports tau_int
            est = gamma_covariance(span, ens.stream_labels, shrinkage=c.shrinkage,
                                   target=c.target, eigenvalue_floor=c.eigenvalue_floor)
    except PlateaufitError as err:
        raise type(err)(ESTIMATOR_KEY, f"fit {fit.name}: the gamma estimator over t = "
                        f"{lo}..{hi}: {err.message}") from None
    total = sum(sizes)
    offsets = np.cumsum([0] + sizes[:-1])
    index = np.concatenate([o + np.arange(lo, hi + 1) for o in offsets])
    matrix = np.full((total, total), np.nan)
    raw = np.full((total, total), np.nan)
    matrix[np.ix_(index, index)] = est.matrix
    raw[np.ix_(index, index)] = est.raw_matrix
    return EmbeddedCovariance(matrix=matrix, raw_matrix=raw, shrinkage=float(est.shrinkage),
                              target=str(est.target), tmin=int(lo), tmax=int(hi), estimate=est)
