"""Command-line entry point: ``plateaufit check|fit|demo|report``.

The command line only parses arguments and dispatches; every piece of work
lives in the modules it calls. User errors (:class:`~plateaufit.errors.PlateaufitError`)
become one line on stderr and exit status 2.
"""

from __future__ import annotations

import argparse
import os
import sys
from collections.abc import Sequence

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

    p_demo = sub.add_parser("demo", help="write the invented demo data and spec, then fit them")
    p_demo.add_argument("--out", default="demo_output", help="directory for data, spec and results")
    p_demo.add_argument("--jobs", type=int, default=None, help="worker processes for scan points")
    p_demo.add_argument("--quiet", action="store_true", help="no progress bars")

    p_report = sub.add_parser("report", help="rebuild plots and the report page from results.json")
    p_report.add_argument("dir", help="an output directory holding results.json")
    return parser


def _dispatch(args: argparse.Namespace) -> int:
    if args.command == "check":
        from plateaufit.pipeline.check import check_spec

        print(check_spec(args.spec))
        return 0
    if args.command == "fit":
        from plateaufit.pipeline.run import run_spec

        results = run_spec(args.spec, args.out, plots=not args.no_plots, jobs=args.jobs,
                           scheduler=args.scheduler, progress=not args.quiet, echo=True)
        print(f"results written to {results['output']['dir']}")
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


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; return the exit status (0 ok, 2 user error)."""
    _one_blas_thread_per_process()
    args = _build_parser().parse_args(argv)
    try:
        return _dispatch(args)
    except PlateaufitError as err:
        print(f"plateaufit: error: {err}", file=sys.stderr)
        return 2
    except KeyboardInterrupt as exc:
        from plateaufit.run_folder import interruption_message

        print(f"plateaufit: interrupted; {interruption_message(exc)}", file=sys.stderr)
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
