"""An invented ensemble and spec for the tests of parallel runs.

The ensemble ``osprey-t32`` is fictional: T = 32, one Monte Carlo stream, one
periodic correlator ``sigma`` (text file) made of three states with a known
truth, E = 0.31, 0.78, 1.40 and A = 1.2, 0.8, 0.5, and multiplicative noise
correlated between neighbouring timeslices, generated with a fixed seed.

:func:`write_run` writes the data and a spec whose scan (``tmin`` x ``tmax`` x
``states``) is as long as the test needs: a wide scan takes several seconds on
two workers, a narrow one well under a second. The helpers below it find
the worker processes of a run (with psutil) and wait for them to end.
"""

from __future__ import annotations

import sys
import time
from pathlib import Path
from typing import Any

import numpy as np
import yaml

SEED = 32_0917
T = 32
#: the invented truth: (energy, amplitude) of each state
STATES = ((0.31, 1.2), (0.78, 0.8), (1.40, 0.5))


def invented_sigma(n_cfg: int, seed: int = SEED) -> np.ndarray:
    """``(n_cfg, T)``: sum of cosh states times ``1 + 0.01 eta``, ``eta`` smooth in t."""
    rng = np.random.default_rng(seed)
    t = np.arange(T)
    truth = sum(a * (np.exp(-e * t) + np.exp(-e * (T - t))) for e, a in STATES)
    white = rng.standard_normal((n_cfg, T + 2))
    eta = (white[:, :-2] + white[:, 1:-1] + white[:, 2:]) / np.sqrt(3.0)
    return truth * (1.0 + 0.01 * eta)


def write_run(directory: Path, *, n_cfg: int = 200, tmin: list[int] | int = (2, 4),
              tmax: list[int] | int = 12, states: list[int] | int = 1,
              per_sample: bool = False, values: np.ndarray | None = None,
              name: str = "spec.yaml") -> Path:
    """Write ``sigma.txt`` and a spec scanning ``tmin`` x ``tmax`` x ``states``.

    ``values`` replaces the invented data (to make a data set that fails in a
    refit). Plots are off; results go to ``directory/results``. Returns the
    spec's path.
    """
    directory.mkdir(parents=True, exist_ok=True)
    data = invented_sigma(n_cfg) if values is None else values
    np.savetxt(directory / "sigma.txt", data, fmt="%.12e",
               header="invented correlator sigma of the osprey-t32 ensemble")
    spec: dict[str, Any] = {
        "ensemble": {"name": "osprey-t32", "time_extent": T},
        "observables": {"sigma": {"file": "sigma.txt", "boundary": "periodic"}},
        "binning": {"size": 1},
        "covariance": {"shrinkage": "ledoit-wolf", "target": "diagonal",
                       "per_sample": per_sample},
        "fits": [{"name": "sigma", "observables": ["sigma"], "model": "cosh",
                  "states": list(states) if not isinstance(states, int) else states,
                  "tmin": list(tmin) if not isinstance(tmin, int) else tmin,
                  "tmax": list(tmax) if not isinstance(tmax, int) else tmax}],
        "output": {"dir": "results", "plots": False},
    }
    path = directory / name
    path.write_text(yaml.safe_dump(spec, sort_keys=False))
    return path


def data_failing_in_a_refit(n_cfg: int = 60) -> np.ndarray:
    """Invented data whose central fits work but whose per-sample refits cannot:
    timeslice 5 (and its periodic partner T - 5) is the same on every
    configuration but one, so the bins without that one are constant there."""
    values = invented_sigma(n_cfg)
    for t in (5, T - 5):
        values[:, t] = values[0, t]
        values[3, t] *= 1.001
    return values


# --------------------------------------------------------------------------- processes


def cli(*args: str) -> list[str]:
    """The command line of ``plateaufit ARGS`` in this interpreter."""
    return [sys.executable, "-m", "plateaufit", *args]


def _cmdline(proc: Any) -> str:
    import psutil

    try:
        return " ".join(proc.cmdline())
    except psutil.Error:
        return ""


def spawn_workers(proc: Any) -> list[Any]:
    """The multiprocessing (spawn) worker processes below ``proc`` (a psutil.Process)."""
    import psutil

    try:
        children = proc.children(recursive=True)
    except psutil.Error:
        return []
    return [c for c in children if "spawn_main" in _cmdline(c)]


def running(procs: list[Any]) -> list[Any]:
    """Those of ``procs`` still running (a zombie has ended: it only waits to be reaped)."""
    import psutil

    alive = []
    for p in procs:
        try:
            if p.status() != psutil.STATUS_ZOMBIE:
                alive.append(p)
        except psutil.Error:
            pass
    return alive


def wait_until_gone(procs: list[Any], timeout: float) -> tuple[list[Any], float]:
    """Wait up to ``timeout`` s for ``procs`` to end; return those still running
    and the seconds waited."""
    start = time.monotonic()
    left = running(procs)
    while left and time.monotonic() - start < timeout:
        time.sleep(0.01)
        left = running(left)
    return left, time.monotonic() - start


def wait_for_workers(proc: Any, count: int, popen: Any, timeout: float = 120.0) -> list[Any]:
    """Wait until ``proc`` has ``count`` spawn workers (or ``popen`` ended); return them."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline and popen.poll() is None:
        workers = spawn_workers(proc)
        if len(workers) >= count:
            return workers
        time.sleep(0.02)
    raise AssertionError(f"the run never had {count} worker processes "
                         f"(exit status {popen.poll()})")


def busy_solves(n_solves: int) -> int:
    """A long computation for a worker: ``n_solves`` small linear solves (about
    10 microseconds each); returns the process id."""
    import os

    rng = np.random.default_rng(n_solves)
    a = rng.normal(size=(12, 12)) + 6.0 * np.eye(12)
    b = rng.normal(size=12)
    for _ in range(n_solves):
        b = np.linalg.solve(a, b) + 1.0
    return os.getpid()


def worker_pid(item: int) -> int:
    """The process id of the worker running the task."""
    import os

    return os.getpid()
