"""Bad-input catalogue, the output folder: nothing lost, nothing mixed, every refusal exit 2.

Outputs never replace inputs (checked before any fitting, on resolved paths and
inodes); the folder must be creatable, writable and have room (a probe write
before fitting); a write failure during output is exit 2 naming the file with
the folder unchanged; an interrupted run leaves either the folder as it was or
one marked incomplete, never one that looks complete but mixes two runs, and
says which; stale files of an earlier run are removed, a user's own files never.
"""

from __future__ import annotations

import errno
import json
import os
import re
import subprocess
import sys
from pathlib import Path

import pytest

from bad_input import (error_line, fit_args, no_fitting_happened, one_fit_spec, run_cli, snapshot,
                       write_run)
from plateaufit import run_folder
from plateaufit.run_folder import (INCOMPLETE, MANIFEST, STAGING_PREFIX, FolderState, RunFolder,
                                   folder_state, interruption_message, read_manifest)
from test_runner_end_to_end import invented_spec


def _data_as_csv(directory: Path, name: str) -> Path:
    """The kaon data rewritten as a long CSV file called ``name`` (a legitimate input)."""
    import numpy as np

    values = np.loadtxt(directory / "kaon.txt")
    lines = ["config,t,value"] + [f"{i},{t},{v!r}" for i, row in enumerate(values)
                                  for t, v in enumerate(row)]
    path = directory / name
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


# --------------------------------------------------------------------------- outputs vs inputs


@pytest.mark.parametrize("name", ["scan_eta.csv", "results.json", "run.log", "results.tex",
                                  "report.html"])
def test_an_input_named_like_an_output_is_refused_before_fitting(name, tmp_path, capsys):
    # output.dir is the data folder: a data file called like an output would be overwritten
    spec = one_fit_spec()
    spec["output"] = {"dir": ".", "plots": name == "report.html"}
    spec["observables"]["eta"] = {"file": name, "format": "csv"}
    write_run(tmp_path, spec)
    _data_as_csv(tmp_path, name)
    before = snapshot(tmp_path)
    status, _, err = run_cli(capsys, "fit", tmp_path / "spec.yaml", "--jobs", "1", "--quiet")
    assert status == 2
    error_line(err, r"output\.dir", re.escape(name), r"input")
    assert no_fitting_happened(err)
    assert snapshot(tmp_path) == before
    # check refuses it too: the spec and its data are not usable as they stand
    status, _, err = run_cli(capsys, "check", tmp_path / "spec.yaml")
    assert status == 2
    error_line(err, r"output\.dir", re.escape(name))


def test_the_spec_itself_is_an_input(tmp_path, capsys):
    spec_path = write_run(tmp_path, one_fit_spec(output={"dir": ".", "plots": False}),
                          name="results.tex")
    before = snapshot(tmp_path)
    status, _, err = run_cli(capsys, *fit_args(spec_path))
    assert status == 2
    error_line(err, r"output\.dir", r"results\.tex")
    assert snapshot(tmp_path) == before


def test_an_input_reached_through_a_symbolic_link_is_protected(tmp_path, capsys):
    # data/eta.npy is a link to out/scan_eta.csv's place: resolved paths are compared
    write_run(tmp_path)
    out = tmp_path / "out"
    out.mkdir()
    (tmp_path / "eta.npy").rename(out / "scan_eta.csv")
    (tmp_path / "eta.npy").symlink_to(out / "scan_eta.csv")
    spec = one_fit_spec()
    spec["observables"]["eta"]["format"] = "npy"
    spec_path = write_run(tmp_path, spec, data=False)
    before = snapshot(out)
    status, _, err = run_cli(capsys, *fit_args(spec_path, out))
    assert status == 2
    error_line(err, r"--out", r"scan_eta\.csv")
    assert snapshot(out) == before


def test_an_input_hard_linked_to_an_output_name_is_protected(tmp_path, capsys):
    spec_path = write_run(tmp_path)
    out = tmp_path / "out"
    out.mkdir()
    os.link(tmp_path / "eta.npy", out / "results.json")
    status, _, err = run_cli(capsys, *fit_args(spec_path, out))
    assert status == 2
    error_line(err, r"--out", r"results\.json", r"eta\.npy")
    assert (out / "results.json").read_bytes() == (tmp_path / "eta.npy").read_bytes()


def test_an_input_inside_the_plots_folder_is_refused_with_plots_on(tmp_path, capsys):
    write_run(tmp_path)
    (tmp_path / "out" / "plots").mkdir(parents=True)
    (tmp_path / "eta.npy").rename(tmp_path / "out" / "plots" / "eta.npy")
    spec = one_fit_spec(output={"dir": "out", "plots": True})
    spec["observables"]["eta"]["file"] = "out/plots/eta.npy"
    spec_path = write_run(tmp_path, spec, data=False)
    status, _, err = run_cli(capsys, *fit_args(spec_path))
    assert status == 2
    error_line(err, r"output\.dir", r"plots")
    assert (tmp_path / "out" / "plots" / "eta.npy").is_file()


# --------------------------------------------------------------------------- the folder itself


def test_an_output_folder_under_a_file_cannot_be_created(tmp_path, capsys):
    spec_path = write_run(tmp_path)
    blocker = tmp_path / "taken"
    blocker.write_text("a file\n", encoding="utf-8")
    before = snapshot(tmp_path)
    status, _, err = run_cli(capsys, *fit_args(spec_path, blocker / "sub" / "out"))
    assert status == 2
    error_line(err, r"--out", r"taken", r"(?i)file")
    assert no_fitting_happened(err)
    assert snapshot(tmp_path) == before


@pytest.mark.parametrize("obstacle", ["plots-is-a-file", "report-is-a-folder",
                                      "scan-table-is-a-folder"])
def test_a_file_or_folder_in_the_way_is_refused_before_fitting(obstacle, tmp_path, capsys):
    spec_path = write_run(tmp_path, one_fit_spec(output={"dir": "out", "plots": True}))
    out = tmp_path / "out"
    out.mkdir()
    if obstacle == "plots-is-a-file":
        (out / "plots").write_text("mine\n", encoding="utf-8")
        where = r"plots"
    elif obstacle == "report-is-a-folder":
        (out / "report.html").mkdir()
        where = r"report\.html"
    else:
        (out / "scan_eta.csv").mkdir()
        where = r"scan_eta\.csv"
    before = snapshot(out)
    status, _, err = run_cli(capsys, *fit_args(spec_path))
    assert status == 2
    error_line(err, r"output\.dir", where)
    assert no_fitting_happened(err)
    assert snapshot(out) == before


@pytest.mark.skipif(os.geteuid() == 0, reason="root writes into read-only folders")
def test_a_read_only_output_folder_is_refused_before_fitting(tmp_path, capsys):
    spec_path = write_run(tmp_path)
    out = tmp_path / "out"
    out.mkdir()
    out.chmod(0o555)
    try:
        status, _, err = run_cli(capsys, *fit_args(spec_path, out))
    finally:
        out.chmod(0o755)
    assert status == 2
    error_line(err, r"--out", r"(?i)writ")
    assert no_fitting_happened(err)


def _limited_fit(spec_path: Path, out: Path, limit: int) -> subprocess.CompletedProcess:
    """`plateaufit fit` in a process whose files may not grow beyond ``limit`` bytes.

    RLIMIT_FSIZE (with SIGXFSZ ignored, writes past the limit fail with EFBIG) is a
    real file-system refusal without root: the probe write meets it as a full disk
    would."""
    code = ("import resource, signal, sys; signal.signal(signal.SIGXFSZ, signal.SIG_IGN); "
            f"resource.setrlimit(resource.RLIMIT_FSIZE, ({limit}, {limit})); "
            "from plateaufit.cli import main; sys.exit(main(sys.argv[1:]))")
    return subprocess.run([sys.executable, "-c", code, *fit_args(spec_path, out)],
                          capture_output=True, text=True, timeout=300)


@pytest.mark.slow   # a subprocess
def test_no_room_for_the_probe_write_is_exit_2_before_fitting(tmp_path):
    spec_path = write_run(tmp_path)
    out = tmp_path / "out"
    before = snapshot(tmp_path)
    proc = _limited_fit(spec_path, out, run_folder.PROBE_BYTES // 2)
    assert proc.returncode == 2, proc.stderr
    error_line(proc.stderr, r"--out", r"test write", r"(?i)too large|space")
    assert no_fitting_happened(proc.stderr)
    assert snapshot(tmp_path) == before and not out.exists()


# --------------------------------------------------------------------------- writing fails


def _fail_fsync_of(monkeypatch, name: str) -> None:
    """os.fsync raises ENOSPC for a file called ``name`` (how a full disk often shows)."""
    real = os.fsync

    def fsync(fd: int) -> None:
        target = os.readlink(f"/proc/self/fd/{fd}")
        if Path(target).name.startswith(f".{name}."):   # the atomic writer's temporary file
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
        real(fd)

    monkeypatch.setattr(os, "fsync", fsync)


@pytest.fixture
def previous_run(tmp_path, capsys):
    """A complete run in tmp_path/out (spec with both fits): (spec path, out, snapshot)."""
    spec = invented_spec()
    spec_path = write_run(tmp_path, spec)
    out = tmp_path / "out"
    status, _, _ = run_cli(capsys, *fit_args(spec_path, out))
    assert status == 0
    return spec_path, out, snapshot(out)


@pytest.mark.skipif(not Path("/proc/self/fd").is_dir(), reason="needs /proc/self/fd")
@pytest.mark.parametrize("name", ["results.tex", "scan_kaon.csv", "results.json", "run.log"])
def test_a_full_disk_while_writing_is_exit_2_naming_the_file_and_the_folder_unchanged(
        name, previous_run, monkeypatch, capsys):
    spec_path, out, before = previous_run
    _fail_fsync_of(monkeypatch, name)
    status, _, err = run_cli(capsys, *fit_args(spec_path, out))
    assert status == 2
    line = error_line(err, re.escape(str(out / name)), r"(?i)no space")
    assert "was changed" in line and "nothing" in line
    assert snapshot(out) == before          # the earlier run, byte for byte
    assert not [p for p in out.iterdir() if p.name.startswith(STAGING_PREFIX)]


# --------------------------------------------------------------------------- interruptions


def _interrupt_at(monkeypatch, module, name: str, after: int = 0) -> None:
    """``module.name`` raises KeyboardInterrupt on call number ``after + 1``."""
    real = getattr(module, name)
    calls = {"n": 0}

    def wrapper(*args, **kwargs):
        calls["n"] += 1
        if calls["n"] > after:
            raise KeyboardInterrupt
        return real(*args, **kwargs)

    monkeypatch.setattr(module, name, wrapper)


def test_an_interrupted_fit_writes_nothing_and_says_so(previous_run, monkeypatch, capsys):
    import plateaufit.pipeline.run as run_module

    spec_path, out, before = previous_run
    _interrupt_at(monkeypatch, run_module, "run_fit", after=1)    # during the second fit
    status, _, err = run_cli(capsys, *fit_args(spec_path, out))
    assert status == 130
    assert "no results were written" in err and "earlier run" in err
    assert snapshot(out) == before


def test_interrupted_while_staging_the_folder_is_unchanged(previous_run, monkeypatch, capsys):
    import plateaufit.report.tables as tables

    spec_path, out, before = previous_run
    _interrupt_at(monkeypatch, tables, "write_text", after=1)    # the second table
    status, _, err = run_cli(capsys, *fit_args(spec_path, out))
    assert status == 130
    assert "no results were written" in err and str(out) in err
    assert snapshot(out) == before
    assert not [p for p in out.iterdir() if p.name.startswith(STAGING_PREFIX)]


def test_interrupted_while_moving_files_in_the_folder_is_marked_incomplete(
        previous_run, monkeypatch, capsys):
    spec_path, out, before = previous_run
    # the renames into the folder itself (not those of the atomic writer into the staging
    # folder): the marker first, then the files; stop at the third
    real, moved = os.replace, []

    def replace(src, dst, *args, **kwargs):
        if Path(dst).parent == out:
            moved.append(dst)
            if len(moved) == 3:
                raise KeyboardInterrupt
        return real(src, dst, *args, **kwargs)

    monkeypatch.setattr(os, "replace", replace)
    status, _, err = run_cli(capsys, *fit_args(spec_path, out))
    monkeypatch.undo()
    assert Path(moved[0]).name == INCOMPLETE
    assert status == 130
    assert "incomplete" in err and "results were written" not in err
    assert not (out / "results.json").exists()   # never a folder that looks complete
    assert (out / INCOMPLETE).is_file()
    # report refuses it, saying why; a new run completes it and clears the mark
    status, _, err = run_cli(capsys, "report", out)
    assert status == 2
    error_line(err, r"results\.json", r"interrupted")
    status, _, _ = run_cli(capsys, *fit_args(spec_path, out))
    assert status == 0
    assert (out / "results.json").is_file() and not (out / INCOMPLETE).exists()
    assert set(snapshot(out)) == set(before)


def test_interruption_messages_follow_the_folder_state(tmp_path):
    ok = RunFolder(tmp_path / "fresh")
    with pytest.raises(KeyboardInterrupt) as caught:
        with ok.writing():
            raise KeyboardInterrupt
    status = folder_state(caught.value)
    assert status is not None and status.state is FolderState.UNCHANGED
    assert interruption_message(caught.value) == "no results were written"
    assert not (tmp_path / "fresh").exists()      # a folder it created is removed again
    assert interruption_message(KeyboardInterrupt()) == "no results were written"


# --------------------------------------------------------------------------- stale and own files


def test_stale_outputs_go_and_the_users_files_stay(tmp_path, capsys):
    spec = invented_spec()
    spec["output"]["plots"] = False
    spec_path = write_run(tmp_path, spec)
    out = tmp_path / "out"
    assert run_cli(capsys, *fit_args(spec_path, out))[0] == 0
    assert {"scan_kaon.csv", "scan_eta.csv"} <= set(read_manifest(out))
    (out / "my_notes.txt").write_text("mine\n", encoding="utf-8")
    (out / "scan_eta.csv").write_text("edited by hand\n", encoding="utf-8")   # changed since
    spec["fits"][0]["name"] = "kaon2"
    spec["fits"] = spec["fits"][:1]        # eta dropped, kaon renamed
    spec_path = write_run(tmp_path, spec, data=False)
    status, _, err = run_cli(capsys, *fit_args(spec_path, out))
    assert status == 0
    files = set(snapshot(out))
    assert "scan_kaon.csv" not in files and "scan_kaon2.csv" in files   # stale one removed
    assert (out / "my_notes.txt").read_text(encoding="utf-8") == "mine\n"
    assert (out / "scan_eta.csv").read_text(encoding="utf-8") == "edited by hand\n"
    assert "kept" in err and "scan_eta.csv" in err
    assert set(read_manifest(out)) == {"results.json", "run.log", "results.tex",
                                       "scan_kaon2.csv"}


def test_a_tampered_manifest_never_removes_anything_outside_the_folder(tmp_path, capsys):
    spec_path = write_run(tmp_path)
    out = tmp_path / "out"
    assert run_cli(capsys, *fit_args(spec_path, out))[0] == 0
    outside = tmp_path / "precious.txt"
    outside.write_text("keep\n", encoding="utf-8")
    digest = run_folder.file_sha256(outside)
    with open(out / MANIFEST, "a", encoding="utf-8") as handle:
        handle.write(f"{digest}  ../precious.txt\n{digest}  {outside}\n")
        handle.write(f"{run_folder.file_sha256(tmp_path / 'eta.npy')}  ../eta.npy\n")
    assert run_cli(capsys, *fit_args(spec_path, out))[0] == 0
    assert outside.read_text(encoding="utf-8") == "keep\n"
    assert (tmp_path / "eta.npy").is_file()


def test_a_stale_output_that_became_an_input_is_never_removed(tmp_path, capsys):
    # scan_eta.csv was written by the first run; then it is used as data (unchanged bytes)
    spec = one_fit_spec(output={"dir": "out", "plots": False})
    spec_path = write_run(tmp_path, spec)
    out = tmp_path / "out"
    assert run_cli(capsys, *fit_args(spec_path))[0] == 0
    folder = RunFolder(out, inputs=[out / "scan_eta.csv"])
    with folder.writing() as staging:
        (staging / "results.json").write_text("{}\n", encoding="utf-8")
    assert (out / "scan_eta.csv").is_file()
    assert "scan_eta.csv" not in folder.report.removed


def test_a_staging_folder_left_by_a_killed_run_is_cleared(tmp_path, capsys):
    spec_path = write_run(tmp_path)
    out = tmp_path / "out"
    leftover = out / f"{STAGING_PREFIX}killed"
    leftover.mkdir(parents=True)
    (leftover / "results.json").write_text("half\n", encoding="utf-8")
    assert run_cli(capsys, *fit_args(spec_path, out))[0] == 0
    assert not leftover.exists()
    assert json.loads((out / "results.json").read_text(encoding="utf-8"))["fits"]


@pytest.mark.skipif(run_folder.fcntl is None, reason="no advisory locks here")
def test_another_run_writing_into_the_folder_is_exit_2_before_fitting(tmp_path, capsys):
    spec_path = write_run(tmp_path)
    out = tmp_path / "out"
    out.mkdir()
    fd = os.open(out, os.O_RDONLY)
    run_folder.fcntl.flock(fd, run_folder.fcntl.LOCK_EX)
    try:
        status, _, err = run_cli(capsys, *fit_args(spec_path, out))
    finally:
        os.close(fd)
    assert status == 2
    error_line(err, r"--out", r"another plateaufit run")
    assert no_fitting_happened(err)
    assert snapshot(out) == {}


# --------------------------------------------------------------------------- the demo's folder


def test_demo_refuses_to_overwrite_a_file_that_is_not_the_demos(tmp_path, capsys):
    out = tmp_path / "demo"
    (out / "data").mkdir(parents=True)
    (out / "demo.yaml").write_text("my own analysis\n", encoding="utf-8")
    (out / "data" / "notes.txt").write_text("mine\n", encoding="utf-8")
    before = snapshot(out)
    status, _, err = run_cli(capsys, "demo", "--out", out, "--jobs", "1", "--quiet")
    assert status == 2
    error_line(err, r"demo\.yaml", r"--out")
    assert snapshot(out) == before


def test_demo_inputs_identical_to_the_demos_are_left_alone(tmp_path):
    from plateaufit.demo.run import demo_inputs, write_demo_inputs

    out = tmp_path / "demo"
    spec_path = write_demo_inputs(out)
    assert spec_path == out / "demo.yaml"
    stamps = {p: p.stat().st_mtime_ns for p in out.rglob("*") if p.is_file()}
    assert write_demo_inputs(out) == spec_path          # a second demo: nothing rewritten
    assert {p: p.stat().st_mtime_ns for p in out.rglob("*") if p.is_file()} == stamps
    assert set(snapshot(out)) == set(demo_inputs())
    first = sorted(demo_inputs())[0]
    (out / first).write_bytes(b"changed")
    with pytest.raises(Exception) as err:
        write_demo_inputs(out)
    assert type(err.value).__name__ == "DataError" and first in str(err.value)
    assert (out / first).read_bytes() == b"changed"
