"""Model averaging over fit ranges and model sizes with AIC weights.

A fit-range scan gives many fits of the same quantity; none of them is "the"
answer. Following Jay & Neil (2021), each fit ``f`` gets the weight

    w_f ∝ exp(-(AIC_f - min AIC) / 2),

with ``AIC = chi2 + 2 k + 2 n_cut`` (``k`` fitted parameters, ``n_cut`` data
points of the full data set left out of the fit range; the fit core computes
it). Non-converged fits get weight 0. The averaged value of a parameter is
``sum_f w_f a_f``; its statistical error comes from averaging every jackknife
sample with the same weights (so correlations between the fits, which share
the data, are kept), and its systematic error from the weighted spread of the
central values,

    sys^2 = sum_f w_f a_f^2 - (sum_f w_f a_f)^2,

the total being ``sqrt(stat^2 + sys^2)``.

A parameter a fit does not have (``E1`` in a one-state fit) is given as NaN
in that fit's row; the average of that parameter runs over the fits that have
it, with their weights renormalised among themselves.

References
----------
W. I. Jay, E. T. Neil, "Bayesian model averaging for analysis of lattice field
theory results", Phys. Rev. D 103 (2021) 114502.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any
from dataclasses import dataclass, field

import numpy as np

from plateaufit.errors import FitError


@dataclass(frozen=True)
class ModelAverage:
    """Result of :func:`model_average`.

    Attributes
    ----------
    names : tuple of str
        Parameter names, in the order of the columns given.
    value : dict
        Name -> averaged central value ``sum_f w_f a_f``.
    stat_error : dict
        Name -> jackknife error of the weighted average of the samples.
    sys_error : dict
        Name -> ``sqrt(sum_f w_f a_f^2 - value^2)``, the spread over the fits.
    error : dict
        Name -> ``sqrt(stat_error^2 + sys_error^2)``.
    weights : numpy.ndarray
        ``(n_fits,)`` normalised AIC weights (0 for non-converged fits).
    n_excluded : int
        Number of fits given weight 0 (not converged, or flagged degenerate).
    samples : dict
        Name -> ``(S,)`` averaged jackknife samples ``sum_f w_f samples_f`` (the
        combination whose jackknife error is ``stat_error``), for propagating
        the average into derived quantities.
    """

    names: tuple[str, ...]
    value: dict[str, float]
    stat_error: dict[str, float]
    sys_error: dict[str, float]
    error: dict[str, float]
    weights: np.ndarray
    n_excluded: int
    samples: dict[str, np.ndarray] = field(default_factory=dict, repr=False)


def aic_weights(aic: np.ndarray | Sequence[float],
                converged: np.ndarray | Sequence[bool]) -> np.ndarray:
    """Normalised Akaike weights ``w_f ∝ exp(-(AIC_f - min AIC)/2)``.

    Parameters
    ----------
    aic : array_like, shape (n_fits,)
        AIC of each fit, ``chi2 + 2 k + 2 n_cut``.
    converged : array_like of bool, shape (n_fits,)
        Whether each fit converged. Non-converged fits, and fits with a
        non-finite AIC, get weight 0 and do not enter the minimum.

    Returns
    -------
    numpy.ndarray, shape (n_fits,)
        Non-negative weights summing to 1.

    Raises
    ------
    FitError
        When the lengths differ or no fit is usable (all non-converged).

    References
    ----------
    W. I. Jay, E. T. Neil, "Bayesian model averaging for analysis of lattice
    field theory results", Phys. Rev. D 103 (2021) 114502.
    """
    aic = np.asarray(aic, dtype=float)
    converged = np.asarray(converged, dtype=bool)
    if aic.ndim != 1 or converged.shape != aic.shape:
        raise FitError("", f"aic and converged must be 1-d of the same length; got shapes "
                           f"{aic.shape} and {converged.shape}")
    usable = converged & np.isfinite(aic)
    if not usable.any():
        raise FitError("", f"none of the {aic.size} fits in the average is usable (each did "
                           "not converge or was flagged degenerate); widen the fit ranges, "
                           "use fewer states, add priors, or check the data")
    shifted = np.where(usable, aic - aic[usable].min(), np.inf)
    raw = np.where(usable, np.exp(-0.5 * np.where(usable, shifted, 0.0)), 0.0)
    return raw / raw.sum()


def _jackknife_error(samples: np.ndarray) -> float:
    # delete-one jackknife: sqrt((N-1)/N * sum (x_i - xbar)^2)
    n = samples.shape[0]
    return float(np.sqrt((n - 1) / n * np.sum((samples - samples.mean()) ** 2)))


def model_average(central: np.ndarray, samples: np.ndarray,
                  aic: np.ndarray | Sequence[float],
                  converged: np.ndarray | Sequence[bool],
                  names: Sequence[str]) -> ModelAverage:
    """AIC-weighted model average of fit parameters with stat and sys errors.

    Parameters
    ----------
    central : array_like, shape (n_fits, p)
        Central-fit values of the parameters ``names`` in each fit. NaN marks
        a parameter the fit does not have.
    samples : array_like, shape (n_fits, S, p)
        Jackknife samples of the same parameters; all fits share the same
        ``S`` jackknife samples (the same binned data, the same deletions).
    aic : array_like, shape (n_fits,)
        AIC of each fit.
    converged : array_like of bool, shape (n_fits,)
        Whether each fit may enter the average; the others get weight 0
        (see :func:`usable_fits`).
    names : sequence of str, length p
        Parameter names.

    Returns
    -------
    ModelAverage

    Raises
    ------
    FitError
        On inconsistent shapes (in particular fits with different numbers of
        jackknife samples), when no fit converged, or when a converged fit
        with weight has non-finite jackknife samples of a parameter it has.

    Notes
    -----
    For a parameter present in the fits ``F`` (non-NaN central value) the
    weights are ``w_f / sum_{g in F} w_g``. The averaged sample ``s`` is
    ``sum_f w_f samples_f``; the statistical error is its jackknife error
    ``sqrt((S-1)/S sum_s (x_s - xbar)^2)``. This keeps the correlation of the
    fits (which share the data); when the fits' samples move together it
    equals the ``sum_f w_f sigma_f^2`` term of Jay & Neil's variance, and it
    is never larger than that term (the jackknife error is a seminorm, so
    ``|sum_f w_f x_f| <= sum_f w_f |x_f| <= sqrt(sum_f w_f |x_f|^2)``).

    References
    ----------
    W. I. Jay, E. T. Neil, "Bayesian model averaging for analysis of lattice
    field theory results", Phys. Rev. D 103 (2021) 114502.
    """
    names = tuple(str(n) for n in names)
    central = np.asarray(central, dtype=float)
    samples = np.asarray(samples, dtype=float)
    p = len(names)
    if central.ndim != 2 or central.shape[1] != p:
        raise FitError("", f"central values must have shape (n_fits, {p}) for the {p} names "
                           f"{list(names)}; got {central.shape}")
    n_fits = central.shape[0]
    if samples.ndim != 3 or samples.shape[0] != n_fits or samples.shape[2] != p:
        raise FitError("", "all fits in an average must share the same jackknife samples: "
                           f"expected samples of shape ({n_fits}, S, {p}), got {samples.shape}; "
                           "fit every range on the same binned data")
    if samples.shape[1] < 2:
        raise FitError("", f"a jackknife error needs at least 2 samples, got {samples.shape[1]}")
    converged = np.asarray(converged, dtype=bool)
    weights = aic_weights(aic, converged)
    if weights.shape[0] != n_fits:
        raise FitError("", f"got {weights.shape[0]} AIC values for {n_fits} fits")
    n_excluded = int(np.count_nonzero(~converged))

    value: dict[str, float] = {}
    averaged: dict[str, np.ndarray] = {}
    stat: dict[str, float] = {}
    sys: dict[str, float] = {}
    total: dict[str, float] = {}
    for j, name in enumerate(names):
        has = np.isfinite(central[:, j]) & (weights > 0)
        if not has.any():
            nan = float("nan")
            value[name], stat[name], sys[name], total[name] = nan, nan, nan, nan
            averaged[name] = np.full(samples.shape[1], nan)
            continue
        w = weights[has] / weights[has].sum()
        a = central[has, j]
        s = samples[has, :, j]
        if not np.all(np.isfinite(s)):
            bad = np.flatnonzero(has)[~np.all(np.isfinite(s), axis=1)]
            raise FitError("", f"jackknife samples of {name} are not finite in fit(s) "
                               f"{bad.tolist()} that carry weight; mark those fits as not "
                               "converged or refit them")
        mean = float(w @ a)
        spread = float(w @ (a - mean) ** 2)   # = sum w a^2 - mean^2, computed stably
        averaged_samples = w @ s              # (S,)
        averaged[name] = averaged_samples
        value[name] = mean
        stat[name] = _jackknife_error(averaged_samples)
        sys[name] = float(np.sqrt(max(spread, 0.0)))
        total[name] = float(np.hypot(stat[name], sys[name]))
    return ModelAverage(names=names, value=value, stat_error=stat, sys_error=sys,
                        error=total, weights=weights, n_excluded=n_excluded, samples=averaged)


def average_fits(fits: Sequence[Any]) -> ModelAverage:
    """Model-average every parameter of a scan over the fits that have it.

    Parameters
    ----------
    fits : sequence of CorrelatorFit
        The points of one scan, fitted on the same binned data (so they share
        their jackknife samples). Their parameter sets may differ: ``E1``
        exists only in the fits with two or more states, and is averaged over
        those, their weights renormalised among them (see
        :func:`model_average`).

    Returns
    -------
    ModelAverage
        Over the union of the fits' parameter names, in order of first
        appearance; ``weights`` are the weights of all fits.

    Notes
    -----
    A fit gets weight 0 (and is counted in ``n_excluded``) when it did not
    converge, when a diagnostic flag makes it degenerate (a collapsed ground
    state, merged energies, a parameter on a bound, refits spread far wider
    or narrower than its curvature allows; see
    :mod:`plateaufit.fit.diagnostics`), or when its ground-state energy ``E0``
    is not positive. The parameters of a state a fit does not resolve (all
    its amplitudes compatible with zero) are left out of those parameters'
    averages, as if the fit did not have them; the fit still counts for the
    others.

    The weights are the central fits' AIC weights, the same for every
    jackknife sample: the averaged sample is ``sum_f w_f samples_f``. Weights
    recomputed per sample would make the average a different (nonlinear)
    function on every sample, and a point whose weight jumps between samples
    would put the jump into the error; with fixed weights the jackknife error
    of the average is at most ``sum_f w_f sigma_f`` (the triangle inequality),
    hence at most the ``sqrt(sum_f w_f sigma_f^2)`` of Jay and Neil's
    variance, and a point of weight ``w`` moves it by at most ``w`` times its
    own error.

    References
    ----------
    W. I. Jay, E. T. Neil, "Bayesian model averaging for analysis of lattice
    field theory results", Phys. Rev. D 103 (2021) 114502.
    """
    names: list[str] = []
    for fit in fits:
        names.extend(n for n in fit.model.reported_names if n not in names)
    n_samples = {fit.samples.shape[0] for fit in fits}
    if len(n_samples) != 1:
        raise FitError("", "all fits in an average must share the same jackknife samples; "
                           f"got sample counts {sorted(n_samples)}")
    (s_count,) = n_samples
    central = np.full((len(fits), len(names)), np.nan)
    samples = np.full((len(fits), s_count, len(names)), np.nan)
    for i, fit in enumerate(fits):
        left_out = set(getattr(fit, "undetermined", ()) or ())
        for j, name in enumerate(fit.model.reported_names):
            if name in left_out:
                continue
            k = names.index(name)
            central[i, k] = fit.central.reported[name]
            samples[i, :, k] = fit.samples[:, j]
    aic = np.array([fit.central.aic for fit in fits], dtype=float)
    return model_average(central, samples, aic, usable_fits(fits), names)


def usable_fits(fits: Sequence[Any]) -> np.ndarray:
    """Per fit: converged, not degenerate by its flags, and no ``E0 <= 0``."""
    return np.array([bool(fit.converged) and not getattr(fit, "degenerate", False)
                     for fit in fits], dtype=bool) & positive_ground_state(fits)


def positive_ground_state(fits: Sequence[Any]) -> np.ndarray:
    """Per fit: False where the central fit's ``E0`` exists and is not positive."""
    return np.array([not (fit.central.reported.get("E0", 1.0) <= 0.0) for fit in fits],
                    dtype=bool)
