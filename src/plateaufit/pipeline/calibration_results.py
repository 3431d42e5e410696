"""The typed results of ``plateaufit calibrate``, and their conversion to calibration.json.

Like :mod:`plateaufit.pipeline.results` this module holds types only (numpy and
the standard library), so the report can read them. The keys (documented in
DEVELOPERS.md, "calibration.json"):

```
n_replicas, n_failed, seed, noise_model.{method, window, shrinkage, n_factors, n_clipped,
    reliable, tau_max}, truth.{source, fits.NAME.{tmin, tmax, states, params.P}, derived.NAME},
fits.NAME.params.P.{truth, n, coverage_1sigma, coverage_2sigma, coverage_1sigma_error,
    coverage_2sigma_error, band_1sigma, band_2sigma, bias_over_error, bias_over_error_error,
    pull_rms, scatter_over_error, mean_error, pulls}
fits.NAME.unmeasured.P          # why a reported parameter has no coverage (no truth)
fits.NAME.p_values.{values, ks_statistic, ks_p_value}   # the chosen (highest-weight) fits'
fits.NAME.chosen_points[i].{tmin, tmax, states, count, fraction}
derived.NAME.{... as params.P ...}
variants[i].{name, description, changes, n_failed, restores, fits.NAME.params.P, derived.NAME}
warnings                        # list of strings
timing.{base_seconds, replicas_seconds, variants_seconds, per_replica_seconds}
provenance.{version, spec, spec_sha256, created, replica_method}
failures                        # the first 20 failed replicas' messages
output.dir
```
NaN and inf are written as ``null``.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from plateaufit.pipeline.results import as_float, jsonable

__all__ = ["ParameterCalibration", "ChosenPointCount", "FitCalibration", "VariantResult",
           "CalibrationResults"]


def _pair(x: Any) -> tuple[float, float]:
    if isinstance(x, (list, tuple)) and len(x) == 2:
        return (as_float(x[0]), as_float(x[1]))
    return (math.nan, math.nan)


@dataclass(frozen=True)
class ParameterCalibration:
    """Coverage, bias and spread of one reported parameter (or derived quantity).

    ``pulls`` are ``(value - truth) / error`` of every usable replica (empty in a
    variant's summary).
    """

    truth: float
    n: int
    coverage_1sigma: float
    coverage_2sigma: float
    coverage_1sigma_error: float
    coverage_2sigma_error: float
    band_1sigma: tuple[float, float]
    band_2sigma: tuple[float, float]
    bias_over_error: float
    bias_over_error_error: float
    pull_rms: float
    scatter_over_error: float
    mean_error: float
    pulls: np.ndarray = field(default_factory=lambda: np.zeros(0))

    @property
    def outside(self) -> bool:
        """A coverage outside its nominal band (the warning's condition)."""
        if self.n < 1:
            return False
        lo1, hi1 = self.band_1sigma
        lo2, hi2 = self.band_2sigma
        return not (lo1 <= self.coverage_1sigma <= hi1 and lo2 <= self.coverage_2sigma <= hi2)

    @classmethod
    def of(cls, stats: Any, truth: float, keep_pulls: bool = True) -> ParameterCalibration:
        """From a :class:`plateaufit.stats.coverage.CoverageStats`."""
        return cls(truth=float(truth), n=int(stats.n), coverage_1sigma=stats.coverage_1sigma,
                   coverage_2sigma=stats.coverage_2sigma,
                   coverage_1sigma_error=stats.coverage_1sigma_error,
                   coverage_2sigma_error=stats.coverage_2sigma_error,
                   band_1sigma=tuple(stats.band_1sigma), band_2sigma=tuple(stats.band_2sigma),
                   bias_over_error=stats.bias_over_error,
                   bias_over_error_error=stats.bias_over_error_error,
                   pull_rms=stats.pull_rms, scatter_over_error=stats.scatter_over_error,
                   mean_error=stats.mean_error,
                   pulls=np.asarray(stats.pulls if keep_pulls else [], dtype=float))

    def to_dict(self) -> dict[str, Any]:
        out = {"truth": self.truth, "n": self.n, "coverage_1sigma": self.coverage_1sigma,
               "coverage_2sigma": self.coverage_2sigma,
               "coverage_1sigma_error": self.coverage_1sigma_error,
               "coverage_2sigma_error": self.coverage_2sigma_error,
               "band_1sigma": list(self.band_1sigma), "band_2sigma": list(self.band_2sigma),
               "bias_over_error": self.bias_over_error,
               "bias_over_error_error": self.bias_over_error_error,
               "pull_rms": self.pull_rms, "scatter_over_error": self.scatter_over_error,
               "mean_error": self.mean_error}
        if self.pulls.size:
            out["pulls"] = self.pulls
        return out

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> ParameterCalibration:
        f = as_float
        return cls(truth=f(d.get("truth")), n=int(d.get("n") or 0),
                   coverage_1sigma=f(d.get("coverage_1sigma")),
                   coverage_2sigma=f(d.get("coverage_2sigma")),
                   coverage_1sigma_error=f(d.get("coverage_1sigma_error")),
                   coverage_2sigma_error=f(d.get("coverage_2sigma_error")),
                   band_1sigma=_pair(d.get("band_1sigma")), band_2sigma=_pair(d.get("band_2sigma")),
                   bias_over_error=f(d.get("bias_over_error")),
                   bias_over_error_error=f(d.get("bias_over_error_error")),
                   pull_rms=f(d.get("pull_rms")), scatter_over_error=f(d.get("scatter_over_error")),
                   mean_error=f(d.get("mean_error")),
                   pulls=np.array([f(x) for x in d.get("pulls") or []], dtype=float))


@dataclass(frozen=True)
class ChosenPointCount:
    """How often one scan point was chosen (the highest-weight point of an average)."""

    tmin: int
    tmax: int
    states: int
    count: int
    fraction: float

    def to_dict(self) -> dict[str, Any]:
        return {"tmin": self.tmin, "tmax": self.tmax, "states": self.states,
                "count": self.count, "fraction": self.fraction}

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> ChosenPointCount:
        return cls(int(d.get("tmin", 0)), int(d.get("tmax", 0)), int(d.get("states", 0)),
                   int(d.get("count", 0)), as_float(d.get("fraction")))


@dataclass(frozen=True)
class FitCalibration:
    """The calibration of one fit (``fits.NAME`` of calibration.json)."""

    params: dict[str, ParameterCalibration]
    unmeasured: dict[str, str] = field(default_factory=dict)
    p_values: np.ndarray = field(default_factory=lambda: np.zeros(0))
    ks_statistic: float = math.nan
    ks_p_value: float = math.nan
    chosen_points: list[ChosenPointCount] = field(default_factory=list)

    def to_dict(self) -> dict[str, Any]:
        out: dict[str, Any] = {"params": {k: v.to_dict() for k, v in self.params.items()}}
        if self.unmeasured:
            out["unmeasured"] = dict(self.unmeasured)
        if self.p_values.size or math.isfinite(self.ks_statistic):
            out["p_values"] = {"values": self.p_values, "ks_statistic": self.ks_statistic,
                               "ks_p_value": self.ks_p_value}
        if self.chosen_points:
            out["chosen_points"] = [c.to_dict() for c in self.chosen_points]
        return out

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> FitCalibration:
        p = d.get("p_values") or {}
        return cls(params={k: ParameterCalibration.from_dict(v)
                           for k, v in (d.get("params") or {}).items()},
                   unmeasured={str(k): str(v) for k, v in (d.get("unmeasured") or {}).items()},
                   p_values=np.array([as_float(x) for x in p.get("values") or []], dtype=float),
                   ks_statistic=as_float(p.get("ks_statistic")),
                   ks_p_value=as_float(p.get("ks_p_value")),
                   chosen_points=[ChosenPointCount.from_dict(c)
                                  for c in d.get("chosen_points") or []])


@dataclass(frozen=True)
class VariantResult:
    """The same replicas analysed with one change to the spec (a warning's remedy)."""

    name: str
    description: str
    changes: dict[str, Any]
    fits: dict[str, FitCalibration]
    derived: dict[str, ParameterCalibration] = field(default_factory=dict)
    n_failed: int = 0
    restores: bool = False

    def to_dict(self) -> dict[str, Any]:
        return {"name": self.name, "description": self.description, "changes": dict(self.changes),
                "n_failed": self.n_failed, "restores": self.restores,
                "fits": {k: v.to_dict() for k, v in self.fits.items()},
                "derived": {k: v.to_dict() for k, v in self.derived.items()}}

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> VariantResult:
        return cls(name=str(d.get("name", "")), description=str(d.get("description", "")),
                   changes=dict(d.get("changes") or {}),
                   fits={k: FitCalibration.from_dict(v) for k, v in (d.get("fits") or {}).items()},
                   derived={k: ParameterCalibration.from_dict(v)
                            for k, v in (d.get("derived") or {}).items()},
                   n_failed=int(d.get("n_failed") or 0), restores=bool(d.get("restores")))


@dataclass(frozen=True)
class CalibrationResults:
    """A whole calibration: what calibration.json holds, typed."""

    n_replicas: int
    seed: int
    fits: dict[str, FitCalibration]
    derived: dict[str, ParameterCalibration] = field(default_factory=dict)
    n_failed: int = 0
    noise_model: dict[str, Any] = field(default_factory=dict)
    truth: dict[str, Any] = field(default_factory=dict)
    variants: list[VariantResult] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)
    failures: list[str] = field(default_factory=list)
    timing: dict[str, float] = field(default_factory=dict)
    provenance: dict[str, Any] = field(default_factory=dict)
    output_dir: str = ""

    def to_dict(self) -> dict[str, Any]:
        """The calibration.json structure (plain JSON types, NaN as None)."""
        return jsonable({
            "n_replicas": self.n_replicas, "n_failed": self.n_failed, "seed": self.seed,
            "noise_model": dict(self.noise_model), "truth": dict(self.truth),
            "fits": {k: v.to_dict() for k, v in self.fits.items()},
            "derived": {k: v.to_dict() for k, v in self.derived.items()},
            "variants": [v.to_dict() for v in self.variants],
            "warnings": list(self.warnings), "failures": list(self.failures),
            "timing": dict(self.timing), "provenance": dict(self.provenance),
            "output": {"dir": self.output_dir},
        })

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> CalibrationResults:
        return cls(n_replicas=int(d.get("n_replicas") or 0), seed=int(d.get("seed") or 0),
                   fits={k: FitCalibration.from_dict(v) for k, v in (d.get("fits") or {}).items()},
                   derived={k: ParameterCalibration.from_dict(v)
                            for k, v in (d.get("derived") or {}).items()},
                   n_failed=int(d.get("n_failed") or 0),
                   noise_model=dict(d.get("noise_model") or {}), truth=dict(d.get("truth") or {}),
                   variants=[VariantResult.from_dict(v) for v in d.get("variants") or []],
                   warnings=[str(w) for w in d.get("warnings") or []],
                   failures=[str(w) for w in d.get("failures") or []],
                   timing={k: as_float(v) for k, v in (d.get("timing") or {}).items()},
                   provenance=dict(d.get("provenance") or {}),
                   output_dir=str((d.get("output") or {}).get("dir", "")))
