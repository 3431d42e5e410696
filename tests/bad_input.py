"""Helpers of the bad-input catalogue (tests/test_bad_input_*.py).

Every case of the catalogue runs the command line in-process (``plateaufit.cli.main``)
and checks the same four things: the exit status, the key path or file named in
the one error line, no traceback, and what is on disk afterwards. The data are
the invented ensemble ``heron-a24`` of ``tests/test_runner_end_to_end.py``
(generated from a known truth with a fixed seed).
"""

from __future__ import annotations

import contextlib
import re
import signal
from pathlib import Path
from typing import Any

from plateaufit.cli import main
from test_runner_end_to_end import invented_spec, write_invented_data, write_spec

ERROR_PREFIX = "plateaufit: error:"


def one_fit_spec(output: dict[str, Any] | None = None, **changes: Any) -> dict[str, Any]:
    """The invented spec with only the single-range eta fit (fast), the fit changed by
    ``changes``, and ``output:`` replaced by ``output`` when given."""
    spec = invented_spec()
    spec["fits"] = [dict(spec["fits"][1], **changes)]
    if output is not None:
        spec["output"] = output
    return spec


def write_run(directory: Path, spec: dict[str, Any] | None = None, name: str = "spec.yaml",
              data: bool = True) -> Path:
    """Data (unless ``data`` is False) and the spec in ``directory``; the spec path."""
    directory.mkdir(parents=True, exist_ok=True)
    if data:
        write_invented_data(directory)
    return write_spec(directory, one_fit_spec() if spec is None else spec, name)


def snapshot(directory: Path) -> dict[str, bytes]:
    """Every file under ``directory`` (hidden ones too): relative path -> bytes."""
    if not directory.exists():
        return {}
    return {str(p.relative_to(directory)): p.read_bytes()
            for p in sorted(directory.rglob("*")) if p.is_file()}


def run_cli(capsys, *args: str) -> tuple[int, str, str]:
    """``plateaufit ARGS`` in-process: (status, stdout, stderr)."""
    status = main([str(a) for a in args])
    captured = capsys.readouterr()
    return status, captured.out, captured.err


def fit_args(spec_path: Path, out: Path | None = None, *more: str) -> list[str]:
    args = ["fit", str(spec_path), "--jobs", "1", "--quiet", *more]
    return args + (["--out", str(out)] if out is not None else [])


def error_line(stderr: str, *patterns: str) -> str:
    """The one error line, last on stderr, matching every regex of ``patterns``; no
    traceback."""
    assert "Traceback" not in stderr, stderr
    lines = stderr.strip().splitlines()
    errors = [line for line in lines if line.startswith(ERROR_PREFIX)]
    assert len(errors) == 1, stderr
    assert lines[-1] == errors[0], stderr
    for pattern in patterns:
        assert re.search(pattern, errors[0]), f"{pattern!r} not in {errors[0]!r}"
    return errors[0]


def no_fitting_happened(stderr: str) -> bool:
    """Whether the run stopped before fitting (no fit's log line was echoed)."""
    return not re.search(r"^fit \S+: ", stderr, flags=re.M)


@contextlib.contextmanager
def time_limit(seconds: int):
    """Fail (TimeoutError) instead of hanging: a SIGALRM after ``seconds``."""
    def alarm(signum, frame):
        raise TimeoutError(f"no answer within {seconds} s")

    previous = signal.signal(signal.SIGALRM, alarm)
    signal.alarm(seconds)
    try:
        yield
    finally:
        signal.alarm(0)
        signal.signal(signal.SIGALRM, previous)
