"""`plateaufit check`: the summary on the example, and user errors through the command line."""

from __future__ import annotations

import hashlib
import importlib.util
import re
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import yaml

from plateaufit.cli import main
from plateaufit.errors import DataError
from plateaufit.pipeline.check import check_spec
from plateaufit.pipeline.inputs import data_checksums, load_ensemble
from plateaufit.pipeline.rules import load_spec

ROOT = Path(__file__).resolve().parents[1]
EXAMPLE = ROOT / "examples" / "check_example.yaml"


# --------------------------------------------------------------------------- the example


def test_check_example_summary(capsys):
    assert main(["check", str(EXAMPLE)]) == 0
    out = capsys.readouterr().out
    assert "ensemble wren-b16: T = 16, 400 configurations in 2 streams (stream 1: 220, " \
           "stream 2: 180)" in out
    assert out.count("configurations: 400 in 2 streams") == 2
    assert "folded to t = 0..8 (9 timeslices)" in out
    # a tau line in value(error) notation, convention named
    assert re.search(r"tau_int \(1/2 \+ sum rho convention\): t=1: \d\.\d+\(\d+\)", out)
    m = re.search(r"binning: bin size (\d+) \(binning.size: auto.*\) -> (\d+) bins, "
                  r"(\d+) configuration\(s\) dropped", out)
    size, n_bins, dropped = (int(g) for g in m.groups())
    assert n_bins == 220 // size + 180 // size
    assert dropped == 220 % size + 180 % size
    assert re.search(r"effective mass \(cosh\), jackknife over \d+ bins: t=1: 0\.4", out)
    assert "fit pion (fits[0]): cosh, states 1, 2" in out
    assert re.search(r"covariance of the widest range t = 1..8 \(8 points, \d+ bins\): "
                     r"condition number [\d.e+]+ raw, [\d.e+]+ after shrinkage \(ledoit-wolf", out)
    assert "check passed" in out


def test_example_tau_matches_the_ar1_truth():
    # exact result: C(t) is linear in AR(1) noise with phi = 0.5 (examples/make_check_data.py),
    # so tau_int = 1/2 + phi/(1-phi) = 1.5 at every timeslice (1/2 + sum rho convention)
    from plateaufit.stats.autocorr import tau_int

    spec = load_spec(EXAMPLE)
    ens = load_ensemble(spec)
    r = tau_int(ens.correlators["pion"][:, 4], streams=ens.stream_labels)
    assert abs(r.tau - 1.5) < 3 * r.error


def test_example_data_are_reproducible(tmp_path, monkeypatch):
    spec = importlib.util.spec_from_file_location("make_check_data",
                                                  ROOT / "examples" / "make_check_data.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    monkeypatch.setattr(module, "OUT", tmp_path)
    module.main()
    for name in ("pion.txt", "rho.csv"):
        committed = (ROOT / "examples" / "check_data" / name).read_bytes()
        assert (tmp_path / name).read_bytes() == committed, name


def test_load_ensemble_and_checksums_of_the_example():
    spec = load_spec(EXAMPLE)
    ens = load_ensemble(spec)
    assert ens.n_configs == 400 and ens.stream_sizes() == {1: 220, 2: 180}
    assert ens.correlators["pion"].shape == (400, 9)
    # ids come from the csv (stream 1: 1000, 1010, ...; stream 2: 2000, ...)
    assert ens.config_ids[0] == 1000 and ens.config_ids[220] == 2000
    sums = data_checksums(spec)
    for name in ("pion", "rho"):
        expected = hashlib.sha256(spec.observable_path(name).read_bytes()).hexdigest()
        assert sums[name] == expected


# --------------------------------------------------------------------------- user errors


@pytest.fixture
def project(tmp_path, make_correlator):
    """A small valid spec with a text and an npy observable; returns (dir, spec dict)."""
    a = make_correlator(n_cfg=60, T=12, seed=3)
    b = make_correlator(n_cfg=60, T=12, seed=4, energy=0.7)
    np.savetxt(tmp_path / "a.txt", a)
    np.save(tmp_path / "b.npy", b)
    data = {
        "ensemble": {"name": "tiny", "time_extent": 12, "streams": [30, 30]},
        "observables": {"a": {"file": "a.txt"}, "b": {"file": "b.npy"}},
        "binning": {"size": 2},
        "fits": [{"name": "fa", "observables": ["a", "b"], "model": "cosh", "tmin": 2,
                  "tmax": 6}],
    }
    return tmp_path, data


def run(capsys, directory, data):
    path = directory / "spec.yaml"
    path.write_text(yaml.safe_dump(data, sort_keys=False))
    code = main(["check", str(path)])
    captured = capsys.readouterr()
    return code, captured.out, captured.err


def assert_user_error(code, out, err, *needles):
    assert code == 2
    assert out == ""
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    assert lines[0].startswith("plateaufit: error: ")
    assert "Traceback" not in err
    for needle in needles:
        assert needle in lines[0], (needle, lines[0])


def test_valid_project_checks(capsys, project):
    code, out, err = run(capsys, *project)
    assert code == 0 and err == ""
    assert "60 configurations in 2 streams (stream 0: 30, stream 1: 30)" in out
    assert "bin size 2 (binning.size: 2; auto would choose" in out
    assert "-> 30 bins, 0 configuration(s) dropped" in out


def test_missing_data_file(capsys, project):
    d, data = project
    data["observables"]["a"]["file"] = "data/missing.txt"
    code, out, err = run(capsys, d, data)
    assert_user_error(code, out, err, "observables.a.file:", "missing.txt", "not found",
                      "relative to the spec file")


def test_wrong_time_extent_names_both_numbers(capsys, project):
    d, data = project
    data["ensemble"]["time_extent"] = 16
    code, out, err = run(capsys, d, data)
    assert_user_error(code, out, err, "observables.a.file:", "a.txt", "12 timeslices",
                      "time_extent is 16")


def test_stream_counts_that_do_not_add_up(capsys, project):
    d, data = project
    data["ensemble"]["streams"] = [30, 20]
    code, out, err = run(capsys, d, data)
    assert_user_error(code, out, err, "ensemble.streams:", "50", "60")


def test_different_counts_name_each_observable(capsys, project, make_correlator):
    d, data = project
    np.save(d / "b.npy", make_correlator(n_cfg=50, T=12, seed=4))
    code, out, err = run(capsys, d, data)
    assert_user_error(code, out, err, "observables.a.file:", "a (a.txt): 60", "b (b.npy): 50")


def test_missing_configuration_ids_are_listed(capsys, tmp_path, make_correlator):
    import h5py

    values = make_correlator(n_cfg=30, T=8, seed=5)
    with h5py.File(tmp_path / "c.h5", "w") as f:
        f["c"] = values
        f["ids"] = np.arange(30)
    rows = ["config,t,value"] + [f"{i},{t},{float(values[i, t])!r}" for i in range(30) if i != 17
                                 for t in range(8)]
    (tmp_path / "d.csv").write_text("\n".join(rows) + "\n")
    data = {"ensemble": {"name": "x", "time_extent": 8},
            "observables": {"c": {"file": "c.h5", "ids_dataset": "ids"},
                            "d": {"file": "d.csv"}}}
    code, out, err = run(capsys, tmp_path, data)
    assert_user_error(code, out, err, "observables.d.file:", "d (d.csv) lacks 17")


def test_nan_in_the_data(capsys, project):
    d, data = project
    values = np.load(d / "b.npy")
    values[7, 4] = np.nan
    np.save(d / "b.npy", values)
    code, out, err = run(capsys, d, data)
    assert_user_error(code, out, err, "observables.b.file:", "b.npy",
                      "configuration index 7, t = 4")


def test_bin_size_larger_than_the_streams(capsys, project):
    d, data = project
    data["binning"]["size"] = 40
    code, out, err = run(capsys, d, data)
    assert_user_error(code, out, err, "binning.size:", "40")


def test_spec_errors_through_the_cli(capsys, project):
    d, data = project
    data["fits"][0]["tmax"] = 7
    code, out, err = run(capsys, d, data)
    assert_user_error(code, out, err, "fits[0].tmax:", "largest allowed tmax is 6")
    data["fits"][0]["tmax"] = 6
    data["fits"][0]["observables"] = ["a", "c"]
    code, out, err = run(capsys, d, data)
    assert_user_error(code, out, err, "fits[0].observables[1]:", "a, b")


def test_yaml_syntax_error_through_the_cli(capsys, tmp_path):
    path = tmp_path / "broken.yaml"
    path.write_text("ensemble: {name: x, time_extent: 8\nobservables: {}\n")
    code = main(["check", str(path)])
    captured = capsys.readouterr()
    assert_user_error(code, captured.out, captured.err, "broken.yaml", "line")
@pytest.mark.slow   # a process pool or subprocess
def test_subprocess_check_exits_2_with_one_line(project):
    d, data = project
    data["covariance"] = {"shrinkage": 2}
    (d / "spec.yaml").write_text(yaml.safe_dump(data, sort_keys=False))
    exe = Path(sys.executable).with_name("plateaufit")
    proc = subprocess.run([str(exe), "check", str(d / "spec.yaml")], capture_output=True,
                          text=True, timeout=120)
    assert proc.returncode == 2
    assert proc.stdout == ""
    assert "Traceback" not in proc.stderr
    lines = proc.stderr.strip().splitlines()
    assert lines == [lines[0]] and lines[0].startswith("plateaufit: error: covariance.shrinkage:")
    assert "outside [0, 1]" in lines[0]


def test_data_error_classes(project):
    d, data = project
    data["observables"]["a"]["file"] = "nope.txt"
    (d / "spec.yaml").write_text(yaml.safe_dump(data, sort_keys=False))
    with pytest.raises(DataError) as err:
        check_spec(d / "spec.yaml")
    assert err.value.where == "observables.a.file"


def test_unreliable_tau_is_flagged(capsys, tmp_path):
    # a strongly autocorrelated short chain (AR(1), phi = 0.97, 80 configurations):
    # far shorter than the 50 tau the estimator asks for, so tau_int is a lower bound
    rng = np.random.default_rng(12)
    n, T, phi = 80, 8, 0.97
    eta = np.empty(n)
    eta[0] = rng.standard_normal()
    for i in range(1, n):
        eta[i] = phi * eta[i - 1] + np.sqrt(1 - phi**2) * rng.standard_normal()
    t = np.arange(T)
    truth = np.exp(-0.5 * t) + np.exp(-0.5 * (T - t))
    values = truth * (1 + 0.01 * (eta[:, None] + 0.3 * rng.standard_normal((n, T))))
    np.savetxt(tmp_path / "c.txt", values)
    data = {"ensemble": {"name": "short", "time_extent": T},
            "observables": {"c": {"file": "c.txt"}}}
    code, out, err = run(capsys, tmp_path, data)
    assert code == 0
    assert "(lower bound)" in out and "UNRELIABLE tau_int at t = " in out
    assert "warning: c: tau_int is unreliable" in out


def test_unshrunk_singular_covariance_is_reported(capsys, project):
    d, data = project
    data["binning"]["size"] = 6          # 10 bins
    data["covariance"] = {"shrinkage": "none"}
    data["fits"][0]["tmin"] = 0          # 2 observables x 7 timeslices = 14 points > 10 bins
    code, out, err = run(capsys, d, data)
    # the fit would stop on this covariance, so the check must not pass
    assert code == 2
    assert "fits[0]" in err and "14 points" in err and "10 bins" in err
    assert "shrinkage" in err


def test_check_and_fit_choose_the_same_automatic_bin_size(capsys, project, tmp_path):
    # one rule, two users: check must report the bin size fit will use
    import re

    from plateaufit.pipeline.run import run_spec

    d, data = project
    data["binning"]["size"] = "auto"
    data["covariance"] = {"shrinkage": "none"}
    code, out, err = run(capsys, d, data)
    assert code == 0, err
    size = int(re.search(r"binning: bin size (\d+)", out).group(1))
    results = run_spec(d / "spec.yaml", tmp_path / "out", plots=False, jobs=1, progress=False)
    assert results["ensemble"]["bin_size"] == size


def test_without_shrinkage_auto_binning_keeps_more_bins_than_fit_points(tmp_path):
    # an unshrunk covariance of p points needs more than p bins (exact: rank <= n_bins - 1)
    from plateaufit.pipeline.prepare import minimum_bins
    from plateaufit.pipeline.rules import validate_spec

    data = {"ensemble": {"name": "wide", "time_extent": 64},
            "observables": {"a": {"file": "a.txt"}, "b": {"file": "b.txt"}},
            "covariance": {"shrinkage": "none"},
            "fits": [{"name": "ab", "observables": ["a", "b"], "model": "cosh",
                      "tmin": [2, 4], "tmax": 20}]}
    assert minimum_bins(validate_spec(data, base_dir=tmp_path)) == 2 * 19 + 1
    data["covariance"] = {"shrinkage": "ledoit-wolf"}
    assert minimum_bins(validate_spec(data, base_dir=tmp_path)) == 20


def test_check_fails_exactly_where_fit_would(capsys, project, tmp_path):
    # 10 bins of 6; without shrinkage the covariance of 2 x 7 points of the first scan
    # point is singular: fit stops there, and check (which sets every point up as fit
    # does, before anything else) stops with the same message
    directory, data = project
    data["binning"] = {"size": 6}
    data["covariance"] = {"shrinkage": "none"}
    data["fits"][0].update(tmin=[0, 2], tmax=[4, 6])
    path = directory / "spec.yaml"
    path.write_text(yaml.safe_dump(data, sort_keys=False))
    code, out, err = run(capsys, directory, data)
    fit_code = main(["fit", str(path), "--out", str(tmp_path / "out"), "--no-plots",
                     "--jobs", "1", "--quiet"])
    fit_err = capsys.readouterr().err.strip().splitlines()[-1]
    assert code == fit_code == 2
    assert_user_error(code, out, err, "fits[0]", "tmin=0, tmax=4", "singular")
    assert err.strip() == fit_err
    assert not (tmp_path / "out" / "results.json").exists()


@pytest.mark.slow
def test_check_into_a_pipe_closed_early_is_quiet(project):
    # `plateaufit check SPEC | head -1`: the reader goes away; no traceback, the status a
    # shell gives a writer killed by SIGPIPE (141)
    import subprocess
    import sys
    from pathlib import Path

    directory, data = project
    path = directory / "spec.yaml"
    path.write_text(yaml.safe_dump(data, sort_keys=False))
    exe = Path(sys.executable).with_name("plateaufit")
    proc = subprocess.Popen([str(exe), "check", str(path)], stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE)
    proc.stdout.close()                       # the reader leaves before anything is read
    err = proc.stderr.read().decode()
    assert proc.wait(timeout=120) in (0, 141)
    assert "Traceback" not in err and "BrokenPipeError" not in err, err
