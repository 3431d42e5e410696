"""`plateaufit fit` and `plateaufit check` on bad input: exit 2, one clear line, nothing written.

Every case starts from the invented ensemble ``heron-a24`` of
``tests/test_runner_end_to_end.py`` (data from a known truth, fixed seed) and
breaks one thing: a key of the spec, a value in a data file, the YAML itself.
The contract (design.md, "Command line"): status 2, one message on stderr
naming the spec key path or the file, no traceback, and no output at all --
exit 0 only when results.json was written.
"""

from __future__ import annotations

import re
import subprocess
from collections.abc import Callable
from pathlib import Path

import numpy as np
import pytest
import yaml

from plateaufit.cli import main
from test_runner_end_to_end import (invented_spec, write_invented_data, write_invented_run,
                                    write_kaon, write_spec)

PLATEAUFIT = Path(__file__).resolve().parents[1] / ".venv" / "bin" / "plateaufit"
ERROR_PREFIX = "plateaufit: error:"


# --------------------------------------------------------------------------- the bad inputs


def _with_fit(directory: Path, **changes) -> Path:
    """The base spec with only the kaon fit, changed by ``changes``."""
    spec = invented_spec()
    spec["fits"] = [dict(spec["fits"][0], **changes)]
    return write_invented_run(directory, spec)


def _with_spec(directory: Path, change: Callable[[dict], None]) -> Path:
    spec = invented_spec()
    change(spec)
    return write_invented_run(directory, spec)


def _with_bad_value(directory: Path, value: float, where: str) -> Path:
    spec_path = write_invented_run(directory)
    if where == "kaon":       # text file: configuration 37, t = 5
        data = np.loadtxt(directory / "kaon.txt")
        data[37, 5] = value
        write_kaon(directory, data)
    else:                     # npy file: configuration 200 (second stream), t = 7
        data = np.load(directory / "eta.npy")
        data[200, 7] = value
        np.save(directory / "eta.npy", data)
    return spec_path


def _few_bins_unshrunk(directory: Path) -> Path:
    # binning.size 30 leaves 170 // 30 + 150 // 30 = 10 bins for the 11 points t = 2..12
    def change(spec: dict) -> None:
        spec["fits"] = [dict(spec["fits"][0], tmin=2, tmax=12)]
        spec["covariance"] = {"shrinkage": "none"}
        spec["binning"] = {"size": 30}
    return _with_spec(directory, change)


def _formula(expression: str) -> Callable[[Path], Path]:
    return lambda d: _with_fit(d, model="formula",
                               formula={"expression": expression, "params": {"a": 1.0}})


def _yaml_syntax_error(directory: Path) -> Path:
    write_invented_data(directory)
    lines = yaml.safe_dump(invented_spec(), sort_keys=False).splitlines()
    assert lines[2] == "  time_extent: 24"
    lines[2] = "  time_extent: 24: 3"        # line 3: a second ':' in a plain value
    path = directory / "spec.yaml"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


def _missing_spec(directory: Path) -> Path:
    write_invented_data(directory)
    return directory / "no_such_spec.yaml"


def _set(path: tuple, value) -> Callable[[dict], None]:
    def change(spec: dict) -> None:
        node = spec
        for key in path[:-1]:
            node = node[key]
        node[path[-1]] = value
    return change


# id -> (writer, regexes every one of which the error line must match)
CASES: dict[str, tuple[Callable[[Path], Path], list[str]]] = {
    "tmin-equals-tmax": (lambda d: _with_fit(d, tmin=12, tmax=12),
                         [r"fits\[0\]\.(tmin|tmax)", r"\b12\b"]),
    "tmin-above-tmax": (lambda d: _with_fit(d, tmin=11, tmax=9),
                        [r"fits\[0\]\.(tmin|tmax)"]),
    "tmax-beyond-folded-range": (lambda d: _with_fit(d, tmax=13),
                                 [r"fits\[0\]\.tmax", r"\b13\b", r"\b12\b"]),
    "unknown-observable": (lambda d: _with_fit(d, observables=["pion"]),
                           [r"fits\[0\]\.observables\[0\]", "pion"]),
    "prior-on-missing-parameter": (lambda d: _with_fit(d, priors={"E5": [1.0, 0.5]}),
                                   [r"fits\[0\]\.priors\.E5"]),
    "nan-in-text-file": (lambda d: _with_bad_value(d, np.nan, "kaon"),
                         [r"kaon\.txt", r"(?i)nan", r"\b37\b", r"t ?= ?5\b"]),
    "inf-in-npy-file": (lambda d: _with_bad_value(d, np.inf, "eta"),
                        [r"eta\.npy", r"(?i)inf", r"\b200\b", r"t ?= ?7\b"]),
    "fewer-bins-than-points-unshrunk": (_few_bins_unshrunk,
                                        [r"fits\[0\]", r"\b10 bins\b", r"\b11 points\b",
                                         r"shrinkage"]),
    "formula-import": (_formula("a + __import__('os')"),
                       [r"fits\[0\]\.formula\.expression", "__import__"]),
    "formula-open": (_formula("a * open('spec.yaml')"),
                     [r"fits\[0\]\.formula\.expression", r"\bopen\b"]),
    "formula-attribute": (_formula("a * t.__class__"),
                          [r"fits\[0\]\.formula\.expression", r"(?i)attribute"]),
    "missing-data-file": (lambda d: _with_spec(d, _set(("observables", "kaon", "file"),
                                                       "nothere.txt")),
                          [r"observables\.kaon\.file", r"nothere\.txt"]),
    "missing-spec-file": (_missing_spec, [r"no_such_spec\.yaml"]),
    "yaml-syntax-error": (_yaml_syntax_error, [r"spec\.yaml", r"line 3\b"]),
    "unknown-top-level-key": (lambda d: _with_spec(d, _set(("colour",), "blue")),
                              [r"colour"]),
    "no-range-with-a-dof": (lambda d: _with_fit(d, states=2, tmin=[9, 10], tmax=11),
                            [r"fits\[0\]", r"(?i)degree of freedom|dof"]),
    "empty-state-list": (lambda d: _with_fit(d, states=[]), [r"fits\[0\]\.states"]),
    "choose-outside-the-scan": (lambda d: _with_fit(d, choose={"tmin": 6, "tmax": 12}),
                                [r"fits\[0\]\.choose", r"\b6\b"]),
    "bin-larger-than-every-stream": (lambda d: _with_spec(d, _set(("binning", "size"), 200)),
                                     [r"binning\.size", r"\b170\b"]),
    # 160 configurations per bin: stream 2 (150) gives no bin at all, stream 1 (170) one bin
    "bin-larger-than-one-stream": (lambda d: _with_spec(d, _set(("binning", "size"), 160)),
                                   [r"binning\.size"]),
}


def _snapshot(directory: Path) -> dict[str, bytes]:
    return {str(p.relative_to(directory)): p.read_bytes()
            for p in sorted(directory.rglob("*")) if p.is_file()}


def _assert_one_error_line(stderr: str, patterns: list[str]) -> str:
    """The error is one line, the last one on stderr; no traceback. Returns the line."""
    assert "Traceback" not in stderr
    lines = stderr.strip().splitlines()
    assert lines, "nothing on stderr"
    errors = [line for line in lines if line.startswith(ERROR_PREFIX)]
    assert len(errors) == 1, stderr
    assert lines[-1] == errors[0], stderr
    line = errors[0]
    for pattern in patterns:
        assert re.search(pattern, line), f"{pattern!r} not in {line!r}"
    return line


# --------------------------------------------------------------------------- fit


@pytest.mark.parametrize("case", list(CASES))
def test_fit_refuses_bad_input_and_writes_nothing(case, tmp_path, capsys):
    writer, patterns = CASES[case]
    spec_path = writer(tmp_path)
    before = _snapshot(tmp_path)
    out = tmp_path / "out"
    status = main(["fit", str(spec_path), "--out", str(out), "--jobs", "1", "--quiet"])
    captured = capsys.readouterr()
    assert status == 2, captured.err
    _assert_one_error_line(captured.err, patterns)
    assert not out.exists() or not any(out.iterdir())
    # nothing else written either (the spec's own output.dir, temporary files)
    assert _snapshot(tmp_path) == before
    assert not (tmp_path / "results").exists()


@pytest.mark.parametrize("case", ["nan-in-text-file", "fewer-bins-than-points-unshrunk"])
def test_a_failed_fit_leaves_an_existing_output_directory_alone(case, tmp_path, capsys):
    # a previous good run's output must survive a failed run into the same directory
    good = tmp_path / "good"
    spec = invented_spec()
    spec["fits"] = spec["fits"][1:]
    out = tmp_path / "out"
    assert main(["fit", str(write_invented_run(good, spec)), "--out", str(out),
                 "--jobs", "1", "--quiet", "--no-plots"]) == 0
    previous = _snapshot(out)
    assert "results.json" in previous
    spec_path = CASES[case][0](tmp_path / "bad")
    capsys.readouterr()
    assert main(["fit", str(spec_path), "--out", str(out), "--jobs", "1", "--quiet"]) == 2
    _assert_one_error_line(capsys.readouterr().err, CASES[case][1])
    assert _snapshot(out) == previous


def test_fit_exits_0_only_with_results_json(tmp_path, capsys):
    spec = invented_spec()
    spec["fits"] = spec["fits"][1:]
    spec_path = write_invented_run(tmp_path, spec)
    out = tmp_path / "out"
    assert main(["fit", str(spec_path), "--out", str(out), "--jobs", "1", "--quiet"]) == 0
    captured = capsys.readouterr()
    assert (out / "results.json").is_file()
    assert ERROR_PREFIX not in captured.err and "Traceback" not in captured.err
    assert str(out) in captured.out


def test_out_naming_an_existing_file_is_a_user_error(tmp_path, capsys):
    # `--out` pointing at a file is a user error: status 2, one line naming it, the file
    # untouched -- not a traceback after the whole fit has run
    spec = invented_spec()
    spec["fits"] = spec["fits"][1:]
    spec_path = write_invented_run(tmp_path, spec)
    taken = tmp_path / "taken.txt"
    taken.write_text("not a directory\n", encoding="utf-8")
    try:
        status = main(["fit", str(spec_path), "--out", str(taken), "--jobs", "1", "--quiet"])
    except OSError as exc:   # what escapes today: FileExistsError from the table writer
        pytest.fail(f"OSError escaped instead of a user error: {exc!r}")
    assert status == 2
    _assert_one_error_line(capsys.readouterr().err, [re.escape(str(taken.name))])
    assert taken.read_text(encoding="utf-8") == "not a directory\n"


# --------------------------------------------------------------------------- check


@pytest.mark.parametrize("case", list(CASES))
def test_check_refuses_the_same_bad_input(case, tmp_path, capsys):
    writer, patterns = CASES[case]
    spec_path = writer(tmp_path)
    before = _snapshot(tmp_path)
    status = main(["check", str(spec_path)])
    captured = capsys.readouterr()
    assert status == 2, captured.out[-800:]
    _assert_one_error_line(captured.err, patterns)
    assert len(captured.err.strip().splitlines()) == 1   # check echoes no log
    assert _snapshot(tmp_path) == before


# --------------------------------------------------------------------------- the installed command


@pytest.mark.parametrize(("command", "case"), [("fit", "nan-in-text-file"),
                                               ("check", "tmax-beyond-folded-range")])
@pytest.mark.slow   # a process pool or subprocess
def test_the_installed_command_exits_2_with_one_line(command, case, tmp_path):
    writer, patterns = CASES[case]
    spec_path = writer(tmp_path)
    before = _snapshot(tmp_path)
    out = tmp_path / "out"
    args = [str(PLATEAUFIT), command, str(spec_path)]
    if command == "fit":
        args += ["--out", str(out), "--jobs", "1", "--quiet"]
    proc = subprocess.run(args, capture_output=True, text=True, timeout=120, cwd=tmp_path)
    assert proc.returncode == 2, proc.stderr
    _assert_one_error_line(proc.stderr, patterns)
    assert not out.exists()
    assert _snapshot(tmp_path) == before
