"""Speed and memory benchmarks (``make bench``); not part of the tests.

Prints a table per workload and writes ``benchmarks/output/latest.json``.
The workloads live in their own modules:

* ``bench_scans.py`` -- A (the scan workload), B (a large simultaneous fit),
  C (precise data, an excited state invisible at large tmin, no prior vs a
  prior), each end to end with the lmfit loop measured beside it;
* ``bench_gevp.py`` -- the variational method on a 4 x 4 matrix;
* ``bench_calibrate.py`` -- ``plateaufit calibrate``: 200 replicas of a single-fit
  spec with 8000 configurations (target under 2 minutes with --jobs 2);
* ``bench_batch.py`` -- ``plateaufit batch`` of 8 ensembles x 2 fits x 60 points:
  cold, unchanged rerun (target under a third of cold), one fit changed, and
  the local pool against a dask LocalCluster (run once, not in the variants);
* ``bench_replicas.py`` -- synthetic replicas and the Gamma-method covariance
  (run on its own: ``.venv/bin/python benchmarks/bench_replicas.py``).

By default the benchmark runs twice: in this process with the environment as
given, and in a subprocess with OPENBLAS_NUM_THREADS=1 (and, when they are
set, once more without OPENBLAS_CORETYPE / OPENBLAS_L2_SIZE): multi-threaded
OpenBLAS calls on small matrices can be very slow on a busy machine, and the
figures show by how much. The machine may be shared: the load average is
printed at the start and the end of each run; figures move by +-30% with it.

Options: ``--quick`` (smaller lmfit subset), ``--skip-b``, ``--no-variants``
(only the run as given), ``--profile`` (cProfile of workload A's scan, top
entries printed), ``--only {a,b,c,gevp,calibrate,batch}`` (one workload).
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

from bench_batch import TARGETS as BATCH_TARGETS  # noqa: E402
from bench_batch import print_batch, workload_batch  # noqa: E402
from bench_calibrate import TARGETS as CAL_TARGETS  # noqa: E402
from bench_calibrate import print_calibrate, workload_calibrate  # noqa: E402
from bench_gevp import TARGETS as GEVP_TARGETS  # noqa: E402
from bench_gevp import print_gevp, workload_gevp  # noqa: E402
from bench_scans import TARGETS as SCAN_TARGETS  # noqa: E402
from bench_scans import print_scans, workload_a, workload_b, workload_c  # noqa: E402
from common import environment, load_average  # noqa: E402

OUTPUT = HERE / "output" / "latest.json"
TARGETS = {**SCAN_TARGETS, **GEVP_TARGETS, **CAL_TARGETS, **BATCH_TARGETS}


def print_report(res: dict) -> None:
    line = "-" * 78
    print(line)
    env = res["environment"]
    end = env.get("load_average_end")
    print(f"plateaufit benchmarks -- {env['label']} (load average "
          f"{env['load_average'][0]:.1f} on {env['cpus']} CPUs at the start"
          + (f", {end[0]:.1f} at the end)" if end else ")"))
    print(line)
    print_scans(res, line)
    print_gevp(res, line)
    print_calibrate(res, line)
    print_batch(res, line)
    print("(stage times overlap: 'refits: total' contains 'refits: batched engine'; the "
          "central fits contain their starting points.)")


def run_all(args) -> dict:
    res = {"environment": environment(args.label)}
    only = getattr(args, "only", None)
    if only in (None, "a"):
        res["A"] = workload_a(2 if args.quick else 5, args.profile)
    if only == "b" or (only is None and not args.skip_b):
        res["B"] = workload_b()
    if only in (None, "c"):
        res["C"] = workload_c(2 if args.quick else 4)
    if only in (None, "gevp"):
        res["GEVP"] = workload_gevp()
    if only in (None, "calibrate"):
        res["CAL"] = workload_calibrate()
    if only in (None, "batch") and not getattr(args, "child", False):
        res["BATCH"] = workload_batch()
    # the machine may be shared: the load at the end tells whether it changed
    res["environment"]["load_average_end"] = load_average()
    return res


def blas_variants(argv: list[str]) -> list[tuple[str, dict]]:
    variants = []
    if os.environ.get("OPENBLAS_NUM_THREADS") != "1":
        variants.append(("OPENBLAS_NUM_THREADS=1", {"OPENBLAS_NUM_THREADS": "1"}))
    if os.environ.get("OPENBLAS_CORETYPE") or os.environ.get("OPENBLAS_L2_SIZE"):
        variants.append(("without OPENBLAS_CORETYPE/L2_SIZE",
                         {"OPENBLAS_CORETYPE": None, "OPENBLAS_L2_SIZE": None}))
    out = []
    for label, change in variants:
        env = dict(os.environ)
        for k, v in change.items():
            if v is None:
                env.pop(k, None)
            else:
                env[k] = v
        cmd = [sys.executable, str(Path(__file__).resolve()), "--child", "--label", label]
        cmd += [a for a in argv if a in ("--quick", "--skip-b")]
        if "--only" in argv:
            cmd += argv[argv.index("--only"):argv.index("--only") + 2]
        cmd += [a for a in argv if a.startswith("--only=")]
        proc = subprocess.run(cmd, env=env, capture_output=True, text=True, check=True)
        out.append((label, json.loads(proc.stdout.strip().splitlines()[-1])))
    return out


def main(argv: list[str] | None = None) -> int:
    argv = sys.argv[1:] if argv is None else argv
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="smaller lmfit subset")
    parser.add_argument("--skip-b", action="store_true", help="only workload A")
    parser.add_argument("--profile", action="store_true", help="cProfile workload A's scan")
    parser.add_argument("--no-variants", action="store_true",
                        help="do not repeat the run with other OpenBLAS settings")
    parser.add_argument("--only", choices=("a", "b", "c", "gevp", "calibrate", "batch"), default=None,
                        help="run one workload only")
    parser.add_argument("--label", default="environment as given")
    parser.add_argument("--child", action="store_true", help=argparse.SUPPRESS)
    args = parser.parse_args(argv)

    res = run_all(args)
    if args.child:   # a variant run: hand the figures to the parent as one JSON line
        res.get("A", {}).pop("profile", None)
        print(json.dumps(res, default=float))
        return 0
    print_report(res)
    if args.profile and res.get("A", {}).get("profile"):
        print("cProfile of workload A's scan (top entries):")
        print(res["A"]["profile"])
    runs = [res]
    if not args.no_variants:
        for label, other in blas_variants(argv):
            print_report(other)
            runs.append(other)
    from plateaufit.atomic import write_text

    for r in runs:
        if "A" in r:
            r["A"].pop("profile", None)
    # a single workload does not overwrite the full run's figures
    out = OUTPUT if args.only is None else OUTPUT.with_name(f"latest_{args.only}.json")
    write_text(out, json.dumps({"runs": runs, "targets": TARGETS}, indent=2, default=float))
    print(f"wrote {out.relative_to(HERE.parent)}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
