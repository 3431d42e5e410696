"""Check that a results dict has the keys the report cannot do without.

The report draws what is there and skips optional parts (a binning study, a
covariance summary, the truth); the keys checked here are the ones without
which there is no report: the ensemble, and for every fit its chosen result
and its scan.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from plateaufit.errors import DataError

__all__ = ["check_results"]

_WHAT_TO_DO = ("it is not a complete plateaufit results file; rerun `plateaufit fit SPEC` "
               "to write it again")


def _need(mapping: Any, key: str, path: str, where: str, kind: type | tuple[type, ...]) -> Any:
    if not isinstance(mapping, Mapping) or key not in mapping:
        raise DataError(where, f"required key {path} is missing; {_WHAT_TO_DO}")
    value = mapping[key]
    if not isinstance(value, kind):
        names = kind.__name__ if isinstance(kind, type) else " or ".join(k.__name__ for k in kind)
        raise DataError(where, f"key {path} should be a {_type_word(names)}, "
                               f"not {type(value).__name__}; {_WHAT_TO_DO}")
    return value


def _type_word(names: str) -> str:
    return names.replace("Mapping", "mapping (JSON object)").replace("list", "list (JSON array)")


def check_results(results: Any, where: str = "results") -> None:
    """Raise DataError naming the first required key that is missing.

    Required: ``ensemble`` (an object), ``fits`` (an object) and for every fit
    ``fits.NAME.chosen`` with ``method`` and ``params`` (each parameter with
    ``value`` and ``error``), and ``fits.NAME.scan`` (a list whose points have
    ``tmin``, ``tmax`` and ``states``).

    Parameters
    ----------
    results : object
        What was read from results.json.
    where : str
        The file the results came from (named in the error).

    Raises
    ------
    DataError
        With ``where`` and a message naming the missing key path, e.g.
        ``required key fits.pion.chosen.params is missing``.
    """
    if not isinstance(results, Mapping):
        raise DataError(where, f"should hold a JSON object, not {type(results).__name__}; "
                               f"{_WHAT_TO_DO}")
    _need(results, "ensemble", "ensemble", where, Mapping)
    fits = _need(results, "fits", "fits", where, Mapping)
    for name, fit in fits.items():
        base = f"fits.{name}"
        if not isinstance(fit, Mapping):
            raise DataError(where, f"key {base} should be a mapping (JSON object); {_WHAT_TO_DO}")
        chosen = _need(fit, "chosen", f"{base}.chosen", where, Mapping)
        _need(chosen, "method", f"{base}.chosen.method", where, str)
        params = _need(chosen, "params", f"{base}.chosen.params", where, Mapping)
        for pname, entry in params.items():
            for key in ("value", "error"):
                _need(entry, key, f"{base}.chosen.params.{pname}.{key}", where,
                      (int, float, type(None)))
        scan = _need(fit, "scan", f"{base}.scan", where, list)
        for i, point in enumerate(scan):
            for key in ("tmin", "tmax", "states"):
                _need(point, key, f"{base}.scan[{i}].{key}", where, int)
