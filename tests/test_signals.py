"""Stopping a ``plateaufit fit`` run: nothing is left computing, and it says so.

Each run is a real ``plateaufit fit`` subprocess with ``--jobs 2`` on an
invented spec whose scan (3 state counts x 10 tmin x 5 tmax, 300 jackknife
samples) keeps both workers busy for well over ten seconds; it is stopped
about a second after its workers started. Every process of the run (the
workers and multiprocessing's resource tracker) must be gone within ten
seconds. Whatever a failing check leaves behind is killed by process id.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time

import pytest

from parallel_fixtures import cli, running, wait_for_workers, wait_until_gone, write_run
from plateaufit import cli as plateaufit_cli
from plateaufit.parallel import usable_cpus

psutil = pytest.importorskip("psutil")

pytestmark = pytest.mark.skipif(not hasattr(signal, "SIGKILL"), reason="POSIX signals")

LONG_SCAN = dict(n_cfg=300, tmin=[1, 10], tmax=[12, 16], states=[1, 2, 3])


@pytest.fixture(scope="module")
def long_spec(tmp_path_factory):
    return write_run(tmp_path_factory.mktemp("long-scan"), **LONG_SCAN)


def _stop_while_refitting(spec, out, send, *, preexec=None):
    """Start a run, wait until its two workers compute, call ``send(popen)``;
    return (exit status, stderr, the run's processes, those still running 10 s later)."""
    if usable_cpus() < 2:
        pytest.skip("needs two CPUs")
    popen = subprocess.Popen(cli("fit", str(spec), "--jobs", "2", "--no-plots", "--quiet",
                                 "--out", str(out)),
                             stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                             start_new_session=True, preexec_fn=preexec)
    proc = psutil.Process(popen.pid)
    everything: list = []
    try:
        wait_for_workers(proc, 2, popen)
        everything = proc.children(recursive=True)   # workers and the resource tracker
        time.sleep(1.0)
        assert popen.poll() is None, "the scan ended before it could be stopped"
        send(popen)
        _, err = popen.communicate(timeout=60)
        left, _ = wait_until_gone(everything, timeout=10)
        return popen.returncode, err, everything, left
    finally:
        if popen.poll() is None:
            popen.kill()
            popen.communicate()
        for p in running(everything):
            p.kill()


def _to_parent(signum):
    return lambda popen: os.kill(popen.pid, signum)


def _to_group(signum):
    # what Ctrl-C in a terminal, or a batch system stopping a job, does
    return lambda popen: os.killpg(popen.pid, signum)


def _one_line(err: str) -> str:
    """The run's last stderr line, checking no traceback came before it."""
    assert "Traceback" not in err, err
    return err.strip().splitlines()[-1]


@pytest.mark.slow
@pytest.mark.parametrize("send, status, name", [
    (_to_parent(signal.SIGTERM), 143, "SIGTERM"),
    (_to_group(signal.SIGTERM), 143, "SIGTERM"),
    (_to_group(signal.SIGINT), 130, "SIGINT"),
    (_to_parent(signal.SIGHUP), 129, "SIGHUP"),
], ids=["sigterm", "sigterm-to-group", "ctrl-c", "sighup"])
def test_a_stopped_run_ends_its_workers_and_says_it_did_not_finish(long_spec, tmp_path, send,
                                                                   status, name):
    rc, err, procs, left = _stop_while_refitting(long_spec, tmp_path / "out", send)
    assert rc == status, err
    assert _one_line(err).startswith(f"plateaufit: interrupted ({name}); the run did not finish: "
                                     "no results were written")
    assert len(procs) >= 2
    assert left == [], f"{len(left)} process(es) of the run still running"
    assert not (tmp_path / "out" / "results.json").exists()


@pytest.mark.slow
def test_a_killed_run_leaves_no_worker_computing(long_spec, tmp_path):
    rc, err, procs, left = _stop_while_refitting(long_spec, tmp_path / "out",
                                                 _to_parent(signal.SIGKILL))
    assert rc == -signal.SIGKILL
    assert len(procs) >= 2
    assert left == [], f"{len(left)} process(es) of the run still running"


@pytest.mark.slow
def test_a_run_under_nohup_ignores_the_hangup(long_spec, tmp_path):
    def send(popen):
        os.kill(popen.pid, signal.SIGHUP)     # ignored, as nohup asks
        time.sleep(1.0)
        assert popen.poll() is None, "the hang-up stopped a run started with SIGHUP ignored"
        os.kill(popen.pid, signal.SIGTERM)

    rc, err, _, left = _stop_while_refitting(
        long_spec, tmp_path / "out", send,
        preexec=lambda: signal.signal(signal.SIGHUP, signal.SIG_IGN))
    assert rc == 143, err
    assert left == []


_IN_PROCESS = """
import os, signal, sys, threading
from plateaufit.cli import main
before = {s: signal.getsignal(s) for s in (signal.SIGTERM, signal.SIGHUP)}
threading.Timer(2.0, os.kill, (os.getpid(), signal.SIGTERM)).start()
status = main(["fit", sys.argv[1], "--jobs", "1", "--no-plots", "--quiet", "--out", sys.argv[2]])
print(status, {s: signal.getsignal(s) for s in before} == before)
"""


@pytest.mark.slow
def test_sigterm_to_a_serial_run_inside_python_returns_143_and_restores_the_handlers(
        long_spec, tmp_path):
    # main() called from Python (in a subprocess: an interrupted import would
    # leave a half-imported module behind in this one)
    done = subprocess.run([sys.executable, "-c", _IN_PROCESS, str(long_spec),
                           str(tmp_path / "out")], capture_output=True, text=True, timeout=120)
    assert done.stdout.split() == ["143", "True"], done.stderr
    assert _one_line(done.stderr).startswith("plateaufit: interrupted (SIGTERM); the run did "
                                             "not finish")


def test_main_leaves_the_signal_handlers_as_it_found_them(tmp_path, capsys):
    before = {s: signal.getsignal(s) for s in (signal.SIGTERM, signal.SIGHUP, signal.SIGINT)}
    assert plateaufit_cli.main(["fit", str(tmp_path / "missing.yaml")]) == 2
    assert "plateaufit: error:" in capsys.readouterr().err
    assert {s: signal.getsignal(s) for s in before} == before
