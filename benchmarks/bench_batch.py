"""A study as a batch: 8 invented ensembles x 2 fits x 60 scan points.

The ensembles are fictional (``heron-a09m31`` ... four lattice spacings times
two pion masses): two periodic observables each (a pseudoscalar and a vector
channel, two states of known truth plus an unresolved third, noise correlated in
Euclidean time and along the chain), 400 configurations, T = 32, bin size 2
(200 jackknife samples). Each spec has two fits of 6 tmin x 5 tmax x (1, 2)
states = 60 points. Timed through :func:`plateaufit.pipeline.batch.run_batch`,
plots off:

* cold: an empty cache, 2 local workers;
* unchanged rerun: every point from the cache;
* one fit changed: one spec's vector fit given a prior (60 points refitted);
* the local pool against a dask ``LocalCluster`` (2 worker processes on
  loopback), both without cache.
"""

from __future__ import annotations

import shutil
import tempfile
import time
from pathlib import Path

import yaml

TARGETS = {"BATCH.rerun_fraction": 1.0 / 3.0}

ENSEMBLES = [(f"heron-a{a:02d}m{m}", 0.05 + 0.01 * i, 0.30 + 0.06 * j)
             for i, a in enumerate((12, 9, 7, 5)) for j, m in enumerate((31, 22))]


def write_study(root: Path, n_cfg: int = 400, time_extent: int = 32) -> list[Path]:
    import numpy as np

    from common import invented_ensemble

    specs = []
    for k, (name, spacing_shift, mass) in enumerate(ENSEMBLES):
        folder = root / name
        folder.mkdir(parents=True)
        energies = [mass, mass + 0.55, mass + 1.2]
        data = invented_ensemble(
            n_cfg, time_extent, {"pseudoscalar": [1.0, 0.5, 0.3], "vector": [0.6, 0.6, 0.4]},
            energies, noise=0.004 + spacing_shift * 0.02, tau_mc=1.5, seed=4100 + k,
            growth=0.04)
        for obs, values in data.items():
            np.savetxt(folder / f"{obs}.txt", values, fmt="%.10e",
                       header=f"invented {obs} correlator of the {name} ensemble")
        fit = {"model": "cosh", "states": [1, 2], "tmin": [3, 8], "tmax": [11, 15]}
        spec = {"ensemble": {"name": name, "time_extent": time_extent},
                "observables": {o: {"file": f"{o}.txt", "boundary": "periodic"} for o in data},
                "binning": {"size": 2},
                "fits": [dict(fit, name="pion", observables=["pseudoscalar"]),
                         dict(fit, name="rho", observables=["vector"])],
                "output": {"dir": "results", "plots": False}}
        path = folder / f"{name}.yaml"
        path.write_text(yaml.safe_dump(spec, sort_keys=False))
        specs.append(path)
    return specs


def _timed(specs, out, **kw) -> tuple[float, object]:
    from plateaufit.pipeline.batch import run_batch

    start = time.perf_counter()
    run = run_batch([str(s) for s in specs], out, plots=False, progress=False, **kw)
    assert not run.failed, [i.error for i in run.failed]
    return time.perf_counter() - start, run


def workload_batch() -> dict:
    root = Path(tempfile.mkdtemp(prefix="plateaufit-bench-batch-"))
    try:
        specs = write_study(root / "specs")
        cold, run = _timed(specs, root / "out", jobs=2)
        n_points = sum(item.n_points for item in run.items)
        rerun, run2 = _timed(specs, root / "out", jobs=2)
        assert sum(item.from_cache for item in run2.items) == n_points
        spec = yaml.safe_load(specs[3].read_text())
        spec["fits"][1]["priors"] = {"E1": [1.0, 0.5]}
        specs[3].write_text(yaml.safe_dump(spec, sort_keys=False))
        changed, run3 = _timed(specs, root / "out", jobs=2)
        refitted = n_points - sum(item.from_cache for item in run3.items)
        pool, _ = _timed(specs, root / "pool", jobs=2, cache=False)
        from dask.distributed import Client, LocalCluster

        with LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                          dashboard_address=None) as cluster, Client(cluster):
            dask, _ = _timed(specs, root / "dask", scheduler=cluster.scheduler_address,
                             cache=False)
        return {"n_specs": len(specs), "n_points": n_points, "cold_seconds": cold,
                "rerun_seconds": rerun, "changed_seconds": changed,
                "changed_points": refitted, "pool_seconds": pool, "dask_seconds": dask,
                "rerun_fraction": rerun / cold}
    finally:
        shutil.rmtree(root, ignore_errors=True)


def print_batch(res: dict, line: str) -> None:
    from common import verdict

    b = res.get("BATCH")
    if not b:
        return
    print(f"{'batch: ' + str(b['n_specs']) + ' specs, ' + str(b['n_points']) + ' points':<46}"
          f"{'value':>14}  {'target':>8}  ")
    print(f"{'cold (empty cache, 2 workers)':<46}{b['cold_seconds']:>12.2f} s")
    print(f"{'unchanged rerun (all from the cache)':<46}{b['rerun_seconds']:>12.2f} s  "
          f"{'< 1/3':>8}  " + verdict(b["rerun_fraction"], TARGETS["BATCH.rerun_fraction"]))
    print(f"{'one fit changed (' + str(b['changed_points']) + ' points refitted)':<46}"
          f"{b['changed_seconds']:>12.2f} s")
    print(f"{'local pool, no cache (--jobs 2)':<46}{b['pool_seconds']:>12.2f} s")
    print(f"{'LocalCluster, 2 workers, no cache':<46}{b['dask_seconds']:>12.2f} s")
    print(line)


if __name__ == "__main__":
    import json
    import sys

    sys.path.insert(0, str(Path(__file__).parent))
    print(json.dumps(workload_batch(), indent=2))
