"""The analysis specification: pydantic models of the YAML file, and :func:`load_spec`.

:func:`load_spec` reads the YAML (refusing duplicate keys), validates the types
and values of every key with pydantic (unknown keys are refused, listing the
allowed ones), then checks what involves more than one key: the observables a
fit names, fit ranges against the folded data, parameters named in priors,
bounds and start against the model, degrees of freedom, ``choose``, user
formulas, derived quantities (``derived:``, expressions over ``FIT.PARAM``
references). Every problem is a :class:`~plateaufit.errors.SpecError` whose
``where`` is the key path (``fits[1].tmin``, ``observables.pion.file``,
``covariance.shrinkage``) and whose message says what is allowed; the line of
the spec file is appended when it is known.

The models keep the values as written (``tmin`` stays an int or a list);
:attr:`FitSpec.tmin_values`, :attr:`FitSpec.tmax_values` and
:attr:`FitSpec.states_values` give the expanded lists.
"""

from __future__ import annotations

import difflib
import os
import re
import types
import typing
from pathlib import Path
from typing import Any, Literal, Union

import yaml
from pydantic import BaseModel, ConfigDict, Field, PrivateAttr, ValidationError, field_validator

from plateaufit.data.loaders import FORMATS, SUFFIXES, format_from_suffix
from plateaufit.data.transforms import folded_extent
from plateaufit.errors import SpecError

__all__ = [
    "Spec",
    "EnsembleSpec",
    "ObservableSpec",
    "BinningSpec",
    "CovarianceSpec",
    "FormulaSpec",
    "ChooseSpec",
    "FitSpec",
    "OutputSpec",
    "load_spec",
    "validate_spec",
    "fit_operators",
    "fit_parameter_names",
    "fit_n_params",
    "fit_reference_names",
    "max_fit_t",
]

SHRINKAGE_METHODS: tuple[str, ...] = ("none", "ledoit-wolf", "oas")
_OBS_NAME = re.compile(r"^[A-Za-z][A-Za-z0-9_]*$")
_FIT_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]*$")


# --------------------------------------------------------------------------- value parsers


def _whole(value: Any, what: str) -> int:
    if isinstance(value, bool) or not isinstance(value, int):
        raise ValueError(f"{what} must be a whole number, got {value!r}")
    return value


def _number(value: Any, what: str) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise ValueError(f"{what} must be a number, got {value!r}")
    return float(value)


def _pair(value: Any, param: str, names: tuple[str, str]) -> list[float]:
    if not isinstance(value, list) or len(value) != 2:
        raise ValueError(f"write {param} as a list of two numbers [{names[0]}, {names[1]}], "
                         f"got {value!r}")
    return [_number(v, f"{param}: {n}") for v, n in zip(value, names)]


def _time_range(value: Any, key: str) -> int | list[int]:
    """``int`` or ``[lo, hi]`` or ``[lo, hi, step]``; values >= 0, lo <= hi, step >= 1."""
    form = f"write {key} as a timeslice (e.g. 4), a scan range [lo, hi] or [lo, hi, step]"
    if isinstance(value, bool) or not isinstance(value, (int, list)):
        raise ValueError(f"{form}; got {value!r}")
    if isinstance(value, int):
        if value < 0:
            raise ValueError(f"{key} = {value} is negative; timeslices count from 0")
        return value
    if len(value) not in (2, 3) or any(isinstance(v, bool) or not isinstance(v, int)
                                       for v in value):
        raise ValueError(f"{form}, with whole numbers; got {value!r}")
    lo, hi = value[0], value[1]
    if lo < 0:
        raise ValueError(f"{key} range {value} starts below 0; timeslices count from 0")
    if lo > hi:
        raise ValueError(f"{key} range {value} has lo = {lo} > hi = {hi}; write [lo, hi] "
                         "with lo <= hi")
    if len(value) == 3 and value[2] < 1:
        raise ValueError(f"{key} range {value} has step {value[2]}; the step must be >= 1")
    return list(value)


def scan_values(value: int | list[int]) -> list[int]:
    """The timeslices of ``tmin``/``tmax`` as written: an int, [lo, hi] or [lo, hi, step]."""
    if isinstance(value, int):
        return [value]
    step = value[2] if len(value) == 3 else 1
    return list(range(value[0], value[1] + 1, step))


# --------------------------------------------------------------------------- models


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", strict=True)


class EnsembleSpec(_Strict):
    """``ensemble:`` -- the name, ``T``, and optional stream sizes in file order."""

    name: str
    time_extent: int = Field(ge=2)
    streams: list[int] | None = None

    @field_validator("streams", mode="plain")
    @classmethod
    def _streams(cls, value: Any) -> list[int] | None:
        if value is None:
            return None
        if not isinstance(value, list) or not value:
            raise ValueError("write streams as a list of configuration counts in file order, "
                             f"e.g. [500, 480]; got {value!r}")
        counts = [_whole(v, "each stream count") for v in value]
        if any(c < 1 for c in counts):
            raise ValueError(f"every stream needs at least one configuration; got {counts}")
        return counts


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
    """``binning:`` -- ``size: auto`` (default) or a number of configurations per bin."""

    size: int | Literal["auto"] = "auto"

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
    """``covariance:`` -- shrinkage, its target, per-sample covariance, eigenvalue floor."""

    shrinkage: str | float = "ledoit-wolf"
    target: Literal["diagonal", "identity"] = "diagonal"
    per_sample: bool = False
    eigenvalue_floor: float | None = None

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
        if not 0.0 <= float(value) <= 1.0:
            raise ValueError(f"shrinkage {value} is outside [0, 1]; use {allowed}")
        return float(value)

    @field_validator("eigenvalue_floor", mode="plain")
    @classmethod
    def _floor(cls, value: Any) -> float | None:
        if value is None:
            return None
        v = _number(value, "eigenvalue_floor")
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
        return {str(k): _number(v, f"the start of {k}") for k, v in value.items()}


class ChooseSpec(_Strict):
    """``choose:`` naming one scan point; ``states`` may be left out when the fit has one."""

    tmin: int
    tmax: int
    states: int | None = None


class FitSpec(_Strict):
    """One entry of ``fits:``."""

    name: str
    observables: list[str] = Field(min_length=1)
    model: Literal["exp", "cosh", "sinh", "formula"]
    states: int | list[int] = 1
    oscillating: int = Field(0, ge=0)
    constant: bool = False
    factorised: bool = False
    formula: FormulaSpec | None = None
    tmin: int | list[int]
    tmax: int | list[int]
    priors: dict[str, list[float]] = Field(default_factory=dict)
    bounds: dict[str, list[float]] = Field(default_factory=dict)
    start: dict[str, float] = Field(default_factory=dict)
    choose: Literal["average"] | ChooseSpec = "average"

    @field_validator("states", mode="plain")
    @classmethod
    def _states(cls, value: Any) -> int | list[int]:
        if isinstance(value, list):
            if not value:
                raise ValueError("the list of state counts is empty; write e.g. [1, 2, 3] or 2")
            counts = [_whole(v, "each state count") for v in value]
            if any(c < 1 for c in counts):
                raise ValueError(f"state counts must be at least 1, got {counts}")
            if len(set(counts)) != len(counts):
                raise ValueError(f"state counts are repeated in {counts}; list each once")
            return counts
        n = _whole(value, "states")
        if n < 1:
            raise ValueError(f"states must be at least 1, got {n}")
        return n

    @field_validator("tmin", mode="plain")
    @classmethod
    def _tmin(cls, value: Any) -> int | list[int]:
        return _time_range(value, "tmin")

    @field_validator("tmax", mode="plain")
    @classmethod
    def _tmax(cls, value: Any) -> int | list[int]:
        return _time_range(value, "tmax")

    @field_validator("priors", mode="plain")
    @classmethod
    def _priors(cls, value: Any) -> dict[str, list[float]]:
        out = _mapping(value, "priors", "PARAM: [mean, width], e.g. E0: [0.5, 0.1]")
        return {k: _pair(v, k, ("mean", "width")) for k, v in out.items()}

    @field_validator("bounds", mode="plain")
    @classmethod
    def _bounds(cls, value: Any) -> dict[str, list[float]]:
        out = _mapping(value, "bounds", "PARAM: [lo, hi], e.g. E0: [0.0, 2.0]")
        return {k: _pair(v, k, ("lo", "hi")) for k, v in out.items()}

    @field_validator("start", mode="plain")
    @classmethod
    def _start(cls, value: Any) -> dict[str, float]:
        out = _mapping(value, "start", "PARAM: value, e.g. E0: 0.5")
        return {k: _number(v, f"the start of {k}") for k, v in out.items()}

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


def _mapping(value: Any, key: str, form: str) -> dict[str, Any]:
    if value is None:
        return {}
    if not isinstance(value, dict):
        raise ValueError(f"write {key} as a mapping {form}; got {value!r}")
    return {str(k): v for k, v in value.items()}


class OutputSpec(_Strict):
    """``output:`` -- results directory (relative to the spec file) and plots."""

    dir: str = "results"
    plots: bool = True


class Spec(_Strict):
    """The whole validated specification.

    ``path`` (the spec file) and ``base_dir`` (its directory, against which
    relative paths are resolved) are kept as properties.
    """

    ensemble: EnsembleSpec
    observables: dict[str, ObservableSpec]
    binning: BinningSpec = Field(default_factory=BinningSpec)
    covariance: CovarianceSpec = Field(default_factory=CovarianceSpec)
    fits: list[FitSpec] = Field(default_factory=list)
    output: OutputSpec = Field(default_factory=OutputSpec)
    truth: dict[str, dict[str, float]] = Field(default_factory=dict)
    derived: dict[str, str] = Field(default_factory=dict)

    _path: Path | None = PrivateAttr(default=None)
    _base_dir: Path = PrivateAttr(default_factory=Path.cwd)

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


# --------------------------------------------------------------------------- helpers for callers


def fit_operators(spec: Spec, fit: FitSpec) -> dict[str, tuple[str, str]] | None:
    """Observable -> (source, sink) for a factorised fit, else None."""
    if not fit.factorised:
        return None
    return {name: (spec.observables[name].source, spec.observables[name].sink)
            for name in fit.observables}


def fit_parameter_names(spec: Spec, fit: FitSpec, states: int | None = None) -> list[str]:
    """Reported parameter names of ``fit`` with ``states`` states (default: the most)."""
    if fit.model == "formula":
        return list(fit.formula.params) if fit.formula is not None else []
    from plateaufit.fit.models import physical_parameter_names

    n = max(fit.states_values) if states is None else states
    return list(physical_parameter_names(fit.observables, n, oscillating=fit.oscillating,
                                         constant=fit.constant,
                                         operators=fit_operators(spec, fit)))


def fit_reference_names(spec: Spec) -> dict[str, list[str]]:
    """Fit name -> the parameters a derived quantity may refer to as ``FIT.PARAM``.

    Those of the chosen result: for ``choose: {tmin, tmax, states}`` the
    parameters of that state count, for ``choose: average`` those of the
    largest state count of the scan (an averaged ``E1`` runs over the fits
    that have it).
    """
    out = {}
    for fit in spec.fits:
        states = fit.choose.states if isinstance(fit.choose, ChooseSpec) else None
        out[fit.name] = fit_parameter_names(spec, fit, states)
    return out


def fit_n_params(spec: Spec, fit: FitSpec, states: int) -> int:
    """Number of fitted parameters of ``fit`` with ``states`` states."""
    return len(fit_parameter_names(spec, fit, states))


def max_fit_t(spec: Spec, name: str) -> int:
    """Largest time index of observable ``name`` after folding (T/2 folded, T-1 open)."""
    obs = spec.observables[name]
    return folded_extent(spec.ensemble.time_extent, obs.boundary, obs.folds) - 1


# --------------------------------------------------------------------------- YAML


class _Loader(yaml.SafeLoader):
    """Safe YAML that refuses duplicate keys (a second ``tmin:`` would win silently)."""


def _construct_mapping(loader: _Loader, node: yaml.MappingNode, deep: bool = False):
    loader.flatten_mapping(node)
    seen: dict[Any, int] = {}
    for key_node, _ in node.value:
        key = loader.construct_object(key_node, deep=True)
        try:
            first = seen.get(key)
        except TypeError:
            raise yaml.constructor.ConstructorError(
                None, None, f"a key must be plain text, got {key!r}", key_node.start_mark
            ) from None
        if first is not None:
            raise yaml.constructor.ConstructorError(
                None, None, f"duplicate key {key!r} (first given at line {first}); give each "
                "key once", key_node.start_mark)
        seen[key] = key_node.start_mark.line + 1
    return yaml.SafeLoader.construct_mapping(loader, node, deep=deep)


_Loader.add_constructor(yaml.resolver.BaseResolver.DEFAULT_MAPPING_TAG, _construct_mapping)


def _read_yaml(path: Path) -> tuple[Any, Any]:
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise SpecError(str(path), "spec file not found; check the path") from None
    except IsADirectoryError:
        raise SpecError(str(path), "is a directory; give the path of the YAML spec file") from None
    except UnicodeDecodeError:
        raise SpecError(str(path), "cannot decode the spec file as UTF-8 text") from None
    except OSError as exc:
        raise SpecError(str(path), f"cannot read the spec file ({exc.strerror or exc})") from None
    loader = _Loader(text)
    try:
        node = loader.get_single_node()
        data = loader.construct_document(node) if node is not None else None
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark or exc.context_mark
        at = f"line {mark.line + 1}, column {mark.column + 1}" if mark else "unknown position"
        problem = exc.problem or exc.context or "invalid YAML"
        kind = ("YAML error" if isinstance(exc, yaml.constructor.ConstructorError)
                else "YAML syntax error")
        raise SpecError(str(path), f"{kind} at {at}: {problem}") from None
    except yaml.YAMLError as exc:
        raise SpecError(str(path), f"YAML error: {exc}") from None
    finally:
        loader.dispose()
    return data, node


def _line_of(node: Any, loc: tuple) -> int | None:
    """Line (1-based) of the key path ``loc`` in the composed YAML, or of its deepest parent."""
    line = None
    for part in loc:
        if isinstance(node, yaml.MappingNode):
            for key_node, value_node in node.value:
                if isinstance(key_node, yaml.ScalarNode) and key_node.value == str(part):
                    line = key_node.start_mark.line + 1
                    node = value_node
                    break
            else:
                return line
        elif isinstance(node, yaml.SequenceNode) and isinstance(part, int):
            if not 0 <= part < len(node.value):
                return line
            node = node.value[part]
            line = node.start_mark.line + 1
        else:
            return line
    return line


# --------------------------------------------------------------------------- errors


def key_path(loc: tuple) -> str:
    """``('fits', 1, 'tmin')`` -> ``fits[1].tmin``."""
    out = ""
    for part in loc:
        if isinstance(part, int):
            out += f"[{part}]"
        else:
            out += ("." if out else "") + str(part)
    return out


class _Errors:
    """Builds SpecErrors with the key path and, when known, the spec file line."""

    def __init__(self, path: Path | None, node: Any) -> None:
        self.path = path
        self.node = node

    def __call__(self, loc: tuple, message: str) -> SpecError:
        line = _line_of(self.node, loc) if self.node is not None else None
        if line is not None and self.path is not None:
            message = f"{message} [{self.path.name} line {line}]"
        return SpecError(key_path(loc), message)


def _unwrap(annotation: Any) -> list[Any]:
    origin = typing.get_origin(annotation)
    if origin in (Union, types.UnionType):
        return [a for arg in typing.get_args(annotation) for a in _unwrap(arg)]
    return [annotation]


def _model_at(loc: tuple) -> type[BaseModel] | None:
    """The model class that validates the mapping at key path ``loc``."""
    current: list[Any] = [Spec]
    for part in loc:
        nxt: list[Any] = []
        for ann in current:
            if isinstance(ann, type) and issubclass(ann, BaseModel) and isinstance(part, str):
                if part in ann.model_fields:
                    nxt += _unwrap(ann.model_fields[part].annotation)
            elif typing.get_origin(ann) is list and isinstance(part, int):
                nxt += _unwrap(typing.get_args(ann)[0])
            elif typing.get_origin(ann) is dict and isinstance(part, str):
                nxt += _unwrap(typing.get_args(ann)[1])
        current = nxt
    models = [a for a in current if isinstance(a, type) and issubclass(a, BaseModel)]
    return models[0] if models else None


_MISSING_HINTS = {
    "ensemble": " {name: ..., time_extent: T}",
    "observables": " NAME: {file: ...} for each correlator",
    "name": " a name",
    "time_extent": " the number of timeslices T of the lattice",
    "file": " the data file, relative to the spec file",
    "model": " exp, cosh, sinh or formula",
    "tmin": " a timeslice or a scan range [lo, hi]",
    "tmax": " a timeslice or a scan range [lo, hi]",
    "expression": " the formula in t, T and the params",
    "params": " NAME: starting value for each parameter of the formula",
}

#: the key of ``truth:`` that holds the truth of the derived quantities
TRUTH_DERIVED_KEY = "derived"


def _describe(value: Any) -> str:
    text = repr(value)
    return text if len(text) <= 60 else text[:57] + "..."


def _pydantic_message(err: dict) -> str:
    kind, loc, value = err["type"], tuple(err["loc"]), err.get("input")
    if kind == "missing":
        hint = _MISSING_HINTS.get(str(loc[-1]), "")
        return f"required key is missing; add {loc[-1]}:{hint}"
    if kind == "extra_forbidden":
        model = _model_at(loc[:-1])
        allowed = list(model.model_fields) if model else []
        close = difflib.get_close_matches(str(loc[-1]), allowed, n=1)
        guess = f"; did you mean {close[0]!r}?" if close else ""
        return f"unknown key {str(loc[-1])!r}; allowed keys here are {', '.join(allowed)}{guess}"
    if kind == "model_type" or kind == "dict_type":
        model = _model_at(loc)
        keys = f" with keys {', '.join(model.model_fields)}" if model else ""
        return f"expected a mapping{keys}, got {_describe(value)}"
    if kind == "value_error":
        return str(err["ctx"]["error"]) if "ctx" in err else err["msg"]
    if kind == "literal_error":
        return f"got {_describe(value)}; allowed values are {err['ctx']['expected']}"
    simple = {
        "int_type": "expected a whole number",
        "float_type": "expected a number",
        "bool_type": "expected true or false",
        "string_type": "expected text",
        "list_type": "expected a list [...]",
    }
    if kind in simple:
        if loc and loc[-1] == "[key]":
            return f"{simple[kind]} as the key, got {_describe(value)}"
        return f"{simple[kind]}, got {_describe(value)}"
    if kind in ("greater_than_equal", "greater_than", "less_than_equal", "less_than"):
        return f"{err['msg'].replace('Input should be', 'must be')}, got {_describe(value)}"
    if kind == "too_short":
        return f"must not be empty, got {_describe(value)}"
    return f"{err['msg']} (got {_describe(value)})"


# --------------------------------------------------------------------------- entry points


def load_spec(path: str | os.PathLike[str]) -> Spec:
    """Read and validate a specification file.

    Parameters
    ----------
    path : path-like
        The YAML file. Relative paths inside it are resolved against its
        directory.

    Returns
    -------
    Spec
        With ``spec.path`` the file and ``spec.base_dir`` its directory.

    Raises
    ------
    SpecError
        The file cannot be read, is not valid YAML (naming the line), or a
        key is missing, unknown, of the wrong type or inconsistent with
        another (``where`` is the key path).
    """
    p = Path(path)
    data, node = _read_yaml(p)
    return validate_spec(data, path=p, _node=node)


def validate_spec(data: Any, *, path: str | os.PathLike[str] | None = None,
                  base_dir: str | os.PathLike[str] | None = None, _node: Any = None) -> Spec:
    """Validate an already-parsed spec (a dict as the YAML would give).

    Parameters
    ----------
    data : dict
    path : path-like, optional
        The file it came from (for messages and ``spec.path``).
    base_dir : path-like, optional
        Directory for relative paths; default: the directory of ``path``, else
        the current directory.

    Returns
    -------
    Spec

    Raises
    ------
    SpecError
    """
    p = Path(path) if path is not None else None
    errors = _Errors(p, _node)
    where_file = str(p) if p is not None else ""
    if data is None:
        raise SpecError(where_file, "the spec is empty; it needs at least ensemble: and "
                        "observables:")
    if not isinstance(data, dict):
        raise SpecError(where_file, "the spec must be a mapping of keys (ensemble:, "
                        f"observables:, fits:, ...), got {type(data).__name__}")
    try:
        spec = Spec.model_validate(data)
    except ValidationError as exc:
        # an unknown key is usually a misspelt one: report it before the "missing" it causes
        errs = sorted(exc.errors(), key=lambda e: e["type"] != "extra_forbidden")
        first = errs[0]
        loc = tuple(part for part in first["loc"] if part != "[key]")
        more = len(errs) - 1
        suffix = f" ({more} more problem{'s' if more > 1 else ''} in the spec)" if more else ""
        raise errors(loc, _pydantic_message(first) + suffix) from None
    if base_dir is not None:
        spec._base_dir = Path(base_dir)
    elif p is not None:
        spec._base_dir = p.resolve().parent
    spec._path = p
    _cross_check(spec, errors)
    return spec


# --------------------------------------------------------------------------- cross checks


def _cross_check(spec: Spec, err: _Errors) -> None:
    if not spec.observables:
        raise err(("observables",), "no observables defined; add at least one, e.g. "
                  "pion: {file: pion.txt}")
    for name, obs in spec.observables.items():
        _check_observable(spec, name, obs, err)
    names: dict[str, int] = {}
    for i, fit in enumerate(spec.fits):
        if not _FIT_NAME.match(fit.name):
            raise err(("fits", i, "name"), f"fit name {fit.name!r} must start with a letter or "
                      "digit and use only letters, digits, '_', '.' and '-'")
        if fit.name in names:
            raise err(("fits", i, "name"), f"fit name {fit.name!r} is already used by "
                      f"fits[{names[fit.name]}]; give each fit its own name")
        names[fit.name] = i
        _check_fit(spec, i, fit, err)
    out = spec.output.dir
    if not out.strip():
        raise err(("output", "dir"), "output.dir is empty; give a directory such as results")
    resolved = spec.resolve(out)
    if resolved.exists() and not resolved.is_dir():
        raise err(("output", "dir"), f"{resolved} exists and is not a directory; choose "
                  "another output.dir")
    _check_derived(spec, names, err)
    for fit_name in spec.truth:
        if fit_name == TRUTH_DERIVED_KEY and fit_name not in names:
            _check_derived_truth(spec, err)
            continue
        if fit_name not in names:
            raise err(("truth", fit_name), f"no fit named {fit_name!r}; truth: lists values by "
                      f"fit name ({', '.join(names) or 'no fits defined'}) and, under "
                      f"{TRUTH_DERIVED_KEY}:, by derived quantity")


def _check_derived(spec: Spec, fit_index: dict[str, int], err: _Errors) -> None:
    """``derived.NAME``: a free name, and an expression over known FIT.PARAM references."""
    if not spec.derived:
        return
    from plateaufit.fit.derived import DerivedExpression

    if TRUTH_DERIVED_KEY in fit_index:
        raise err(("fits", fit_index[TRUTH_DERIVED_KEY], "name"),
                  f"a spec with derived quantities cannot have a fit named "
                  f"{TRUTH_DERIVED_KEY!r} (truth.{TRUTH_DERIVED_KEY} holds their truth); "
                  "rename the fit")
    known = fit_reference_names(spec)
    for name, expression in spec.derived.items():
        key = ("derived", name)
        if not _OBS_NAME.match(name):
            raise err(key, f"derived quantity name {name!r} must start with a letter and use "
                      "only letters, digits and '_'")
        if name in fit_index:
            raise err(key, f"the name {name!r} is already the name of fits[{fit_index[name]}]; "
                      "give the derived quantity its own name")
        if not known:
            raise err(key, "there are no fits to derive from; add fits: first")
        try:
            DerivedExpression(expression, known)
        except ValueError as exc:
            raise err(key, str(exc)) from None


def _check_derived_truth(spec: Spec, err: _Errors) -> None:
    defined = list(spec.derived)
    for name in spec.truth[TRUTH_DERIVED_KEY]:
        if name not in spec.derived:
            listed = (f"the derived quantities are {', '.join(defined)}" if defined
                      else "the spec defines none (add derived: {NAME: expression})")
            raise err(("truth", TRUTH_DERIVED_KEY, name), f"no derived quantity named {name!r}; "
                      f"{listed}{_suggest_name(name, defined)}")


def _suggest_name(name: str, choices: list[str]) -> str:
    close = difflib.get_close_matches(name, choices, n=1)
    return f"; did you mean {close[0]!r}?" if close else ""


def _check_observable(spec: Spec, name: str, obs: ObservableSpec, err: _Errors) -> None:
    base = ("observables", name)
    if not _OBS_NAME.match(name):
        raise err(base, f"observable name {name!r} must start with a letter and use only "
                  "letters, digits and '_' (it becomes part of parameter names like A0.NAME)")
    if not obs.file.strip():
        raise err(base + ("file",), "file is empty; give the data file's path")
    fmt = obs.resolved_format
    if fmt is None:
        accepted = ", ".join(SUFFIXES)
        raise err(base + ("file",), f"cannot tell the format of {obs.file!r} from its suffix; "
                  f"use one of {accepted} or add format: ({', '.join(FORMATS)})")
    for key, needs in (("dataset", "hdf5"), ("ids_dataset", "hdf5"), ("array", "npz")):
        if getattr(obs, key) is not None and fmt != needs:
            raise err(base + (key,), f"{key} applies to {needs} files only, but {obs.file!r} is "
                      f"read as {fmt}; remove it or set format: {needs}")
    if obs.part == "imag" and fmt == "text":
        raise err(base + ("part",), "text files hold real numbers only; part: imag needs "
                  "complex data (npy, npz, hdf5, or csv with an imag column)")
    if obs.boundary == "open" and obs.fold:
        raise err(base + ("fold",), "fold: true needs a periodic or antiperiodic boundary; an "
                  "open boundary has no reflection symmetry (remove fold or change boundary)")


def _check_fit(spec: Spec, i: int, fit: FitSpec, err: _Errors) -> None:
    from plateaufit.fit.models import check_formula

    key = ("fits", i)
    known = list(spec.observables)
    for j, name in enumerate(fit.observables):
        if name not in spec.observables:
            raise err(key + ("observables", j), f"unknown observable {name!r}; the observables "
                      f"are {', '.join(known)}")
        if name in fit.observables[:j]:
            raise err(key + ("observables", j), f"observable {name!r} is listed twice; list "
                      "each once")

    if fit.model == "formula":
        if fit.formula is None:
            raise err(key + ("formula",), "model: formula needs formula: {expression: ..., "
                      "params: {NAME: start, ...}}")
        for opt, default in (("states", 1), ("oscillating", 0), ("constant", False),
                             ("factorised", False)):
            if getattr(fit, opt) != default:
                raise err(key + (opt,), f"{opt} does not apply to model: formula; the formula "
                          "itself says what is fitted (remove it)")
        try:
            check_formula(fit.formula.expression, list(fit.formula.params))
        except ValueError as exc:
            raise err(key + ("formula", "expression"), str(exc)) from None
    elif fit.formula is not None:
        raise err(key + ("formula",), f"formula: applies to model: formula only, but the model "
                  f"is {fit.model}; remove it or set model: formula")

    if fit.factorised:
        for name in fit.observables:
            for end in ("source", "sink"):
                if getattr(spec.observables[name], end) is None:
                    raise err(("observables", name, end), f"fits[{i}] ({fit.name}) is factorised, "
                              f"so observable {name!r} needs source: and sink: operator labels "
                              "(A_n = Z_n.source * Z_n.sink)")

    _check_ranges(spec, i, fit, err)

    names = fit_parameter_names(spec, fit)
    for group in ("priors", "bounds", "start"):
        for param in getattr(fit, group):
            if param not in names:
                close = difflib.get_close_matches(param, names, n=1)
                guess = f"; did you mean {close[0]!r}?" if close else ""
                raise err(key + (group, param), f"the model has no parameter {param!r}; its "
                          f"parameters are {', '.join(names)}{guess}")
    for param, (mean, width) in fit.priors.items():
        if not width > 0:
            raise err(key + ("priors", param), f"prior width {width:g} must be positive "
                      "([mean, width])")
    for param, (lo, hi) in fit.bounds.items():
        if not lo < hi:
            raise err(key + ("bounds", param), f"bounds [{lo:g}, {hi:g}] need lo < hi")
    for param, value in fit.start.items():
        if param in fit.bounds:
            lo, hi = fit.bounds[param]
            if not lo <= value <= hi:
                raise err(key + ("start", param), f"start {value:g} is outside the bounds "
                          f"[{lo:g}, {hi:g}] of {param}")

    _check_dof(spec, i, fit, err)


def _check_ranges(spec: Spec, i: int, fit: FitSpec, err: _Errors) -> None:
    key = ("fits", i)
    tmins, tmaxs = fit.tmin_values, fit.tmax_values
    if isinstance(fit.tmin, int) and isinstance(fit.tmax, int) and fit.tmin >= fit.tmax:
        raise err(key + ("tmin",), f"tmin = {fit.tmin} must be smaller than tmax = {fit.tmax} "
                  "(the range includes both ends)")
    if min(tmins) >= max(tmaxs):
        raise err(key + ("tmin",), f"no tmin in {tmins} is below a tmax in {tmaxs}; every fit "
                  "range needs tmin < tmax")
    limits = {name: max_fit_t(spec, name) for name in fit.observables}
    tightest = min(limits, key=limits.get)
    largest = limits[tightest]
    if max(tmaxs) > largest:
        obs = spec.observables[tightest]
        how = (f"folded, t = 0..{largest}" if obs.folds else f"not folded, t = 0..{largest}")
        raise err(key + ("tmax",), f"tmax = {max(tmaxs)} is beyond the data: observable "
                  f"{tightest!r} has T = {spec.ensemble.time_extent}, {obs.boundary} boundary, "
                  f"{how}; the largest allowed tmax is {largest}")


def _check_dof(spec: Spec, i: int, fit: FitSpec, err: _Errors) -> None:
    key = ("fits", i)
    n_obs = len(fit.observables)
    tmins, tmaxs, states = fit.tmin_values, fit.tmax_values, fit.states_values
    n_params = {s: fit_n_params(spec, fit, s) for s in states}

    def dof(tmin: int, tmax: int, s: int) -> int:
        return n_obs * (tmax - tmin + 1) - n_params[s]

    if not any(dof(a, b, s) >= 1 for a in tmins for b in tmaxs if a < b for s in states):
        widest = n_obs * (max(tmaxs) - min(tmins) + 1)
        fewest, most = min(n_params.values()), max(n_params.values())
        params = (f"{fewest} parameters" if fewest == most
                  else f"{fewest} to {most} parameters")
        raise err(key + ("tmin",), f"no fit range leaves a degree of freedom: the widest range "
                  f"t = {min(tmins)}..{max(tmaxs)} gives {widest} data points "
                  f"({n_obs} observable(s)) and the model has {params}; dof = points - "
                  "parameters must be >= 1 (widen the range or use fewer states)")
    choose = fit.choose
    if isinstance(choose, ChooseSpec):
        if choose.states is None:
            if len(states) > 1:
                raise err(key + ("choose",), f"the fit scans states {states}; say which with "
                          "choose: {tmin: .., tmax: .., states: ..}")
            choose.states = states[0]
        point = (choose.tmin, choose.tmax, choose.states)
        outside = [f"{k} = {v} is not among {vals}" for k, v, vals in
                   (("tmin", choose.tmin, tmins), ("tmax", choose.tmax, tmaxs),
                    ("states", choose.states, states)) if v not in vals]
        if outside:
            raise err(key + ("choose",), f"choose names a point outside the scan: "
                      f"{'; '.join(outside)}")
        if choose.tmin >= choose.tmax or dof(*point) < 1:
            raise err(key + ("choose",), f"the chosen point tmin = {choose.tmin}, tmax = "
                      f"{choose.tmax}, states = {choose.states} is not fitted (it needs tmin < "
                      "tmax and at least one degree of freedom); choose another")
