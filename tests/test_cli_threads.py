"""The command line gives each process one BLAS thread unless the user chose a number."""

import os
import subprocess
import sys

import pytest

pytestmark = pytest.mark.slow   # runs a process pool or a subprocess

SCRIPT = ("import os; from plateaufit import cli; cli._one_blas_thread_per_process(); "
          "import numpy; print(os.environ.get('OPENBLAS_NUM_THREADS'))")


def _run(env_extra):
    env = {k: v for k, v in os.environ.items() if k not in ("OPENBLAS_NUM_THREADS",
                                                            "OMP_NUM_THREADS",
                                                            "MKL_NUM_THREADS")}
    env.update(env_extra)
    done = subprocess.run([sys.executable, "-c", SCRIPT], env=env, capture_output=True,
                          text=True, check=True, timeout=60)
    return done.stdout.strip()


def test_one_thread_by_default():
    assert _run({}) == "1"


def test_the_users_choice_wins():
    assert _run({"OPENBLAS_NUM_THREADS": "2"}) == "2"
