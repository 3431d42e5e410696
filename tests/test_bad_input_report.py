"""Bad-input catalogue, damaged results for ``plateaufit report DIR``: exit 2, file and key named.

A results.json may be truncated, garbage, of the wrong type, edited by hand,
from an older layout, or not a file at all; the plots folder may be missing or
a file. Every case: status 2 (or 0 where the folder is usable), the file and
the key path in the one error line, no traceback, and the folder unchanged.
A hypothesis fuzz damages results.json at random keys: the reading, the tables
and the page either work or raise the user error, never anything else.
"""

from __future__ import annotations

import copy
import json
import os
import re
import shutil
from pathlib import Path
from typing import Any

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from bad_input import error_line, one_fit_spec, run_cli, snapshot, write_run
from plateaufit.errors import DataError
from plateaufit.report.html import render_report
from plateaufit.report.reading import damaged, read_results, trail_of
from plateaufit.report.tables import write_tables
from plateaufit.run_folder import MANIFEST


@pytest.fixture(scope="module")
def finished(tmp_path_factory) -> tuple[Path, dict[str, Any]]:
    """A finished run (the eta fit, a derived quantity, no plots): (out dir, results)."""
    from plateaufit.pipeline.run import run_spec

    directory = tmp_path_factory.mktemp("finished")
    spec = one_fit_spec()
    spec["derived"] = {"twice": "eta.E0 * 2"}
    spec_path = write_run(directory, spec)
    results = run_spec(spec_path, directory / "out", plots=False, jobs=1, progress=False)
    return directory / "out", results


@pytest.fixture
def folder(finished, tmp_path) -> Path:
    """A copy of the finished run's folder to damage."""
    out = tmp_path / "out"
    shutil.copytree(finished[0], out)
    return out


def _set(path: tuple, value: Any):
    def change(d: dict) -> None:
        node = d
        for key in path[:-1]:
            node = node[key]
        if value == "<deleted>":
            del node[path[-1]]
        else:
            node[path[-1]] = value
    return change


def _shorten(path: tuple):
    def change(d: dict) -> None:
        node = d
        for key in path:
            node = node[key]
        del node[1:]
    return change


def _older(d: dict) -> None:   # an older layout: parameters as bare numbers, no method
    d["version"] = "0.0.1"
    chosen = d["fits"]["eta"]["chosen"]
    del chosen["method"]


def _bare_numbers(d: dict) -> None:
    params = d["fits"]["eta"]["chosen"]["params"]
    for name in params:
        params[name] = params[name]["value"]


# name -> (change of the results dict, regexes the error line must match besides the file)
DAMAGE: dict[str, tuple[Any, list[str]]] = {
    "scan-tmin-as-text": (_set(("fits", "eta", "scan", 0, "tmin"), "4"),
                          [r"fits\.eta\.scan\[0\]\.tmin", r"whole number"]),
    "negative-error": (_set(("fits", "eta", "chosen", "params", "E0", "error"), -0.1),
                       [r"fits\.eta\.chosen\.params\.E0\.error", r"negative"]),
    "tau-window-as-text": (_set(("ensemble", "tau_int", "eta", "window"), "w"),
                           [r"ensemble\.tau_int\.eta\.window"]),
    "effective-mass-too-short": (_shorten(("fits", "eta", "effective_mass", "eta", "value")),
                                 [r"fits\.eta\.effective_mass\.eta", r"same length"]),
    "correlation-ragged": (_shorten(("fits", "eta", "covariance", "correlation", 0)),
                           [r"fits\.eta\.covariance\.correlation", r"square"]),
    "provenance-a-list": (_set(("provenance",), [1, 2]), [r"key provenance\b", r"mapping"]),
    "warnings-a-mapping": (_set(("warnings",), {"a": 1}), [r"key warnings\b", r"list"]),
    "truth-as-text": (_set(("truth",), {"eta": {"E0": "x"}}), [r"truth\.eta\.E0"]),
    "derived-value-as-text": (_set(("derived", "twice", "value"), "x"),
                              [r"derived\.twice\.value"]),
    "fits-a-list": (_set(("fits",), []), [r"key fits\b", r"mapping"]),
    "scan-missing": (_set(("fits", "eta", "scan"), "<deleted>"),
                     [r"required key fits\.eta\.scan is missing"]),
    "scan-point-a-number": (_set(("fits", "eta", "scan", 0), 7),
                            [r"fits\.eta\.scan\[0\]"]),
    "ensemble-missing": (_set(("ensemble",), "<deleted>"), [r"required key ensemble"]),
    "older-layout-without-method": (_older, [r"fits\.eta\.chosen\.method",
                                             r"written by plateaufit 0\.0\.1"]),
    "older-layout-bare-numbers": (_bare_numbers,
                                  [r"fits\.eta\.chosen\.params\.E0\.value is missing"]),
    "stream-sizes-as-text": (_set(("ensemble", "stream_sizes"), "abc"),
                             [r"ensemble\.stream_sizes"]),
    "tmin-above-tmax": (_set(("fits", "eta", "scan", 0, "tmax"), 1),
                        [r"fits\.eta\.scan\[0\]", r"above tmax"]),
}


@pytest.mark.parametrize("case", list(DAMAGE))
def test_damaged_results_are_exit_2_naming_the_file_and_the_key(case, folder, capsys):
    change, patterns = DAMAGE[case]
    path = folder / "results.json"
    data = json.loads(path.read_text(encoding="utf-8"))
    change(data)
    path.write_text(json.dumps(data), encoding="utf-8")
    before = snapshot(folder)
    status, _, err = run_cli(capsys, "report", folder)
    assert status == 2
    error_line(err, re.escape(str(path)), *patterns, r"rerun")
    assert snapshot(folder) == before


def _truncated(text: str) -> bytes:
    return text[: len(text) // 2].encode()


# name -> (the bytes of results.json from the good text, regexes)
BYTES: dict[str, tuple[Any, list[str]]] = {
    "truncated": (_truncated, [r"not valid JSON", r"line \d+"]),
    "empty": (lambda text: b"", [r"empty"]),
    "blank": (lambda text: b"  \n\n", [r"empty"]),
    "garbage": (lambda text: bytes(range(256)) * 4, [r"not UTF-8"]),
    "a-list": (lambda text: b"[1, 2, 3]", [r"JSON object"]),
    "a-number": (lambda text: b"42", [r"JSON object"]),
    "nested-too-deep": (lambda text: b"[" * 100_000 + b"]" * 100_000,
                        [r"(?i)nested|JSON object"]),
    "nan-tokens-at-a-key": (lambda text: text.replace('"chi2": ', '"chi2": "NaN", "x": ',
                                                       1).encode(),
                            [r"chi2"]),
}


@pytest.mark.parametrize("case", list(BYTES))
def test_unreadable_results_are_exit_2_naming_the_file(case, folder, capsys):
    make, patterns = BYTES[case]
    path = folder / "results.json"
    path.write_bytes(make(path.read_text(encoding="utf-8")))
    before = snapshot(folder)
    status, _, err = run_cli(capsys, "report", folder)
    assert status == 2
    error_line(err, re.escape(str(path)), *patterns)
    assert snapshot(folder) == before


@pytest.mark.parametrize("kind", ["directory", "fifo", "device-link", "missing"])
def test_a_results_json_that_is_no_file_never_blocks(kind, folder, capsys):
    path = folder / "results.json"
    path.unlink()
    if kind == "directory":
        path.mkdir()
    elif kind == "fifo":
        os.mkfifo(path)
    elif kind == "device-link":
        path.symlink_to("/dev/zero")
    status, _, err = run_cli(capsys, "report", folder)
    assert status == 2
    error_line(err, re.escape(str(path)),
               r"no results\.json" if kind == "missing" else r"not a regular file")


@pytest.mark.parametrize("kind", ["missing", "a-file"])
def test_report_of_a_folder_that_is_not_one(kind, tmp_path, capsys):
    target = tmp_path / "nothing"
    if kind == "a-file":
        target.write_text("x\n", encoding="utf-8")
    status, _, err = run_cli(capsys, "report", target)
    assert status == 2
    error_line(err, re.escape(str(target)), r"output folder")


def test_a_plots_file_in_the_way_is_exit_2_and_the_folder_unchanged(folder, capsys):
    (folder / "plots").write_text("my own notes\n", encoding="utf-8")
    before = snapshot(folder)
    status, _, err = run_cli(capsys, "report", folder)
    assert status == 2
    error_line(err, r"plots", r"file")
    assert snapshot(folder) == before


@pytest.mark.slow   # draws every plot of the run
def test_a_missing_plots_folder_is_drawn_again_and_stale_plots_go(folder, capsys):
    # an earlier page's plot that this results.json no longer has, listed in the manifest
    (folder / "plots").mkdir()
    stale = folder / "plots" / "gone.effmass.x.png"
    stale.write_bytes(b"\x89PNG old")
    mine = folder / "plots" / "my_sketch.png"
    mine.write_bytes(b"\x89PNG mine")
    from plateaufit.run_folder import file_sha256
    with open(folder / MANIFEST, "a", encoding="utf-8") as handle:
        handle.write(f"{file_sha256(stale)}  plots/gone.effmass.x.png\n")
    results_before = (folder / "results.json").read_bytes()
    status, out, err = run_cli(capsys, "report", folder)
    assert status == 0, err
    assert "report page" in out and (folder / "report.html").is_file()
    drawn = {p.name for p in (folder / "plots").iterdir()}
    assert "eta.effmass.eta.png" in drawn and "eta.effmass.eta.pdf" in drawn
    assert not stale.exists() and mine.read_bytes() == b"\x89PNG mine"
    assert (folder / "results.json").read_bytes() == results_before   # never rewritten
    manifest = (folder / MANIFEST).read_text(encoding="utf-8")
    assert "results.json" in manifest and "plots/eta.effmass.eta.png" in manifest
    assert "my_sketch.png" not in manifest


# --------------------------------------------------------------------------- fuzzing


def _leaf_paths(node: Any, path: tuple = ()):
    if isinstance(node, dict):
        for k, v in node.items():
            yield path + (k,)
            yield from _leaf_paths(v, path + (k,))
    elif isinstance(node, list):
        for i, v in enumerate(node[:2]):
            yield path + (i,)
            yield from _leaf_paths(v, path + (i,))


_JUNK = st.one_of(st.none(), st.booleans(), st.integers(-10**30, 10**30), st.floats(),
                  st.text(max_size=5), st.lists(st.integers(), max_size=3),
                  st.dictionaries(st.text(max_size=3), st.integers(), max_size=2))


@settings(max_examples=150, deadline=None, derandomize=True, database=None,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])
@given(data=st.data())
def test_fuzz_damaged_results_read_or_refused(data, finished, tmp_path_factory):
    out, results = finished
    paths = list(_leaf_paths(results))
    damaged_results = copy.deepcopy(results)
    for _ in range(data.draw(st.integers(1, 3))):
        path = data.draw(st.sampled_from(paths))
        node: Any = damaged_results
        try:
            for key in path[:-1]:
                node = node[key]
            if data.draw(st.booleans()) and isinstance(node, dict):
                node.pop(path[-1], None)
            else:
                node[path[-1]] = data.draw(_JUNK)
        except (KeyError, IndexError, TypeError):
            continue      # an earlier damage removed the way there
    folder = tmp_path_factory.mktemp("fuzz_results")
    (folder / "results.json").write_text(json.dumps(damaged_results), encoding="utf-8")
    try:
        tracked, _ = read_results(folder)
        with damaged(folder / "results.json", trail_of(tracked)):
            write_tables(tracked, folder)
            render_report(tracked, figures={})
    except DataError as err:
        assert err.where.endswith("results.json")
        assert "rerun" in err.message or "key" in err.message
