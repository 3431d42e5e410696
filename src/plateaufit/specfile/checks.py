"""Checks of a spec that involve more than one key; they read the spec, never change it.

The observables a fit names, fit ranges against the folded data, parameters
named in priors, bounds and start against the model, degrees of freedom,
``choose``, user formulas, derived quantities (``derived:``, expressions over
``FIT.PARAM`` references) and ``truth:``. The model-dependent rules come in
through :class:`~plateaufit.specfile.rules.ModelRules`.
"""

from __future__ import annotations

import ast
import math
import re

from plateaufit.data.loaders import FORMATS, SUFFIXES
from plateaufit.specfile.matrices import check_matrices, check_matrix_fit, check_matrix_t0
from plateaufit.specfile.messages import SpecErrors, suggest_name
from plateaufit.specfile.models import FitSpec, ObservableSpec, Spec
from plateaufit.specfile.rules import ModelRules

__all__ = ["cross_check", "TRUTH_DERIVED_KEY"]

#: the key of ``truth:`` that holds the truth of the derived quantities
TRUTH_DERIVED_KEY = "derived"

_OBS_NAME = re.compile(r"^[A-Za-z][A-Za-z0-9_]*$")
_FIT_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]*$")


def cross_check(spec: Spec, rules: ModelRules, err: SpecErrors) -> None:
    """Raise the first cross-key problem of ``spec`` as a SpecError (see module docs)."""
    if not spec.observables:
        raise err(("observables",), "no observables defined; add at least one, e.g. "
                  "pion: {file: pion.txt}")
    for name, obs in spec.observables.items():
        _check_observable(spec, name, obs, err)
    check_matrices(spec, err)
    names: dict[str, int] = {}
    for i, fit in enumerate(spec.fits):
        if not _FIT_NAME.match(fit.name):
            raise err(("fits", i, "name"), f"fit name {fit.name!r} must start with a letter or "
                      "digit and use only letters, digits, '_', '.' and '-'")
        if fit.name in names:
            raise err(("fits", i, "name"), f"fit name {fit.name!r} is already used by "
                      f"fits[{names[fit.name]}]; give each fit its own name")
        names[fit.name] = i
        _check_fit(spec, rules, i, fit, err)
    out = spec.output.dir
    if not out.strip():
        raise err(("output", "dir"), "output.dir is empty; give a directory such as results")
    resolved = spec.resolve(out)
    if resolved.exists() and not resolved.is_dir():
        raise err(("output", "dir"), f"{resolved} exists and is not a directory; choose "
                  "another output.dir")
    _check_derived(spec, rules, names, err)
    _check_truth(spec, names, err)


def _check_truth(spec: Spec, names: dict[str, int], err: SpecErrors) -> None:
    """``truth.FIT.PARAM``: a fit of the spec and one of its parameters, a finite value."""
    for fit_name, values in spec.truth.items():
        for param, value in values.items():
            if not math.isfinite(value):
                raise err(("truth", fit_name, param), f"the truth of {param} must be a finite "
                          f"number, got {value!r}")
        if fit_name == TRUTH_DERIVED_KEY and fit_name not in names:
            _check_derived_truth(spec, err)
            continue
        if fit_name not in names:
            choices = list(names) + ([TRUTH_DERIVED_KEY] if spec.derived else [])
            raise err(("truth", fit_name), f"no fit named {fit_name!r}; truth: lists values by "
                      f"fit name ({', '.join(names) or 'no fits defined'}) and, under "
                      f"{TRUTH_DERIVED_KEY}:, by derived quantity"
                      f"{suggest_name(fit_name, choices)}")
        fit = spec.fits[names[fit_name]]
        known = spec.reported_names(fit)
        for param in values:
            if param not in known:
                raise err(("truth", fit_name, param), f"fit {fit_name!r} has no parameter "
                          f"{param!r}; its parameters are {', '.join(known)}"
                          f"{suggest_name(param, known)}")


def _check_derived(spec: Spec, rules: ModelRules, fit_index: dict[str, int],
                   err: SpecErrors) -> None:
    """``derived.NAME``: a free name, and an expression over known FIT.PARAM references."""
    if not spec.derived:
        return
    if TRUTH_DERIVED_KEY in fit_index:
        raise err(("fits", fit_index[TRUTH_DERIVED_KEY], "name"),
                  f"a spec with derived quantities cannot have a fit named "
                  f"{TRUTH_DERIVED_KEY!r} (truth.{TRUTH_DERIVED_KEY} holds their truth); "
                  "rename the fit")
    known = spec.reference_names()
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
            rules.check_derived(expression, known)
        except ValueError as exc:
            raise err(key, str(exc)) from None


def _names_in(expression: str) -> set[str]:
    """The names an expression uses (it has passed the formula check: valid syntax)."""
    tree = ast.parse(expression.strip(), mode="eval")
    return {node.id for node in ast.walk(tree) if isinstance(node, ast.Name)}


def _check_derived_truth(spec: Spec, err: SpecErrors) -> None:
    defined = list(spec.derived)
    for name in spec.truth[TRUTH_DERIVED_KEY]:
        if name not in spec.derived:
            listed = (f"the derived quantities are {', '.join(defined)}" if defined
                      else "the spec defines none (add derived: {NAME: expression})")
            raise err(("truth", TRUTH_DERIVED_KEY, name), f"no derived quantity named {name!r}; "
                      f"{listed}{suggest_name(name, defined)}")


def _check_observable(spec: Spec, name: str, obs: ObservableSpec, err: SpecErrors) -> None:
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


def _check_fit(spec: Spec, rules: ModelRules, i: int, fit: FitSpec, err: SpecErrors) -> None:
    key = ("fits", i)
    known = list(spec.observables)
    if fit.matrix is not None or fit.level is not None:
        check_matrix_fit(spec, i, fit, err)
    elif not fit.observables:
        raise err(key + ("observables",), "required key is missing; add observables: [NAME, "
                  "...] (or matrix: NAME and level: n to fit a level of a correlator matrix)")
    for j, name in enumerate(fit.observables):
        if name not in spec.observables:
            raise err(key + ("observables", j), f"unknown observable {name!r}; the observables "
                      f"are {', '.join(known)}{suggest_name(name, known)}")
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
            rules.check_formula(fit.formula.expression, list(fit.formula.params))
        except ValueError as exc:
            raise err(key + ("formula", "expression"), str(exc)) from None
        used = _names_in(fit.formula.expression)
        for param in fit.formula.params:
            if param not in used:
                raise err(key + ("formula", "params", param), f"the expression "
                          f"{fit.formula.expression!r} does not use the parameter {param!r}, so "
                          "the data cannot determine it (it would be reported as its start "
                          "value); use it in the expression or remove it from params")
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
    if fit.matrix is not None:
        check_matrix_t0(spec, i, fit, err)

    names = spec.reported_names(fit)
    for group in ("priors", "bounds", "start"):
        for param in getattr(fit, group):
            if param not in names:
                raise err(key + (group, param), f"the model has no parameter {param!r}; its "
                          f"parameters are {', '.join(names)}{suggest_name(param, names)}")
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


def _check_ranges(spec: Spec, i: int, fit: FitSpec, err: SpecErrors) -> None:
    key = ("fits", i)
    tmins, tmaxs = fit.tmin_values, fit.tmax_values
    if isinstance(fit.tmin, int) and isinstance(fit.tmax, int) and fit.tmin >= fit.tmax:
        raise err(key + ("tmin",), f"tmin = {fit.tmin} must be smaller than tmax = {fit.tmax} "
                  "(the range includes both ends)")
    if min(tmins) >= max(tmaxs):
        raise err(key + ("tmin",), f"no tmin in {tmins} is below a tmax in {tmaxs}; every fit "
                  "range needs tmin < tmax")
    limits = {name: spec.max_fit_t(name) for name in fit.correlators}
    tightest = min(limits, key=limits.get)
    largest = limits[tightest]
    if max(tmaxs) > largest:
        obs = spec.observables[spec.matrices[tightest].grid[0][0]
                               if tightest in spec.matrices else tightest]
        how = (f"folded, t = 0..{largest}" if obs.folds else f"not folded, t = 0..{largest}")
        what = "matrix" if tightest in spec.matrices else "observable"
        raise err(key + ("tmax",), f"tmax = {max(tmaxs)} is beyond the data: {what} "
                  f"{tightest!r} has T = {spec.ensemble.time_extent}, {obs.boundary} boundary, "
                  f"{how}; the largest allowed tmax is {largest}")


def _check_dof(spec: Spec, i: int, fit: FitSpec, err: SpecErrors) -> None:
    key = ("fits", i)
    n_obs = len(fit.correlators)
    tmins, tmaxs, states = fit.tmin_values, fit.tmax_values, fit.states_values
    n_params = {s: spec.n_params(fit, s) for s in states}

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
    if fit.averages:
        return
    if choose.states is None and len(states) > 1:
        raise err(key + ("choose",), f"the fit scans states {states}; say which with "
                  "choose: {tmin: .., tmax: .., states: ..}")
    point = fit.chosen_point()
    c_tmin, c_tmax, c_states = point
    outside = [f"{k} = {v} is not among {vals}" for k, v, vals in
               (("tmin", c_tmin, tmins), ("tmax", c_tmax, tmaxs),
                ("states", c_states, states)) if v not in vals]
    if outside:
        raise err(key + ("choose",), f"choose names a point outside the scan: "
                  f"{'; '.join(outside)}")
    if c_tmin >= c_tmax or dof(*point) < 1:
        raise err(key + ("choose",), f"the chosen point tmin = {c_tmin}, tmax = "
                  f"{c_tmax}, states = {c_states} is not fitted (it needs tmin < "
                  "tmax and at least one degree of freedom); choose another")
