"""Parsers of single spec values: whole numbers, numbers, pairs, fit ranges.

Each raises ``ValueError`` with the wording a user reads; the pydantic models
(:mod:`plateaufit.specfile.models`) turn it into a
:class:`~plateaufit.errors.SpecError` at the key path.
"""

from __future__ import annotations

from typing import Any

__all__ = ["whole", "number", "pair", "time_range", "scan_values", "mapping"]


def whole(value: Any, what: str) -> int:
    """``value`` as an int; refuses bools and floats."""
    if isinstance(value, bool) or not isinstance(value, int):
        raise ValueError(f"{what} must be a whole number, got {value!r}")
    return value


def number(value: Any, what: str) -> float:
    """``value`` as a float; refuses bools and text."""
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise ValueError(f"{what} must be a number, got {value!r}")
    return float(value)


def pair(value: Any, param: str, names: tuple[str, str]) -> list[float]:
    """A list of two numbers, e.g. a prior ``[mean, width]``."""
    if not isinstance(value, list) or len(value) != 2:
        raise ValueError(f"write {param} as a list of two numbers [{names[0]}, {names[1]}], "
                         f"got {value!r}")
    return [number(v, f"{param}: {n}") for v, n in zip(value, names)]


def time_range(value: Any, key: str) -> int | list[int]:
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


def mapping(value: Any, key: str, form: str) -> dict[str, Any]:
    """A mapping with text keys (None -> {})."""
    if value is None:
        return {}
    if not isinstance(value, dict):
        raise ValueError(f"write {key} as a mapping {form}; got {value!r}")
    return {str(k): v for k, v in value.items()}
