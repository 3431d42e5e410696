"""From a specification file to results: the main job, wired end to end.

:func:`run_spec` validates the spec, loads and aligns the data, measures the
autocorrelation, bins, runs every fit's scan (central fits and jackknife
refits), chooses or averages, evaluates the derived quantities (``derived:``,
with the jackknife samples of the chosen or averaged parameters, so the
correlations between fits on the same bins are kept), and writes
results.json, the tables, the log, and (optionally) the plots and the
report page. Nothing is written until all
fitting is done, every file is written atomically, and results.json is written
last, so its presence means a complete run.
"""

from __future__ import annotations

import datetime as _dt
import json
import os
import platform
import sys
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from plateaufit import __version__
from plateaufit.atomic import write_text
from plateaufit.errors import DataError, FitError, PlateaufitError, SpecError
from plateaufit.fit.average import average_fits
from plateaufit.fit.constraints import Prior
from plateaufit.fit.correlator_fit import CorrelatorFit
from plateaufit.fit.derived import DerivedExpression, DerivedInput, evaluate_derived
from plateaufit.fit.models import EFFECTIVE_MASS_KIND
from plateaufit.fit.scan import scan, scan_points
from plateaufit.parallel import make_executor
from plateaufit.spec.inputs import (check_bin_size, data_checksums, file_sha256, load_ensemble,
                                    minimum_bins)
from plateaufit.spec.schema import fit_operators, fit_reference_names, load_spec
from plateaufit.stats.autocorr import (BinningWarning, ShortChainWarning, binning_study,
                                      choose_bin_size, tau_int)
from plateaufit.stats.effmass import effective_mass_jackknife
from plateaufit.stats.resample import bin_samples

__all__ = ["run_spec"]

_LOW_P_VALUE = 0.05
_STRONG_SHRINKAGE = 0.5


@dataclass
class _RunLog:
    """Lines for run.log, and the warnings a user must see."""

    echo: bool = False
    lines: list[str] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)

    def info(self, message: str) -> None:
        self.lines.append(message)
        if self.echo:
            print(message, file=sys.stderr)

    def warn(self, message: str) -> None:
        self.warnings.append(message)
        self.info(f"warning: {message}")

    def detail(self, message: str) -> None:
        """A line for run.log only, never echoed (e.g. each flagged scan point)."""
        self.lines.append(message)


@dataclass(frozen=True)
class _Autocorrelation:
    """Per-observable autocorrelation summary at its most autocorrelated timeslice."""

    tau: float
    error: float
    window: int
    t: int
    reliable: bool
    rho: np.ndarray
    tau_by_window: np.ndarray


def _autocorrelation(series: np.ndarray, streams: np.ndarray) -> tuple[_Autocorrelation, np.ndarray]:
    """tau_int of every timeslice; return the largest one's details and all taus."""
    results = []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ShortChainWarning)
        for t in range(series.shape[1]):
            results.append(tau_int(series[:, t], streams=streams))
    taus = np.array([r.tau for r in results])
    worst = int(np.nanargmax(taus))
    r = results[worst]
    summary = _Autocorrelation(
        tau=float(r.tau), error=float(r.error), window=int(r.window), t=worst,
        reliable=bool(all(res.reliable for res in results)),
        rho=np.asarray(r.rho), tau_by_window=np.asarray(r.tau_by_window),
    )
    return summary, taus


def _jsonable(obj: Any) -> Any:
    """numpy scalars and arrays to plain JSON; NaN and inf to null."""
    if isinstance(obj, dict):
        return {str(k): _jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_jsonable(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return _jsonable(obj.tolist())
    if isinstance(obj, (np.bool_, bool)):
        return bool(obj)
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        value = float(obj)
        return value if np.isfinite(value) else None
    return obj


def _param_entry(value: float, stat: float, sys_err: float = 0.0) -> dict[str, float]:
    return {
        "value": float(value),
        "error": float(np.hypot(stat, sys_err)),
        "stat_error": float(stat),
        "sys_error": float(sys_err),
    }


def _scan_row(fit: CorrelatorFit, model: str, weight: float) -> dict[str, Any]:
    central = fit.central
    return {
        "tmin": int(fit.tmin),
        "tmax": int(fit.tmax),
        "model": model,
        "states": int(fit.states),
        "chi2": float(central.chi2),
        "chi2_data": float(central.chi2_data),
        "chi2_prior": float(central.chi2_prior),
        "dof": int(central.dof),
        "n_points": int(central.n_points),
        "n_priors": int(central.n_priors),
        "p_value": float(central.p_value),
        "p_value_hotelling": float(central.p_value_hotelling),
        "aic": float(central.aic),
        "weight": float(weight),
        "converged": bool(fit.converged),
        "n_refit_failed": int(fit.n_refit_failed),
        "flags": fit.flag_codes,
        "params": {
            name: {"value": float(central.physical[name]), "error": float(fit.errors[name])}
            for name in fit.model.physical_names
        },
    }


def _average_fits(fits: list[CorrelatorFit]) -> tuple[dict[str, dict[str, float]], np.ndarray,
                                                     int, dict[str, DerivedInput]]:
    """Model-average every parameter over the fits that have it (see ``average_fits``).

    Returns the params entries, the weights of all fits, the number of fits
    excluded for not converging, and for each parameter its averaged value,
    jackknife samples and sys_error, the inputs of derived quantities.
    """
    avg = average_fits(fits)
    params: dict[str, dict[str, float]] = {}
    inputs: dict[str, DerivedInput] = {}
    for name in avg.names:
        if not np.isfinite(avg.value[name]):
            continue   # no converged fit has this parameter
        params[name] = _param_entry(avg.value[name], avg.stat_error[name], avg.sys_error[name])
        inputs[name] = DerivedInput(avg.value[name], avg.samples[name], avg.sys_error[name])
    return params, avg.weights, avg.n_excluded, inputs


def _excluded_summary(name: str, fits: list[CorrelatorFit]) -> str:
    """One line: how many scan points got weight 0, and why (flags counted)."""
    reasons: dict[str, int] = {}
    n = 0
    for f in fits:
        codes = [flag.code for flag in f.flags if flag.degenerate]
        if not f.converged and "central-failed" not in codes and "refits-failed" not in codes:
            codes.append("not converged")
        if f.central.physical.get("E0", 1.0) <= 0 and "ground-collapsed" not in codes:
            codes.append("ground-collapsed")
        if codes:
            n += 1
            for code in codes:
                reasons[code] = reasons.get(code, 0) + 1
    shown = ", ".join(f"{code} {count}" for code, count in sorted(reasons.items()))
    return (f"fit {name}: {n} of {len(fits)} scan points were given weight 0 ({shown}); "
            "run.log lists each with its reason")


def _covariance_summary(fit: CorrelatorFit) -> dict[str, Any]:
    cov = fit.covariance
    sd = np.sqrt(np.diag(cov.matrix))
    return {
        "correlation": cov.matrix / np.outer(sd, sd),
        "eigenvalues": cov.eigenvalues,
        "eigenvalues_raw": cov.eigenvalues_raw,
        "shrinkage": float(cov.shrinkage),
        "target": cov.target,
        "condition_number": float(cov.condition_number),
        "condition_number_raw": float(cov.condition_number_raw),
        "n_bins": int(cov.n_samples),
        "n_points": int(cov.matrix.shape[0]),
        "tmin": int(fit.tmin),
        "tmax": int(fit.tmax),
        "states": int(fit.states),
    }


def _fit_kwargs(fit_spec: Any, spec: Any) -> dict[str, Any]:
    """Keyword arguments of fit_correlator that are the same at every scan point."""
    factorised = fit_operators(spec, fit_spec)
    formula = None
    if fit_spec.formula is not None:
        formula = {"expression": fit_spec.formula.expression, "params": dict(fit_spec.formula.params)}
    shrinkage = spec.covariance.shrinkage
    return {
        "form": fit_spec.model,
        "time_extent": spec.ensemble.time_extent,
        "bounds": {k: tuple(v) for k, v in (fit_spec.bounds or {}).items()} or None,
        "shrinkage": shrinkage,
        "target": spec.covariance.target,
        "per_sample": spec.covariance.per_sample,
        "oscillating": fit_spec.oscillating,
        "constant": fit_spec.constant,
        "factorised": factorised,
        "formula": formula,
        "start": dict(fit_spec.start) if fit_spec.start else None,
    }


def _run_fit(index: int, fit_spec: Any, spec: Any, binned: dict[str, np.ndarray],
             executor: Any, progress: bool, log: _RunLog
             ) -> tuple[dict[str, Any], dict[str, DerivedInput]]:
    """One fit's scan, choice or average: its results entry, and per parameter the
    value, jackknife samples and sys error a derived quantity is computed from."""
    where = f"fits[{index}]"
    observables = list(fit_spec.observables)
    data = {name: binned[name] for name in observables}
    states = fit_spec.states_values
    priors = {k: Prior(float(v[0]), float(v[1])) for k, v in (fit_spec.priors or {}).items()}
    kwargs = _fit_kwargs(fit_spec, spec)
    kwargs["priors"] = priors or None
    kwargs["n_total_points"] = int(sum(d.shape[1] for d in data.values()))
    n_points = len(scan_points(fit_spec.tmin, fit_spec.tmax, states,
                               observables=observables, **_count_kwargs(fit_spec, kwargs)))
    log.info(f"fit {fit_spec.name}: {n_points} fit range(s) x state count(s), "
             f"{next(iter(data.values())).shape[0]} jackknife samples each")
    try:
        fits = scan(data, tmin=fit_spec.tmin, tmax=fit_spec.tmax, states=states,
                    executor=executor, progress=progress, label=fit_spec.name, **kwargs)
    except PlateaufitError as err:
        # the numerical core names keys relative to the fit entry (``tmin``, ``priors.E1``)
        inner = err.where if err.where and not err.where.startswith("fits[") else ""
        raise type(err)(f"{where}.{inner}" if inner else (err.where or where), err.message) from None

    weights = np.zeros(len(fits))
    fit_warnings: list[str] = []
    choose = fit_spec.choose
    if len(fits) == 1 or choose != "average":
        if len(fits) == 1:
            chosen_fit = fits[0]
        else:
            chosen_fit = next(f for f in fits if (f.tmin, f.tmax) == (choose.tmin, choose.tmax)
                              and choose.states in (None, f.states))
        weights[fits.index(chosen_fit)] = 1.0
        params = {name: _param_entry(chosen_fit.central.physical[name], chosen_fit.errors[name])
                  for name in chosen_fit.model.physical_names}
        inputs = {name: DerivedInput(float(chosen_fit.central.physical[name]),
                                     chosen_fit.samples[:, j], 0.0)
                  for j, name in enumerate(chosen_fit.model.physical_names)}
        chosen = {"method": "single", "tmin": chosen_fit.tmin, "tmax": chosen_fit.tmax,
                  "states": chosen_fit.states, "params": params,
                  "chi2": chosen_fit.central.chi2, "dof": chosen_fit.central.dof,
                  "p_value": chosen_fit.central.p_value,
                  "p_value_hotelling": chosen_fit.central.p_value_hotelling,
                  "converged": chosen_fit.converged,
                  "band": {"tmin": chosen_fit.tmin, "tmax": chosen_fit.tmax}}
        if not chosen_fit.converged:
            fit_warnings.append(f"fit {fit_spec.name}: the chosen fit did not converge")
        if chosen_fit.central.p_value < _LOW_P_VALUE:
            fit_warnings.append(f"fit {fit_spec.name}: the chosen fit has p-value "
                                f"{chosen_fit.central.p_value:.3g}")
        shown = chosen_fit
    else:
        try:
            params, weights, n_excluded, inputs = _average_fits(fits)
        except FitError:
            params = {}
        if not params:
            raise FitError(where, "no fit of the scan converged; narrow the ranges, add priors "
                                  "on the excited states, or give start values")
        if n_excluded:
            # a few bad points left out is the average working as it should
            # (run.log and the report's scan table list them); a warning when
            # they are the majority
            summary = _excluded_summary(fit_spec.name, fits)
            if 2 * n_excluded >= len(fits):
                fit_warnings.append(summary)
            else:
                log.info(summary)
        shown = fits[int(np.argmax(weights))]
        chosen = {"method": "average", "tmin": shown.tmin, "tmax": shown.tmax,
                  "states": shown.states, "params": params, "n_fits": len(fits),
                  "n_excluded": n_excluded,
                  "best": {"tmin": shown.tmin, "tmax": shown.tmax, "states": shown.states,
                           "weight": float(weights.max())},
                  "chi2": shown.central.chi2, "dof": shown.central.dof,
                  "p_value": shown.central.p_value,
                  "p_value_hotelling": shown.central.p_value_hotelling,
                  "converged": True,
                  "band": {"tmin": min(f.tmin for f in fits), "tmax": max(f.tmax for f in fits)}}
        if shown.central.p_value < _LOW_P_VALUE:
            fit_warnings.append(f"fit {fit_spec.name}: the highest-weight fit has p-value "
                                f"{shown.central.p_value:.3g}")
    if len(fits) == 1 or choose != "average":
        if chosen_fit.flags:
            fit_warnings.append(f"fit {fit_spec.name}: the chosen fit is flagged: "
                                + "; ".join(f.message for f in chosen_fit.flags))
    for f in fits:
        for flag in f.flags:
            log.detail(f"fit {fit_spec.name}: tmin={f.tmin} tmax={f.tmax} states={f.states}: "
                       f"{flag.code}: {flag.message}")
    n_numerical = sum(f.n_numerical_warnings for f in fits)
    if n_numerical:
        log.info(f"fit {fit_spec.name}: {n_numerical} numerical warning(s) from numpy/scipy/"
                 "lmfit were caught inside the fits (expected while a minimiser explores a "
                 "steep or flat region); run.log has the messages")
        log.detail(f"fit {fit_spec.name}: caught: " + " | ".join(
            sorted({m for f in fits for m in f.numerical_warnings})[:5]))
    if shown.covariance.shrinkage > _STRONG_SHRINKAGE:
        fit_warnings.append(f"fit {fit_spec.name}: strong covariance shrinkage "
                            f"({shown.covariance.shrinkage:.2f}); more bins would help")
    for message in fit_warnings:
        log.warn(message)

    kind = EFFECTIVE_MASS_KIND[fit_spec.model]
    effmass = {}
    for name in observables:
        em = effective_mass_jackknife(binned[name], kind=kind, time_extent=spec.ensemble.time_extent)
        effmass[name] = {"t": em.t, "value": em.value, "error": em.error, "kind": em.kind}
    first = "E0" if "E0" in params else next(iter(params))   # a formula has its own names
    log.info(f"fit {fit_spec.name}: {first} = {params[first]['value']:.6g} "
             f"+- {params[first]['error']:.2g} ({chosen['method']})")
    return {
        "observables": observables,
        "model": fit_spec.model,
        "chosen": chosen,
        "scan": [_scan_row(f, fit_spec.model, w) for f, w in zip(fits, weights)],
        "effective_mass": effmass,
        "covariance": _covariance_summary(shown),
        "warnings": fit_warnings,
    }, inputs


def _derived_section(spec: Any, inputs_by_fit: dict[str, dict[str, DerivedInput]],
                     log: _RunLog) -> dict[str, Any]:
    """``derived.NAME.{expression, value, error, stat_error, sys_error, references}``.

    Every fit shares the bins, so sample k of every fit's parameters leaves
    out the same bin: the derived quantity's jackknife samples keep the
    correlations between the fits (see plateaufit.fit.derived).
    """
    out: dict[str, Any] = {}
    if not spec.derived:
        return out
    known = fit_reference_names(spec)
    for name, text in spec.derived.items():
        where = f"derived.{name}"
        try:
            expr = DerivedExpression(text, known)
        except ValueError as exc:      # load_spec checked it already
            raise SpecError(where, str(exc)) from None
        inputs = {}
        for ref in expr.references:
            fit_name, param = expr.parts[ref]
            if param not in inputs_by_fit[fit_name]:
                raise FitError(where, f"{ref} has no result: no fit of {fit_name}'s scan that "
                               f"has {param} converged; fix that fit (priors, ranges, states) "
                               "or leave the reference out")
            inputs[ref] = inputs_by_fit[fit_name][param]
        try:
            result = evaluate_derived(expr, inputs)
        except PlateaufitError as err:
            raise type(err)(where, err.message) from None
        if result.n_dropped:
            log.warn(f"derived {name}: {result.n_dropped} jackknife sample(s) left out, where a "
                     "refit of an input failed")
        out[name] = {"expression": text, "references": list(result.references),
                     **_param_entry(result.value, result.stat_error, result.sys_error)}
        log.info(f"derived {name} = {text}: {result.value:.6g} +- {result.error:.2g} "
                 f"(stat {result.stat_error:.2g}, sys {result.sys_error:.2g})")
    return out


def _count_kwargs(fit_spec: Any, kwargs: dict[str, Any]) -> dict[str, Any]:
    """The model options that decide how many parameters a scan point has."""
    return {"oscillating": kwargs["oscillating"], "constant": kwargs["constant"],
            "operators": kwargs["factorised"],
            "formula": kwargs["formula"]}


def _ensemble_section(spec: Any, ensemble: Any, log: _RunLog) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
    """Autocorrelation, the bin size, and the binned data of every observable."""
    streams = ensemble.streams
    counts = list(ensemble.stream_counts().values())
    autocorr: dict[str, _Autocorrelation] = {}
    all_taus = []
    for name, series in ensemble.correlators.items():
        summary, taus = _autocorrelation(series, streams)
        autocorr[name] = summary
        all_taus.append(taus)
        log.info(f"{name}: tau_int (1/2 + sum rho convention) = {summary.tau:.2f} "
                 f"+- {summary.error:.2f} at t = {summary.t}, window {summary.window}")
        if not summary.reliable:
            log.warn(f"{name}: the autocorrelation window was not found for every timeslice; "
                     "tau_int is a lower bound there (the chains are short for their "
                     "autocorrelation)")
    if spec.binning.size == "auto":
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always", BinningWarning)
            bin_size = int(choose_bin_size(np.concatenate(all_taus), counts,
                                           min_bins=minimum_bins(spec)))
        for w in caught:
            if issubclass(w.category, BinningWarning):
                log.warn(f"binning.size: {w.message}")
        log.info(f"bin size {bin_size} chosen automatically from the largest tau_int "
                 f"({float(np.nanmax(np.concatenate(all_taus))):.2f})")
    else:
        bin_size = int(spec.binning.size)
    check_bin_size(bin_size, counts)
    binned: dict[str, np.ndarray] = {}
    n_dropped = 0
    n_bins = 0
    studies = {}
    for name, series in ensemble.correlators.items():
        try:
            binned[name], n_dropped = bin_samples(series, bin_size, streams, return_dropped=True)
        except PlateaufitError as err:
            raise type(err)("binning.size", err.message) from None
        n_bins = binned[name].shape[0]
        t_worst = autocorr[name].t
        study = binning_study(series[:, t_worst], streams=streams)
        studies[name] = {"t": t_worst, "sizes": study.sizes, "errors": study.errors,
                         "naive_error": study.naive_error}
    if n_dropped:
        log.info(f"binning: {n_dropped} configuration(s) at stream ends dropped")
    log.info(f"{ensemble.n_configs} configurations in {len(counts)} stream(s) -> "
             f"{n_bins} bins of {bin_size}")
    section = {
        "name": ensemble.name,
        "time_extent": ensemble.time_extent,
        "n_configs": ensemble.n_configs,
        "n_streams": len(counts),
        "stream_sizes": counts,
        "n_bins": n_bins,
        "bin_size": bin_size,
        "n_dropped": n_dropped,
        "tau_int_convention": "1/2 + sum_{t>=1} rho(t)",
        "tau_int": {name: {"value": a.tau, "error": a.error, "window": a.window, "t": a.t,
                           "reliable": a.reliable}
                    for name, a in autocorr.items()},
        "autocorrelation": {name: {"t": a.t, "rho": a.rho, "tau_by_window": a.tau_by_window,
                                   "window": a.window}
                            for name, a in autocorr.items()},
        "binning_study": studies,
        "observables": {name: {"n_t": int(series.shape[1]),
                               "boundary": ensemble.boundaries[name],
                               "folded": bool(ensemble.folded[name])}
                        for name, series in ensemble.correlators.items()},
    }
    return section, binned


def _check_output_dir(out_dir: Path, key: str) -> None:
    """Refuse, before any fitting, an output directory that cannot be written."""
    for candidate in (out_dir, *out_dir.parents):
        if candidate.exists():
            if not candidate.is_dir():
                raise DataError(str(candidate), f"{key} must name a directory, but this is a "
                                "file; choose another output directory")
            if not os.access(candidate, os.W_OK | os.X_OK):
                raise DataError(str(candidate), f"{key}: this directory is not writable; "
                                "choose another output directory")
            return


def _write_outputs(results: dict[str, Any], out_dir: Path, plots: bool, log: _RunLog) -> None:
    """Tables, plots and page first; results.json last (its presence means complete)."""
    from plateaufit.report.tables import write_tables

    write_tables(results, out_dir)
    if plots:
        from plateaufit.report.html import write_report
        from plateaufit.report.plots import make_all_plots

        page = write_report(results, out_dir, figures=make_all_plots(results, out_dir))
        log.info(f"report page: {page}")
    write_text(out_dir / "run.log", "\n".join(log.lines) + "\n")
    write_text(out_dir / "results.json", json.dumps(results, indent=1, allow_nan=False) + "\n")


def run_spec(path: str | Path, out: str | Path | None = None, *, plots: bool = True,
             jobs: int | None = None, scheduler: str | None = None, progress: bool = True,
             echo: bool = False) -> dict[str, Any]:
    """Run the analysis a specification file describes and write its results.

    Parameters
    ----------
    path : str or Path
        The YAML specification file.
    out : str or Path, optional
        Output directory; default the spec's ``output.dir`` (relative to the spec).
    plots : bool
        Also write the plots and the HTML report page.
    jobs : int, optional
        Worker processes for scan points (default: all cores; 1 runs in-process).
    scheduler : str, optional
        Address of a dask.distributed scheduler to run scan points on instead.
    progress : bool
        Show progress bars (only on a terminal).
    echo : bool
        Also print the log lines to stderr as the run goes.

    Returns
    -------
    dict
        The same structure as results.json.

    Raises
    ------
    SpecError, DataError, FitError
        For user errors; each names the spec key path or file.
    """
    spec = load_spec(path)
    spec_path = Path(path)
    out_dir = Path(out) if out is not None else spec.output_dir
    plots = plots and spec.output.plots
    _check_output_dir(out_dir, "--out" if out is not None else "output.dir")
    log = _RunLog(echo=echo)
    log.info(f"plateaufit {__version__}: {spec_path}")
    ensemble = load_ensemble(spec)
    ensemble_section, binned = _ensemble_section(spec, ensemble, log)

    fits: dict[str, Any] = {}
    inputs_by_fit: dict[str, dict[str, DerivedInput]] = {}
    with make_executor(jobs=jobs, scheduler=scheduler) as executor:
        for index, fit_spec in enumerate(spec.fits):
            fits[fit_spec.name], inputs_by_fit[fit_spec.name] = _run_fit(
                index, fit_spec, spec, binned, executor, progress, log)
    derived = _derived_section(spec, inputs_by_fit, log)

    truth = {name: dict(values) for name, values in (spec.truth or {}).items()}
    results = {
        "version": __version__,
        "output": {"dir": str(out_dir)},
        "ensemble": ensemble_section,
        "fits": fits,
        "derived": derived,
        "truth": truth,
        "warnings": list(log.warnings),
        "provenance": {
            "version": __version__,
            "spec": str(spec_path),
            "spec_sha256": file_sha256(spec_path),
            "data_sha256": data_checksums(spec),
            "seeds": {},
            "created": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
            "python": platform.python_version(),
            "numpy": np.__version__,
        },
    }
    results = _jsonable(results)
    _write_outputs(results, out_dir, plots, log)
    return results

