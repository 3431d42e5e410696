"""Command-line entry point: ``plateaufit check|fit|batch|calibrate|demo|report|cache``.

The command line only parses arguments and dispatches; every piece of work
lives in the modules it calls. User errors (:class:`~plateaufit.errors.PlateaufitError`)
become one line on stderr and exit status 2.
"""

from __future__ import annotations

import argparse
import os
import signal
import sys
import threading
from collections.abc import Iterator, Sequence
from contextlib import contextmanager

from plateaufit import __version__
from plateaufit.errors import PlateaufitError


def _build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="plateaufit",
        description="Hadron energies with honest errors from lattice two-point correlators.",
    )
    parser.add_argument("--version", action="version", version=f"plateaufit {__version__}")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    p_check = sub.add_parser("check", help="validate a spec and its data; print a data summary")
    p_check.add_argument("spec", help="path to the YAML specification file")

    p_fit = sub.add_parser("fit", help="run the analysis a spec describes and write results")
    p_fit.add_argument("spec", help="path to the YAML specification file")
    p_fit.add_argument("--out", help="output directory (default: the spec's output.dir)")
    p_fit.add_argument("--jobs", type=int, default=None,
                       help="worker processes for scan points (default: all cores)")
    p_fit.add_argument("--scheduler", default=None,
                       help="address of a dask.distributed scheduler to run scan points on")
    p_fit.add_argument("--no-plots", action="store_true", help="skip plots and the report page")
    p_fit.add_argument("--quiet", action="store_true", help="no progress bars")
    _add_cache_options(p_fit)

    p_batch = sub.add_parser("batch", help="run many specs (ensembles) on one executor and "
                             "write a summary across them")
    p_batch.add_argument("specs", nargs="+", metavar="SPEC",
                         help="spec files, glob patterns ('specs/*.yaml') or list files "
                         "(one spec path per line)")
    p_batch.add_argument("--out", default=None,
                         help="batch folder for summary.csv and summary.html, each spec "
                         "then writing OUT/<spec name> (default: batch_output, each spec "
                         "into its own output.dir)")
    p_batch.add_argument("--jobs", type=int, default=None,
                         help="worker processes shared by all specs (default: all cores)")
    p_batch.add_argument("--scheduler", default=None,
                         help="address of a dask.distributed scheduler to run scan points on")
    p_batch.add_argument("--no-plots", action="store_true",
                         help="skip plots and report pages (the summary's plots too)")
    p_batch.add_argument("--quiet", action="store_true", help="no progress bar")
    _add_cache_options(p_batch)

    p_demo = sub.add_parser("demo", help="write the invented demo data and spec, then fit them")
    p_demo.add_argument("--out", default="demo_output", help="directory for data, spec and results")
    p_demo.add_argument("--jobs", type=int, default=None, help="worker processes for scan points")
    p_demo.add_argument("--quiet", action="store_true", help="no progress bars")

    p_cal = sub.add_parser("calibrate", help="measure the coverage of the spec's own errors "
                           "on synthetic replicas of its ensemble")
    p_cal.add_argument("spec", help="path to the YAML specification file")
    p_cal.add_argument("--replicas", type=int, default=200,
                       help="number of synthetic replicas (default 200)")
    p_cal.add_argument("--out", help="output directory (default: the spec's output.dir)")
    p_cal.add_argument("--seed", type=int, default=None,
                       help="seed of the replicas (default: fresh, written to calibration.json)")
    p_cal.add_argument("--truth", default=None,
                       help="YAML file of the shape of the spec's truth: key (default: the "
                       "fitted result is the replicas' truth)")
    p_cal.add_argument("--jobs", type=int, default=None,
                       help="worker processes for the replicas (default: all cores)")
    p_cal.add_argument("--scheduler", default=None,
                       help="address of a dask.distributed scheduler to run replicas on")
    p_cal.add_argument("--no-variants", action="store_true",
                       help="do not rerun the replicas with remedies when coverage fails")
    p_cal.add_argument("--no-plots", action="store_true", help="skip plots and the report page")
    p_cal.add_argument("--quiet", action="store_true", help="no progress bars")

    p_report = sub.add_parser("report", help="rebuild plots and the report page from results.json")
    p_report.add_argument("dir", help="an output directory holding results.json")

    p_cache = sub.add_parser("cache", help="show the size of a fit cache, or clear it")
    p_cache.add_argument("dir", help="an output directory (its .plateaufit-cache) or a cache "
                         "folder given to --cache")
    what = p_cache.add_mutually_exclusive_group()
    what.add_argument("--size", action="store_true", help="entries and bytes (the default)")
    what.add_argument("--clear", action="store_true", help="remove every entry")
    return parser


def _add_cache_options(p: argparse.ArgumentParser) -> None:
    group = p.add_mutually_exclusive_group()
    group.add_argument("--cache", metavar="DIR", default=None,
                       help="fit cache folder, e.g. one shared between specs "
                       "(default: OUT/.plateaufit-cache)")
    group.add_argument("--no-cache", action="store_true",
                       help="neither read nor write the fit cache")


def _cache_choice(args: argparse.Namespace) -> bool | str:
    return False if args.no_cache else (args.cache if args.cache is not None else True)


def _size_text(n_bytes: int) -> str:
    for unit in ("bytes", "KiB", "MiB", "GiB"):
        if n_bytes < 1024 or unit == "GiB":
            return f"{n_bytes:.0f} {unit}" if unit == "bytes" else f"{n_bytes:.1f} {unit}"
        n_bytes /= 1024
    raise AssertionError("unreachable")


def _dispatch(args: argparse.Namespace) -> int:
    if args.command == "check":
        from plateaufit.pipeline.check import check_spec

        print(check_spec(args.spec))
        return 0
    if args.command == "fit":
        from plateaufit.pipeline.run import run_spec

        results = run_spec(args.spec, args.out, plots=not args.no_plots, jobs=args.jobs,
                           scheduler=args.scheduler, progress=not args.quiet, echo=True,
                           cache=_cache_choice(args))
        print(f"results written to {results['output']['dir']}")
        return 0
    if args.command == "batch":
        from plateaufit.pipeline.batch import run_batch

        run = run_batch(args.specs, args.out, jobs=args.jobs, scheduler=args.scheduler,
                        cache=_cache_choice(args), plots=not args.no_plots,
                        progress=not args.quiet, echo=True)
        print(f"summary of {len(run.items)} spec(s) written to {run.folder / 'summary.html'} "
              f"({run.seconds:.1f} s)")
        for item in run.failed:
            print(f"plateaufit: error: {item.spec}: {item.error}", file=sys.stderr)
        if run.failed:
            print(f"plateaufit: error: {len(run.failed)} of {len(run.items)} spec(s) failed; "
                  "the others' results and the summary were written", file=sys.stderr)
            return 2
        return 0
    if args.command == "cache":
        from plateaufit.pipeline.cache import cache_size, clear_cache

        if args.clear:
            folder, n, size = clear_cache(args.dir)
            print(f"fit cache {folder}: removed {n} entr{'y' if n == 1 else 'ies'} "
                  f"({_size_text(size)})")
        else:
            folder, n, size = cache_size(args.dir)
            print(f"fit cache {folder}: {n} entr{'y' if n == 1 else 'ies'}, {_size_text(size)}")
        return 0
    if args.command == "calibrate":
        from plateaufit.pipeline.calibrate import calibrate_spec, print_summary

        calibration = calibrate_spec(args.spec, args.replicas, args.out, seed=args.seed,
                                     jobs=args.jobs, scheduler=args.scheduler, truth=args.truth,
                                     variants=not args.no_variants, plots=not args.no_plots,
                                     progress=not args.quiet, echo=True)
        print_summary(calibration)
        return 0
    if args.command == "demo":
        from plateaufit.demo import run_demo

        run_demo(args.out, jobs=args.jobs, progress=not args.quiet)
        return 0
    if args.command == "report":
        from plateaufit.report.html import rebuild_report

        page = rebuild_report(args.dir)
        print(f"report page: {page}")
        return 0
    raise AssertionError(f"unhandled command {args.command!r}")  # argparse guarantees this


#: BLAS thread pools the command line sizes to one thread unless the user set them
_BLAS_THREAD_VARIABLES = ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS")


def _one_blas_thread_per_process() -> None:
    """Give each process one BLAS thread, unless the user chose otherwise.

    The matrices of correlator fits are small (tens of timeslices), where a
    threaded BLAS only spins, and scan points already run in parallel
    processes (``--jobs``). Must run before numpy is first imported, which
    ``main`` guarantees; worker processes inherit the setting.
    """
    if "numpy" in sys.modules:   # too late to matter (e.g. main() called from Python)
        return
    for name in _BLAS_THREAD_VARIABLES:
        os.environ.setdefault(name, "1")


class _Stopped(KeyboardInterrupt):
    """A stop signal (SIGTERM, SIGHUP) turned into the Ctrl-C path.

    Raised in the main thread, so a run stops as on Ctrl-C: every ``with`` and
    ``finally`` on the way out runs (the pool's workers are terminated, files
    being written are not left half-written).
    """

    def __init__(self, signum: int) -> None:
        super().__init__(signum)
        self.signum = signum


def _raise_stopped(signum: int, frame: object) -> None:
    signal.signal(signum, signal.SIG_DFL)   # a second one ends the process at once
    raise _Stopped(signum)


#: signals that stop a run like Ctrl-C (SIGHUP: the terminal or ssh session went away)
_STOP_SIGNALS = ("SIGTERM", "SIGHUP")


@contextmanager
def _stop_signals_interrupt() -> Iterator[None]:
    """While inside, SIGTERM and SIGHUP raise :class:`_Stopped` in the main thread.

    A signal that is ignored (``nohup``) or has a handler of the caller's own
    is left alone, and the previous dispositions are restored on the way out
    (``main`` may be called from Python). Outside the main thread Python
    cannot install handlers, and nothing is changed.
    """
    saved: dict[int, object] = {}
    if threading.current_thread() is threading.main_thread():
        for name in _STOP_SIGNALS:
            signum = getattr(signal, name, None)
            if signum is not None and signal.getsignal(signum) is signal.SIG_DFL:
                saved[signum] = signal.signal(signum, _raise_stopped)
    try:
        yield
    finally:
        for signum, previous in saved.items():
            signal.signal(signum, previous)


def _interrupted(exc: KeyboardInterrupt) -> int:
    """One line on stderr for an interrupted run; the exit status 128 + signal."""
    signum = exc.signum if isinstance(exc, _Stopped) else signal.SIGINT
    name = signal.Signals(signum).name
    from plateaufit.run_folder import interruption_message   # what is on disk now

    state = interruption_message(exc)
    finished = state.startswith("the results were complete")
    print(f"plateaufit: interrupted ({name}); "
          + (state if finished else f"the run did not finish: {state}"), file=sys.stderr)
    return 128 + int(signum)


def _check_parallel_options(args: argparse.Namespace) -> None:
    """Refuse a bad --jobs, or a --scheduler nobody listens at, before any data is read."""
    from plateaufit.parallel import check_jobs, check_scheduler

    check_jobs(getattr(args, "jobs", None))
    scheduler = check_scheduler(getattr(args, "scheduler", None))
    if scheduler is not None:
        from plateaufit.dask_executor import check_reachable

        check_reachable(scheduler)


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; return the exit status.

    0 ok, 2 user error, 128 + the signal's number when interrupted (130 for
    Ctrl-C, 143 for SIGTERM, 129 for SIGHUP), 141 when the reader of the output
    went away (``plateaufit check SPEC | head``), as a shell reports SIGPIPE.
    """
    _one_blas_thread_per_process()
    args = _build_parser().parse_args(argv)
    try:
        with _stop_signals_interrupt():
            try:
                _check_parallel_options(args)
                status = _dispatch(args)
                sys.stdout.flush()     # a closed pipe shows here, not at exit
                return status
            except PlateaufitError as err:
                print(f"plateaufit: error: {err}", file=sys.stderr)
                return 2
    except KeyboardInterrupt as exc:   # reported once the signal handlers are restored
        return _interrupted(exc)
    except BrokenPipeError:
        # the pipe's reader closed early: nothing to report to anyone; point stdout
        # at /dev/null so the interpreter's final flush raises nothing either
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return 128 + 13


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
