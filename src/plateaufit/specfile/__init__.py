"""The spec file's contract: pydantic models, YAML reading, error wording, cross-checks.

:func:`load_spec` reads the YAML (refusing duplicate keys), validates the types
and values of every key with pydantic (unknown keys are refused, listing the
allowed ones), then checks what involves more than one key
(:mod:`plateaufit.specfile.checks`). Every problem is a
:class:`~plateaufit.errors.SpecError` whose ``where`` is the key path
(``fits[1].tmin``, ``observables.pion.file``, ``covariance.shrinkage``) and
whose message says what is allowed; the line of the spec file is appended
when it is known. The validated :class:`Spec` is never changed afterwards.

This package imports nothing above :mod:`plateaufit.data`: the model rules
its checks need (parameter names, formula and derived-expression checks)
are passed in as :class:`ModelRules`. ``plateaufit.load_spec`` (that is,
:func:`plateaufit.pipeline.load_spec`) passes the fit core's.
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any

from pydantic import ValidationError

from plateaufit.errors import SpecError
from plateaufit.specfile.checks import TRUTH_DERIVED_KEY, cross_check
from plateaufit.specfile.messages import SpecErrors, key_path, pydantic_message
from plateaufit.specfile.models import (
    FORMS,
    SHRINKAGE_METHODS,
    BinningSpec,
    ChooseSpec,
    CovarianceSpec,
    EnsembleSpec,
    FitSpec,
    FormulaSpec,
    MatrixSpec,
    ObservableSpec,
    OutputSpec,
    Spec,
)
from plateaufit.specfile.parsers import KeyedValueError, scan_values
from plateaufit.specfile.rules import ModelRules
from plateaufit.specfile.yaml_io import read_yaml

__all__ = [
    "Spec", "EnsembleSpec", "ObservableSpec", "BinningSpec", "CovarianceSpec", "FormulaSpec",
    "ChooseSpec", "FitSpec", "OutputSpec", "MatrixSpec", "ModelRules", "load_spec", "validate_spec",
    "key_path", "scan_values", "FORMS", "SHRINKAGE_METHODS", "TRUTH_DERIVED_KEY",
]


#: the model classes, whose names pydantic puts into the key path of a union's errors
_MODEL_NAMES = frozenset(m.__name__ for m in (
    Spec, EnsembleSpec, ObservableSpec, BinningSpec, CovarianceSpec, FormulaSpec, ChooseSpec,
    FitSpec, OutputSpec))


def _is_union_tag(part: Any) -> bool:
    return isinstance(part, str) and (part in _MODEL_NAMES or part.startswith("literal["))


def _without_union_tags(errors: list[dict]) -> list[dict]:
    """pydantic's errors with the union members' tags taken out of the key paths.

    A value of a union (``choose: average | {tmin, tmax, states}``) that matches no
    member gets one error per member, their key paths tagged with the member
    (``choose.ChooseSpec.tmax``, ``choose.literal['average']``). The user's key
    path has no such parts; and where the mapping member has errors, those are
    the ones to report (the value is a mapping, so "not 'average'" says nothing).
    """
    cleaned = []
    for err in errors:
        tags = [p for p in err["loc"] if _is_union_tag(p)]
        loc = tuple(p for p in err["loc"] if not _is_union_tag(p))
        cleaned.append(({**err, "loc": loc}, tags))
    mapping_locs = [e["loc"] for e, tags in cleaned if any(t in _MODEL_NAMES for t in tags)]
    out = []
    for err, tags in cleaned:
        literal_only = bool(tags) and all(t.startswith("literal[") for t in tags)
        at = err["loc"]
        if literal_only and any(loc[:len(at)] == at for loc in mapping_locs):
            continue   # "not 'average'" said of a mapping whose own errors are listed
        out.append(err)
    return out


def load_spec(path: str | os.PathLike[str], *, rules: ModelRules) -> Spec:
    """Read and validate a specification file.

    Parameters
    ----------
    path : path-like
        The YAML file. Relative paths inside it are resolved against its
        directory.
    rules : ModelRules
        The model rules of the cross-checks (the fit core's:
        :data:`plateaufit.pipeline.rules.FIT_RULES`).

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
    data, node = read_yaml(p)
    return validate_spec(data, path=p, rules=rules, _node=node)


def validate_spec(data: Any, *, rules: ModelRules, path: str | os.PathLike[str] | None = None,
                  base_dir: str | os.PathLike[str] | None = None, _node: Any = None) -> Spec:
    """Validate an already-parsed spec (a dict as the YAML would give).

    Parameters
    ----------
    data : dict
    rules : ModelRules
        See :func:`load_spec`.
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
    errors = SpecErrors(p, _node)
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
        errs = sorted(_without_union_tags(exc.errors()),
                      key=lambda e: e["type"] != "extra_forbidden")
        first = errs[0]
        loc = tuple(part for part in first["loc"] if part != "[key]")
        cause = (first.get("ctx") or {}).get("error")
        if isinstance(cause, KeyedValueError):   # a problem of one entry of a mapping
            loc += cause.key
        more = len(errs) - 1
        suffix = f" ({more} more problem{'s' if more > 1 else ''} in the spec)" if more else ""
        raise errors(loc, pydantic_message(first) + suffix) from None
    if base_dir is not None:
        spec._base_dir = Path(base_dir)
    elif p is not None:
        spec._base_dir = p.resolve().parent
    spec._path = p
    spec._rules = rules
    cross_check(spec, rules, errors)
    return spec
