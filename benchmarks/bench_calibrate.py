"""``plateaufit calibrate`` on a single-fit spec: 200 replicas of 8000 configurations.

The invented one-state cosh ensemble of tests/calibration_ensembles.py (T = 32,
tau_int = 4.5 on every timeslice, one stream), a 6-point range, binning.size
auto, the default covariance. ``calibrate_spec`` end to end (the run on the
data, the noise model, 200 replicas on the executor, the summary, the outputs
with plots), without the remedy variants (they run only when a coverage fails,
each costing another round of replicas). Target: under 2 minutes with
``--jobs 2`` on this 2-core machine. Reported beside the time: the coverage it
measured, and the time per replica (in a worker).
"""

from __future__ import annotations

import sys
import tempfile
import time
from pathlib import Path

TARGETS = {"CAL.seconds": 120.0}
N_CONFIGS = 8000
N_REPLICAS = 200

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))


def workload_calibrate(jobs: int = 2) -> dict:
    from calibration_ensembles import single_state, write_spec

    from plateaufit.pipeline.calibrate import calibrate_spec

    with tempfile.TemporaryDirectory() as tmp:
        spec = write_spec(Path(tmp) / "spec", single_state(8, N_CONFIGS), tmin=6, tmax=11)
        start = time.perf_counter()
        cal = calibrate_spec(spec, N_REPLICAS, Path(tmp) / "out", seed=1, jobs=jobs,
                             variants=False, progress=False)
        seconds = time.perf_counter() - start
    e0 = cal["fits"]["meson"]["params"]["E0"]
    return {"seconds": seconds, "jobs": jobs, "n_configs": N_CONFIGS, "n_replicas": N_REPLICAS,
            "timing": cal["timing"], "coverage_1sigma": e0["coverage_1sigma"],
            "coverage_1sigma_error": e0["coverage_1sigma_error"],
            "coverage_2sigma": e0["coverage_2sigma"],
            "scatter_over_error": e0["scatter_over_error"],
            "ks_p_value": cal["fits"]["meson"]["p_values"]["ks_p_value"],
            "n_failed": cal["n_failed"]}


def print_calibrate(res: dict, line: str) -> None:
    from common import verdict

    c = res.get("CAL")
    if not c:
        return
    print(f"{'calibrate':<46}{'value':>14}  {'target':>8}  ")
    name = f"{c['n_replicas']} replicas x {c['n_configs']} cfg, --jobs {c['jobs']}"
    print(f"{name:<46}{c['seconds']:>12.1f} s  {'< 120 s':>8}  "
          + verdict(c["seconds"], TARGETS["CAL.seconds"]))
    t = c["timing"]
    print(f"  run on the data {t['base_seconds']:.2f} s; replicas {t['replicas_seconds']:.1f} s "
          f"({t['per_replica_seconds']:.3f} s each in a worker); the rest is outputs and plots")
    print(f"  E0 coverage 1 sigma {c['coverage_1sigma']:.3f} +- {c['coverage_1sigma_error']:.3f}, "
          f"2 sigma {c['coverage_2sigma']:.3f}, scatter/error {c['scatter_over_error']:.2f}, "
          f"p-values KS p {c['ks_p_value']:.2g}, failed {c['n_failed']}")
    print(line)


if __name__ == "__main__":
    sys.path.insert(0, str(Path(__file__).resolve().parent))
    print_calibrate({"CAL": workload_calibrate()}, "-" * 78)
