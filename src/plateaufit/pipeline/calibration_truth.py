"""The known truth of ``plateaufit calibrate``'s replicas.

Every fit of the spec has a *truth point*: its chosen scan point (``choose:
{tmin, tmax, states}``), or for an average the highest-weight point. The truth
point's model, with the parameters of its central fit (or those of a
``--truth`` file, the missing ones taken from the central fit), predicts the
correlator over the fit's whole *band* (every timeslice any of its scan points
uses, ``min tmin .. max tmax``); that prediction is the replicas' mean there.
Timeslices no fit covers keep the data mean. Every scan point of every
replica then fits data whose mean the truth model gives exactly.

An observable in several fits: the first fit of the spec (in order) that uses
it sets its truth, over the union of the bands of every fit that uses it (one
model per observable, so the truth is never a patchwork of two fits). A later
fit that does not own all of its observables gets as its truth the
*pseudo-true* parameters: its truth point's model fitted, without noise, to the
truth vector over its range, weighted with the replicas' exact covariance of
the mean (the value an unbiased fit of that model scatters around); when its
form can describe the first fit's prediction (the same form, or a factorised
version of it), that fit recovers it exactly.

Reported parameters the truth model lacks (``E1`` of an average whose
highest-weight point has one state) have no truth: their coverage is not
measured (``fits.NAME.unmeasured`` says so). The derived quantities' truth is
their expression at the fits' truth (or the ``--truth`` file's ``derived:``).

The folded data are what is replicated (the analysis's input after loading,
aligning and folding): the truth vector and the noise model live on the
concatenation of every observable's folded timeslices, in the ensemble's order.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from plateaufit.data.ensemble import Ensemble
from plateaufit.errors import PlateaufitError, SpecError
from plateaufit.fit.central import correlated_fit
from plateaufit.fit.derived import DerivedExpression
from plateaufit.fit.models import make_model
from plateaufit.pipeline.fits import fit_kwargs
from plateaufit.pipeline.results import Results
from plateaufit.specfile import Spec

__all__ = ["FitTruth", "CalibrationTruth", "truth_vector", "pseudo_true", "read_truth_file",
           "column_layout"]

TRUTH_OPTION = "--truth"


@dataclass(frozen=True)
class FitTruth:
    """The truth of one fit: the truth point and its model's parameters."""

    tmin: int
    tmax: int
    states: int
    params: dict[str, float]
    band: tuple[int, int]
    own_band: bool           # every timeslice of the band was set by this fit

    def to_dict(self) -> dict[str, Any]:
        return {"tmin": self.tmin, "tmax": self.tmax, "states": self.states,
                "band": list(self.band), "params": dict(self.params)}


@dataclass(frozen=True)
class CalibrationTruth:
    """The replicas' truth: per-configuration mean, fit parameters, derived quantities."""

    vector: np.ndarray                    # (p,) over the concatenated folded timeslices
    fits: dict[str, FitTruth]
    derived: dict[str, float]
    unmeasured: dict[str, dict[str, str]] = field(default_factory=dict)
    derived_unmeasured: dict[str, str] = field(default_factory=dict)
    source: str = "fit"

    def to_dict(self) -> dict[str, Any]:
        return {"source": self.source,
                "fits": {k: v.to_dict() for k, v in self.fits.items()},
                "derived": dict(self.derived)}


def column_layout(ensemble: Ensemble) -> dict[str, slice]:
    """Observable -> its columns in the concatenated data (the ensemble's order)."""
    out, start = {}, 0
    for name, values in ensemble.correlators.items():
        out[name] = slice(start, start + values.shape[1])
        start += values.shape[1]
    return out


def _model(spec: Spec, index: int, states: int, ranges: Mapping[str, tuple[int, int]]):
    """The fit's model with ``states`` states on ``ranges`` (observable -> (lo, hi))."""
    fit = spec.fits[index]
    kw = fit_kwargs(spec, fit)
    t = {n: np.arange(ranges[n][0], ranges[n][1] + 1) for n in fit.observables}
    return make_model(fit.form, states, fit.observables, t, spec.ensemble.time_extent,
                      oscillating=kw["oscillating"], constant=kw["constant"],
                      operators=kw["operators"], formula=kw["formula"])


def _band(spec: Spec, index: int, ensemble: Ensemble) -> tuple[int, int]:
    fit = spec.fits[index]
    n_t = min(ensemble.correlators[n].shape[1] for n in fit.observables)
    return min(fit.tmin_values), min(max(fit.tmax_values), n_t - 1)


def _point_params(results: Results, name: str) -> tuple[tuple[int, int, int], dict[str, float]]:
    fit = results.fits[name]
    key = fit.chosen.point.key
    for point in fit.scan:
        if point.key == key:
            return key, {p: float(e.value) for p, e in point.params.items()}
    return key, {p: float(e.value) for p, e in fit.chosen.params.items()}


def truth_vector(spec: Spec, results: Results, ensemble: Ensemble,
                 file_truth: Mapping[str, Mapping[str, float]] | None = None
                 ) -> tuple[np.ndarray, dict[str, FitTruth]]:
    """The replicas' mean over the concatenated folded timeslices, and each fit's truth.

    Each observable's truth comes from the first fit of the spec that uses it,
    evaluated over the union of the bands of every fit that uses it (see the
    module notes).

    Raises
    ------
    SpecError
        At ``--truth`` when the file names a parameter the truth model lacks.
    """
    layout = column_layout(ensemble)
    vector = np.concatenate([v.mean(axis=0) for v in ensemble.correlators.values()])
    owner: dict[str, int] = {}
    union: dict[str, tuple[int, int]] = {}
    for index, fit in enumerate(spec.fits):
        lo, hi = _band(spec, index, ensemble)
        for obs in fit.observables:
            owner.setdefault(obs, index)
            a, b = union.get(obs, (lo, hi))
            union[obs] = (min(a, lo), max(b, hi))
    fits: dict[str, FitTruth] = {}
    for index, fit in enumerate(spec.fits):
        (tmin, tmax, states), params = _point_params(results, fit.name)
        given = dict((file_truth or {}).get(fit.name) or {})
        model = _model(spec, index, states, union)
        names = list(model.reported_names)
        unknown = [p for p in given if p not in names]
        if unknown:
            raise SpecError(TRUTH_OPTION, f"{fit.name}.{unknown[0]}: the truth model of fit "
                            f"{fit.name} ({tmin}..{tmax}, {states} state(s)) has no parameter "
                            f"{unknown[0]}; its parameters are {', '.join(names)}")
        params.update({k: float(v) for k, v in given.items()})
        theta = model.from_reported(np.array([params[n] for n in names], dtype=float))
        with np.errstate(all="ignore"):
            prediction = model.predict(theta)
        if not np.all(np.isfinite(prediction)):
            raise SpecError(TRUTH_OPTION if given else "fits", f"fit {fit.name}: the truth "
                            "model's prediction is not finite; check its parameters")
        for obs, sl in model.point_slices().items():
            if owner[obs] == index:
                lo, hi = union[obs]
                vector[layout[obs].start + lo:layout[obs].start + hi + 1] = prediction[sl]
        fits[fit.name] = FitTruth(tmin=tmin, tmax=tmax, states=states,
                                  params={n: float(params[n]) for n in names},
                                  band=_band(spec, index, ensemble),
                                  own_band=all(owner[o] == index for o in fit.observables))
    return vector, fits


def pseudo_true(spec: Spec, ensemble: Ensemble, vector: np.ndarray, fits: dict[str, FitTruth],
                mean_covariance: np.ndarray) -> dict[str, FitTruth]:
    """Pseudo-true parameters of the fits whose band another fit set in part (module notes)."""
    layout = column_layout(ensemble)
    out = dict(fits)
    for index, fit in enumerate(spec.fits):
        truth = fits[fit.name]
        if truth.own_band:
            continue
        model = _model(spec, index, truth.states,
                       {o: (truth.tmin, truth.tmax) for o in fit.observables})
        cols = np.concatenate([np.arange(layout[o].start + truth.tmin,
                                         layout[o].start + truth.tmax + 1)
                               for o in fit.observables])
        names = list(model.reported_names)
        p0 = model.from_reported(np.array([truth.params[n] for n in names], dtype=float))
        try:
            central = correlated_fit(vector[cols], mean_covariance[np.ix_(cols, cols)], model, p0)
        except PlateaufitError:
            continue
        if central.converged:
            out[fit.name] = FitTruth(tmin=truth.tmin, tmax=truth.tmax, states=truth.states,
                                     params={n: float(central.reported[n]) for n in names},
                                     band=truth.band, own_band=False)
    return out


def derived_truth(spec: Spec, fits: dict[str, FitTruth],
                  given: Mapping[str, float] | None = None
                  ) -> tuple[dict[str, float], dict[str, str]]:
    """The derived quantities' truth (``given`` wins), and why some have none."""
    values: dict[str, float] = {}
    missing: dict[str, str] = {}
    known = spec.reference_names()
    for name, text in spec.derived.items():
        if given and name in given:
            values[name] = float(given[name])
            continue
        expr = DerivedExpression(text, known)
        inputs = {}
        for ref in expr.references:
            fit_name, param = expr.parts[ref]
            if param not in fits[fit_name].params:
                missing[name] = f"{ref} has no truth (the truth model of {fit_name} lacks {param})"
                break
            inputs[ref] = fits[fit_name].params[param]
        else:
            value = float(expr(inputs))
            if math.isfinite(value):
                values[name] = value
            else:
                missing[name] = "the expression is not finite at the truth"
    return values, missing


def read_truth_file(path: str | Path, spec: Spec) -> dict[str, dict[str, float]]:
    """A ``--truth`` file: YAML of the shape of the spec's ``truth:`` key.

    ``{FIT: {PARAM: value}, derived: {NAME: value}}``; fits and derived
    quantities the spec does not have are refused.

    Raises
    ------
    SpecError
        At ``--truth``, naming the file and the entry.
    """
    from plateaufit.specfile.yaml_io import read_yaml

    p = Path(path)
    if not p.is_file():
        raise SpecError(TRUTH_OPTION, f"{p}: no such file; give a YAML file of the shape of "
                        "the spec's truth: key ({FIT: {PARAM: value}, derived: {NAME: value}})")
    try:
        data, _ = read_yaml(p)
    except PlateaufitError as err:
        raise SpecError(TRUTH_OPTION, f"{p}: {err.message}") from None
    if not isinstance(data, Mapping):
        raise SpecError(TRUTH_OPTION, f"{p}: write FIT: {{PARAM: value}} entries, like the "
                        "spec's truth: key")
    names = [f.name for f in spec.fits]
    out: dict[str, dict[str, float]] = {}
    for key, entry in data.items():
        key = str(key)
        allowed = spec.derived if key == "derived" and "derived" not in names else None
        if allowed is None and key not in names:
            raise SpecError(TRUTH_OPTION, f"{p}: {key}: the spec has no fit of that name "
                            f"(fits: {', '.join(names)})")
        if not isinstance(entry, Mapping):
            raise SpecError(TRUTH_OPTION, f"{p}: {key}: write PARAM: value entries")
        values = {}
        for param, v in entry.items():
            if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
                raise SpecError(TRUTH_OPTION, f"{p}: {key}.{param}: {v!r} is not a finite number")
            if allowed is not None and str(param) not in allowed:
                raise SpecError(TRUTH_OPTION, f"{p}: derived.{param}: the spec has no derived "
                                "quantity of that name")
            values[str(param)] = float(v)
        out[key] = values
    return out
