"""The ``matrices:`` block of the spec (correlator matrices for the GEVP) and its checks.

A matrix names an ``r x r`` grid of observables, ``C_ij(t) = grid[i][j]``
(row ``i`` the operator at the sink, column ``j`` the one at the source), and
the ``t0`` of the metric ``C(t0)`` of the generalised eigenvalue problem::

    matrices:
      axial:
        grid: [[axial_LL, axial_LS], [axial_SL, axial_SS]]
        t0: 2                  # or: half
        operators: [L, S]      # optional labels of the rows (default: the diagonal's names)

A fit of one level refers to the matrix instead of listing observables::

    fits:
      - {name: axial_0, matrix: axial, level: 0, model: cosh, tmin: [4, 8], tmax: 16}

``t0: half`` is the choice ``t0 >= t/2`` of Blossier et al. for every fitted
timeslice: each fit entry of the matrix is solved at its own
``t0 = ceil(max tmax / 2)`` (:func:`fit_t0`), which must lie below every
``tmin`` of the entry; the effective energies of the report use
``t0 = ceil(t/2)`` at every ``t``.

The checks here read the spec and never change it; they are called from
:func:`plateaufit.specfile.checks.cross_check`.

References
----------
.. [1] M. Lüscher, U. Wolff, Nucl. Phys. B 339 (1990) 222 -- the GEVP.
.. [2] B. Blossier, M. Della Morte, G. von Hippel, T. Mendes, R. Sommer,
   JHEP 04 (2009) 094 -- ``t0 >= t/2``.
"""

from __future__ import annotations

import math
import re
from typing import TYPE_CHECKING, Any, Literal

from pydantic import BaseModel, ConfigDict, field_validator

if TYPE_CHECKING:  # the models import this module; only the types are needed here
    from plateaufit.specfile.messages import SpecErrors
    from plateaufit.specfile.models import FitSpec, Spec

__all__ = ["MatrixSpec", "HALF", "fit_t0", "check_matrices", "check_matrix_fit",
           "check_matrix_t0"]

#: the ``t0`` value that asks for ``t0 >= t/2`` (Blossier et al. 2009)
HALF = "half"

_NAME = re.compile(r"^[A-Za-z][A-Za-z0-9_]*$")


class MatrixSpec(BaseModel):
    """``matrices.NAME:`` -- a square grid of observables and the ``t0`` of the GEVP."""

    model_config = ConfigDict(extra="forbid", strict=True)

    grid: list[list[str]]
    t0: int | Literal["half"]
    operators: list[str] | None = None

    @field_validator("grid", mode="plain")
    @classmethod
    def _grid(cls, value: Any) -> list[list[str]]:
        form = ("write grid as a list of rows of observable names, e.g. "
                "[[c_LL, c_LS], [c_SL, c_SS]] (row i: sink operator i, column j: source j)")
        if not isinstance(value, list) or not value or \
                not all(isinstance(row, list) for row in value):
            raise ValueError(f"{form}; got {value!r}")
        for row in value:
            for entry in row:
                if not isinstance(entry, str):
                    raise ValueError(f"{form}; the entry {entry!r} is not a name")
        return [list(row) for row in value]

    @field_validator("t0", mode="plain")
    @classmethod
    def _t0(cls, value: Any) -> int | str:
        if isinstance(value, str) and value == HALF:
            return value
        if isinstance(value, bool) or not isinstance(value, int):
            raise ValueError(f"write t0 as a timeslice (e.g. 2) or half (t0 = ceil(t/2), "
                             f"Blossier et al. 2009); got {value!r}")
        if value < 0:
            raise ValueError(f"t0 = {value} is negative; timeslices count from 0")
        return value

    @field_validator("operators", mode="plain")
    @classmethod
    def _operators(cls, value: Any) -> list[str] | None:
        if value is None:
            return None
        if not isinstance(value, list) or not all(isinstance(v, str) and v for v in value):
            raise ValueError(f"write operators as a list of labels, one per row of the grid, "
                             f"e.g. [L, S]; got {value!r}")
        return list(value)

    @property
    def size(self) -> int:
        """``r``, the number of operators (rows of the grid)."""
        return len(self.grid)

    @property
    def is_half(self) -> bool:
        """``t0: half``."""
        return self.t0 == HALF

    def elements(self) -> list[str]:
        """The observables of the grid, each once, in row-major order."""
        seen: list[str] = []
        for row in self.grid:
            seen.extend(name for name in row if name not in seen)
        return seen

    def operator_labels(self) -> list[str]:
        """Labels of the rows: ``operators:``, else the diagonal's observable names."""
        if self.operators is not None:
            return list(self.operators)
        return [self.grid[i][i] for i in range(self.size)]


def fit_t0(matrix: MatrixSpec, tmax_values: list[int]) -> int:
    """The ``t0`` of a fit of ``matrix`` whose scan reaches ``max(tmax_values)``.

    The matrix's ``t0``; for ``t0: half``, ``ceil(max tmax / 2)``, so that
    ``t0 >= t/2`` at every fitted ``t`` (Blossier et al. 2009).
    """
    if matrix.is_half:
        return int(math.ceil(max(tmax_values) / 2))
    return int(matrix.t0)


# --------------------------------------------------------------------------- checks


def check_matrices(spec: Spec, err: SpecErrors) -> None:
    """Every ``matrices.NAME``: its name, a square grid of known observables, one
    boundary and folding, operator labels, and ``t0`` inside the data."""
    for name, matrix in spec.matrices.items():
        base = ("matrices", name)
        if not _NAME.match(name):
            raise err(base, f"matrix name {name!r} must start with a letter and use only "
                      "letters, digits and '_' (it becomes part of parameter names like "
                      "A0.NAME)")
        if name in spec.observables:
            raise err(base, f"{name!r} is already the name of an observable; give the matrix "
                      "its own name")
        _check_grid(spec, name, matrix, err)
        if matrix.operators is not None:
            labels = matrix.operators
            if len(labels) != matrix.size:
                raise err(base + ("operators",), f"{len(labels)} operator label(s) for a "
                          f"{matrix.size} x {matrix.size} grid; give one per row")
            if len(set(labels)) != len(labels):
                raise err(base + ("operators",), f"operator labels {labels} repeat; give each "
                          "row its own label")
        if not matrix.is_half:
            last = spec.max_fit_t(name)
            if matrix.t0 > last - 1:
                raise err(base + ("t0",), f"t0 = {matrix.t0} leaves no timeslice after it: the "
                          f"matrix has t = 0..{last} (after folding) and its levels are named "
                          f"at t0 + 1; choose t0 <= {last - 1}")


def _check_grid(spec: Spec, name: str, matrix: MatrixSpec, err: SpecErrors) -> None:
    from plateaufit.specfile.messages import suggest_name  # it imports the models

    key = ("matrices", name, "grid")
    grid = matrix.grid
    r = len(grid)
    widths = [len(row) for row in grid]
    if any(w != r for w in widths):
        raise err(key, f"the grid is not square: {r} row(s) of length(s) "
                  f"{', '.join(map(str, widths))}; a correlator matrix pairs every sink "
                  f"operator with every source operator, so write {r} rows of {r} names")
    if r < 2:
        raise err(key, "a GEVP needs at least two operators (a 2 x 2 grid); fit a single "
                  "correlator with observables: instead")
    known = list(spec.observables)
    for i, row in enumerate(grid):
        for j, entry in enumerate(row):
            if entry not in spec.observables:
                raise err(key + (i, j), f"unknown observable {entry!r} in the grid of matrix "
                          f"{name!r}; the observables are {', '.join(known)}"
                          f"{suggest_name(entry, known)}")
    first = grid[0][0]
    ref = spec.observables[first]
    for entry in matrix.elements():
        obs = spec.observables[entry]
        if obs.boundary != ref.boundary:
            raise err(key, f"mixed boundaries in matrix {name!r}: {first!r} is {ref.boundary} "
                      f"but {entry!r} is {obs.boundary}; every element of a correlator matrix "
                      "must have the same boundary")
        if obs.folds != ref.folds:
            raise err(key, f"mixed folding in matrix {name!r}: {first!r} is "
                      f"{'folded' if ref.folds else 'not folded'} but {entry!r} is "
                      f"{'folded' if obs.folds else 'not folded'}; set the same fold: for "
                      "every element")


def check_matrix_fit(spec: Spec, i: int, fit: FitSpec, err: SpecErrors) -> None:
    """A fit of one level: the matrix exists, the level is in it, no observables, and a
    built-in form."""
    from plateaufit.specfile.messages import suggest_name  # it imports the models

    key = ("fits", i)
    if fit.matrix is None:
        raise err(key + ("level",), "level: applies to a fit of a correlator matrix; add "
                  "matrix: NAME or remove level:")
    if fit.observables:
        raise err(key + ("observables",), f"a fit of a level of matrix {fit.matrix!r} takes "
                  "no observables: (it fits the level's principal correlator); remove "
                  "observables: or matrix:")
    if fit.matrix not in spec.matrices:
        names = list(spec.matrices)
        listed = (f"the matrices are {', '.join(names)}" if names
                  else "the spec defines none (add matrices: {NAME: {grid: ..., t0: ...}})")
        raise err(key + ("matrix",), f"unknown matrix {fit.matrix!r}; {listed}"
                  f"{suggest_name(fit.matrix, names)}")
    matrix = spec.matrices[fit.matrix]
    if fit.level is None:
        raise err(key + ("level",), f"required key is missing; add level: n, the level of "
                  f"matrix {fit.matrix!r} to fit (0 = lowest, up to {matrix.size - 1})")
    if fit.level >= matrix.size:
        raise err(key + ("level",), f"level {fit.level} does not exist: matrix "
                  f"{fit.matrix!r} has {matrix.size} operators, so levels 0..{matrix.size - 1}")
    if fit.model == "formula":
        raise err(key + ("model",), "a level of a correlator matrix is fitted with exp, cosh "
                  "or sinh (its E0 is the level's energy); model: formula does not apply")
    if fit.factorised:
        raise err(key + ("factorised",), "factorised: does not apply to a principal "
                  "correlator (it has one amplitude); remove it")


def check_matrix_t0(spec: Spec, i: int, fit: FitSpec, err: SpecErrors) -> None:
    """Every ``tmin`` of a fit of a matrix level after its ``t0``, where the principal
    correlator is exactly 1 (no variance). Called after the ranges are checked."""
    key = ("fits", i)
    matrix = spec.matrices[fit.matrix]
    t0 = fit_t0(matrix, fit.tmax_values)
    first = min(fit.tmin_values)
    if first <= t0:
        if matrix.is_half:
            why = (f"t0: half gives this fit t0 = ceil(max tmax / 2) = {t0} (so that t0 >= t/2 "
                   "over the range)")
            remedy = f"raise tmin above {t0} or lower tmax"
        else:
            why = f"matrix {fit.matrix!r} has t0 = {t0}"
            remedy = f"start the fit at tmin >= {t0 + 1} or choose a smaller t0"
        raise err(key + ("tmin",), f"tmin = {first} is not after t0: {why}, and the principal "
                  f"correlator is exactly 1 at t0 (no variance) and fixed by the normalisation "
                  f"before it; {remedy}")
