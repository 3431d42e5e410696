"""The fit core's model rules for the spec's cross-checks, and loading a spec with them.

:mod:`plateaufit.specfile` imports nothing above :mod:`plateaufit.data`; the
rules it needs (reported parameter names, the formula check, the derived
expression check) have their one home in the fit core and are passed in
from here.
"""

from __future__ import annotations

import os
from collections.abc import Mapping
from pathlib import Path
from typing import Any

from plateaufit.errors import SpecError
from plateaufit.fit.derived import DerivedExpression
from plateaufit.fit.models import check_formula, reported_parameter_names
from plateaufit.specfile import ModelRules, Spec
from plateaufit.specfile import load_spec as _load_spec
from plateaufit.specfile import validate_spec as _validate_spec

__all__ = ["FIT_RULES", "load_spec", "validate_spec", "as_spec"]


def _check_derived(expression: str, known: Mapping[str, list[str]]) -> None:
    DerivedExpression(expression, dict(known))


#: the fit core's rules, as the spec's cross-checks call them
FIT_RULES = ModelRules(reported_names=reported_parameter_names, check_formula=check_formula,
                       check_derived=_check_derived)


def load_spec(path: str | os.PathLike[str]) -> Spec:
    """Read and validate a spec file with the fit core's rules (``plateaufit.load_spec``).

    Raises
    ------
    SpecError
        At the key path (or the file), see :func:`plateaufit.specfile.load_spec`.
    """
    return _load_spec(path, rules=FIT_RULES)


def validate_spec(data: Any, *, path: str | os.PathLike[str] | None = None,
                  base_dir: str | os.PathLike[str] | None = None) -> Spec:
    """Validate a parsed spec (a dict as the YAML would give) with the fit core's rules."""
    return _validate_spec(data, rules=FIT_RULES, path=path, base_dir=base_dir)


def as_spec(source: str | os.PathLike[str] | Spec | Mapping[str, Any], *,
            base_dir: str | os.PathLike[str] | None = None) -> Spec:
    """A validated Spec from a file path, a Spec, or a dict (relative paths against ``base_dir``)."""
    if isinstance(source, Spec):
        return source
    if isinstance(source, Mapping):
        return validate_spec(dict(source), base_dir=base_dir)
    if isinstance(source, (str, os.PathLike)):
        return load_spec(Path(source))
    raise SpecError("", "expected a spec file path, a Spec or a dict, got "
                    f"{type(source).__name__}")
