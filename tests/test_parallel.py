"""Executors (plateaufit.parallel): order, equality across executors, errors."""

from __future__ import annotations

import operator
import os
import sys

import numpy as np
import pytest

from plateaufit.errors import DataError, FitError, SpecError
from plateaufit.parallel import ProcessExecutor, SerialExecutor, make_executor, usable_cpus


def solve_seeded(shared, seed):
    """A small numerical task whose result depends on the shared data and the item."""
    rng = np.random.default_rng(seed)
    a = rng.normal(size=(12, 12)) + shared["diag"] * np.eye(12)
    return np.linalg.solve(a, rng.normal(size=12)), os.getpid()


def refuse_odd(item):
    if item % 2:
        raise DataError(f"file{item}.txt", f"item {item} is odd; give an even one")
    return item


@pytest.fixture(scope="module")
def pool():
    with make_executor(jobs=2) as ex:
        yield ex


def test_jobs_one_is_serial_and_none_uses_every_core():
    assert isinstance(make_executor(1), SerialExecutor)
    ex = make_executor(None)
    expected = usable_cpus()           # the CPUs this process may use (affinity)
    assert ex.n_workers == expected
    assert isinstance(ex, SerialExecutor if expected == 1 else ProcessExecutor)
    ex.close()


def test_serial_map_keeps_order_and_passes_shared():
    with make_executor(1) as ex:
        assert ex.map(operator.neg, [3, 1, 2]) == [-3, -1, -2]
        assert ex.map(operator.add, [3, 1, 2], shared=10) == [13, 11, 12]
        assert ex.map(operator.neg, []) == []
@pytest.mark.slow   # a process pool or subprocess
def test_process_pool_gives_bitwise_the_serial_results_in_input_order(pool):
    shared = {"diag": 5.0}
    seeds = list(range(23))
    with make_executor(1) as serial:
        expected = serial.map(solve_seeded, seeds, shared=shared)
    got = pool.map(solve_seeded, seeds, shared=shared)
    assert len(got) == len(seeds)
    for (x_serial, _), (x_pool, _) in zip(expected, got):
        assert x_serial.tobytes() == x_pool.tobytes()
    # the work really went to other processes
    assert {pid for _, pid in got} - {os.getpid()}
@pytest.mark.slow   # a process pool or subprocess
def test_user_error_in_a_worker_is_reraised_with_its_place_and_message(pool):
    with pytest.raises(DataError) as info:
        pool.map(refuse_odd, [0, 2, 4, 5, 6, 8])
    assert info.value.where == "file5.txt"
    assert info.value.message == "item 5 is odd; give an even one"
    # the pool is still usable afterwards
    assert pool.map(refuse_odd, [0, 2, 4]) == [0, 2, 4]


def test_user_error_in_serial_run_propagates_unchanged():
    with make_executor(1) as ex, pytest.raises(DataError, match="item 1 is odd"):
        ex.map(refuse_odd, [0, 1])


@pytest.mark.parametrize("jobs", [0, -3, 1.5, "2", True])
def test_bad_jobs_are_a_clear_error(jobs):
    with pytest.raises(SpecError) as info:
        make_executor(jobs)
    assert info.value.where == "--jobs"
    assert "positive integer" in info.value.message


def test_scheduler_without_dask_says_how_to_install(monkeypatch):
    # a None entry in sys.modules makes the import fail, as when dask is not installed
    monkeypatch.setitem(sys.modules, "dask.distributed", None)
    monkeypatch.setitem(sys.modules, "dask", None)
    with pytest.raises(SpecError) as info:
        make_executor(scheduler="tcp://127.0.0.1:8786")
    assert info.value.where == "--scheduler"
    assert "pip install 'plateaufit[cluster]'" in info.value.message


def test_empty_scheduler_address_is_refused():
    with pytest.raises(SpecError, match="scheduler address"):
        make_executor(scheduler="  ")


def test_progress_bar_stays_silent_when_stderr_is_not_a_terminal(capsys):
    with make_executor(1) as ex:
        assert ex.map(operator.neg, range(5), progress=True, desc="scan") == [0, -1, -2, -3, -4]
    assert capsys.readouterr().err == ""


def die_abruptly(item):
    if item == 3:
        os._exit(1)   # a worker killed from outside looks the same to the pool
    return item
@pytest.mark.slow   # a process pool or subprocess
def test_a_worker_that_dies_gives_a_clear_error_not_a_hang():
    with make_executor(jobs=2) as ex:
        with pytest.raises(FitError) as info:
            ex.map(die_abruptly, range(8))
    assert info.value.where == "--jobs"
    assert "--jobs 1" in info.value.message
