"""``plateaufit fit``: from a spec to written results, each step once.

:func:`run_spec` validates the spec, loads the data, prepares it
(:mod:`~plateaufit.pipeline.prepare`: tau_int, bins), runs every fit
(:mod:`~plateaufit.pipeline.fits`), the derived quantities
(:mod:`~plateaufit.pipeline.derived`) and the warnings table
(:mod:`~plateaufit.pipeline.warnings`), and writes results.json, the tables, the
log, and (optionally) the plots and the report page. Before any fitting the
output folder is checked (:meth:`~plateaufit.run_folder.RunFolder.preflight`:
no output over an input, writable, with room); nothing is written until all
fitting is done; then every file goes into a staging folder and is moved into
place with results.json last (:mod:`plateaufit.run_folder`), so its presence
means a complete run, and an interruption leaves either the folder as it was or
one marked incomplete (never one that looks complete but mixes two runs). What
escapes :func:`run_spec` carries the folder's state
(:func:`plateaufit.run_folder.folder_state`).
"""

from __future__ import annotations

import datetime as _dt
import os
import platform
import sys
from collections.abc import Mapping
from contextlib import nullcontext
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from plateaufit import __version__
from plateaufit.data.ensemble import Ensemble
from plateaufit.parallel import Executor, make_executor
from plateaufit.pipeline.cache import CacheSession, FitCache, default_cache_root
from plateaufit.pipeline.derived import derive
from plateaufit.pipeline.fits import n_scan_points, run_fit
from plateaufit.pipeline.inputs import data_checksums, file_sha256, load_ensemble
from plateaufit.pipeline.matrices import GevpSolutions, log_matrices, solve_all, summarise_matrices
from plateaufit.pipeline.output import output_folder, output_names, write_outputs
from plateaufit.pipeline.prepare import (Prepared, ensemble_result, prepare, tau_estimable,
                                         tau_text)
from plateaufit.pipeline.results import FitResult, Results
from plateaufit.pipeline.rules import as_spec
from plateaufit.pipeline.warnings import excluded_reasons, with_warnings
from plateaufit.run_folder import COMPLETION, FolderState, FolderStatus, folder_state
from plateaufit.specfile import Spec

__all__ = ["run_spec", "run_analysis", "RunLog"]


@dataclass
class RunLog:
    """Lines for run.log (echoed to stderr as the run goes when ``echo``)."""

    echo: bool = False
    lines: list[str] = field(default_factory=list)

    def info(self, message: str) -> None:
        self.lines.append(message)
        if self.echo:
            print(message, file=sys.stderr)

    def detail(self, message: str) -> None:
        """A line for run.log only, never echoed (each flagged point, each warning text)."""
        self.lines.append(message)


def _log_prepared(log: RunLog, prepared: Prepared) -> None:
    for name in prepared.ensemble.correlators:
        t, r = prepared.largest_tau(name)
        if tau_estimable(r):
            log.info(f"{name}: tau_int (1/2 + sum rho convention) = {tau_text(r)} at t = {t}, "
                     f"window {r.window}")
        else:
            log.info(f"{name}: tau_int (1/2 + sum rho convention) not estimable at any "
                     "timeslice (too few configurations)")
    if prepared.automatic:
        largest = max(prepared.largest_tau(name)[1].tau for name in prepared.taus)
        log.info(f"bin size {prepared.bin_size} chosen automatically from the largest tau_int "
                 f"({largest:.2f})")
    if prepared.n_dropped:
        log.info(f"binning: {prepared.n_dropped} configuration(s) at stream ends dropped")
    log.info(f"{prepared.ensemble.n_configs} configurations in {len(prepared.stream_sizes)} "
             f"stream(s) -> {prepared.n_bins} bins of {prepared.bin_size}")
    if prepared.binning_correction > 1.0:
        log.info(f"binning correction: bins scaled by {prepared.binning_correction:.3f} about "
                 "their mean for the autocorrelation left between bins (binning.correction)")


def _log_fit(log: RunLog, fit: FitResult) -> None:
    params = fit.chosen.params
    first = "E0" if "E0" in params else next(iter(params))   # a formula has its own names
    if first in fit.chosen.withheld:
        log.info(f"fit {fit.name}: no result: the chosen fit is not a fit (its values are "
                 "withheld; see the warning)")
    else:
        log.info(f"fit {fit.name}: {first} = {params[first].value:.6g} +- "
                 f"{params[first].error:.2g} ({fit.chosen.method})")
    if fit.chosen.n_excluded:
        shown = ", ".join(f"{code} {n}" for code, n in sorted(excluded_reasons(fit).items()))
        log.info(f"fit {fit.name}: {fit.chosen.n_excluded} of {len(fit.scan)} scan points given "
                 f"weight 0 ({shown}); run.log lists each with its reason")
    n_numerical = sum(p.n_numerical_warnings for p in fit.scan)
    if n_numerical:   # one line on the terminal per fit, the texts in run.log only
        log.info(f"fit {fit.name}: {n_numerical} numerical warning(s) from numpy/scipy/lmfit "
                 "caught inside the fits (expected while a minimiser explores a steep or flat "
                 "region); run.log has the messages")
    for point in fit.scan:
        if point.flags:
            reasons = "; ".join(point.flag_messages) or ", ".join(point.flags)
            log.detail(f"fit {fit.name}: flagged {point.label} [{', '.join(point.flags)}]: "
                       f"{reasons}")
        for text in point.numerical_warnings:
            log.detail(f"fit {fit.name}: {point.label}: numerical warning: {text}")


def run_analysis(spec: Spec, *, executor: Any = None, progress: bool = False,
                 log: RunLog | None = None, out_dir: str | os.PathLike[str] | None = None,
                 spec_path: Path | None = None, ensemble: Ensemble | None = None,
                 effective_masses: bool = True, cache: CacheSession | None = None) -> Results:
    """Everything ``plateaufit fit`` computes, as typed results; writes nothing.

    Parameters
    ----------
    spec : Spec
        A validated spec (:func:`plateaufit.pipeline.load_spec`).
    executor : Executor, optional
        Runs the scan points (default serial).
    progress : bool
        Progress bars (only on a terminal).
    log : RunLog, optional
        Receives the log lines.
    out_dir, spec_path : optional
        Recorded in the results (``output.dir``, provenance).
    ensemble : Ensemble, optional
        Analyse these aligned, folded data instead of loading the spec's files
        (``plateaufit calibrate`` runs its replicas so, never touching the
        disk); the provenance then has no data checksums.
    effective_masses : bool
        The fits' (display-only) effective masses; the replicas skip them.
    cache : CacheSession, optional
        A fit cache (:meth:`plateaufit.pipeline.cache.FitCache.session`): scan
        points found there are not fitted again; the others are stored.

    Returns
    -------
    Results
        With the warnings table filled in.
    """
    log = log if log is not None else RunLog()
    in_memory = ensemble is not None
    ensemble = ensemble if in_memory else load_ensemble(spec)
    prepared = prepare(spec, ensemble)
    _log_prepared(log, prepared)
    solutions = GevpSolutions(spec, prepared)
    solve_all(spec, solutions)           # a C(t0) that is not positive definite stops here
    fits: dict[str, FitResult] = {}
    for index, fit in enumerate(spec.fits):
        log.info(f"fit {fit.name}: {n_scan_points(spec, fit)} fit range(s) x state count(s), "
                 f"{prepared.n_bins} jackknife samples each")
        fits[fit.name] = run_fit(spec, index, prepared, executor=executor, progress=progress,
                                 solutions=solutions, effective_masses=effective_masses,
                                 cache=cache)
        _log_fit(log, fits[fit.name])
    if cache is not None:
        for note in cache.notes:
            log.info(note)
        log.info(f"fit cache: {cache.hits} of {cache.hits + cache.misses} scan point(s) from "
                 f"the cache, {cache.misses} fitted ({cache.store.root})")
    matrices = summarise_matrices(spec, solutions, fits)
    log_matrices(log.info, matrices)
    derived = derive(spec, fits)
    for name, d in derived.items():
        e = d.estimate
        if d.withheld_inputs:
            log.info(f"derived {name} = {d.expression}: not computed ("
                     f"{', '.join(d.withheld_inputs)} withheld)")
            continue
        log.info(f"derived {name} = {d.expression}: {e.value:.6g} +- {e.error:.2g} "
                 f"(stat {e.stat_error:.2g}, sys {e.sys_error:.2g})")
    provenance: dict[str, Any] = {
        "version": __version__,
        "spec": str(spec_path if spec_path is not None else spec.path or ""),
        "data_sha256": {} if in_memory else data_checksums(spec),
        "seeds": {},
        "created": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        "python": platform.python_version(),
        "numpy": np.__version__,
    }
    source = spec_path if spec_path is not None else spec.path
    provenance["spec_sha256"] = file_sha256(source) if source is not None else None
    provenance = {k: provenance[k] for k in ("version", "spec", "spec_sha256", "data_sha256",
                                             "seeds", "created", "python", "numpy")}
    results = Results(
        version=__version__, output_dir=str(out_dir if out_dir is not None else spec.output_dir),
        ensemble=ensemble_result(prepared), fits=fits, derived=derived,
        truth={name: dict(values) for name, values in spec.truth.items()},
        provenance=provenance, matrices=matrices)
    results = with_warnings(results)
    for w in results.warnings:
        log.info(f"warning: {w.message}")
    return results


def run_spec(source: str | os.PathLike[str] | Spec | Mapping[str, Any],
             out: str | os.PathLike[str] | None = None, *, plots: bool = True,
             jobs: int | None = None, scheduler: str | None = None, progress: Any = True,
             echo: bool = False, base_dir: str | os.PathLike[str] | None = None,
             cache: bool | str | os.PathLike[str] = True, executor: Executor | None = None,
             session: list[CacheSession] | None = None) -> dict[str, Any]:
    """Run the analysis a specification describes and write its results.

    Parameters
    ----------
    source : path, Spec or dict
        The YAML specification file, a validated :class:`~plateaufit.specfile.Spec`,
        or a dict as the YAML would give (relative paths against ``base_dir``,
        default the current directory).
    out : path, optional
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
    base_dir : path, optional
        For a dict ``source``: the directory relative paths are resolved against.
    cache : bool or path
        The fit cache (:mod:`plateaufit.pipeline.cache`): ``True`` (default)
        ``OUT/.plateaufit-cache``, a path for a cache shared between specs,
        ``False`` neither read nor written. Results are the same bit for bit.
    executor : Executor, optional
        An open executor to run the scan points on (a batch shares one);
        ``jobs`` and ``scheduler`` are then ignored.
    session : list, optional
        Receives the run's :class:`~plateaufit.pipeline.cache.CacheSession`
        (what came from the cache), when there is a cache.

    Returns
    -------
    dict
        The same structure as results.json (``Results.to_dict()``).

    Raises
    ------
    SpecError, DataError, FitError
        For user errors; each names the spec key path or file.
    """
    spec = as_spec(source, base_dir=base_dir)
    folder = output_folder(spec, out)
    plots = plots and spec.output.plots
    try:
        # before any fitting: outputs clear of the inputs, the folder writable, with room
        folder.preflight(output_names(spec, plots=plots), plots=plots)
        log = RunLog(echo=echo)
        log.info(f"plateaufit {__version__}: "
                 f"{spec.path if spec.path is not None else '(in memory)'}")
        store = None
        if cache is not False:
            store = FitCache(default_cache_root(folder.path) if cache is True else Path(cache))
        tally = store.session() if store is not None else None
        if tally is not None and session is not None:
            session.append(tally)
        with (nullcontext(executor) if executor is not None
              else make_executor(jobs=jobs, scheduler=scheduler)) as running:
            results = run_analysis(spec, executor=running, progress=progress, log=log,
                                   out_dir=folder.path, spec_path=spec.path, cache=tally)
        data = results.to_dict()
        if plots:
            log.info(f"report page: {folder.path / 'report.html'}")
        with folder.writing() as staging:
            write_outputs(results, data, staging, plots=plots, log_lines=log.lines)
    except BaseException as exc:
        if folder_state(exc) is None:   # it never reached the folder: nothing there changed
            exc.plateaufit_folder = FolderStatus(  # type: ignore[attr-defined]
                folder.path, FolderState.UNCHANGED, (folder.path / COMPLETION).is_file())
        raise
    removed = folder.report.removed
    if removed:
        log.info(f"removed {len(removed)} file(s) of an earlier run that this run did not "
                 f"write again ({', '.join(removed[:5])}{', ...' if len(removed) > 5 else ''})")
    for rel in folder.report.kept_changed:
        log.info(f"kept {folder.path / rel}: an earlier run wrote it, but it was changed since")
    return data
