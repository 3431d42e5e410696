"""The pydantic models of the spec file, with the queries callers ask of them.

The models keep the values as written (``tmin`` stays an int or a list) and
are never changed after validation; the queries give the expanded forms
(:meth:`FitSpec.tmin_values`, :meth:`FitSpec.chosen_point`,
:meth:`Spec.reported_names`, ...). Unknown keys are refused (``extra="forbid"``)
and types are strict: ``tmin: 4.0`` is not a timeslice.
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any, Literal

from pydantic import (BaseModel, ConfigDict, Field, PrivateAttr, ValidationInfo,
                      field_validator)

from plateaufit.data.loaders import format_from_suffix
from plateaufit.data.transforms import folded_extent
from plateaufit.specfile.matrices import MatrixSpec, fit_t0
from plateaufit.specfile.parsers import (MAX_TIMESLICE, mapping, number, pair, per_key,
                                         scan_values, time_range, whole)
from plateaufit.specfile.rules import ModelRules

__all__ = ["Spec", "EnsembleSpec", "ObservableSpec", "BinningSpec", "CovarianceSpec",
           "FormulaSpec", "ChooseSpec", "FitSpec", "OutputSpec", "MatrixSpec", "SHRINKAGE_METHODS",
           "FORMS", "MAX_STATES", "MAX_TIME_EXTENT"]

SHRINKAGE_METHODS: tuple[str, ...] = ("none", "ledoit-wolf", "oas")
#: the values of a fit's ``model:`` key (the model's form)
FORMS: tuple[str, ...] = ("exp", "cosh", "sinh", "formula")
#: most states (or oscillating states) a fit may have: far more than data resolve, and
#: small enough that a typo (states: 1000000) is refused instead of exhausting memory
MAX_STATES = 20
#: largest time extent (and timeslice) a spec may name; lattices have a few hundred
MAX_TIME_EXTENT = MAX_TIMESLICE


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", strict=True)


class EnsembleSpec(_Strict):
    """``ensemble:`` -- the name, ``T``, and optional stream sizes in file order."""

    name: str
    time_extent: int = Field(ge=2, le=MAX_TIME_EXTENT)
    streams: list[int] | None = None

    @field_validator("streams", mode="plain")
    @classmethod
    def _streams(cls, value: Any) -> list[int] | None:
        if value is None:
            return None
        if not isinstance(value, list) or not value:
            raise ValueError("write streams as a list of configuration counts in file order, "
                             f"e.g. [500, 480]; got {value!r}")
        counts = [whole(v, "each stream count") for v in value]
        if any(c < 1 for c in counts):
            raise ValueError(f"every stream needs at least one configuration; got {counts}")
        return counts

    @property
    def stream_sizes(self) -> list[int] | None:
        """Configurations per stream in file order (the spec key ``streams``), or None."""
        return None if self.streams is None else list(self.streams)


class ObservableSpec(_Strict):
    """``observables.NAME:`` -- where one correlator is and how to read and fold it."""

    file: str
    format: Literal["text", "npy", "npz", "hdf5", "csv"] | None = None
    dataset: str | None = None
    ids_dataset: str | None = None
    array: str | None = None
    part: Literal["real", "imag"] = "real"
    boundary: Literal["periodic", "antiperiodic", "open"] = "periodic"
    fold: bool | None = None
    source: str | None = None
    sink: str | None = None

    @property
    def resolved_format(self) -> str | None:
        """``format`` or the one the file suffix implies (None when unknown)."""
        return self.format or format_from_suffix(self.file)

    @property
    def folds(self) -> bool:
        """Whether the data are folded (default: unless the boundary is open)."""
        if self.boundary == "open":
            return False
        return True if self.fold is None else bool(self.fold)


class BinningSpec(_Strict):
    """``binning:`` -- ``size: auto`` (default) or a number of configurations per bin;
    ``correction: true`` (default) scales the bins for the autocorrelation left
    between them (:func:`plateaufit.stats.autocorr.binning_correction`)."""

    size: int | Literal["auto"] = "auto"
    correction: bool = True

    @field_validator("size", mode="plain")
    @classmethod
    def _size(cls, value: Any) -> int | str:
        if value == "auto" and isinstance(value, str):
            return value
        if isinstance(value, bool) or not isinstance(value, int):
            raise ValueError(f"write size as auto or a whole number >= 1, got {value!r}")
        if value < 1:
            raise ValueError(f"size must be at least 1 configuration per bin, got {value}")
        return value


class CovarianceSpec(_Strict):
    """``covariance:`` -- estimator, shrinkage, its target, per-sample covariance, eigenvalue floor.

    ``per_sample: auto`` (default) refits each jackknife sample with its own
    covariance where a range has fewer than 10 bins per point (a covariance
    estimated from few bins is noisy, and frozen in the refits its noise never
    reaches the errors), and with the one from all bins elsewhere.
    ``estimator: binned`` (default) takes the covariance of the mean from the bins;
    ``gamma`` from the windowed autocorrelation matrix of the unbinned data (Wolff 2004),
    for the central fit and, frozen, for every refit (so not with ``per_sample``).
    """

    estimator: Literal["binned", "gamma"] = "binned"
    shrinkage: str | float = "ledoit-wolf"
    target: Literal["diagonal", "identity"] = "diagonal"
    per_sample: bool | Literal["auto"] = "auto"
    eigenvalue_floor: float | None = None

    @field_validator("per_sample", mode="after")
    @classmethod
    def _per_sample(cls, value: bool | str, info: ValidationInfo) -> bool | str:
        if value is True and info.data.get("estimator") == "gamma":
            raise ValueError("per_sample: true takes each refit's covariance from the bins, "
                             "but estimator: gamma estimates one covariance from the unbinned "
                             "data; set per_sample: false or estimator: binned")
        return value

    @field_validator("shrinkage", mode="plain")
    @classmethod
    def _shrinkage(cls, value: Any) -> str | float:
        allowed = f"{', '.join(SHRINKAGE_METHODS)} or a number in [0, 1]"
        if isinstance(value, str):
            if value not in SHRINKAGE_METHODS:
                raise ValueError(f"unknown shrinkage {value!r}; use {allowed}")
            return value
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise ValueError(f"shrinkage must be {allowed}, got {value!r}")
        if not (isinstance(value, float) or abs(value) <= 1) or not 0.0 <= float(value) <= 1.0:
            shown = str(value) if len(str(value)) <= 20 else f"{str(value)[:17]}..."
            raise ValueError(f"shrinkage {shown} is outside [0, 1]; use {allowed}")
        return float(value)

    @field_validator("eigenvalue_floor", mode="plain")
    @classmethod
    def _floor(cls, value: Any) -> float | None:
        if value is None:
            return None
        v = number(value, "eigenvalue_floor")
        if not 0.0 < v < 1.0:
            raise ValueError(f"eigenvalue_floor {value} must be in (0, 1): a fraction of the "
                             "largest eigenvalue of the correlation matrix")
        return v


class FormulaSpec(_Strict):
    """``formula:`` of a ``model: formula`` fit: an expression in t, T and the params."""

    expression: str
    params: dict[str, float]

    @field_validator("params", mode="plain")
    @classmethod
    def _params(cls, value: Any) -> dict[str, float]:
        if not isinstance(value, dict) or not value:
            raise ValueError("write params as a mapping NAME: starting value, e.g. "
                             f"{{a: 1.0, m: 0.5}}; got {value!r}")
        return per_key({str(k): v for k, v in value.items()},
                       lambda k, v: number(v, f"the start of {k}"))


class ChooseSpec(_Strict):
    """``choose:`` naming one scan point; ``states`` may be left out when the fit has one."""

    tmin: int
    tmax: int
    states: int | None = None



class FitSpec(_Strict):
    """One entry of ``fits:``.

    Either ``observables:`` (the correlators fitted) or, for a level of a
    correlator matrix, ``matrix:`` and ``level:`` (its principal correlator is
    fitted; :attr:`correlators` names it after the matrix).
    """

    name: str
    observables: list[str] = Field(default_factory=list)
    model: Literal["exp", "cosh", "sinh", "formula"]
    states: int | list[int] = 1
    oscillating: int = Field(0, ge=0, le=MAX_STATES)
    constant: bool = False
    factorised: bool = False
    formula: FormulaSpec | None = None
    tmin: int | list[int]
    tmax: int | list[int]
    priors: dict[str, list[float]] = Field(default_factory=dict)
    bounds: dict[str, list[float]] = Field(default_factory=dict)
    start: dict[str, float] = Field(default_factory=dict)
    choose: Literal["average"] | ChooseSpec = "average"
    matrix: str | None = None
    level: int | None = Field(None, ge=0)

    @field_validator("states", mode="plain")
    @classmethod
    def _states(cls, value: Any) -> int | list[int]:
        if isinstance(value, list):
            if not value:
                raise ValueError("the list of state counts is empty; write e.g. [1, 2, 3] or 2")
            counts = [whole(v, "each state count") for v in value]
            if any(c < 1 for c in counts):
                raise ValueError(f"state counts must be at least 1, got {counts}")
            if any(c > MAX_STATES for c in counts):
                raise ValueError(f"state counts must be at most {MAX_STATES}, got "
                                 f"{[c if c <= MAX_STATES else '...' for c in counts]}")
            if len(set(counts)) != len(counts):
                raise ValueError(f"state counts are repeated in {counts}; list each once")
            return counts
        n = whole(value, "states")
        if n < 1:
            raise ValueError(f"states must be at least 1, got {n}")
        if n > MAX_STATES:
            raise ValueError(f"states must be at most {MAX_STATES} (no data resolve more), got "
                             f"{str(n)[:20]}")
        return n

    @field_validator("choose", mode="before")
    @classmethod
    def _choose(cls, value: Any) -> Any:
        if value == "average" or isinstance(value, dict):
            return value
        raise ValueError("write choose as average (the default) or as one point "
                         f"{{tmin: .., tmax: .., states: ..}}, got {value!r}")

    @field_validator("tmin", mode="plain")
    @classmethod
    def _tmin(cls, value: Any) -> int | list[int]:
        return time_range(value, "tmin")

    @field_validator("tmax", mode="plain")
    @classmethod
    def _tmax(cls, value: Any) -> int | list[int]:
        return time_range(value, "tmax")

    @field_validator("priors", mode="plain")
    @classmethod
    def _priors(cls, value: Any) -> dict[str, list[float]]:
        out = mapping(value, "priors", "PARAM: [mean, width], e.g. E0: [0.5, 0.1]")
        return per_key(out, lambda k, v: pair(v, k, ("mean", "width")))

    @field_validator("bounds", mode="plain")
    @classmethod
    def _bounds(cls, value: Any) -> dict[str, list[float]]:
        out = mapping(value, "bounds", "PARAM: [lo, hi], e.g. E0: [0.0, 2.0]")
        return per_key(out, lambda k, v: pair(v, k, ("lo", "hi"), infinite=True))

    @field_validator("start", mode="plain")
    @classmethod
    def _start(cls, value: Any) -> dict[str, float]:
        out = mapping(value, "start", "PARAM: value, e.g. E0: 0.5")
        return per_key(out, lambda k, v: number(v, f"the start of {k}"))

    @property
    def form(self) -> str:
        """The model's form (the spec key ``model``): exp, cosh, sinh or formula."""
        return self.model

    @property
    def correlators(self) -> list[str]:
        """Names of the data series fitted: the observables, or ``[MATRIX]`` for a level
        of a correlator matrix (its principal correlator; parameters ``A0.MATRIX``, ...)."""
        return [self.matrix] if self.matrix is not None else list(self.observables)

    @property
    def tmin_values(self) -> list[int]:
        """Every tmin of the scan."""
        return scan_values(self.tmin)

    @property
    def tmax_values(self) -> list[int]:
        """Every tmax of the scan."""
        return scan_values(self.tmax)

    @property
    def states_values(self) -> list[int]:
        """Every state count of the scan (``[1]`` for formula fits)."""
        return list(self.states) if isinstance(self.states, list) else [self.states]

    @property
    def is_scan(self) -> bool:
        """More than one (tmin, tmax, states) combination."""
        return len(self.tmin_values) * len(self.tmax_values) * len(self.states_values) > 1

    @property
    def averages(self) -> bool:
        """``choose: average`` (the default)."""
        return not isinstance(self.choose, ChooseSpec)

    def chosen_point(self) -> tuple[int, int, int] | None:
        """``(tmin, tmax, states)`` named by ``choose:``; None for ``choose: average``.

        ``states`` left out of ``choose:`` is the fit's only state count (the
        cross-checks refuse a missing ``states`` when the fit scans several).
        """
        if not isinstance(self.choose, ChooseSpec):
            return None
        states = self.choose.states
        if states is None:
            states = self.states_values[0]
        return self.choose.tmin, self.choose.tmax, states


class OutputSpec(_Strict):
    """``output:`` -- results directory (relative to the spec file) and plots."""

    dir: str = "results"
    plots: bool = True


class Spec(_Strict):
    """The whole validated specification (never changed after validation).

    ``path`` (the spec file), ``base_dir`` (its directory, against which
    relative paths are resolved) and the :class:`ModelRules` it was checked
    with are kept as private attributes, set by
    :func:`plateaufit.specfile.validate_spec`.
    """

    ensemble: EnsembleSpec
    observables: dict[str, ObservableSpec]
    binning: BinningSpec = Field(default_factory=BinningSpec)
    covariance: CovarianceSpec = Field(default_factory=CovarianceSpec)
    fits: list[FitSpec] = Field(default_factory=list)
    output: OutputSpec = Field(default_factory=OutputSpec)
    truth: dict[str, dict[str, float]] = Field(default_factory=dict)
    derived: dict[str, str] = Field(default_factory=dict)
    matrices: dict[str, MatrixSpec] = Field(default_factory=dict)

    _path: Path | None = PrivateAttr(default=None)
    _base_dir: Path = PrivateAttr(default_factory=Path.cwd)
    _rules: ModelRules | None = PrivateAttr(default=None)

    # ----------------------------------------------------------------- files

    @property
    def path(self) -> Path | None:
        """The spec file this was read from (None when built in memory)."""
        return self._path

    @property
    def base_dir(self) -> Path:
        """Directory against which relative paths in the spec are resolved."""
        return self._base_dir

    def resolve(self, path: str | os.PathLike[str]) -> Path:
        """``path`` relative to the spec file's directory (absolute paths unchanged)."""
        p = Path(path).expanduser()
        return p if p.is_absolute() else self._base_dir / p

    def observable_path(self, name: str) -> Path:
        """The resolved data file of observable ``name``."""
        return self.resolve(self.observables[name].file)

    @property
    def output_dir(self) -> Path:
        """The resolved ``output.dir``."""
        return self.resolve(self.output.dir)

    # ----------------------------------------------------------------- fits

    def fit_index(self, name: str) -> int:
        """Position of fit ``name`` in ``fits:`` (KeyError when there is none)."""
        for i, fit in enumerate(self.fits):
            if fit.name == name:
                return i
        raise KeyError(name)

    def operators(self, fit: FitSpec) -> dict[str, tuple[str, str]] | None:
        """Observable -> (source, sink) operator labels for a factorised fit, else None."""
        if not fit.factorised:
            return None
        return {name: (self.observables[name].source, self.observables[name].sink)
                for name in fit.observables}

    def max_fit_t(self, name: str) -> int:
        """Largest time index of observable (or matrix) ``name`` after folding (T/2 folded,
        T-1 open); a matrix's is that of its elements."""
        if name in self.matrices and name not in self.observables:
            name = self.matrices[name].grid[0][0]
        obs = self.observables[name]
        return folded_extent(self.ensemble.time_extent, obs.boundary, obs.folds) - 1

    def n_timeslices(self, fit: FitSpec) -> int:
        """Timeslices of all the fit's observables after folding (the AIC's full data set)."""
        return sum(self.max_fit_t(name) + 1 for name in fit.correlators)

    def reported_names(self, fit: FitSpec, states: int | None = None) -> list[str]:
        """Reported parameter names of ``fit`` with ``states`` states (default: the most).

        A formula fit reports its own parameters; a built-in form those the
        fit core's naming rule gives (``E0, E1, ..., A0.NAME, ...``).
        """
        if fit.model == "formula":
            return list(fit.formula.params) if fit.formula is not None else []
        if self._rules is None:
            raise RuntimeError("this Spec was built without ModelRules; validate it with "
                               "plateaufit.load_spec or plateaufit.pipeline.load_spec")
        n = max(fit.states_values) if states is None else states
        return list(self._rules.reported_names(fit.correlators, n, oscillating=fit.oscillating,
                                               constant=fit.constant,
                                               operators=self.operators(fit)))

    def fit_t0(self, fit: FitSpec) -> int | None:
        """The GEVP ``t0`` of a fit of a matrix level (None for other fits); for
        ``t0: half``, ``ceil(max tmax / 2)`` (:func:`plateaufit.specfile.matrices.fit_t0`)."""
        if fit.matrix is None:
            return None
        return fit_t0(self.matrices[fit.matrix], fit.tmax_values)

    def matrix_fits(self, name: str) -> list[FitSpec]:
        """The fits of levels of matrix ``name``, in spec order."""
        return [fit for fit in self.fits if fit.matrix == name]

    def n_params(self, fit: FitSpec, states: int) -> int:
        """Number of fitted parameters of ``fit`` with ``states`` states."""
        return len(self.reported_names(fit, states))

    def reference_names(self) -> dict[str, list[str]]:
        """Fit name -> the parameters a derived quantity may refer to as ``FIT.PARAM``.

        Those of the chosen result: for ``choose: {tmin, tmax, states}`` the
        parameters of that state count, for ``choose: average`` those of the
        largest state count of the scan (an averaged ``E1`` runs over the fits
        that have it).
        """
        out = {}
        for fit in self.fits:
            point = fit.chosen_point()
            out[fit.name] = self.reported_names(fit, point[2] if point else None)
        return out
