"""Error wording of the spec: key paths, spec-file lines, pydantic errors in a user's words."""

from __future__ import annotations

import difflib
import types
import typing
from pathlib import Path
from typing import Any, Union

from pydantic import BaseModel

from plateaufit.errors import SpecError
from plateaufit.specfile.models import Spec
from plateaufit.specfile.yaml_io import line_of

__all__ = ["key_path", "SpecErrors", "pydantic_message", "suggest_name"]


def key_path(loc: tuple) -> str:
    """``('fits', 1, 'tmin')`` -> ``fits[1].tmin``."""
    out = ""
    for part in loc:
        if isinstance(part, int):
            out += f"[{part}]"
        else:
            out += ("." if out else "") + str(part)
    return out


class SpecErrors:
    """Builds SpecErrors with the key path and, when known, the spec file line."""

    def __init__(self, path: Path | None, node: Any) -> None:
        self.path = path
        self.node = node

    def __call__(self, loc: tuple, message: str) -> SpecError:
        line = line_of(self.node, loc) if self.node is not None else None
        if line is not None and self.path is not None:
            message = f"{message} [{self.path.name} line {line}]"
        return SpecError(key_path(loc), message)


def suggest_name(name: str, choices: list[str]) -> str:
    """``; did you mean 'x'?`` for the closest of ``choices``, else ''."""
    same_letters = [c for c in choices if c.lower() == name.lower()]
    close = same_letters or difflib.get_close_matches(name, choices, n=1)
    return f"; did you mean {close[0]!r}?" if close else ""


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


def _describe(value: Any) -> str:
    text = repr(value)
    return text if len(text) <= 60 else text[:57] + "..."


def pydantic_message(err: dict) -> str:
    """One pydantic error (``ValidationError.errors()[i]``) in a user's words."""
    kind, loc, value = err["type"], tuple(err["loc"]), err.get("input")
    if kind == "missing":
        hint = _MISSING_HINTS.get(str(loc[-1]), "")
        return f"required key is missing; add {loc[-1]}:{hint}"
    if kind == "extra_forbidden":
        model = _model_at(loc[:-1])
        allowed = list(model.model_fields) if model else []
        return (f"unknown key {str(loc[-1])!r}; allowed keys here are {', '.join(allowed)}"
                f"{suggest_name(str(loc[-1]), allowed)}")
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
    if kind == "invalid_key":
        return f"keys must be text, got {_describe(loc[-1] if loc else value)}"
    if kind == "too_short":
        return f"must not be empty, got {_describe(value)}"
    return f"{err['msg']} (got {_describe(value)})"
