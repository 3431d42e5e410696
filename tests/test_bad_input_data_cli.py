"""Bad-input catalogue, data files through the command line (the gaps left by the loader tests).

``tests/test_loaders_bad_input.py`` and ``tests/test_loaders_fuzz.py`` cover the
loaders; here the same kinds of file reach ``check`` and ``fit``: a pipe as a
data file, ensembles too short for an autocorrelation (tau_int not estimable:
never printed as nan or a negative number, never a crash), and files whose rows
the loader reorders (the data summary says so, with the files' stream names).
"""

from __future__ import annotations

import json
import os
import re
from pathlib import Path

import numpy as np
import pytest

from bad_input import (error_line, fit_args, no_fitting_happened, one_fit_spec, run_cli, snapshot,
                       time_limit)
from test_runner_end_to_end import STREAMS, invented_spec, write_invented_data, write_spec

T = 24
#: a tau_int or error printed as nan or below zero (the tau lines of check and the log)
BAD_TAU = re.compile(r"tau_int[^\n]*(\bnan\b|[=:(] ?-\d)", re.I)

@pytest.mark.parametrize("command", ["check", "fit"])
def test_a_pipe_as_data_file_is_exit_2_without_blocking(command, tmp_path, capsys):
    write_invented_data(tmp_path)
    (tmp_path / "eta.npy").unlink()
    os.mkfifo(tmp_path / "eta.npy")
    spec_path = write_spec(tmp_path, one_fit_spec())
    with time_limit(30):
        status, _, err = run_cli(capsys, *([command, spec_path] if command == "check"
                                           else fit_args(spec_path, tmp_path / "out")))
    assert status == 2
    error_line(err, r"observables\.eta\.file", r"eta\.npy", r"pipe")
    assert no_fitting_happened(err) and not (tmp_path / "out").exists()


def _short_ensemble(directory: Path, n_cfg: int, size: int | str,
                    shrinkage: str | float = 0.5) -> Path:
    """A correlator of ``n_cfg`` configurations (one state, E = 0.5), and its spec."""
    rng = np.random.default_rng(20_240_611)
    t = np.arange(T)
    exact = 1.2 * (np.exp(-0.5 * t) + np.exp(-0.5 * (T - t)))
    np.savetxt(directory / "short.txt", exact * (1 + 0.01 * rng.standard_normal((n_cfg, T))))
    spec = {"ensemble": {"name": "tiny", "time_extent": T},
            "observables": {"short": {"file": "short.txt"}},
            "binning": {"size": size},
            "covariance": {"shrinkage": shrinkage},
            "fits": [{"name": "short", "observables": ["short"], "model": "cosh",
                      "tmin": 4, "tmax": 6}],
            "output": {"dir": "out", "plots": False}}
    return write_spec(directory, spec)


def test_two_configurations_with_automatic_binning_is_exit_2_at_binning_size(tmp_path, capsys):
    spec_path = _short_ensemble(tmp_path, 2, "auto")
    status, _, err = run_cli(capsys, "check", spec_path)
    assert status == 2
    error_line(err, r"binning\.size", r"explicitly")


@pytest.mark.parametrize("n_cfg", [2, 3, 4])
def test_too_few_configurations_tau_int_is_not_estimable_and_nothing_crashes(n_cfg, tmp_path,
                                                                            capsys):
    spec_path = _short_ensemble(tmp_path, n_cfg, 1)
    status, out, err = run_cli(capsys, "check", spec_path)
    assert status == 0, err
    assert "not estimable" in out and not BAD_TAU.search(out), out
    if n_cfg == 2:       # estimable nowhere: no automatic bin size to compare with
        assert "auto could not choose one" in out
        assert "largest tau_int: not estimable at any timeslice" in out
    status, _, err = run_cli(capsys, *fit_args(spec_path))
    assert status == 0, err
    assert "Traceback" not in err and not BAD_TAU.search(err)
    results = json.loads((tmp_path / "out" / "results.json").read_text(encoding="utf-8"))
    tau = results["ensemble"]["tau_int"]["short"]
    assert tau["reliable"] is False
    if n_cfg == 2:
        assert tau["value"] is None and tau["error"] is None
        assert any("not estimable" in w for w in results["warnings"])
        from plateaufit.report.html import render_report
        assert "not estimable" in render_report(results, figures={})
    else:
        assert tau["value"] >= 0 and tau["error"] >= 0
    assert not any(BAD_TAU.search(w) for w in results["warnings"])


def test_singular_covariance_advice_fits_the_shrinkage_already_set(tmp_path, capsys):
    # ledoit-wolf is set (the default) yet 2 bins leave 3 points singular: the advice is a
    # fixed, larger intensity -- not "use shrinkage 'ledoit-wolf'"
    spec_path = _short_ensemble(tmp_path, 2, 1, shrinkage="ledoit-wolf")
    for args in (["check", spec_path], fit_args(spec_path)):
        status, _, err = run_cli(capsys, *args)
        assert status == 2
        line = error_line(err, r"fits\[0\]", r"(?i)fixed\)? shrinkage")
        assert "use shrinkage 'ledoit-wolf'" not in line


def _write_shuffled_csv(directory: Path) -> None:
    """kaon as a long CSV, configurations shuffled, streams labelled 'alpha' and 'beta'."""
    values = np.loadtxt(directory / "kaon.txt")
    labels = np.repeat(["alpha", "beta"], STREAMS)
    ids = np.concatenate([np.arange(n) for n in STREAMS])
    order = np.random.default_rng(7).permutation(len(values))
    rows = ["stream,config,t,value"]
    for i in order:
        rows += [f"{labels[i]},{ids[i]},{t},{float(values[i, t])!r}" for t in range(T)]
    (directory / "kaon.csv").write_text("\n".join(rows) + "\n", encoding="utf-8")
    (directory / "kaon.txt").unlink()


def test_check_says_which_files_were_reordered_and_names_the_streams(tmp_path, capsys):
    write_invented_data(tmp_path)
    _write_shuffled_csv(tmp_path)
    spec = invented_spec()
    spec["observables"]["kaon"]["file"] = "kaon.csv"
    spec["ensemble"].pop("streams")          # the CSV file labels its streams
    spec_path = write_spec(tmp_path, spec)
    before = snapshot(tmp_path)
    status, out, err = run_cli(capsys, "check", spec_path)
    assert status == 0, err
    assert "2 streams (stream alpha: 170, stream beta: 150)" in out   # names, not codes
    assert re.search(r"reordered: .* \d+ of 320 configurations were put in Monte Carlo order",
                     out)
    # eta.npy has no ids, so the observables are matched row by row: say what that needs
    assert re.search(r"warning: the files of kaon were reordered .* row by row: files without "
                     r"ids must list their configurations in Monte Carlo order", out)
    assert snapshot(tmp_path) == before
