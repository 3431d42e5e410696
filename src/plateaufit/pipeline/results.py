"""The typed results of a run, and their one conversion to and from results.json.

Every section of results.json has a frozen dataclass here with ``to_dict`` and
``from_dict``; :class:`Results` is the whole run. The JSON keys are those
documented in DEVELOPERS.md ("results dict") and ../shared/design.md, with
NaN and inf written as ``null``. ``from_dict`` accepts what an older or a
sparse results.json holds: optional parts missing give empty or NaN fields.

This module holds types only (numpy and the standard library): the report
reads these, and :mod:`plateaufit.pipeline.summary` builds them from the fit
core's objects, e.g. ``summarise_scan(pf.scan(...))`` in a notebook.

Vocabulary: *reported* parameter names (``E0, E1, A0.NAME, ...``, what users
write in ``priors:`` and read here) as opposed to the fit core's internal
parameters (log-gaps); ``form`` is a model's form (the spec key ``model``);
``stream_sizes`` are counts per stream; ``n_bins`` counts bins, the jackknife
samples of a fit being one per bin.

One module of about 600 lines on purpose: every section's ``to_dict`` and
``from_dict`` must stay in step with the others and with the documented keys, and
reading them side by side is how that is kept.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from plateaufit.pipeline.matrix_results import MatrixResult

__all__ = [
    "ParamEstimate", "PointEstimate", "ScanPointResult", "PointSummary", "ChosenResult",
    "EffectiveMassResult", "CovarianceSummary", "FitResult", "TauIntSummary",
    "AutocorrelationSummary", "BinningStudySummary", "ObservableSummary", "EnsembleResult",
    "DerivedQuantity", "RunWarning", "Results", "MatrixResult", "jsonable", "as_float",
    "TAU_INT_CONVENTION",
]

TAU_INT_CONVENTION = "1/2 + sum_{t>=1} rho(t)"


# --------------------------------------------------------------------------- JSON helpers


def jsonable(obj: Any) -> Any:
    """numpy scalars and arrays to plain JSON types; NaN and inf to None."""
    if isinstance(obj, dict):
        return {str(k): jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [jsonable(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return jsonable(obj.tolist())
    if isinstance(obj, (np.bool_, bool)):
        return bool(obj)
    if isinstance(obj, np.integer):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        value = float(obj)
        return value if math.isfinite(value) else None
    return obj


def as_float(x: Any) -> float:
    """A JSON number as a float: None, bools and text that is no number give NaN."""
    if x is None or isinstance(x, bool):
        return math.nan
    try:
        return float(x)
    except (TypeError, ValueError):
        return math.nan


_f = as_float


def _i(x: Any, default: int = 0) -> int:
    return default if x is None else int(x)


def _arr(x: Any) -> np.ndarray:
    if x is None:
        return np.array([], dtype=float)
    return np.array(x, dtype=float)


def _get(d: Any, key: str) -> Mapping[str, Any]:
    value = d.get(key) if isinstance(d, Mapping) else None
    return value if isinstance(value, Mapping) else {}


# --------------------------------------------------------------------------- fits


@dataclass(frozen=True)
class ParamEstimate:
    """A reported parameter: central value, total, statistical and systematic error."""

    value: float
    error: float
    stat_error: float
    sys_error: float = 0.0

    @classmethod
    def of(cls, value: float, stat: float, sys_error: float = 0.0) -> ParamEstimate:
        """From value and the two errors; ``error = hypot(stat, sys)``."""
        return cls(float(value), float(np.hypot(stat, sys_error)), float(stat), float(sys_error))

    def to_dict(self) -> dict[str, float]:
        return {"value": self.value, "error": self.error, "stat_error": self.stat_error,
                "sys_error": self.sys_error}

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> ParamEstimate:
        error = _f(d.get("error"))
        return cls(_f(d.get("value")), error, _f(d.get("stat_error", d.get("error"))),
                   _f(d.get("sys_error", 0.0)))


@dataclass(frozen=True)
class PointEstimate:
    """A parameter of one scan point: its central value and jackknife error."""

    value: float
    error: float

    def to_dict(self) -> dict[str, float]:
        return {"value": self.value, "error": self.error}

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> PointEstimate:
        return cls(_f(d.get("value")), _f(d.get("error")))


@dataclass(frozen=True)
class ScanPointResult:
    """One point of a fit-range scan (``fits.NAME.scan[i]``)."""

    tmin: int
    tmax: int
    form: str
    states: int
    chi2: float
    chi2_data: float
    chi2_prior: float
    dof: int
    n_points: int
    n_priors: int
    p_value: float
    p_value_hotelling: float
    aic: float
    weight: float
    converged: bool
    n_refit_failed: int
    params: dict[str, PointEstimate]
    flags: tuple[str, ...] = ()
    flag_messages: tuple[str, ...] = ()
    n_numerical_warnings: int = 0
    numerical_warnings: tuple[str, ...] = ()

    @property
    def key(self) -> tuple[int, int, int]:
        """``(tmin, tmax, states)``."""
        return self.tmin, self.tmax, self.states

    @property
    def label(self) -> str:
        """``[tmin, tmax], S state(s)``."""
        return f"[{self.tmin}, {self.tmax}], {self.states} state" + ("s" if self.states != 1
                                                                      else "")

    def to_dict(self) -> dict[str, Any]:
        return {
            "tmin": self.tmin, "tmax": self.tmax, "model": self.form, "states": self.states,
            "chi2": self.chi2, "chi2_data": self.chi2_data, "chi2_prior": self.chi2_prior,
            "dof": self.dof, "n_points": self.n_points, "n_priors": self.n_priors,
            "p_value": self.p_value, "p_value_hotelling": self.p_value_hotelling,
            "aic": self.aic, "weight": self.weight, "converged": self.converged,
            "n_refit_failed": self.n_refit_failed,
            "params": {k: v.to_dict() for k, v in self.params.items()},
            "flags": list(self.flags), "flag_messages": list(self.flag_messages),
            "n_numerical_warnings": self.n_numerical_warnings,
            "numerical_warnings": list(self.numerical_warnings),
        }

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> ScanPointResult:
        return cls(
            tmin=int(d["tmin"]), tmax=int(d["tmax"]), form=str(d.get("model", "")),
            states=int(d.get("states", 1)), chi2=_f(d.get("chi2")),
            chi2_data=_f(d.get("chi2_data", d.get("chi2"))),
            chi2_prior=_f(d.get("chi2_prior", 0.0)),
            dof=_i(d.get("dof")), n_points=_i(d.get("n_points")), n_priors=_i(d.get("n_priors")),
            p_value=_f(d.get("p_value")), p_value_hotelling=_f(d.get("p_value_hotelling")),
            aic=_f(d.get("aic")), weight=_f(d.get("weight")),
            converged=bool(d.get("converged", True)), n_refit_failed=_i(d.get("n_refit_failed")),
            params={k: PointEstimate.from_dict(v) for k, v in _get(d, "params").items()},
            flags=tuple(str(x) for x in d.get("flags") or ()),
            flag_messages=tuple(str(x) for x in d.get("flag_messages") or ()),
            n_numerical_warnings=_i(d.get("n_numerical_warnings")),
            numerical_warnings=tuple(str(x) for x in d.get("numerical_warnings") or ()),
        )


@dataclass(frozen=True)
class PointSummary:
    """The scan point behind a chosen result: its range, weight and fit quality."""

    tmin: int
    tmax: int
    states: int
    weight: float
    chi2: float
    dof: int
    p_value: float
    p_value_hotelling: float
    converged: bool

    @property
    def key(self) -> tuple[int, int, int]:
        return self.tmin, self.tmax, self.states

    def to_dict(self) -> dict[str, Any]:
        return {"tmin": self.tmin, "tmax": self.tmax, "states": self.states,
                "weight": self.weight, "chi2": self.chi2, "dof": self.dof,
                "p_value": self.p_value, "p_value_hotelling": self.p_value_hotelling,
                "converged": self.converged}

    @classmethod
    def from_dict(cls, d: Mapping[str, Any], fallback: Mapping[str, Any] | None = None
                  ) -> PointSummary:
        fb = fallback or {}

        def pick(key: str, default: Any = None) -> Any:
            return d.get(key, fb.get(key, default))

        return cls(tmin=_i(pick("tmin")), tmax=_i(pick("tmax")), states=_i(pick("states"), 1),
                   weight=_f(pick("weight", 1.0)), chi2=_f(pick("chi2")), dof=_i(pick("dof")),
                   p_value=_f(pick("p_value")), p_value_hotelling=_f(pick("p_value_hotelling")),
                   converged=bool(pick("converged", True)))


@dataclass(frozen=True)
class ChosenResult:
    """What a fit reports (``fits.NAME.chosen``).

    ``method`` is ``single`` (one scan point, ``choose: {...}`` or a scan of
    one) or ``average`` (the AIC-weighted model average). ``point`` is the
    scan point behind it: the chosen one, or for an average the highest-weight
    one (written as ``chosen.best``; its range and fit quality are also
    written at the top level of ``chosen``, as results.json always had them).
    ``converged`` is the chosen point's, or for an average whether every
    point with weight > 0 converged. ``withheld`` lists the parameters that are
    not results (a chosen point that is not a fit: all of them; else those of
    states it does not resolve): their values are NaN, the reasons in
    ``withheld_reasons``.
    """

    method: str
    params: dict[str, ParamEstimate]
    point: PointSummary
    converged: bool
    band: tuple[int, int]
    n_fits: int = 1
    n_excluded: int = 0
    withheld: tuple[str, ...] = ()          # parameters that are not results (NaN values)
    withheld_reasons: tuple[str, ...] = ()  # why (the flags' messages)

    @property
    def is_average(self) -> bool:
        return self.method == "average"

    def to_dict(self) -> dict[str, Any]:
        p = self.point
        out: dict[str, Any] = {"method": self.method, "tmin": p.tmin, "tmax": p.tmax,
                               "states": p.states,
                               "params": {k: v.to_dict() for k, v in self.params.items()},
                               "chi2": p.chi2, "dof": p.dof, "p_value": p.p_value,
                               "p_value_hotelling": p.p_value_hotelling,
                               "converged": self.converged,
                               "band": {"tmin": self.band[0], "tmax": self.band[1]},
                               "withheld": list(self.withheld),
                               "withheld_reasons": list(self.withheld_reasons)}
        if self.is_average:
            out.update(n_fits=self.n_fits, n_excluded=self.n_excluded, best=p.to_dict())
        return out

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> ChosenResult:
        method = str(d.get("method", "single"))
        best = _get(d, "best")
        point = PointSummary.from_dict(best, fallback=d) if best else PointSummary.from_dict(d)
        band = _get(d, "band")
        return cls(method=method,
                   params={k: ParamEstimate.from_dict(v) for k, v in _get(d, "params").items()},
                   point=point, converged=bool(d.get("converged", True)),
                   band=(_i(band.get("tmin", d.get("tmin"))), _i(band.get("tmax", d.get("tmax")))),
                   n_fits=_i(d.get("n_fits"), 1), n_excluded=_i(d.get("n_excluded")),
                   withheld=tuple(str(x) for x in d.get("withheld") or ()),
                   withheld_reasons=tuple(str(x) for x in d.get("withheld_reasons") or ()))


@dataclass(frozen=True)
class EffectiveMassResult:
    """Jackknife effective mass of one observable (``fits.NAME.effective_mass.OBS``)."""

    t: np.ndarray
    value: np.ndarray
    error: np.ndarray
    kind: str

    def to_dict(self) -> dict[str, Any]:
        return {"t": self.t, "value": self.value, "error": self.error, "kind": self.kind}

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> EffectiveMassResult:
        return cls(_arr(d.get("t")), _arr(d.get("value")), _arr(d.get("error")),
                   str(d.get("kind", "log")))


@dataclass(frozen=True)
class CovarianceSummary:
    """The data covariance of the chosen (or highest-weight) point (``fits.NAME.covariance``)."""

    correlation: np.ndarray
    eigenvalues: np.ndarray
    eigenvalues_raw: np.ndarray
    shrinkage: float
    target: str
    condition_number: float
    condition_number_raw: float
    n_bins: int
    n_points: int
    tmin: int | None
    tmax: int | None
    states: int | None

    def to_dict(self) -> dict[str, Any]:
        return {"correlation": self.correlation, "eigenvalues": self.eigenvalues,
                "eigenvalues_raw": self.eigenvalues_raw, "shrinkage": self.shrinkage,
                "target": self.target, "condition_number": self.condition_number,
                "condition_number_raw": self.condition_number_raw, "n_bins": self.n_bins,
                "n_points": self.n_points, "tmin": self.tmin, "tmax": self.tmax,
                "states": self.states}

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> CovarianceSummary:
        corr = np.atleast_2d(_arr(d.get("correlation"))) if d.get("correlation") is not None \
            else np.zeros((0, 0))

        def opt(key: str) -> int | None:
            return None if d.get(key) is None else int(d[key])

        return cls(correlation=corr, eigenvalues=_arr(d.get("eigenvalues")),
                   eigenvalues_raw=_arr(d.get("eigenvalues_raw")), shrinkage=_f(d.get("shrinkage")),
                   target=str(d.get("target", "")), condition_number=_f(d.get("condition_number")),
                   condition_number_raw=_f(d.get("condition_number_raw")),
                   n_bins=_i(d.get("n_bins")), n_points=_i(d.get("n_points"), corr.shape[0]),
                   tmin=opt("tmin"), tmax=opt("tmax"), states=opt("states"))


@dataclass(frozen=True)
class FitResult:
    """One fit of a spec: its scan, what it reports, effective masses, covariance.

    ``derived_inputs`` (reported name -> value, jackknife samples and sys
    error of the chosen or averaged parameter, for derived quantities) is
    kept in memory only; it is empty after :meth:`from_dict`.
    """

    name: str
    observables: list[str]
    form: str
    chosen: ChosenResult
    scan: list[ScanPointResult]
    effective_mass: dict[str, EffectiveMassResult] = field(default_factory=dict)
    covariance: CovarianceSummary | None = None
    warnings: list[str] = field(default_factory=list)
    derived_inputs: dict[str, Any] = field(default_factory=dict, repr=False, compare=False)
    #: a fit of a level of a correlator matrix: the matrix, the level and the GEVP's t0
    matrix: str | None = None
    level: int | None = None
    t0: int | None = None

    def chosen_point(self) -> ScanPointResult | None:
        """The scan point behind the chosen result (see :class:`ChosenResult`)."""
        for point in self.scan:
            if point.key == self.chosen.point.key:
                return point
        weights = [p.weight for p in self.scan]
        if not self.scan or all(math.isnan(w) for w in weights):
            return None
        return self.scan[int(np.nanargmax(weights))]

    def to_dict(self) -> dict[str, Any]:
        out: dict[str, Any] = {
            "observables": list(self.observables), "model": self.form,
            "chosen": self.chosen.to_dict(), "scan": [p.to_dict() for p in self.scan],
            "effective_mass": {k: v.to_dict() for k, v in self.effective_mass.items()},
            "warnings": list(self.warnings),
        }
        if self.covariance is not None:
            out["covariance"] = self.covariance.to_dict()
        if self.matrix is not None:
            out.update(matrix=self.matrix, level=self.level, t0=self.t0)
        return out

    @classmethod
    def from_dict(cls, name: str, d: Mapping[str, Any]) -> FitResult:
        cov = _get(d, "covariance")
        return cls(name=name, observables=list(d.get("observables") or []),
                   form=str(d.get("model", "")), chosen=ChosenResult.from_dict(_get(d, "chosen")),
                   scan=[ScanPointResult.from_dict(p) for p in d.get("scan") or []],
                   effective_mass={k: EffectiveMassResult.from_dict(v)
                                   for k, v in _get(d, "effective_mass").items()},
                   covariance=CovarianceSummary.from_dict(cov) if cov else None,
                   warnings=[str(w) for w in d.get("warnings") or []],
                   matrix=None if d.get("matrix") is None else str(d["matrix"]),
                   level=None if d.get("level") is None else int(d["level"]),
                   t0=None if d.get("t0") is None else int(d["t0"]))


# --------------------------------------------------------------------------- ensemble


@dataclass(frozen=True)
class TauIntSummary:
    """tau_int of an observable at its most autocorrelated timeslice ``t``."""

    value: float
    error: float
    window: int | None
    t: int | None
    reliable: bool

    def to_dict(self) -> dict[str, Any]:
        return {"value": self.value, "error": self.error, "window": self.window, "t": self.t,
                "reliable": self.reliable}

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> TauIntSummary:
        return cls(_f(d.get("value")), _f(d.get("error")),
                   None if d.get("window") is None else int(d["window"]),
                   None if d.get("t") is None else int(d["t"]), d.get("reliable") is not False)


@dataclass(frozen=True)
class AutocorrelationSummary:
    """rho and tau_int against the summation window, at timeslice ``t``."""

    t: int | None
    rho: np.ndarray
    tau_by_window: np.ndarray
    window: int | None

    def to_dict(self) -> dict[str, Any]:
        return {"t": self.t, "rho": self.rho, "tau_by_window": self.tau_by_window,
                "window": self.window}

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> AutocorrelationSummary:
        return cls(None if d.get("t") is None else int(d["t"]), _arr(d.get("rho")),
                   _arr(d.get("tau_by_window")),
                   None if d.get("window") is None else int(d["window"]))


@dataclass(frozen=True)
class BinningStudySummary:
    """Error of the mean against bin size (``errors`` one per size, or (sizes, n_t))."""

    t: int | None
    sizes: np.ndarray
    errors: np.ndarray
    naive_error: np.ndarray

    def to_dict(self) -> dict[str, Any]:
        return {"t": self.t, "sizes": self.sizes, "errors": self.errors,
                "naive_error": self.naive_error}

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> BinningStudySummary:
        return cls(None if d.get("t") is None else int(d["t"]), _arr(d.get("sizes")),
                   _arr(d.get("errors")), _arr(d.get("naive_error")))


@dataclass(frozen=True)
class ObservableSummary:
    """An observable's timeslices after folding, boundary, and whether it was folded."""

    n_t: int
    boundary: str
    folded: bool

    def to_dict(self) -> dict[str, Any]:
        return {"n_t": self.n_t, "boundary": self.boundary, "folded": self.folded}

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> ObservableSummary:
        return cls(_i(d.get("n_t")), str(d.get("boundary", "")), bool(d.get("folded", False)))


@dataclass(frozen=True)
class EnsembleResult:
    """The ensemble section: counts, bins, tau_int, autocorrelation and binning studies."""

    name: str
    time_extent: int | None
    n_configs: int | None
    n_streams: int | None
    stream_sizes: list[int]
    n_bins: int | None
    bin_size: int | None
    n_dropped: int
    tau_int: dict[str, TauIntSummary] = field(default_factory=dict)
    autocorrelation: dict[str, AutocorrelationSummary] = field(default_factory=dict)
    binning_study: dict[str, BinningStudySummary] = field(default_factory=dict)
    observables: dict[str, ObservableSummary] = field(default_factory=dict)
    bin_size_notes: tuple[str, ...] = ()
    binning_correction: float = 1.0

    def to_dict(self) -> dict[str, Any]:
        return {
            "name": self.name, "time_extent": self.time_extent, "n_configs": self.n_configs,
            "n_streams": self.n_streams, "stream_sizes": list(self.stream_sizes),
            "n_bins": self.n_bins, "bin_size": self.bin_size, "n_dropped": self.n_dropped,
            "tau_int_convention": TAU_INT_CONVENTION,
            "tau_int": {k: v.to_dict() for k, v in self.tau_int.items()},
            "autocorrelation": {k: v.to_dict() for k, v in self.autocorrelation.items()},
            "binning_study": {k: v.to_dict() for k, v in self.binning_study.items()},
            "observables": {k: v.to_dict() for k, v in self.observables.items()},
            "bin_size_notes": list(self.bin_size_notes),
            "binning_correction": self.binning_correction,
        }

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> EnsembleResult:
        def opt(key: str) -> int | None:
            return None if d.get(key) is None else int(d[key])

        return cls(
            name=str(d.get("name", "")), time_extent=opt("time_extent"), n_configs=opt("n_configs"),
            n_streams=opt("n_streams"), stream_sizes=[int(x) for x in d.get("stream_sizes") or []],
            n_bins=opt("n_bins"), bin_size=opt("bin_size"), n_dropped=_i(d.get("n_dropped")),
            tau_int={k: TauIntSummary.from_dict(v) for k, v in _get(d, "tau_int").items()
                     if isinstance(v, Mapping)},
            autocorrelation={k: AutocorrelationSummary.from_dict(v)
                             for k, v in _get(d, "autocorrelation").items()
                             if isinstance(v, Mapping) and v.get("rho") is not None},
            binning_study={k: BinningStudySummary.from_dict(v)
                           for k, v in _get(d, "binning_study").items()
                           if isinstance(v, Mapping) and v.get("sizes") is not None},
            observables={k: ObservableSummary.from_dict(v)
                         for k, v in _get(d, "observables").items() if isinstance(v, Mapping)},
            bin_size_notes=tuple(str(x) for x in d.get("bin_size_notes") or ()),
            binning_correction=_f(d.get("binning_correction", 1.0)),
        )


# --------------------------------------------------------------------------- the run


@dataclass(frozen=True)
class DerivedQuantity:
    """A derived quantity (``derived.NAME``).

    ``n_dropped`` (jackknife samples left out where a refit of an input
    failed) and ``withheld_inputs`` (references that are not results, so the
    quantity is NaN) are kept in memory for the warnings; results.json states
    them in a warning, not as keys.
    """

    expression: str
    references: list[str]
    estimate: ParamEstimate
    n_dropped: int = 0
    withheld_inputs: tuple[str, ...] = ()   # references that are not results: not computed

    def to_dict(self) -> dict[str, Any]:
        return {"expression": self.expression, "references": list(self.references),
                **self.estimate.to_dict()}

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> DerivedQuantity:
        return cls(str(d.get("expression", "")), [str(r) for r in d.get("references") or []],
                   ParamEstimate.from_dict(d), _i(d.get("n_dropped")))


@dataclass(frozen=True)
class RunWarning:
    """One warning of a run: a short code, the fit it concerns (or None), the message.

    A record in the results (never raised, never passed to ``warnings.warn``).
    """

    code: str
    fit: str | None
    message: str

    def to_dict(self) -> dict[str, Any]:
        return {"code": self.code, "fit": self.fit, "message": self.message}

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> RunWarning:
        return cls(str(d.get("code", "")), d.get("fit"), str(d.get("message", "")))


@dataclass(frozen=True)
class Results:
    """A whole run: what results.json holds, typed.

    ``warnings`` is the run's warnings table (written as the list of messages
    ``warnings`` and, with codes, ``warning_table``; each fit's own messages
    also go to ``fits.NAME.warnings``). Reading, the messages of ``warnings``
    are what counts: ``warning_table`` only adds the codes when it lists the
    same messages.
    """

    version: str
    output_dir: str
    ensemble: EnsembleResult
    fits: dict[str, FitResult]
    derived: dict[str, DerivedQuantity] = field(default_factory=dict)
    truth: dict[str, dict[str, float]] = field(default_factory=dict)
    warnings: list[RunWarning] = field(default_factory=list)
    provenance: dict[str, Any] = field(default_factory=dict)
    matrices: dict[str, MatrixResult] = field(default_factory=dict)

    def to_dict(self) -> dict[str, Any]:
        """The results.json structure (plain JSON types, NaN as None)."""
        return jsonable({
            "version": self.version,
            "output": {"dir": self.output_dir},
            "ensemble": self.ensemble.to_dict(),
            "fits": {name: fit.to_dict() for name, fit in self.fits.items()},
            "derived": {name: d.to_dict() for name, d in self.derived.items()},
            "matrices": {name: m.to_dict() for name, m in self.matrices.items()},
            "truth": {k: dict(v) for k, v in self.truth.items()},
            "warnings": [w.message for w in self.warnings],
            "warning_table": [w.to_dict() for w in self.warnings],
            "provenance": dict(self.provenance),
        })

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> Results:
        """Typed results from a results.json dict (sparse ones too)."""
        fits = {name: FitResult.from_dict(name, fit) for name, fit in _get(d, "fits").items()}
        messages = [str(m) for m in d.get("warnings") or []]
        table = [RunWarning.from_dict(w) for w in d.get("warning_table") or []]
        if [w.message for w in table] != messages:
            # an older (or edited) results.json: the messages are what counts
            table = [RunWarning("", None, m) for m in messages]
            known = {w.message for w in table}
            for name, fit in fits.items():
                table += [RunWarning("", name, m) for m in fit.warnings if m not in known]
        truth = {str(k): {str(p): _f(v) for p, v in vals.items()}
                 for k, vals in _get(d, "truth").items() if isinstance(vals, Mapping)}
        return cls(version=str(d.get("version", "")),
                   output_dir=str(_get(d, "output").get("dir", "")),
                   ensemble=EnsembleResult.from_dict(_get(d, "ensemble")), fits=fits,
                   derived={k: DerivedQuantity.from_dict(v) for k, v in _get(d, "derived").items()},
                   truth=truth, warnings=table, provenance=dict(_get(d, "provenance")),
                   matrices={str(k): MatrixResult.from_dict(str(k), v)
                             for k, v in _get(d, "matrices").items() if isinstance(v, Mapping)})
