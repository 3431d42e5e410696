"""Local worker processes: how many are started, and that none outlives its run.

The process checks use psutil (a test dependency). A check that starts a run
in a subprocess kills whatever it leaves behind by process id, so a failing
test leaves nothing computing.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import textwrap
import threading
import time
from pathlib import Path

import pytest

import plateaufit.parallel as parallel
from parallel_fixtures import (busy_solves, cli, running, spawn_workers, wait_for_workers,
                               wait_until_gone, worker_pid, write_run)
from plateaufit.parallel import ProcessExecutor, SerialExecutor, make_executor, usable_cpus

psutil = pytest.importorskip("psutil")

TESTS = Path(__file__).resolve().parent
#: solves that keep a worker busy for about a minute (it is always stopped long before)
FOREVER = 2_500_000


def _kill_leftovers(procs):
    for p in running(procs):
        try:
            p.kill()
        except psutil.Error:
            pass


# --------------------------------------------------------------------------- how many


def test_jobs_are_capped_at_the_cpus_this_process_may_use():
    ex = make_executor(1000)
    assert ex.n_workers == usable_cpus()
    assert make_executor(None).n_workers == usable_cpus()
    assert make_executor(2).n_workers == min(2, usable_cpus())
    if hasattr(os, "sched_getaffinity"):
        assert usable_cpus() == len(os.sched_getaffinity(0))


def test_usable_cpus_follow_the_affinity_mask_then_the_cpu_count(monkeypatch):
    # a batch system (or taskset) that gives the job one core of many
    monkeypatch.setattr(os, "sched_getaffinity", lambda pid: {3}, raising=False)
    monkeypatch.setattr(os, "cpu_count", lambda: 64)
    assert usable_cpus() == 1
    assert isinstance(make_executor(1000), SerialExecutor)
    # a system without affinity masks (macOS, Windows)
    monkeypatch.delattr(os, "sched_getaffinity", raising=False)
    assert usable_cpus() == 64
    monkeypatch.setattr(os, "cpu_count", lambda: None)
    assert usable_cpus() == 1


@pytest.mark.slow
def test_a_pool_starts_at_most_one_worker_per_task_and_grows_when_needed(monkeypatch):
    monkeypatch.setattr(parallel, "usable_cpus", lambda: 5)   # pretend a larger machine
    me = psutil.Process()
    before = {p.pid for p in spawn_workers(me)}
    with ProcessExecutor(5) as ex:
        assert ex.n_workers == 5 and ex.pool_size == 0      # nothing started yet
        pids = set(ex.map(worker_pid, range(2)))
        assert ex.pool_size == 2
        started = {p.pid for p in spawn_workers(me)} - before
        assert pids <= started and len(started) <= 2
        pids = set(ex.map(worker_pid, range(3)))
        assert ex.pool_size == 3
        assert len({p.pid for p in running(spawn_workers(me))} - before) <= 3
        assert os.getpid() not in pids
        ex.map(worker_pid, range(2))                         # a smaller map keeps the pool
        assert ex.pool_size == 3
    assert ex.pool_size == 0


@pytest.mark.slow
def test_jobs_1000_on_the_command_line_starts_at_most_one_worker_per_cpu(tmp_path):
    spec = write_run(tmp_path, n_cfg=200, tmin=[2, 7], tmax=[11, 13], states=[1, 2])
    popen = subprocess.Popen(cli("fit", str(spec), "--jobs", "1000", "--no-plots", "--quiet"),
                             stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    proc = psutil.Process(popen.pid)
    seen: dict[int, psutil.Process] = {}
    try:
        while popen.poll() is None:
            for w in spawn_workers(proc):
                seen.setdefault(w.pid, w)
            time.sleep(0.02)
        _, err = popen.communicate(timeout=120)
    finally:
        if popen.poll() is None:
            popen.kill()
            popen.communicate()
        _kill_leftovers(list(seen.values()))
    assert popen.returncode == 0, err
    assert (tmp_path / "results" / "results.json").is_file()
    assert 1 <= len(seen) <= usable_cpus(), f"{len(seen)} workers on {usable_cpus()} CPUs"


@pytest.mark.parametrize("jobs", ["0", "-4"])
def test_jobs_zero_or_negative_is_a_one_line_error_naming_jobs(tmp_path, jobs):
    spec = write_run(tmp_path)
    done = subprocess.run(cli("fit", str(spec), "--jobs", jobs), capture_output=True,
                          text=True, timeout=120)
    assert done.returncode == 2
    lines = done.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("plateaufit: error: --jobs:"), done.stderr
    assert "positive integer" in lines[0]
    assert not (tmp_path / "results").exists()   # refused before anything was read or written


# --------------------------------------------------------------------------- stopping


@pytest.mark.slow
def test_an_interrupted_map_terminates_its_busy_workers_at_once():
    me = psutil.Process()
    before = {p.pid for p in spawn_workers(me)}
    ex = make_executor(2)
    if ex.n_workers < 2:
        pytest.skip("needs two CPUs")
    workers: list[psutil.Process] = []
    processes = []          # the pool's multiprocessing.Process objects, for their exit codes

    def interrupt_when_busy():
        deadline = time.monotonic() + 120
        while time.monotonic() < deadline:
            found = [p for p in spawn_workers(me) if p.pid not in before]
            if len(found) >= 2:
                workers.extend(found)
                break
            time.sleep(0.02)
        time.sleep(0.5)                 # the workers are computing their first task
        processes.extend(ex._pool._processes.values())
        os.kill(os.getpid(), signal.SIGINT)   # Ctrl-C (the CLI turns SIGTERM into the same)

    timer = threading.Thread(target=interrupt_when_busy, daemon=True)
    timer.start()
    try:
        with pytest.raises(KeyboardInterrupt):
            with ex:
                ex.map(busy_solves, [FOREVER] * 4)
        left, waited = wait_until_gone(workers, timeout=10)
        assert len(workers) == 2 and len(processes) == 2
        assert left == [], f"workers still running {waited:.1f} s after the interrupt"
        # stopped by a signal, not ended after finishing their tasks
        assert sorted(p.exitcode for p in processes) == [-signal.SIGTERM] * 2
        assert ex.pool_size == 0
    finally:
        timer.join(5)
        _kill_leftovers(workers)


_ORPHAN_SCRIPT = textwrap.dedent("""
    import os, signal, sys, threading, time
    from plateaufit.parallel import make_executor
    from parallel_fixtures import busy_solves

    def run():
        with make_executor(2) as ex:
            ex.map(busy_solves, [{forever}] * 4)

    if __name__ == "__main__":
        if sys.argv[1] == "main-thread":
            threading.Thread(target=lambda: (time.sleep({wait}), os.kill(os.getpid(),
                                             signal.SIGKILL)), daemon=True).start()
            run()
        else:
            threading.Thread(target=run, daemon=True).start()
            time.sleep({wait})
            os.kill(os.getpid(), signal.SIGKILL)
""")


def _orphan_check(tmp_path, where: str, script: str):
    """Run ``script`` (which SIGKILLs itself while its workers compute); return the
    workers it had and those still running 10 s after its death."""
    path = tmp_path / "parent.py"
    path.write_text(script)
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([str(TESTS), os.environ.get("PYTHONPATH", "")]))
    popen = subprocess.Popen([sys.executable, str(path), where], env=env,
                             stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    proc = psutil.Process(popen.pid)
    workers: list[psutil.Process] = []
    try:
        workers = wait_for_workers(proc, 2, popen)
        popen.communicate(timeout=120)     # it kills itself
        left, waited = wait_until_gone(workers, timeout=10)
        return popen.returncode, workers, left, waited
    finally:
        if popen.poll() is None:
            popen.kill()
            popen.communicate()
        _kill_leftovers(workers)


@pytest.mark.slow
@pytest.mark.parametrize("where", ["main-thread", "other-thread"])
def test_workers_end_when_their_parent_is_killed(tmp_path, where):
    # main-thread: parent-death signal (Linux) and watchdog; other-thread: the
    # pool was created in a thread, so the watchdog alone
    if usable_cpus() < 2:
        pytest.skip("needs two CPUs")
    rc, workers, left, waited = _orphan_check(
        tmp_path, where, _ORPHAN_SCRIPT.format(forever=FOREVER, wait=4.0))
    assert rc == -signal.SIGKILL
    assert len(workers) == 2
    assert left == [], f"workers still running {waited:.1f} s after their parent was killed"


_DEATH_SIGNAL_ONLY = textwrap.dedent("""
    import os, signal, sys, threading, time, multiprocessing
    from concurrent.futures import ProcessPoolExecutor
    from plateaufit.worker_lifetime import set_parent_death_signal
    from parallel_fixtures import busy_solves

    if __name__ == "__main__":
        assert set_parent_death_signal() in (True, False)
        threading.Thread(target=lambda: (time.sleep(4.0), os.kill(os.getpid(), signal.SIGKILL)),
                         daemon=True).start()
        with ProcessPoolExecutor(2, mp_context=multiprocessing.get_context("spawn"),
                                 initializer=set_parent_death_signal) as pool:
            list(pool.map(busy_solves, [{forever}] * 2))
""")


@pytest.mark.slow
@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="PR_SET_PDEATHSIG is Linux's")
def test_the_parent_death_signal_alone_ends_a_busy_worker(tmp_path):
    # no watchdog here: only the kernel's signal can stop these workers
    rc, workers, left, waited = _orphan_check(
        tmp_path, "main-thread", _DEATH_SIGNAL_ONLY.format(forever=FOREVER))
    assert rc == -signal.SIGKILL
    assert len(workers) == 2
    assert left == [], f"workers still running {waited:.1f} s after their parent was killed"
