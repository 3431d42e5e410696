"""Numerical warnings of a fit, caught where they arise and counted.

numpy, scipy and lmfit warn about overflow, invalid values or a singular
covariance of their own estimate while a minimiser explores a steep or flat
region: expected inside a fit, alarming on a user's terminal. Fits catch them
with :class:`CaughtWarnings` and keep the count and the distinct messages, for
the run log.
"""

from __future__ import annotations

import warnings
from typing import Any

__all__ = ["CaughtWarnings", "MAX_MESSAGES"]

#: Distinct messages kept per fit.
MAX_MESSAGES = 5


class CaughtWarnings:
    """Context manager: every warning inside is recorded, none is shown.

    Attributes
    ----------
    count : int
        Number of warnings caught (after the block).
    messages : tuple of str
        The distinct ``Category: message`` texts, at most :data:`MAX_MESSAGES`.
    """

    def __init__(self) -> None:
        self.count = 0
        self.messages: tuple[str, ...] = ()

    def __enter__(self) -> CaughtWarnings:
        self._ctx = warnings.catch_warnings(record=True)
        self._caught = self._ctx.__enter__()
        warnings.simplefilter("always")
        return self

    def __exit__(self, *exc: Any) -> None:
        self._ctx.__exit__(*exc)
        distinct: list[str] = []
        for w in self._caught:
            text = f"{w.category.__name__}: {w.message}"
            if text not in distinct:
                distinct.append(text)
        self.count = len(self._caught)
        self.messages = tuple(distinct[:MAX_MESSAGES])


def merge_messages(*groups: tuple[str, ...]) -> tuple[str, ...]:
    """Distinct messages of several groups, at most :data:`MAX_MESSAGES`."""
    out: list[str] = []
    for group in groups:
        for text in group:
            if text not in out:
                out.append(text)
    return tuple(out[:MAX_MESSAGES])
