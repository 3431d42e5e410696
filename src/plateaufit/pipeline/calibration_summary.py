"""From the replicas' outcomes to coverages, warnings and the remedies to try.

:func:`summarise` gives, for every fit and reported parameter with a truth
(and every derived quantity), the statistics of
:func:`plateaufit.stats.coverage.coverage_stats`; the chosen fits' p-values
with their KS distance to uniform; and, for scans, how often each scan point
was the chosen (highest-weight) one.

:func:`coverage_warnings` words what falls outside its binomial band;
:func:`remedies` lists the changes to the spec that test the likely causes
(larger bins against an underestimated autocorrelation, the per-sample
covariance, no shrinkage, the Gamma-method covariance against a noisy
covariance from few bins), each run on the same replicas;
:func:`remedy_sentence` says which of them restores coverage.
"""

from __future__ import annotations

import math
from collections import Counter
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from plateaufit.pipeline.calibration_results import (ChosenPointCount, FitCalibration,
                                                     ParameterCalibration, VariantResult)
from plateaufit.pipeline.calibration_replicas import ReplicaOutcome
from plateaufit.pipeline.calibration_truth import CalibrationTruth
from plateaufit.pipeline.prepare import MIN_BINS
from plateaufit.pipeline.results import Results
from plateaufit.specfile import Spec
from plateaufit.specfile.models import BinningSpec
from plateaufit.stats.coverage import coverage_stats, p_value_uniformity

__all__ = ["summarise", "coverage_warnings", "Remedy", "remedies", "remedy_sentence",
           "failing_items", "restores", "KS_P_WARN"]

#: the chosen fits' p-values are called non-uniform below this KS p-value
KS_P_WARN = 0.01


def _stats(pairs: Sequence[tuple[float, float]], truth: float, keep_pulls: bool
           ) -> ParameterCalibration:
    v = np.array([p[0] for p in pairs], dtype=float)
    e = np.array([p[1] for p in pairs], dtype=float)
    return ParameterCalibration.of(coverage_stats(v, e, truth), truth, keep_pulls)


def summarise(spec: Spec, base: Results, truth: CalibrationTruth,
              outcomes: Sequence[ReplicaOutcome], *, keep_pulls: bool = True
              ) -> tuple[dict[str, FitCalibration], dict[str, ParameterCalibration]]:
    """Coverage statistics of every fit's reported parameters and of the derived quantities."""
    good = [o for o in outcomes if not o.failed]
    nan = (math.nan, math.nan)
    fits: dict[str, FitCalibration] = {}
    for fit in spec.fits:
        name = fit.name
        ft = truth.fits[name]
        params, unmeasured = {}, dict(truth.unmeasured.get(name, {}))
        for p in base.fits[name].chosen.params:
            if p not in ft.params:
                unmeasured.setdefault(p, f"the truth model ({ft.tmin}..{ft.tmax}, {ft.states} "
                                         f"state(s)) has no {p}")
                continue
            params[p] = _stats([o.params.get(name, {}).get(p, nan) for o in good],
                               ft.params[p], keep_pulls)
        p_values = np.array([o.p_values.get(name, math.nan) for o in good], dtype=float)
        ks, ks_p = p_value_uniformity(p_values)
        points: list[ChosenPointCount] = []
        if fit.is_scan and fit.averages and good:
            counts = Counter(o.chosen[name] for o in good if name in o.chosen)
            points = [ChosenPointCount(k[0], k[1], k[2], c, c / len(good))
                      for k, c in sorted(counts.items(), key=lambda kc: (-kc[1], kc[0]))]
        fits[name] = FitCalibration(params=params, unmeasured=unmeasured,
                                    p_values=p_values if keep_pulls else np.zeros(0),
                                    ks_statistic=ks, ks_p_value=ks_p, chosen_points=points)
    derived = {name: _stats([o.derived.get(name, nan) for o in good], value, keep_pulls)
               for name, value in truth.derived.items()}
    return fits, derived


def _below(pc: ParameterCalibration) -> bool:
    return pc.n > 0 and (pc.coverage_1sigma < pc.band_1sigma[0]
                         or pc.coverage_2sigma < pc.band_2sigma[0])


def failing_items(fits: dict[str, FitCalibration], derived: dict[str, ParameterCalibration],
                  *, low_only: bool = False) -> list[tuple[str, str]]:
    """(fit or 'derived', parameter) of every coverage outside its band (``low_only``:
    below it, the errors too small: what the remedies address)."""
    bad = _below if low_only else (lambda pc: pc.outside)
    out = [(name, p) for name, fc in fits.items() for p, pc in fc.params.items() if bad(pc)]
    out += [("derived", name) for name, pc in derived.items() if bad(pc)]
    return out


def _item(fits, derived, key: tuple[str, str]) -> ParameterCalibration | None:
    group, name = key
    if group == "derived" and group not in fits:
        return derived.get(name)
    fc = fits.get(group)
    return fc.params.get(name) if fc is not None else None


def _pct(x: float) -> str:
    return "n/a" if not math.isfinite(x) else f"{100 * x:.0f}%"


def _label(key: tuple[str, str], fits, short: bool = False) -> str:
    group, name = key
    if group == "derived" and group not in fits:
        return f"derived {name}"
    return f"{group} {name}" if short else f"fit {group}: {name}"


def coverage_warnings(fits: dict[str, FitCalibration], derived: dict[str, ParameterCalibration],
                      n_replicas: int, averaged: Sequence[str] = ()) -> list[str]:
    """One warning per coverage outside its band, with the numbers; and non-uniform p-values.

    ``averaged`` names the fits that average a scan: their p-values (of the
    highest-weight point, chosen for its small chi2) lean high even with an exact
    covariance, so only p-values leaning low are warned about there.
    """
    out = []
    for key in failing_items(fits, derived):
        pc = _item(fits, derived, key)
        lo1, hi1 = pc.band_1sigma
        lo2, hi2 = pc.band_2sigma
        low = pc.coverage_1sigma < lo1 or pc.coverage_2sigma < lo2
        what = ("the errors are too small" if low else "the errors are too large (conservative)")
        out.append(
            f"{_label(key, fits)} covers the truth in {_pct(pc.coverage_1sigma)} of {pc.n} "
            f"replicas at 1 sigma (expected 68%, band {_pct(lo1)}-{_pct(hi1)}) and "
            f"{_pct(pc.coverage_2sigma)} at 2 sigma (expected 95%, band {_pct(lo2)}-{_pct(hi2)}): "
            f"{what}; replica scatter / mean error = {pc.scatter_over_error:.2f}, "
            f"bias = {pc.bias_over_error:+.2f}({pc.bias_over_error_error:.2f}) errors")
    for name, fc in fits.items():
        if not (math.isfinite(fc.ks_p_value) and fc.ks_p_value < KS_P_WARN):
            continue
        mean = float(np.nanmean(fc.p_values)) if fc.p_values.size else math.nan
        selected = name in averaged
        if selected and not mean < 0.5:
            continue   # the highest-weight point is picked for its small chi2: p leans high
        cause = ("chi2 too large: the covariance is underestimated (or the model misses "
                 "something at small tmin)" if mean < 0.5 else
                 "chi2 too small: the covariance is overestimated (too much shrinkage, or "
                 "a noisy estimate)")
        out.append(f"fit {name}: the chosen fits' p-values are not uniform over the "
                   f"replicas (KS distance {fc.ks_statistic:.2f}, KS p = {fc.ks_p_value:.2g}, "
                   f"mean p {mean:.2f}, uniform: 0.50): {cause}, so the p-value does not judge "
                   "the fit's quality on this ensemble")
    if n_replicas < 50 and out:
        out.append(f"only {n_replicas} replicas: the bands are wide; rerun with --replicas 200 "
                   "for a firmer verdict")
    return out


@dataclass(frozen=True)
class Remedy:
    """A change to the spec that tests one likely cause of a coverage failure."""

    name: str
    description: str
    changes: dict[str, Any]
    spec: Spec


def _largest_size(stream_sizes: Sequence[int], least_bins: int) -> int:
    size = max(stream_sizes)
    while size > 1 and sum(n // size for n in stream_sizes) < least_bins:
        size -= 1
    return size


def remedies(spec: Spec, bin_size: int, auto_bin_size: int, stream_sizes: Sequence[int]
             ) -> tuple[list[Remedy], list[str]]:
    """The variants to run on the same replicas, and why others were not possible.

    * larger bins: ``max(2 b, auto)`` configurations per bin (b the size used),
      at most the size that leaves :data:`MIN_BINS` bins;
    * ``covariance.per_sample: true`` (binned estimator only);
    * ``covariance.shrinkage: none``, when every fit has fewer points than bins;
    * ``covariance.estimator: gamma`` (when the spec uses ``binned``).
    """
    out, skipped = [], []
    cov = spec.covariance
    largest = _largest_size(stream_sizes, MIN_BINS)
    size = min(max(2 * bin_size, auto_bin_size), largest)
    if size > bin_size:
        out.append(Remedy("larger-bins", f"binning.size {bin_size} -> {size}",
                          {"binning.size": size},
                          spec.model_copy(update={"binning": BinningSpec(size=size)})))
    else:
        skipped.append(f"larger bins: bins of {bin_size} already leave fewer than "
                       f"{2 * MIN_BINS} bins")
    if cov.estimator == "binned" and cov.per_sample is not True:
        out.append(Remedy("per-sample", "covariance.per_sample true",
                          {"covariance.per_sample": True},
                          spec.model_copy(update={"covariance": cov.model_copy(
                              update={"per_sample": True})})))
    if cov.shrinkage != "none":
        n_bins = sum(n // bin_size for n in stream_sizes)
        points = max((max(f.tmax_values) - min(f.tmin_values) + 1) * len(f.observables)
                     for f in spec.fits) if spec.fits else 0
        if cov.estimator == "gamma" or points < n_bins - 1:
            out.append(Remedy("no-shrinkage", "covariance.shrinkage none",
                              {"covariance.shrinkage": "none"},
                              spec.model_copy(update={"covariance": cov.model_copy(
                                  update={"shrinkage": "none"})})))
        else:
            skipped.append(f"no shrinkage: {n_bins} bins for up to {points} points give a "
                           "singular covariance")
    if cov.estimator == "binned":
        out.append(Remedy("gamma", "covariance.estimator gamma",
                          {"covariance.estimator": "gamma"},
                          spec.model_copy(update={"covariance": cov.model_copy(
                              update={"estimator": "gamma", "per_sample": False})})))
    return out, skipped


def restores(variant_fits, variant_derived, failing: list[tuple[str, str]]) -> bool:
    """Every failing item's coverages inside their bands in the variant."""
    if not failing:
        return False
    for key in failing:
        pc = _item(variant_fits, variant_derived, key)
        if pc is None or pc.n < 1 or pc.outside:
            return False
    return True


def remedy_sentence(base_fits, base_derived, variants: list[VariantResult],
                    failing: list[tuple[str, str]], skipped: list[str]) -> str:
    """What rerunning the same replicas with each variant did to the failing coverages."""
    if not failing:
        return ""
    parts = []
    n = 0
    for v in variants:
        cells = []
        for key in failing[:3]:
            pc = _item(v.fits, v.derived, key)
            base = _item(base_fits, base_derived, key)
            if pc is None:
                continue
            n = max(n, pc.n)
            cells.append(f"{_label(key, base_fits, short=True)} {_pct(base.coverage_1sigma)} -> "
                         f"{_pct(pc.coverage_1sigma)}")
        more = f" (and {len(failing) - 3} more)" if len(failing) > 3 else ""
        verdict = "restores coverage" if v.restores else "does not restore it"
        failed = f", {v.n_failed} replica(s) failed" if v.n_failed else ""
        parts.append(f"{v.description}: {', '.join(cells)}{more} at 1 sigma ({verdict}{failed})")
    good = [v.description for v in variants if v.restores]
    which = f"the first {n} replicas" if n else "the same replicas"
    lead = (f"rerunning {which} with {' / '.join(good)} restores coverage"
            if good else f"none of the variants tried on {which} restores coverage")
    text = f"{lead} -- " + "; ".join(parts)
    if skipped:
        text += " (not tried: " + "; ".join(skipped) + ")"
    if not good:
        text += ("; when the bias is large against the scatter, suspect the model (excited "
                 "states at small tmin: start the range later or add a state)")
    return text
