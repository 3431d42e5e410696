"""Parsers of single spec values: whole numbers, numbers, pairs, fit ranges.

Each raises ``ValueError`` with the wording a user reads; the pydantic models
(:mod:`plateaufit.specfile.models`) turn it into a
:class:`~plateaufit.errors.SpecError` at the key path.
"""

from __future__ import annotations

import math
from typing import Any

__all__ = ["whole", "number", "pair", "time_range", "scan_values", "mapping", "per_key",
           "KeyedValueError"]


#: largest timeslice a fit range may name (the spec's MAX_TIME_EXTENT): keeps a typo such as
#: tmin: [0, 10**12] from expanding into a list of 10**12 timeslices
MAX_TIMESLICE = 100_000


class KeyedValueError(ValueError):
    """A ValueError about one entry of a mapping: ``key`` extends the error's key path."""

    def __init__(self, key: tuple, message: str) -> None:
        super().__init__(message)
        self.key = key


def per_key(values: dict[str, Any], parse: Any) -> dict[str, Any]:
    """``{k: parse(k, v)}``; a ValueError of one entry is raised at that entry's key."""
    out = {}
    for k, v in values.items():
        try:
            out[k] = parse(k, v)
        except KeyedValueError as exc:
            raise KeyedValueError((k, *exc.key), str(exc)) from None
        except ValueError as exc:
            raise KeyedValueError((k,), str(exc)) from None
    return out


def whole(value: Any, what: str) -> int:
    """``value`` as an int; refuses bools and floats."""
    if isinstance(value, bool) or not isinstance(value, int):
        raise ValueError(f"{what} must be a whole number, got {value!r}")
    return value


def number(value: Any, what: str, *, infinite: bool = False) -> float:
    """``value`` as a finite float (``infinite``: also +-inf); refuses bools, text and NaN."""
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise ValueError(f"{what} must be a number, got {value!r}")
    try:
        out = float(value)
    except OverflowError:   # an integer beyond the range of a float
        raise ValueError(f"{what} is too large ({str(value)[:20]}...); give a number below "
                         "1e308") from None
    if math.isnan(out) or (math.isinf(out) and not infinite):
        allowed = "a finite number" if not infinite else "a number (or +-.inf), not NaN"
        raise ValueError(f"{what} must be {allowed}, got {value!r}")
    return out


def pair(value: Any, param: str, names: tuple[str, str], *,
         infinite: bool = False) -> list[float]:
    """A list of two numbers, e.g. a prior ``[mean, width]`` (``infinite``: +-inf allowed)."""
    if not isinstance(value, list) or len(value) != 2:
        raise ValueError(f"write {param} as a list of two numbers [{names[0]}, {names[1]}], "
                         f"got {value!r}")
    return [number(v, n, infinite=infinite) for v, n in zip(value, names)]


def time_range(value: Any, key: str) -> int | list[int]:
    """``int`` or ``[lo, hi]`` or ``[lo, hi, step]``; values >= 0, lo <= hi, step >= 1."""
    form = f"write {key} as a timeslice (e.g. 4), a scan range [lo, hi] or [lo, hi, step]"
    if isinstance(value, bool) or not isinstance(value, (int, list)):
        raise ValueError(f"{form}; got {value!r}")
    if isinstance(value, int):
        if value < 0:
            raise ValueError(f"{key} = {value} is negative; timeslices count from 0")
        if value > MAX_TIMESLICE:
            raise ValueError(f"{key} = {str(value)[:20]} is beyond any lattice (at most "
                             f"{MAX_TIMESLICE})")
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
    if hi > MAX_TIMESLICE:
        raise ValueError(f"{key} range ends at {str(hi)[:20]}, beyond any lattice (at most "
                         f"{MAX_TIMESLICE})")
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
