"""``plateaufit fit``: from a spec to written results, each step once.

:func:`run_spec` validates the spec, loads the data, prepares it
(:mod:`~plateaufit.pipeline.prepare`: tau_int, bins), runs every fit
(:mod:`~plateaufit.pipeline.fits`), the derived quantities
(:mod:`~plateaufit.pipeline.derived`) and the warnings table
(:mod:`~plateaufit.pipeline.warnings`), and writes results.json, the tables, the
log, and (optionally) the plots and the report page. Nothing is written until
all fitting is done, every file is written atomically, and results.json is
written last, so its presence means a complete run.
"""

from __future__ import annotations

import datetime as _dt
import json
import os
import platform
import sys
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from plateaufit import __version__
from plateaufit.atomic import write_text
from plateaufit.data.ensemble import Ensemble
from plateaufit.errors import DataError
from plateaufit.parallel import make_executor
from plateaufit.pipeline.derived import derive
from plateaufit.pipeline.fits import n_scan_points, run_fit
from plateaufit.pipeline.inputs import data_checksums, file_sha256, load_ensemble
from plateaufit.pipeline.matrices import GevpSolutions, log_matrices, solve_all, summarise_matrices
from plateaufit.pipeline.prepare import Prepared, ensemble_result, prepare
from plateaufit.pipeline.results import FitResult, Results
from plateaufit.pipeline.rules import as_spec
from plateaufit.pipeline.warnings import excluded_reasons, with_warnings
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
        log.info(f"{name}: tau_int (1/2 + sum rho convention) = {r.tau:.2f} "
                 f"+- {r.error:.2f} at t = {t}, window {r.window}")
    if prepared.automatic:
        largest = max(float(np.nanmax([r.tau for r in res])) for res in prepared.taus.values())
        log.info(f"bin size {prepared.bin_size} chosen automatically from the largest tau_int "
                 f"({largest:.2f})")
    if prepared.n_dropped:
        log.info(f"binning: {prepared.n_dropped} configuration(s) at stream ends dropped")
    log.info(f"{prepared.ensemble.n_configs} configurations in {len(prepared.stream_sizes)} "
             f"stream(s) -> {prepared.n_bins} bins of {prepared.bin_size}")


def _log_fit(log: RunLog, fit: FitResult) -> None:
    params = fit.chosen.params
    first = "E0" if "E0" in params else next(iter(params))   # a formula has its own names
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
                 effective_masses: bool = True) -> Results:
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
                                 solutions=solutions, effective_masses=effective_masses)
        _log_fit(log, fits[fit.name])
    matrices = summarise_matrices(spec, solutions, fits)
    log_matrices(log.info, matrices)
    derived = derive(spec, fits)
    for name, d in derived.items():
        e = d.estimate
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


def _write_outputs(results: Results, data: dict[str, Any], out_dir: Path, plots: bool,
                   log: RunLog) -> None:
    """Tables, plots and page first; results.json last (its presence means complete)."""
    from plateaufit.report.tables import write_tables

    write_tables(results, out_dir)
    if plots:
        from plateaufit.report.html import write_report
        from plateaufit.report.plots import make_all_plots

        page = write_report(results, out_dir, figures=make_all_plots(results, out_dir))
        log.info(f"report page: {page}")
    write_text(out_dir / "run.log", "\n".join(log.lines) + "\n")
    write_text(out_dir / "results.json", json.dumps(data, indent=1, allow_nan=False) + "\n")


def run_spec(source: str | os.PathLike[str] | Spec | Mapping[str, Any],
             out: str | os.PathLike[str] | None = None, *, plots: bool = True,
             jobs: int | None = None, scheduler: str | None = None, progress: bool = True,
             echo: bool = False, base_dir: str | os.PathLike[str] | None = None
             ) -> dict[str, Any]:
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
    out_dir = Path(out) if out is not None else spec.output_dir
    plots = plots and spec.output.plots
    _check_output_dir(out_dir, "--out" if out is not None else "output.dir")
    log = RunLog(echo=echo)
    log.info(f"plateaufit {__version__}: {spec.path if spec.path is not None else '(in memory)'}")
    with make_executor(jobs=jobs, scheduler=scheduler) as executor:
        results = run_analysis(spec, executor=executor, progress=progress, log=log,
                               out_dir=out_dir, spec_path=spec.path)
    data = results.to_dict()
    _write_outputs(results, data, out_dir, plots, log)
    return data
