"""Typed results of a correlator matrix (``matrices.NAME`` of results.json).

A :class:`MatrixResult` holds what the variational analysis of one matrix
found, beside the fits of its levels (which are ordinary ``fits.NAME`` entries
with ``matrix`` and ``level`` set): the effective energies of every principal
correlator, the eigenvectors against ``t``, crossing counts and level
separations, the overlaps ``Z_in``, the condition number of ``C(t0)``, the
asymmetry of the grid, and for each level fit the crossings and separations
inside its range (the facts the warnings table reads). Like
:mod:`plateaufit.pipeline.results` it holds types only (numpy and the standard
library) with one ``to_dict``/``from_dict`` each; NaN and inf are written as
``null``.

References
----------
.. [1] B. Blossier, M. Della Morte, G. von Hippel, T. Mendes, R. Sommer, JHEP 04
   (2009) 094 -- principal correlators, their effective energies and the
   overlaps from the eigenvectors.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

__all__ = ["PrincipalEnergy", "OverlapSummary", "LevelCheck", "MatrixResult",
           "OVERLAP_NORMALISATION"]

#: how the overlaps are normalised (written beside them in results.json and the report)
OVERLAP_NORMALISATION = (
    "Z_in = <0|O_i|n>, the amplitudes of C_ij(t) = sum_n Z_in Z_jn g(E_n, t) with "
    "g = exp(-E t) (exp), exp(-E t) + exp(-E (T - t)) (cosh) or exp(-E t) - exp(-E (T - t)) "
    "(sinh); estimated as (C(t) v_n)_i / sqrt(v_n^T C(t) v_n g(E_n, t)) from the GEVP "
    "eigenvectors at t and the fitted E_n (Blossier et al. 2009); relative: |Z_in| / "
    "max_m |Z_im|, per operator")


def _f(x: Any) -> float:
    if x is None or isinstance(x, bool):
        return math.nan
    try:
        return float(x)
    except (TypeError, ValueError):
        return math.nan


def _arr(x: Any, dtype: type = float) -> np.ndarray:
    if x is None:
        return np.array([], dtype=dtype)
    a = np.array(x, dtype=float)            # None (a NaN written as null) -> nan
    return a if dtype is float else a.astype(dtype)


def _opt_int(x: Any) -> int | None:
    return None if x is None else int(x)


@dataclass(frozen=True)
class PrincipalEnergy:
    """Effective energy of one principal correlator (``matrices.NAME.principal[n]``).

    ``value[k]`` is from the pair ``t[k], t[k] + 1``, with the GEVP at
    ``t0[k]`` (constant for a fixed ``t0``; ``ceil(t/2)`` for ``t0: half``);
    ``crossings[k]`` counts the jackknife samples out of the central's
    eigenvalue order at either timeslice.
    """

    t: np.ndarray
    t0: np.ndarray
    value: np.ndarray
    error: np.ndarray
    kind: str
    crossings: np.ndarray

    def to_dict(self) -> dict[str, Any]:
        return {"t": self.t, "t0": self.t0, "value": self.value, "error": self.error,
                "kind": self.kind, "crossings": self.crossings}

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> PrincipalEnergy:
        return cls(t=_arr(d.get("t"), int), t0=_arr(d.get("t0"), int),
                   value=_arr(d.get("value")), error=_arr(d.get("error")),
                   kind=str(d.get("kind", "log")), crossings=_arr(d.get("crossings"), int))


@dataclass(frozen=True)
class OverlapSummary:
    """Overlaps ``Z_in`` of operator ``i`` onto level ``n`` (``matrices.NAME.overlaps``).

    Arrays are (r, n_levels); a level without a fit has NaN overlaps. ``t[n]`` is
    the timeslice of ``C(t)`` and the eigenvectors used for level ``n`` (the start of
    its fit's chosen range; None when not fitted), ``t0`` the GEVP's, ``form`` the time
    dependence assumed for every level (exp, cosh or sinh).
    """

    t: list[int | None]
    t0: int
    form: str
    value: np.ndarray
    error: np.ndarray
    relative: np.ndarray
    relative_error: np.ndarray
    normalisation: str = OVERLAP_NORMALISATION

    def to_dict(self) -> dict[str, Any]:
        return {"t": list(self.t), "t0": self.t0, "form": self.form, "value": self.value,
                "error": self.error, "relative": self.relative,
                "relative_error": self.relative_error, "normalisation": self.normalisation}

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> OverlapSummary:
        def grid(key: str) -> np.ndarray:
            return np.atleast_2d(_arr(d.get(key))) if d.get(key) is not None \
                else np.zeros((0, 0))

        return cls(t=[_opt_int(x) for x in d.get("t") or []], t0=int(d.get("t0", 0)),
                   form=str(d.get("form", "exp")), value=grid("value"),
                   error=grid("error"), relative=grid("relative"),
                   relative_error=grid("relative_error"),
                   normalisation=str(d.get("normalisation", OVERLAP_NORMALISATION)))


@dataclass(frozen=True)
class LevelCheck:
    """What the GEVP says inside the range of one level fit (``matrices.NAME.fits.FIT``).

    ``tmin..tmax`` is the range the fit's result rests on: the chosen point's,
    or for an average the span of the points with weight > 0. ``crossings`` is
    the number of (sample, timeslice) pairs in it where the level is out of the
    central's eigenvalue order, ``crossing_t`` the timeslices where any sample
    is (or the central levels themselves have swapped); ``separation_min`` the
    smallest ``|lambda_n - lambda_m| / sigma`` to a neighbouring level ``m``
    there, at ``separation_t``.
    """

    level: int
    t0: int
    tmin: int
    tmax: int
    crossings: int
    crossing_t: tuple[int, ...]
    separation_min: float
    separation_t: int | None

    def to_dict(self) -> dict[str, Any]:
        return {"level": self.level, "t0": self.t0, "tmin": self.tmin, "tmax": self.tmax,
                "crossings": self.crossings, "crossing_t": list(self.crossing_t),
                "separation_min": self.separation_min, "separation_t": self.separation_t}

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> LevelCheck:
        return cls(level=int(d.get("level", 0)), t0=int(d.get("t0", 0)),
                   tmin=int(d.get("tmin", 0)), tmax=int(d.get("tmax", 0)),
                   crossings=int(d.get("crossings") or 0),
                   crossing_t=tuple(int(t) for t in d.get("crossing_t") or ()),
                   separation_min=_f(d.get("separation_min")),
                   separation_t=_opt_int(d.get("separation_t")))


@dataclass(frozen=True)
class MatrixResult:
    """One correlator matrix: the GEVP at its reference ``t0`` and its level fits.

    Attributes
    ----------
    name : str
    grid : list of list of str
        The observables, ``grid[i][j] = C_ij``.
    operators : list of str
        Labels of the rows (operators), for the overlap table.
    t0 : int
        The reference ``t0`` of the eigenvectors, crossings, separations and
        overlaps (the matrix's ``t0``; for ``t0: half`` the smallest ``t0`` of
        its fits, 1 when it has none).
    t0_rule : str
        ``fixed`` or ``half``.
    t : ndarray of int (n_t,)
    principal : list of PrincipalEnergy
        One per level.
    crossings : ndarray of int (n_levels, n_t)
        Jackknife samples out of the central's order, per level and ``t``.
    central_swapped : ndarray of bool (n_levels, n_t)
        Where the central levels themselves are out of eigenvalue order.
    separation : ndarray (n_levels - 1, n_t)
        ``(lambda_n - lambda_{n+1}) / sigma`` of neighbouring levels.
    eigenvectors, eigenvector_errors : ndarray (n_t, r, n_levels)
        ``v_n(t, t0)`` normalised ``v^T C(t0) v = 1``, and jackknife errors.
    overlaps : OverlapSummary or None
        None when no level is fitted.
    condition_number : float
        Of the central ``C(t0)``.
    asymmetry : ndarray (r, r)
        ``max_t |C_ij - C_ji| / sigma`` before symmetrisation.
    fits : dict
        Fit name -> :class:`LevelCheck`.
    levels : list
        Per level, the fit whose ``E0`` is its energy (the first in the spec), or None.
    n_samples : int
        Jackknife samples.
    """

    name: str
    grid: list[list[str]]
    operators: list[str]
    t0: int
    t0_rule: str
    t: np.ndarray
    principal: list[PrincipalEnergy]
    crossings: np.ndarray
    central_swapped: np.ndarray
    separation: np.ndarray
    eigenvectors: np.ndarray
    eigenvector_errors: np.ndarray
    overlaps: OverlapSummary | None
    condition_number: float
    asymmetry: np.ndarray
    fits: dict[str, LevelCheck] = field(default_factory=dict)
    levels: list[str | None] = field(default_factory=list)
    n_samples: int = 0

    @property
    def n_levels(self) -> int:
        return len(self.principal)

    def to_dict(self) -> dict[str, Any]:
        return {
            "grid": [list(row) for row in self.grid], "operators": list(self.operators),
            "t0": self.t0, "t0_rule": self.t0_rule, "n_levels": self.n_levels,
            "n_samples": self.n_samples, "t": self.t,
            "principal": [p.to_dict() for p in self.principal],
            "crossings": self.crossings, "central_swapped": self.central_swapped,
            "separation": self.separation,
            "eigenvectors": {"value": self.eigenvectors, "error": self.eigenvector_errors},
            "overlaps": self.overlaps.to_dict() if self.overlaps is not None else None,
            "condition_number": self.condition_number, "asymmetry": self.asymmetry,
            "fits": {k: v.to_dict() for k, v in self.fits.items()},
            "levels": list(self.levels),
        }

    @classmethod
    def from_dict(cls, name: str, d: Mapping[str, Any]) -> MatrixResult:
        vectors = d.get("eigenvectors") if isinstance(d.get("eigenvectors"), Mapping) else {}
        grid = [[str(x) for x in row] for row in d.get("grid") or []]
        r = len(grid)

        def cube(x: Any) -> np.ndarray:
            a = _arr(x)
            return a if a.ndim == 3 else np.zeros((0, r, r))

        def square(x: Any, rows: int, dtype: type = float) -> np.ndarray:
            a = _arr(x, dtype)
            return a if a.ndim == 2 else np.zeros((rows, 0), dtype=dtype)

        overlaps = d.get("overlaps")
        return cls(
            name=name, grid=grid,
            operators=[str(x) for x in d.get("operators") or []],
            t0=int(d.get("t0", 0)), t0_rule=str(d.get("t0_rule", "fixed")),
            t=_arr(d.get("t"), int),
            principal=[PrincipalEnergy.from_dict(p) for p in d.get("principal") or []
                       if isinstance(p, Mapping)],
            crossings=square(d.get("crossings"), r, int),
            central_swapped=square(d.get("central_swapped"), r, bool),
            separation=square(d.get("separation"), max(r - 1, 0)),
            eigenvectors=cube(vectors.get("value")),
            eigenvector_errors=cube(vectors.get("error")),
            overlaps=OverlapSummary.from_dict(overlaps) if isinstance(overlaps, Mapping)
            else None,
            condition_number=_f(d.get("condition_number")),
            asymmetry=square(d.get("asymmetry"), r),
            fits={str(k): LevelCheck.from_dict(v) for k, v in (d.get("fits") or {}).items()
                  if isinstance(v, Mapping)},
            levels=[None if x is None else str(x) for x in d.get("levels") or []],
            n_samples=int(d.get("n_samples") or 0),
        )
