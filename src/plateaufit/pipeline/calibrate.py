"""``plateaufit calibrate``: are the errors of *this* analysis, on *this* ensemble, honest?

1. The spec is run once on its data (as ``plateaufit fit`` does).
2. The truth of the replicas is the fitted result
   (:mod:`~plateaufit.pipeline.calibration_truth`): every fit's chosen (or
   highest-weight) model with its central fit, or a ``--truth`` file.
3. A noise model is fitted to the measured, folded per-configuration data of
   every observable (:func:`plateaufit.stats.replicas.fit_replica_model`,
   method ``ar1-factors``): the covariance across timeslices and observables,
   the signal-to-noise growth, the streams and the Monte Carlo
   autocorrelation; see that module for the method and its references.
4. ``M`` independent replicas (seeds ``SeedSequence(seed).spawn(M)``) are
   drawn and each goes through the *same* spec (binning, covariance, scans,
   averaging, derived quantities) in memory, on the executor, one task per
   replica (:mod:`~plateaufit.pipeline.calibration_replicas`).
5. Coverage, bias, pulls, scatter and the p-values are summarised
   (:mod:`~plateaufit.pipeline.calibration_summary`); when a coverage falls
   below its binomial band (errors too small), the same replicas (the first
   :data:`VARIANT_REPLICAS` of them) are rerun with the changes that test the
   likely causes (larger bins, per-sample covariance, no shrinkage, the
   Gamma-method covariance) and the warning says which restores it.
6. ``DIR/calibration.json`` is written last, after the fit's own outputs
   (results.json, tables, plots, and the report page with its calibration
   section).
"""

from __future__ import annotations

import datetime as _dt
import json
import os
import time
from collections.abc import Mapping
from dataclasses import replace
from pathlib import Path
from typing import Any

import numpy as np

from plateaufit import __version__
from plateaufit.atomic import write_text
from plateaufit.errors import SpecError
from plateaufit.parallel import make_executor
from plateaufit.pipeline.calibration_replicas import ReplicaJob, ReplicaOutcome, run_replica
from plateaufit.pipeline.calibration_results import CalibrationResults, VariantResult
from plateaufit.pipeline.calibration_summary import (coverage_warnings, failing_items, remedies,
                                                     remedy_sentence, restores, summarise)
from plateaufit.pipeline.calibration_truth import (CalibrationTruth, column_layout, derived_truth,
                                                   pseudo_true, read_truth_file, truth_vector)
from plateaufit.pipeline.inputs import file_sha256, load_ensemble
from plateaufit.pipeline.prepare import prepare
from plateaufit.pipeline.results import Results
from plateaufit.pipeline.rules import as_spec
from plateaufit.pipeline.output import output_folder, output_names
from plateaufit.pipeline.run import RunLog, run_analysis
from plateaufit.specfile import Spec
from plateaufit.stats.replicas import ReplicaModel, fit_replica_model

__all__ = ["calibrate_spec", "calibrate", "DEFAULT_REPLICAS", "coverage_table", "print_summary",
           "build_truth", "write_calibration"]

DEFAULT_REPLICAS = 200
#: the remedies rerun at most this many of the replicas (the first ones: the same
#: draws), each variant costing another round of analyses
VARIANT_REPLICAS = 100


def _check_count(replicas: Any) -> int:
    if isinstance(replicas, bool) or not isinstance(replicas, (int, np.integer)) or replicas < 2:
        raise SpecError("--replicas", f"give a whole number of replicas >= 2, got {replicas!r} "
                        f"(default {DEFAULT_REPLICAS})")
    return int(replicas)


def _check_seed(seed: Any) -> int:
    if seed is None:
        return int(np.random.SeedSequence().entropy)
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise SpecError("--seed", f"give a whole number >= 0 as the seed, got {seed!r}")
    return int(seed)


def build_truth(spec: Spec, base: Results, ensemble, file_truth: Mapping[str, Any] | None
                ) -> tuple[CalibrationTruth, ReplicaModel]:
    """The replicas' truth and the noise model (the truth added to its draws)."""
    vector, fits = truth_vector(spec, base, ensemble, file_truth)
    x = np.concatenate([v for v in ensemble.correlators.values()], axis=1)
    model = fit_replica_model(x, vector, streams=ensemble.stream_labels)
    fits = pseudo_true(spec, ensemble, vector, fits, model.mean_covariance)
    given = (file_truth or {}).get("derived") if "derived" not in fits else None
    derived, missing = derived_truth(spec, fits, given)
    truth = CalibrationTruth(vector=vector, fits=fits, derived=derived,
                             derived_unmeasured=missing,
                             source="file" if file_truth else "fit")
    return truth, model


def _run_replicas(executor, job: ReplicaJob, seeds, progress: bool, desc: str
                  ) -> list[ReplicaOutcome]:
    items = list(enumerate(seeds))
    return executor.map(run_replica, items, shared=job, progress=progress, desc=desc)


def _failures(outcomes: list[ReplicaOutcome]) -> list[str]:
    return [f"replica {o.index}: {o.failure}" for o in outcomes if o.failed]


def calibrate(spec: Spec, replicas: int = DEFAULT_REPLICAS, *, seed: int | None = None,
              executor: Any = None, truth: Mapping[str, Any] | None = None,
              variants: bool = True, progress: bool = False, log: RunLog | None = None
              ) -> tuple[Results, CalibrationResults]:
    """Run ``spec`` on its data and on ``replicas`` synthetic replicas; writes nothing.

    Parameters
    ----------
    spec : Spec
        A validated spec.
    replicas : int
        Number of replicas ``M`` (>= 2).
    seed : int, optional
        Makes the replicas reproducible (default: fresh entropy, recorded).
    executor : Executor, optional
        Runs the replicas (default serial).
    truth : mapping, optional
        ``{FIT: {PARAM: value}, derived: {NAME: value}}`` overriding the fitted truth.
    variants : bool
        Rerun the same replicas with the remedies when a coverage fails.
    progress : bool
        A progress bar (on a terminal).
    log : RunLog, optional

    Returns
    -------
    (Results, CalibrationResults)
        The run on the data, and the calibration.

    References
    ----------
    U. Wolff, Comput. Phys. Commun. 156 (2004) 143 (the noise model's
    autocorrelation); J. Neyman, Phil. Trans. R. Soc. A 236 (1937) 333 (coverage).
    """
    from plateaufit.parallel import SerialExecutor

    replicas = _check_count(replicas)
    seed = _check_seed(seed)
    log = log if log is not None else RunLog()
    executor = executor if executor is not None else SerialExecutor()
    t0 = time.perf_counter()
    base = run_analysis(spec, executor=executor, progress=progress, log=log)
    ensemble = load_ensemble(spec)
    t_base = time.perf_counter() - t0
    cal_truth, model = build_truth(spec, base, ensemble, truth)
    log.info(f"calibrate: noise model {model.method}: {model.n_factors} factors, window "
             f"{model.window}, largest tau_int {float(np.max(model.taus)):.2f} (1/2 + sum rho "
             f"convention), shrinkage {model.shrinkage:.2f}")
    log.info(f"calibrate: {replicas} replicas, seed {seed}")
    job = ReplicaJob.of(spec, model, ensemble, column_layout(ensemble))
    seeds = ReplicaModel.replica_seeds(replicas, seed)
    t1 = time.perf_counter()
    outcomes = _run_replicas(executor, job, seeds, progress, "replicas")
    t_rep = time.perf_counter() - t1
    fits, derived = summarise(spec, base, cal_truth, outcomes)
    n_failed = sum(o.failed for o in outcomes)
    averaged = [f.name for f in spec.fits if f.is_scan and f.averages]
    messages = coverage_warnings(fits, derived, replicas - n_failed, averaged)
    if n_failed:
        first = next(o.failure for o in outcomes if o.failed)
        messages.append(f"{n_failed} of {replicas} replicas failed (left out of the coverage); "
                        f"the first: {first}")
    if not model.reliable:
        messages.append("tau_int of the data is only a lower bound (chain too short for its "
                        "window): the replicas have at most the measured autocorrelation, so "
                        "the coverage measured here may be optimistic")
    failing = failing_items(fits, derived, low_only=True)
    variant_results: list[VariantResult] = []
    t2 = time.perf_counter()
    if failing and variants:
        prepared = prepare(spec, ensemble)
        tried, skipped = remedies(spec, prepared.bin_size, prepared.auto_bin_size,
                                  prepared.stream_sizes)
        for remedy in tried:
            log.info(f"calibrate: rerunning the same replicas with {remedy.description}")
            vjob = ReplicaJob.of(remedy.spec, model, ensemble, job.layout)
            vout = _run_replicas(executor, vjob, seeds[:VARIANT_REPLICAS], progress, remedy.name)
            vfits, vderived = summarise(remedy.spec, base, cal_truth, vout, keep_pulls=False)
            variant_results.append(VariantResult(
                name=remedy.name, description=remedy.description, changes=remedy.changes,
                fits=vfits, derived=vderived, n_failed=sum(o.failed for o in vout),
                restores=restores(vfits, vderived, failing)))
        sentence = remedy_sentence(fits, derived, variant_results, failing, skipped)
        if sentence:
            messages.append(sentence[0].upper() + sentence[1:])
    t_var = time.perf_counter() - t2
    for message in messages:     # run.log; the terminal gets them from print_summary
        log.detail(f"calibration warning: {message}")
    unmeasured = {name: dict(fc.unmeasured) for name, fc in fits.items() if fc.unmeasured}
    for name, reason in cal_truth.derived_unmeasured.items():
        log.info(f"calibrate: derived {name}: coverage not measured ({reason})")
    source = spec.path
    provenance = {
        "version": __version__, "spec": str(source or ""),
        "spec_sha256": file_sha256(source) if source is not None else None,
        "created": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        "replica_method": model.method,
    }
    calibration = CalibrationResults(
        n_replicas=replicas, seed=seed, fits=fits, derived=derived, n_failed=n_failed,
        noise_model={"method": model.method, "window": model.window,
                     "shrinkage": model.shrinkage, "n_factors": model.n_factors,
                     "n_clipped": model.n_clipped, "reliable": model.reliable,
                     "tau_max": float(np.max(model.taus)),
                     "stream_sizes": list(model.stream_sizes)},
        truth={**cal_truth.to_dict(), "unmeasured": unmeasured,
               "derived_unmeasured": dict(cal_truth.derived_unmeasured)},
        variants=variant_results, warnings=messages, failures=_failures(outcomes)[:20],
        timing={"base_seconds": t_base, "replicas_seconds": t_rep, "variants_seconds": t_var,
                "per_replica_seconds": float(np.mean([o.seconds for o in outcomes]))},
        provenance=provenance)
    return base, calibration


def coverage_table(calibration: CalibrationResults) -> str:
    """A plain-text table of the coverages, for the terminal."""
    rows = [f"{'quantity':28s} {'cov 1s':>12s} {'cov 2s':>12s} {'bias/err':>9s} "
            f"{'pull rms':>8s} {'scat/err':>8s}"]

    def line(label: str, pc) -> str:
        flag = "  <- outside band" if pc.outside else ""
        return (f"{label[:28]:28s} {pc.coverage_1sigma:6.2f}({100 * pc.coverage_1sigma_error:2.0f})"
                f"   {pc.coverage_2sigma:6.2f}({100 * pc.coverage_2sigma_error:2.0f})"
                f"   {pc.bias_over_error:+7.2f} {pc.pull_rms:8.2f} "
                f"{pc.scatter_over_error:8.2f}{flag}")
    for name, fc in calibration.fits.items():
        for p, pc in fc.params.items():
            rows.append(line(f"{name}: {p}", pc))
        if np.isfinite(fc.ks_p_value):
            rows.append(f"{name}: p-values, KS distance to uniform {fc.ks_statistic:.2f} "
                        f"(KS p = {fc.ks_p_value:.2g})")
    for name, pc in calibration.derived.items():
        rows.append(line(f"derived {name}", pc))
    rows.append("(coverage(binomial error in %); expected 0.68 and 0.95; bias in units of the "
                "rms error; scatter/err = replica scatter over the rms error)")
    return "\n".join(rows)


def write_calibration(base: Results, calibration: CalibrationResults, out_dir: Path,
                      plots: bool, log: RunLog) -> Path:
    """The fit's outputs with the calibration section and calibration.json into
    ``out_dir`` (a staging folder: :mod:`plateaufit.run_folder` moves them into place,
    results.json last)."""
    from plateaufit.report.tables import write_tables

    write_tables(base, out_dir)
    if plots:
        from plateaufit.report.calibration_plots import make_calibration_plots
        from plateaufit.report.html import write_report
        from plateaufit.report.plots import make_all_plots

        figures = dict(make_all_plots(base, out_dir))
        figures.update(make_calibration_plots(calibration, out_dir))
        page = write_report(base, out_dir, figures=figures, calibration=calibration)
        log.info(f"report page: {page}")
    write_text(out_dir / "run.log", "\n".join(log.lines) + "\n")
    write_text(out_dir / "results.json",
               json.dumps(base.to_dict(), indent=1, allow_nan=False) + "\n")
    return write_text(out_dir / "calibration.json",
                      json.dumps(calibration.to_dict(), indent=1, allow_nan=False) + "\n")


def calibrate_spec(source: str | os.PathLike[str] | Spec | Mapping[str, Any],
                   replicas: int = DEFAULT_REPLICAS, out: str | os.PathLike[str] | None = None,
                   *, seed: int | None = None, jobs: int | None = None,
                   scheduler: str | None = None, truth: str | os.PathLike[str] | None = None,
                   variants: bool = True, plots: bool = True, progress: bool = True,
                   echo: bool = False, base_dir: str | os.PathLike[str] | None = None
                   ) -> dict[str, Any]:
    """``plateaufit calibrate``: calibrate a spec's errors and write the results.

    Parameters
    ----------
    source : path, Spec or dict
        The specification (as for :func:`plateaufit.pipeline.run.run_spec`).
    replicas : int
        Number of replicas (default 200).
    out : path, optional
        Output directory (default: the spec's ``output.dir``); gets the fit's
        outputs and ``calibration.json``.
    seed : int, optional
        Reproducible replicas (default: fresh entropy, written to calibration.json).
    jobs, scheduler : optional
        Executor of the replicas (``--jobs``, a dask scheduler address).
    truth : path, optional
        A YAML file of the shape of the spec's ``truth:`` key.
    variants : bool
        Rerun the replicas with the remedies when a coverage fails.
    plots : bool
        Plots and the report page.
    progress, echo : bool
        Progress bar; log lines on stderr as the run goes.

    Returns
    -------
    dict
        calibration.json's structure.

    Raises
    ------
    SpecError, DataError, FitError
        For user errors (``--replicas``, ``--seed``, ``--truth`` or a spec key).
    """
    spec = as_spec(source, base_dir=base_dir)
    replicas = _check_count(replicas)
    seed = _check_seed(seed)
    file_truth = read_truth_file(truth, spec) if truth is not None else None
    folder = output_folder(spec, out)
    out_dir = folder.path
    plots = plots and spec.output.plots
    # before any fitting: outputs clear of the inputs, the folder writable, with room
    folder.preflight([*output_names(spec, plots=plots), "calibration.json"], plots=plots)
    log = RunLog(echo=echo)
    log.info(f"plateaufit {__version__} calibrate: "
             f"{spec.path if spec.path is not None else '(in memory)'}")
    with make_executor(jobs=jobs, scheduler=scheduler) as executor:
        base, calibration = calibrate(spec, replicas, seed=seed, executor=executor,
                                      truth=file_truth, variants=variants, progress=progress,
                                      log=log)
    calibration = replace(calibration, output_dir=str(out_dir))
    log.detail(coverage_table(calibration))
    with folder.writing() as staging:
        write_calibration(base, calibration, staging, plots, log)
    return calibration.to_dict()


def print_summary(calibration: Mapping[str, Any] | CalibrationResults) -> None:
    """The coverage table and the warnings on stdout (``plateaufit calibrate``)."""
    cal = (calibration if isinstance(calibration, CalibrationResults)
           else CalibrationResults.from_dict(calibration))
    print(f"calibration on {cal.n_replicas} replicas (seed {cal.seed}"
          + (f", {cal.n_failed} failed" if cal.n_failed else "") + "):")
    print(coverage_table(cal))
    for message in cal.warnings:
        print(f"warning: {message}")
    if not cal.warnings:
        print("no calibration warnings: every coverage lies inside its binomial band")
    print(f"calibration written to {Path(cal.output_dir) / 'calibration.json'}")
