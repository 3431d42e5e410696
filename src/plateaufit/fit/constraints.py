"""Priors and bounds of a fit, on the reported parameters of a model.

Users write priors and bounds on the *reported* parameters (``E0``, ``E1``,
``A0.pion`` ...). The minimisers work on the model's *internal* parameters
(``E0`` and positive log-gaps for higher energies, see
:mod:`plateaufit.fit.models`), so this module turns both into arrays: priors as
(index into the reported vector, mean, width), which the minimisers add as
extra residuals ``(P_k(theta) - mean_k) / width_k``, and bounds as a box on the
internal vector.

References
----------
G. P. Lepage, B. Clark, C. T. H. Davies, K. Hornbostel, P. B. Mackenzie,
C. Morningstar, H. Trottier, "Constrained curve fitting", Nucl. Phys. B (Proc.
Suppl.) 106 (2002) 12 -- Gaussian priors as an augmented chi-square.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from plateaufit.errors import FitError
from plateaufit.fit.models import CorrelatorModel, ParameterLayout

__all__ = ["Prior", "prior_terms", "bound_pairs", "internal_bounds", "clip_into"]


@dataclass(frozen=True)
class Prior:
    """A Gaussian prior on a reported parameter: ``((P - mean) / width)^2`` in chi2.

    References
    ----------
    G. P. Lepage et al., "Constrained curve fitting", Nucl. Phys. B (Proc.
    Suppl.) 106 (2002) 12.
    """

    mean: float
    width: float

    def __post_init__(self) -> None:
        if not (math.isfinite(self.mean) and math.isfinite(self.width) and self.width > 0):
            raise ValueError(f"a prior needs a finite mean and a positive finite width, "
                             f"got mean={self.mean}, width={self.width}")


def prior_terms(model: CorrelatorModel, priors: Mapping[str, Any] | None
                ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Priors as arrays: (index into the reported parameters, means, widths).

    Parameters
    ----------
    model : CorrelatorModel
    priors : mapping, optional
        Reported name -> :class:`Prior` or ``(mean, width)``.

    Raises
    ------
    plateaufit.errors.FitError
        ``where="priors.NAME"`` for an unknown name or a bad width.
    """
    if not priors:
        return np.zeros(0, dtype=np.intp), np.zeros(0), np.zeros(0)
    index = {n: i for i, n in enumerate(model.reported_names)}
    idx, mean, width = [], [], []
    for name, prior in priors.items():
        if name not in index:
            raise FitError(f"priors.{name}", f"there is no parameter '{name}' in this fit; "
                           f"priors may be set on {list(model.reported_names)}")
        try:
            p = prior if isinstance(prior, Prior) else Prior(*(float(v) for v in prior))
        except (TypeError, ValueError) as exc:
            raise FitError(f"priors.{name}", f"write a prior as [mean, width]: {exc}") from None
        idx.append(index[name])
        mean.append(p.mean)
        width.append(p.width)
    return np.array(idx, dtype=np.intp), np.array(mean), np.array(width)


def bound_pairs(model: CorrelatorModel, bounds: Mapping[str, Any] | None
                ) -> tuple[np.ndarray, np.ndarray]:
    """Bounds on the reported parameters as two arrays (``-inf``/``inf`` where free).

    Raises
    ------
    plateaufit.errors.FitError
        ``where="bounds.NAME"`` for an unknown name or a malformed pair.
    """
    lo = np.full(model.n_params, -np.inf)
    hi = np.full(model.n_params, np.inf)
    if not bounds:
        return lo, hi
    index = {n: i for i, n in enumerate(model.reported_names)}
    for name, pair in bounds.items():
        if name not in index:
            raise FitError(f"bounds.{name}", f"there is no parameter '{name}' in this fit; "
                           f"bounds may be set on {list(model.reported_names)}")
        try:
            a, b = pair
            a = -np.inf if a is None else float(a)
            b = np.inf if b is None else float(b)
        except (TypeError, ValueError):
            raise FitError(f"bounds.{name}", f"write bounds as [lower, upper], got {pair!r}"
                           ) from None
        if not a < b or np.isnan(a) or np.isnan(b):
            raise FitError(f"bounds.{name}", f"bounds must be [lower, upper] with "
                           f"lower < upper, got [{a}, {b}]")
        lo[index[name]], hi[index[name]] = a, b
    return lo, hi


def internal_bounds(model: CorrelatorModel, bounds: Mapping[str, Any] | None
                    ) -> tuple[np.ndarray, np.ndarray]:
    """Bounds on the reported parameters, mapped to the internal parameters.

    Parameters
    ----------
    model : CorrelatorModel
    bounds : mapping, optional
        Reported name -> ``(lower, upper)``; ``None`` for no bound on a side.

    Returns
    -------
    lower, upper : ndarray, (n_params,)
        Bounds on the internal parameters (``-inf``/``inf`` where free).

    Notes
    -----
    Amplitudes, constants, ``E0`` and ``Eosc0`` are internal parameters
    themselves: their bounds are exact. A higher energy ``E_n`` is
    ``E_{n-1} + exp(lgap_n)``; its bound ``[lo_n, hi_n]`` becomes a bound on
    the gap by interval arithmetic, ``gap_n in [max(lo_n - H_{n-1}, 0),
    hi_n - L_{n-1}]``, where ``[L_{n-1}, H_{n-1}]`` is the range ``E_{n-1}``
    is confined to by the bounds below it. This is a necessary condition, so
    ``E_n`` can end a fit outside ``[lo_n, hi_n]`` when ``E_{n-1}`` is not at
    the end of its range; the central fit reports that in its message.
    A bound that the lower states make impossible raises ``FitError``.
    """
    lo_ph, hi_ph = bound_pairs(model, bounds)
    lo, hi = lo_ph.copy(), hi_ph.copy()
    layout: ParameterLayout = model.layout
    if model.form == "formula":
        return lo, hi
    names = model.reported_names
    for family, label in (("energies", "E"), ("oscillating_energies", "Eosc")):
        first_ph = layout.reported[family].start
        first_in = layout.internal[family].start
        m = layout.reported[family].stop - first_ph
        if m == 0:
            continue
        L, H = lo_ph[first_ph], hi_ph[first_ph]
        lo[first_in], hi[first_in] = L, H
        for n in range(1, m):
            a, b = lo_ph[first_ph + n], hi_ph[first_ph + n]
            gap_lo = max(a - H, 0.0) if np.isfinite(a) else 0.0
            gap_hi = b - L if np.isfinite(b) else np.inf
            if not gap_hi > 0 or gap_hi <= gap_lo:
                raise FitError(f"bounds.{names[first_ph + n]}",
                               f"the bounds [{a}, {b}] of {label}{n} leave no room above "
                               f"{label}{n - 1} (which may reach {L}); widen them")
            lo[first_in + n] = np.log(gap_lo) if gap_lo > 0 else -np.inf
            hi[first_in + n] = np.log(gap_hi) if np.isfinite(gap_hi) else np.inf
            L = max(a, L + gap_lo)
            H = min(b, H + gap_hi)
    # the other families map one-to-one onto internal parameters
    for family in ParameterLayout.LINEAR_FAMILIES:
        ph, sl = layout.reported[family], layout.internal[family]
        lo[sl], hi[sl] = lo_ph[ph], hi_ph[ph]
    return lo, hi


def clip_into(theta: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
    """Move a start strictly inside the bounds (scipy refuses a start on a bound)."""
    out = np.array(theta, dtype=float, copy=True)
    for k in range(out.size):
        a, b = lo[k], hi[k]
        if a < out[k] < b:
            continue
        if np.isfinite(a) and np.isfinite(b):
            margin = 1e-6 * (b - a)
            out[k] = min(max(out[k], a + margin), b - margin) if np.isfinite(out[k]) \
                else 0.5 * (a + b)
        elif np.isfinite(a):
            out[k] = a + max(1e-6 * abs(a), 1e-6)
        else:
            out[k] = b - max(1e-6 * abs(b), 1e-6)
    return out
