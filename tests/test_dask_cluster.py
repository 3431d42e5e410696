"""Scan points on a dask.distributed cluster (``--scheduler``), on loopback only.

A module-wide ``LocalCluster`` (two worker processes of one thread each, on
127.0.0.1, no dashboard) stands in for the cluster a batch system would start.
Checks: the numbers of a ``--scheduler`` run are those of the local pool, bit
for bit; a user error raised inside a task is the same exit-2 line; a closed
port, a silent server, a scheduler without workers and a worker that dies are
each one clear error naming ``--scheduler``.
"""

from __future__ import annotations

import json
import logging
import os
import socket
import subprocess
import time

import pytest

from parallel_fixtures import cli, data_failing_in_a_refit, worker_pid, write_run
from plateaufit.errors import DataError, SpecError
from plateaufit.parallel import make_executor
from test_parallel import refuse_odd, solve_seeded

distributed = pytest.importorskip("distributed")
dask = pytest.importorskip("dask")

#: the workers' BLAS thread pools, as the command line sets them for local workers
ONE_THREAD = {"OPENBLAS_NUM_THREADS": "1", "OMP_NUM_THREADS": "1", "MKL_NUM_THREADS": "1"}
#: seconds a cluster may take to start (its workers are spawned processes)
START_TIMEOUT = 60


def _local_cluster(n_workers: int, **config):
    from dask.distributed import Client, LocalCluster

    with dask.config.set({"distributed.comm.timeouts.connect": "20s", **config}):
        # no dashboard; the scheduler's small HTTP server on a free loopback port
        cluster = LocalCluster(n_workers=n_workers, threads_per_worker=1, processes=True,
                               host="127.0.0.1", dashboard_address=None, env=ONE_THREAD,
                               scheduler_kwargs={"dashboard": False,
                                                 "dashboard_address": "127.0.0.1:0"},
                               silence_logs=logging.ERROR)
    if n_workers:
        with Client(cluster.scheduler_address, set_as_default=False) as client:
            client.wait_for_workers(n_workers, timeout=START_TIMEOUT)
    return cluster


@pytest.fixture(scope="module")
def cluster():
    cl = _local_cluster(2)
    yield cl
    cl.close()


def _closed_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _fit(spec, out, *extra):
    start = time.perf_counter()
    done = subprocess.run(cli("fit", str(spec), "--no-plots", "--quiet", "--out", str(out),
                              *extra), capture_output=True, text=True, timeout=300)
    return done, time.perf_counter() - start


def _last_line(err: str) -> str:
    assert "Traceback" not in err, err
    return err.strip().splitlines()[-1]


# --------------------------------------------------------------------------- same numbers


def test_a_cluster_gives_the_serial_results_bit_for_bit_from_its_own_workers(cluster):
    shared = {"diag": 5.0}
    with make_executor(1) as serial:
        expected = serial.map(solve_seeded, range(17), shared=shared)
    with make_executor(scheduler=cluster.scheduler_address) as ex:
        assert ex.kind == "dask" and ex.n_workers == 2
        got = ex.map(solve_seeded, range(17), shared=shared)
        pids = set(ex.map(worker_pid, range(8)))
    assert [x.tobytes() for x, _ in got] == [x.tobytes() for x, _ in expected]
    assert os.getpid() not in pids and len(pids) == 2    # both workers of the cluster


@pytest.mark.slow
def test_fit_with_scheduler_writes_the_local_pools_numbers(cluster, tmp_path):
    spec = write_run(tmp_path, n_cfg=120, tmin=[3, 6], tmax=[11, 12], states=[1, 2])
    local, t_local = _fit(spec, tmp_path / "pool", "--jobs", "2")
    remote, t_remote = _fit(spec, tmp_path / "dask", "--scheduler", cluster.scheduler_address)
    assert local.returncode == 0, local.stderr
    assert remote.returncode == 0, remote.stderr
    a = json.loads((tmp_path / "pool" / "results.json").read_text())
    b = json.loads((tmp_path / "dask" / "results.json").read_text())
    # every number of the analysis (JSON floats round-trip exactly): bit for bit
    for key in ("ensemble", "fits", "derived", "warnings"):
        assert a[key] == b[key], key
    print(f"\nlocal pool (--jobs 2): {t_local:.2f} s; LocalCluster (--scheduler): {t_remote:.2f} s")


# --------------------------------------------------------------------------- errors


def test_a_user_error_in_a_task_comes_back_as_from_the_local_pool(cluster):
    errors = []
    for kwargs in ({"jobs": 2}, {"scheduler": cluster.scheduler_address}):
        with make_executor(**kwargs) as ex, pytest.raises(DataError) as info:
            ex.map(refuse_odd, [0, 2, 4, 5, 6, 7])
        errors.append((type(info.value), info.value.where, info.value.message))
    assert errors[0] == errors[1] == (DataError, "file5.txt", "item 5 is odd; give an even one")


@pytest.mark.slow
def test_a_user_error_in_a_refit_is_the_same_exit_2_line_on_a_cluster(cluster, tmp_path):
    spec = write_run(tmp_path, n_cfg=60, values=data_failing_in_a_refit(60), tmin=[2, 4],
                     tmax=[9, 10], per_sample=True)
    local, _ = _fit(spec, tmp_path / "pool", "--jobs", "2")
    remote, _ = _fit(spec, tmp_path / "dask", "--scheduler", cluster.scheduler_address)
    assert local.returncode == remote.returncode == 2
    line = _last_line(local.stderr)
    assert line.startswith("plateaufit: error: fits[0]:") and "constant" in line
    assert _last_line(remote.stderr) == line


@pytest.mark.slow
def test_a_closed_port_is_a_one_line_error_naming_scheduler_at_once(tmp_path):
    spec = write_run(tmp_path)
    done, seconds = _fit(spec, tmp_path / "out", "--scheduler",
                         f"tcp://127.0.0.1:{_closed_port()}")
    assert done.returncode == 2
    line = _last_line(done.stderr)
    assert line.startswith("plateaufit: error: --scheduler:"), line
    assert "connection refused" in line and "leave out --scheduler" in line
    assert len(done.stderr.strip().splitlines()) == 1     # refused before any data was read
    assert not (tmp_path / "out").exists()
    print(f"\nclosed port refused after {seconds:.2f} s (whole command)")


def test_a_server_that_never_answers_times_out_with_a_clear_error():
    with socket.socket() as silent:      # accepts connections (backlog), never speaks
        silent.bind(("127.0.0.1", 0))
        silent.listen(4)
        address = f"tcp://127.0.0.1:{silent.getsockname()[1]}"
        with pytest.raises(SpecError) as info:
            make_executor(scheduler=address, connect_timeout=1.0)
    assert info.value.where == "--scheduler"
    assert address in info.value.message and "no answer within 1 s" in info.value.message


@pytest.mark.parametrize("address", ["tcp://", "tcp://127.0.0.1:notaport", "tcp://:8786"])
def test_a_malformed_address_says_how_to_write_one(address):
    with pytest.raises(SpecError) as info:
        make_executor(scheduler=address, connect_timeout=1.0)
    assert info.value.where == "--scheduler"
    assert "tcp://HOST:PORT" in info.value.message


def test_a_scheduler_without_workers_is_a_clear_error_not_a_hang():
    empty = _local_cluster(0)
    try:
        ex = make_executor(scheduler=empty.scheduler_address, connect_timeout=0.5)
        with ex, pytest.raises(SpecError) as info:
            ex.map(worker_pid, range(3))
        assert info.value.where == "--scheduler"
        assert "no workers" in info.value.message
    finally:
        empty.close()


def die_in_the_worker(item: int) -> int:
    os._exit(3)    # a worker killed from outside (out of memory) looks the same


@pytest.mark.slow
def test_a_worker_dying_in_a_task_is_a_clear_error_naming_scheduler():
    fragile = _local_cluster(1, **{"distributed.scheduler.allowed-failures": 0})
    try:
        with make_executor(scheduler=fragile.scheduler_address) as ex, \
                pytest.raises(SpecError) as info:
            ex.map(die_in_the_worker, range(2))
        assert info.value.where == "--scheduler"
        assert "died" in info.value.message
    finally:
        fragile.close()


@pytest.mark.slow
def test_batch_with_scheduler_writes_the_local_pools_numbers(cluster, tmp_path):
    specs = []
    for name, n_cfg in (("osprey-g", 100), ("osprey-h", 140)):
        specs.append(str(write_run(tmp_path / name, n_cfg=n_cfg, tmin=[3, 5], tmax=[11, 12],
                                   states=[1, 2], name=f"{name}.yaml")))
    common = ("--no-plots", "--quiet", "--no-cache")
    local = subprocess.run(cli("batch", *specs, "--out", str(tmp_path / "pool"), "--jobs", "2",
                               *common), capture_output=True, text=True, timeout=300)
    remote = subprocess.run(cli("batch", *specs, "--out", str(tmp_path / "dask"), "--scheduler",
                                cluster.scheduler_address, *common),
                            capture_output=True, text=True, timeout=300)
    assert local.returncode == 0, local.stderr
    assert remote.returncode == 0, remote.stderr
    for name in ("osprey-g", "osprey-h"):
        a = json.loads((tmp_path / "pool" / name / "results.json").read_text())
        b = json.loads((tmp_path / "dask" / name / "results.json").read_text())
        for key in ("ensemble", "fits", "derived", "warnings"):
            assert a[key] == b[key], (name, key)
    assert ((tmp_path / "pool" / "summary.csv").read_text()
            == (tmp_path / "dask" / "summary.csv").read_text())


def test_batch_with_a_scheduler_nobody_listens_at_is_one_line_at_once(tmp_path):
    spec = write_run(tmp_path, n_cfg=60, tmin=3, tmax=11, states=1)
    start = time.perf_counter()
    done = subprocess.run(cli("batch", str(spec), "--scheduler", f"tcp://127.0.0.1:{_closed_port()}",
                              "--out", str(tmp_path / "b"), "--quiet"),
                          capture_output=True, text=True, timeout=60)
    assert done.returncode == 2
    assert "--scheduler" in _last_line(done.stderr)
    assert time.perf_counter() - start < 30
    assert not (tmp_path / "b").exists()
