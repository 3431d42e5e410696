"""Check that a results dict can be reported: required keys, and the type of every known key.

The report draws what is there and skips optional parts (a binning study, a
covariance summary, the truth). :func:`check_results` refuses, naming the key
path, what it cannot do without -- the ensemble, and for every fit its chosen
result and its scan -- and any key of the documented layout (DEVELOPERS.md,
"results dict") whose value has the wrong type, a negative error, or arrays
whose lengths disagree. Unknown keys are left alone (a newer layout may add
some); numbers may be ``null`` (NaN and inf are written so).
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from plateaufit.errors import DataError

__all__ = ["check_results", "RESULTS_LAYOUT"]

_WHAT_TO_DO = ("it is not a complete plateaufit results file; rerun `plateaufit fit SPEC` "
               "to write it again")

# ------------------------------------------------------------------ the layout, as types
# A layout is one of: a type tag (str), a dict of key -> layout (an object with those
# keys, all optional), ("map", layout) (an object of any keys, each value of that layout),
# ("list", layout), or ("either", layout, layout).

NUM, INT, STR, BOOL, ANY = "number", "whole number", "text", "true or false", "any"
ERR = "error"            # a number >= 0 (or null)
OPT_INT = "whole number or null"
OPT_STR = "text or null"

_PARAM = {"value": NUM, "error": ERR, "stat_error": ERR, "sys_error": ERR}
_POINT = {"tmin": INT, "tmax": INT, "states": INT, "weight": NUM, "chi2": NUM, "dof": INT,
          "p_value": NUM, "p_value_hotelling": NUM, "converged": BOOL}
_SCAN_POINT = {
    "tmin": INT, "tmax": INT, "model": STR, "states": INT, "chi2": NUM, "chi2_data": NUM,
    "chi2_prior": NUM, "dof": INT, "n_points": INT, "n_priors": INT, "p_value": NUM,
    "p_value_hotelling": NUM, "aic": NUM, "weight": NUM, "converged": BOOL,
    "n_refit_failed": INT, "params": ("map", {"value": NUM, "error": ERR}),
    "flags": ("list", STR), "flag_messages": ("list", STR), "n_numerical_warnings": INT,
    "numerical_warnings": ("list", STR),
}
_NUMS = ("list", NUM)
RESULTS_LAYOUT: dict[str, Any] = {
    "version": STR,
    "output": {"dir": STR},
    "ensemble": {
        "name": STR, "time_extent": OPT_INT, "n_configs": OPT_INT, "n_streams": OPT_INT,
        "stream_sizes": ("list", INT), "n_bins": OPT_INT, "bin_size": OPT_INT,
        "n_dropped": OPT_INT, "tau_int_convention": STR,
        "tau_int": ("map", {"value": NUM, "error": ERR, "window": OPT_INT, "t": OPT_INT,
                            "reliable": BOOL}),
        "autocorrelation": ("map", {"t": OPT_INT, "rho": _NUMS, "tau_by_window": _NUMS,
                                    "window": OPT_INT}),
        "binning_study": ("map", {"t": OPT_INT, "sizes": _NUMS,
                                  "errors": ("either", _NUMS, ("list", _NUMS)),
                                  "naive_error": ("either", NUM, _NUMS)}),
        "observables": ("map", {"n_t": INT, "boundary": STR, "folded": BOOL}),
        "bin_size_notes": ("list", STR),
    },
    "fits": ("map", {
        "observables": ("list", STR), "model": STR,
        "chosen": {**_POINT, "method": STR, "params": ("map", _PARAM),
                   "band": {"tmin": INT, "tmax": INT}, "n_fits": INT, "n_excluded": INT,
                   "best": _POINT, "withheld": ("list", STR),
                   "withheld_reasons": ("list", STR)},
        "scan": ("list", _SCAN_POINT),
        "effective_mass": ("map", {"t": _NUMS, "value": _NUMS, "error": ("list", ERR),
                                   "kind": STR}),
        "covariance": ("either", "null", {
            "correlation": ("list", _NUMS), "eigenvalues": _NUMS, "eigenvalues_raw": _NUMS,
            "shrinkage": NUM, "target": STR, "condition_number": NUM,
            "condition_number_raw": NUM, "n_bins": OPT_INT, "n_points": OPT_INT,
            "tmin": OPT_INT, "tmax": OPT_INT, "states": OPT_INT}),
        "warnings": ("list", STR),
    }),
    "derived": ("map", {**_PARAM, "expression": STR, "references": ("list", STR)}),
    "truth": ("map", ("map", NUM)),
    "warnings": ("list", STR),
    "warning_table": ("list", {"code": STR, "fit": OPT_STR, "message": STR}),
    "provenance": ("map", ANY),
}


def _is_number(x: Any) -> bool:
    return isinstance(x, (int, float)) and not isinstance(x, bool)


def _matches(value: Any, tag: str) -> bool:
    if tag == ANY:
        return True
    if tag == "null":
        return value is None
    if tag in (NUM, ERR):
        return value is None or _is_number(value)
    if tag == INT:
        return isinstance(value, int) and not isinstance(value, bool)
    if tag == OPT_INT:
        return value is None or (isinstance(value, int) and not isinstance(value, bool))
    if tag == STR:
        return isinstance(value, str)
    if tag == OPT_STR:
        return value is None or isinstance(value, str)
    if tag == BOOL:
        return isinstance(value, bool)
    raise AssertionError(tag)  # pragma: no cover - a typo in the layout


def _describe(layout: Any) -> str:
    if isinstance(layout, str):
        return {NUM: "a number (or null)", ERR: "a non-negative number (or null)",
                INT: "a whole number", OPT_INT: "a whole number (or null)", STR: "text",
                OPT_STR: "text (or null)", BOOL: "true or false", "null": "null"}.get(layout,
                                                                                    layout)
    if isinstance(layout, dict) or layout[0] == "map":
        return "a mapping (JSON object)"
    if layout[0] == "list":
        return "a list (JSON array)"
    return f"{_describe(layout[1])} or {_describe(layout[2])}"


def _type_name(value: Any) -> str:
    if value is None:
        return "null"
    if isinstance(value, bool):
        return "true/false"
    if isinstance(value, Mapping):
        return "a mapping"
    if isinstance(value, list):
        return "a list"
    if isinstance(value, str):
        return f"text {value[:30]!r}"
    return f"{value!r}"[:40]


def _fits(value: Any, layout: Any) -> bool:
    """Whether ``value`` has the layout's outer shape (for ``either``)."""
    if isinstance(layout, str):
        return _matches(value, layout)
    if isinstance(layout, dict) or layout[0] == "map":
        return isinstance(value, Mapping)
    if layout[0] == "list":
        return isinstance(value, list)
    return _fits(value, layout[1]) or _fits(value, layout[2])


def _join(path: str, key: Any) -> str:
    return f"{path}[{key}]" if isinstance(key, int) else (f"{path}.{key}" if path else str(key))


def _walk(value: Any, layout: Any, path: str, where: str) -> None:
    if isinstance(layout, tuple) and layout[0] == "either":
        for option in layout[1:]:
            if _fits(value, option):
                _walk(value, option, path, where)
                return
        _wrong(value, layout, path, where)
    if isinstance(layout, str):
        if not _matches(value, layout):
            _wrong(value, layout, path, where)
        if layout == ERR and value is not None and value < 0:
            raise DataError(where, f"key {path} is an error bar but negative ({value!r}); "
                            f"{_WHAT_TO_DO}")
        return
    if isinstance(layout, dict):
        if not isinstance(value, Mapping):
            _wrong(value, layout, path, where)
        for key, sub in layout.items():
            if key in value:
                _walk(value[key], sub, _join(path, key), where)
        return
    kind, sub = layout
    if kind == "map":
        if not isinstance(value, Mapping):
            _wrong(value, layout, path, where)
        for key, item in value.items():
            _walk(item, sub, _join(path, key), where)
    else:
        if not isinstance(value, list):
            _wrong(value, layout, path, where)
        for i, item in enumerate(value):
            _walk(item, sub, _join(path, i), where)


def _wrong(value: Any, layout: Any, path: str, where: str) -> None:
    raise DataError(where, f"key {path} should be {_describe(layout)}, not {_type_name(value)}; "
                           f"{_WHAT_TO_DO}")


def _need(mapping: Any, key: str, path: str, where: str) -> Any:
    if not isinstance(mapping, Mapping) or key not in mapping:
        raise DataError(where, f"required key {path} is missing; {_WHAT_TO_DO}")
    return mapping[key]


def _same_length(d: Mapping[str, Any], keys: tuple[str, ...], path: str, where: str) -> None:
    present = [(k, len(d[k])) for k in keys if isinstance(d.get(k), list)]
    if len({n for _, n in present}) > 1:
        shown = ", ".join(f"{k} {n}" for k, n in present)
        raise DataError(where, f"key {path}: the lists {', '.join(k for k, _ in present)} must "
                        f"have the same length, but have {shown}; {_WHAT_TO_DO}")


def _check_shapes(results: Mapping[str, Any], where: str) -> None:
    ens = results.get("ensemble") or {}
    for name, ac in (ens.get("autocorrelation") or {}).items():
        _same_length(ac, ("rho", "tau_by_window"), f"ensemble.autocorrelation.{name}", where)
    for name, study in (ens.get("binning_study") or {}).items():
        _same_length(study, ("sizes", "errors"), f"ensemble.binning_study.{name}", where)
    for fit_name, fit in (results.get("fits") or {}).items():
        for obs, em in (fit.get("effective_mass") or {}).items():
            _same_length(em, ("t", "value", "error"), f"fits.{fit_name}.effective_mass.{obs}",
                         where)
        cov = fit.get("covariance")
        if isinstance(cov, Mapping) and isinstance(cov.get("correlation"), list):
            rows = cov["correlation"]
            path = f"fits.{fit_name}.covariance.correlation"
            if any(len(row) != len(rows) for row in rows):
                raise DataError(where, f"key {path} should be a square matrix (a list of "
                                f"{len(rows)} rows of {len(rows)} numbers); {_WHAT_TO_DO}")


def check_results(results: Any, where: str = "results") -> None:
    """Raise DataError naming the first key that is missing or unusable.

    Required: ``ensemble`` (an object), ``fits`` (an object) and for every fit
    ``fits.NAME.chosen`` with ``method`` and ``params`` (each parameter with
    ``value`` and ``error``), and ``fits.NAME.scan`` (a list whose points have
    ``tmin``, ``tmax`` and ``states``). Every other key of
    :data:`RESULTS_LAYOUT` present must have its type; error bars are
    non-negative; the arrays of one plot have equal lengths.

    Parameters
    ----------
    results : object
        What was read from results.json.
    where : str
        The file the results came from (named in the error).

    Raises
    ------
    DataError
        With ``where`` and a message naming the key path, e.g. ``required
        key fits.pion.chosen.params is missing`` or ``key fits.pion.scan[3].tmin
        should be a whole number, not text '7'``.
    """
    if not isinstance(results, Mapping):
        raise DataError(where, f"should hold a JSON object, not {_type_name(results)}; "
                               f"{_WHAT_TO_DO}")
    for key in ("ensemble", "fits"):
        _need(results, key, key, where)
    fits = results["fits"]
    if isinstance(fits, Mapping):
        for name, fit in fits.items():
            base = f"fits.{name}"
            if not isinstance(fit, Mapping):
                _wrong(fit, {}, base, where)
            chosen = _need(fit, "chosen", f"{base}.chosen", where)
            if isinstance(chosen, Mapping):
                _need(chosen, "method", f"{base}.chosen.method", where)
                params = _need(chosen, "params", f"{base}.chosen.params", where)
                if isinstance(params, Mapping):
                    for pname, entry in params.items():
                        for key in ("value", "error"):
                            _need(entry, key, f"{base}.chosen.params.{pname}.{key}", where)
            scan = _need(fit, "scan", f"{base}.scan", where)
            if isinstance(scan, list):
                for i, point in enumerate(scan):
                    for key in ("tmin", "tmax", "states"):
                        _need(point, key, f"{base}.scan[{i}].{key}", where)
    _walk(results, RESULTS_LAYOUT, "", where)
    _check_shapes(results, where)
    for name, fit in results["fits"].items():
        for i, point in enumerate(fit["scan"]):
            if point["tmin"] > point["tmax"]:
                raise DataError(where, f"key fits.{name}.scan[{i}]: tmin {point['tmin']} is "
                                f"above tmax {point['tmax']}; {_WHAT_TO_DO}")
