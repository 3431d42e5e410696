"""`run_spec` end to end on a small invented ensemble: the results.json contract.

The ensemble, ``heron-a24``, is fictional: T = 24, two Monte Carlo streams of
170 and 150 configurations, two periodic correlators generated from a known
truth with a fixed seed (see :func:`write_invented_data`):

* ``kaon`` (text file): two states, E0 = 0.42, A0 = 1.5, E1 = 1.45, A1 = 0.9;
* ``eta`` (npy file): one state, E0 = 0.65, A0 = 0.9.

Noise is multiplicative, ``C(t) (1 + s(t) eta(t))``, with ``eta`` an AR(1)
process in Monte Carlo time (phi = 0.4, per stream) partly shared between
timeslices, so the data are autocorrelated and correlated in t as real data are.

The helpers :func:`write_invented_data`, :func:`invented_spec`,
:func:`write_spec` and :func:`write_invented_run` are also used by
``tests/test_cli_fit_errors.py``.
"""

from __future__ import annotations

import copy
import csv
import hashlib
import json
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import yaml

from plateaufit.data.transforms import fold
from plateaufit.fit.correlator_fit import fit_correlator
from plateaufit.pipeline.run import run_spec
from plateaufit.stats.resample import bin_samples, jackknife_error

SEED = 24_0611
T = 24
STREAMS = (170, 150)
#: the invented truth: observable -> [(energy, amplitude), ...]
STATES = {"kaon": [(0.42, 1.5), (1.45, 0.9)], "eta": [(0.65, 0.9)]}
TRUTH_E0 = {"kaon": 0.42, "eta": 0.65}
PHI = 0.4

BASE_SPEC: dict[str, Any] = {
    "ensemble": {"name": "heron-a24", "time_extent": T, "streams": list(STREAMS)},
    "observables": {
        "kaon": {"file": "kaon.txt", "boundary": "periodic"},
        "eta": {"file": "eta.npy", "boundary": "periodic"},
    },
    "binning": {"size": "auto"},
    "covariance": {"shrinkage": "ledoit-wolf", "target": "diagonal"},
    "fits": [
        # a scan of three fit ranges, averaged
        {"name": "kaon", "observables": ["kaon"], "model": "cosh", "states": 1,
         "tmin": [7, 9], "tmax": 12},
        # a single fit range
        {"name": "eta", "observables": ["eta"], "model": "cosh", "states": 1,
         "tmin": 4, "tmax": 11},
    ],
    "output": {"dir": "results", "plots": False},
}


# --------------------------------------------------------------------------- helpers


def _ar1(rng: np.random.Generator, n: int, k: int, phi: float) -> np.ndarray:
    """(n, k) unit-variance AR(1) series along the first axis, started stationary."""
    z = rng.standard_normal((n, k))
    x = np.empty((n, k))
    x[0] = z[0]
    c = np.sqrt(1.0 - phi * phi)
    for i in range(1, n):
        x[i] = phi * x[i - 1] + c * z[i]
    return x


def invented_correlator(rng: np.random.Generator, states: list[tuple[float, float]],
                        *, rel_noise: float = 0.012, phi: float = PHI) -> np.ndarray:
    """(sum STREAMS, T) periodic correlator from ``states`` with multiplicative noise."""
    t = np.arange(T)
    exact = sum(a * (np.exp(-e * t) + np.exp(-e * (T - t))) for e, a in states)
    pieces = [0.8 * _ar1(rng, n, 1, phi) + 0.6 * _ar1(rng, n, T, phi) for n in STREAMS]
    noise = np.concatenate(pieces, axis=0)
    return exact * (1.0 + rel_noise * np.exp(0.04 * t) * noise)


def write_invented_data(directory: Path, seed: int = SEED) -> dict[str, np.ndarray]:
    """Write kaon.txt and eta.npy into ``directory``; return the arrays (n_cfg, T)."""
    rng = np.random.default_rng(seed)
    data = {name: invented_correlator(rng, states) for name, states in STATES.items()}
    directory.mkdir(parents=True, exist_ok=True)
    write_kaon(directory, data["kaon"])
    np.save(directory / "eta.npy", data["eta"])
    return data


def write_kaon(directory: Path, values: np.ndarray) -> Path:
    path = directory / "kaon.txt"
    np.savetxt(path, values, fmt="%.10e",
               header="invented data: ensemble heron-a24, T = 24; one row per configuration")
    return path


def invented_spec() -> dict[str, Any]:
    """A deep copy of the base spec, to modify."""
    return copy.deepcopy(BASE_SPEC)


def write_spec(directory: Path, spec: dict[str, Any], name: str = "spec.yaml") -> Path:
    path = directory / name
    path.write_text(yaml.safe_dump(spec, sort_keys=False), encoding="utf-8")
    return path


def write_invented_run(directory: Path, spec: dict[str, Any] | None = None) -> Path:
    """Data and spec in ``directory``; returns the spec path."""
    write_invented_data(directory)
    return write_spec(directory, invented_spec() if spec is None else spec)


def folded_binned(directory: Path, name: str, bin_size: int,
                  correction: float = 1.0) -> np.ndarray:
    """What the runner should fit, rebuilt by hand: load, fold, bin within streams, and
    scale the bins about their mean by the run's binning correction (binning.correction,
    ``results["ensemble"]["binning_correction"]``)."""
    path = directory / ("kaon.txt" if name == "kaon" else "eta.npy")
    raw = np.loadtxt(path) if path.suffix == ".txt" else np.load(path)
    streams = np.repeat(np.arange(len(STREAMS)), STREAMS)
    bins = bin_samples(fold(raw, "periodic"), bin_size, streams)
    mean = bins.mean(axis=0)
    return mean + correction * (bins - mean)


def _read_json(path: Path) -> dict[str, Any]:
    return json.loads(path.read_text(encoding="utf-8"))


# --------------------------------------------------------------------------- one shared run


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    """One serial run of the base spec without plots: (spec path, out dir, returned dict)."""
    directory = tmp_path_factory.mktemp("heron")
    spec_path = write_invented_run(directory)
    out = directory / "out"
    results = run_spec(spec_path, out, plots=False, jobs=1, progress=False)
    return spec_path, out, results


def test_every_contract_key_is_present(run):
    _, _, res = run
    ens = res["ensemble"]
    for key in ("n_configs", "n_bins", "bin_size"):
        assert isinstance(ens[key], int), key
    for name in ("kaon", "eta"):
        tau = ens["tau_int"][name]
        assert isinstance(tau["value"], float) and isinstance(tau["error"], float)
        assert isinstance(tau["window"], int)
    assert set(res["fits"]) == {"kaon", "eta"}
    for fit_name, fit in res["fits"].items():
        chosen = fit["chosen"]
        assert chosen["method"] in ("single", "average")
        assert set(chosen["params"]) == {"E0", f"A0.{fit_name}"}
        for entry in chosen["params"].values():
            for key in ("value", "error", "stat_error", "sys_error"):
                assert isinstance(entry[key], float), (fit_name, key)
        assert fit["scan"]
        for row in fit["scan"]:
            for key in ("tmin", "tmax", "states", "dof"):
                assert isinstance(row[key], int), key
            for key in ("chi2", "p_value", "aic", "weight"):
                assert isinstance(row[key], float), key
            assert isinstance(row["converged"], bool)
            assert row["model"] == "cosh"
            for entry in row["params"].values():
                assert isinstance(entry["value"], float) and isinstance(entry["error"], float)
    prov = res["provenance"]
    assert prov["version"] == res["version"]
    assert set(prov["data_sha256"]) == {"kaon", "eta"}


def test_the_ensemble_section_counts_configurations_and_bins(run):
    _, _, res = run
    ens = res["ensemble"]
    assert ens["n_configs"] == sum(STREAMS)
    size = ens["bin_size"]
    assert size >= 1
    # bins never cross a stream boundary; leftovers at each stream's end are dropped
    assert ens["n_bins"] == sum(n // size for n in STREAMS)
    assert ens["n_dropped"] == sum(n % size for n in STREAMS)
    # the noise is AR(1) with phi = 0.4 at every timeslice; an exact result for AR(1):
    # tau_int = 1/2 + phi / (1 - phi) = 1.1667 (1/2 + sum rho convention). The runner reports
    # the largest tau over timeslices, so it is not below the truth by more than 3 sigma.
    exact = 0.5 + PHI / (1.0 - PHI)
    for name in ("kaon", "eta"):
        tau = ens["tau_int"][name]
        assert tau["value"] > exact - 3 * tau["error"], name
        assert tau["value"] < 3 * exact, name


def test_results_json_equals_the_returned_dict(run):
    _, out, res = run
    assert _read_json(out / "results.json") == res


def test_a_run_writes_the_log_and_the_scan_tables(run):
    _, out, res = run
    log = (out / "run.log").read_text(encoding="utf-8")
    assert "tau_int (1/2 + sum rho convention)" in log
    assert "fit kaon: E0 = " in log and "fit eta: E0 = " in log
    for name, fit in res["fits"].items():
        with open(out / f"scan_{name}.csv", newline="", encoding="utf-8") as handle:
            rows = list(csv.DictReader(handle))
        assert len(rows) == len(fit["scan"]), name
        assert [(int(r["tmin"]), int(r["tmax"])) for r in rows] == \
               [(s["tmin"], s["tmax"]) for s in fit["scan"]]
    # plots=False: neither the page nor the plots
    assert not (out / "report.html").exists()
    assert not (out / "plots").exists()


def test_provenance_checksums_are_those_of_the_files(run):
    spec_path, _, res = run
    prov = res["provenance"]
    assert prov["spec_sha256"] == hashlib.sha256(spec_path.read_bytes()).hexdigest()
    directory = spec_path.parent
    assert prov["data_sha256"]["kaon"] == \
        hashlib.sha256((directory / "kaon.txt").read_bytes()).hexdigest()
    assert prov["data_sha256"]["eta"] == \
        hashlib.sha256((directory / "eta.npy").read_bytes()).hexdigest()


def test_a_single_fit_range_is_reported_as_that_fit(run):
    spec_path, _, res = run
    fit = res["fits"]["eta"]
    assert fit["chosen"]["method"] == "single"
    assert len(fit["scan"]) == 1 and fit["scan"][0]["weight"] == 1.0
    row = fit["scan"][0]
    assert (row["tmin"], row["tmax"], row["states"]) == (4, 11, 1)
    assert row["dof"] == (11 - 4 + 1) - 2
    for name, entry in fit["chosen"]["params"].items():
        assert entry["sys_error"] == 0.0, name
        assert entry["error"] == entry["stat_error"], name
        assert entry["value"] == row["params"][name]["value"]
        assert entry["error"] == row["params"][name]["error"]

    # the same fit by hand, on the data binned with the reported bin size
    binned = folded_binned(spec_path.parent, "eta", res["ensemble"]["bin_size"],
                           res["ensemble"]["binning_correction"])
    assert binned.shape == (res["ensemble"]["n_bins"], T // 2 + 1)
    by_hand = fit_correlator({"eta": binned}, form="cosh", states=1, tmin=4, tmax=11,
                             time_extent=T)
    e0 = fit["chosen"]["params"]["E0"]
    # the value is the central fit's, not the jackknife mean
    assert e0["value"] == pytest.approx(by_hand.central.reported["E0"], rel=1e-13)
    assert e0["value"] != pytest.approx(float(np.mean(by_hand.samples[:, 0])), rel=1e-12)
    assert e0["stat_error"] == pytest.approx(by_hand.errors["E0"], rel=1e-8)
    assert fit["chosen"]["chi2"] == pytest.approx(by_hand.central.chi2, rel=1e-8, abs=1e-10)
    # and the jackknife error is the delete-one formula on the refits
    assert e0["stat_error"] == pytest.approx(float(jackknife_error(by_hand.samples[:, 0])),
                                             rel=1e-8)


def test_a_model_average_is_the_aic_weighted_scan(run):
    _, _, res = run
    fit = res["fits"]["kaon"]
    assert fit["chosen"]["method"] == "average"
    scan = fit["scan"]
    assert [(r["tmin"], r["tmax"]) for r in scan] == [(7, 12), (8, 12), (9, 12)]
    w = np.array([r["weight"] for r in scan])
    assert w.sum() == pytest.approx(1.0, abs=1e-12)
    assert np.all(w >= 0)
    # weights proportional to exp(-AIC/2) (Jay & Neil 2021, Phys. Rev. D 103, 114502)
    aic = np.array([r["aic"] for r in scan])
    expected = np.exp(-(aic - aic.min()) / 2)
    np.testing.assert_allclose(w, expected / expected.sum(), rtol=1e-9, atol=1e-15)
    # value = sum w_f value_f; sys^2 = sum w_f value_f^2 - value^2; total = hypot(stat, sys)
    for name, entry in fit["chosen"]["params"].items():
        v = np.array([r["params"][name]["value"] for r in scan])
        mean = float(w @ v)
        assert entry["value"] == pytest.approx(mean, rel=1e-12)
        assert entry["sys_error"] == pytest.approx(np.sqrt(max(w @ v**2 - mean**2, 0.0)),
                                                   rel=1e-6, abs=1e-12)
        assert entry["error"] == pytest.approx(np.hypot(entry["stat_error"],
                                                        entry["sys_error"]), rel=1e-12)
        # the jackknife error is a (scaled) Euclidean norm of the sample deviations, so by the
        # triangle inequality the error of sum_f w_f samples_f is at most sum_f w_f error_f
        errs = np.array([r["params"][name]["error"] for r in scan])
        assert 0 < entry["stat_error"] <= float(w @ errs) * (1 + 1e-9)


def test_the_fitted_ground_state_recovers_the_invented_truth(run):
    _, _, res = run
    for name, truth in TRUTH_E0.items():
        e0 = res["fits"][name]["chosen"]["params"]["E0"]
        assert e0["error"] > 0
        assert abs(e0["value"] - truth) < 3 * e0["error"], (name, e0, truth)


# --------------------------------------------------------------------------- separate runs


def test_choose_reports_the_named_point(tmp_path):
    spec = invented_spec()
    spec["fits"] = [dict(spec["fits"][0], choose={"tmin": 8, "tmax": 12})]
    spec_path = write_invented_run(tmp_path, spec)
    res = run_spec(spec_path, tmp_path / "out", plots=False, jobs=1, progress=False)
    fit = res["fits"]["kaon"]
    chosen = fit["chosen"]
    assert chosen["method"] == "single"
    assert (chosen["tmin"], chosen["tmax"], chosen["states"]) == (8, 12, 1)
    assert [r["weight"] for r in fit["scan"]] == [0.0, 1.0, 0.0]
    row = fit["scan"][1]
    for name, entry in chosen["params"].items():
        assert entry["value"] == row["params"][name]["value"]
        assert entry["sys_error"] == 0.0 and entry["error"] == entry["stat_error"]


def test_a_user_formula_scan_equals_the_built_in_cosh_scan(tmp_path):
    # a formula has no E0 of its own; its average must still weight every point, and the
    # same cosh written as a formula must give the built-in model's numbers (exact)
    spec = invented_spec()
    built_in = dict(spec["fits"][0])
    formula = {"name": "kaon_formula", "observables": ["kaon"], "model": "formula",
               "formula": {"expression": "A * (exp(-E * t) + exp(-E * (T - t)))",
                           "params": {"A": 1.0, "E": 0.5}},
               "tmin": [7, 9], "tmax": 12}
    spec["fits"] = [built_in, formula]
    res = run_spec(write_invented_run(tmp_path, spec), tmp_path / "out", plots=False,
                   jobs=1, progress=False)
    ours, theirs = res["fits"]["kaon_formula"], res["fits"]["kaon"]
    assert ours["chosen"]["method"] == "average"
    assert sum(r["weight"] for r in ours["scan"]) == pytest.approx(1.0)
    for a, b in zip(ours["scan"], theirs["scan"]):
        assert a["weight"] == pytest.approx(b["weight"], rel=1e-6)
    assert ours["chosen"]["params"]["E"]["value"] == pytest.approx(
        theirs["chosen"]["params"]["E0"]["value"], rel=1e-7)
    assert ours["chosen"]["params"]["E"]["error"] == pytest.approx(
        theirs["chosen"]["params"]["E0"]["error"], rel=1e-4)


def test_without_out_the_spec_output_dir_is_used(tmp_path, monkeypatch):
    directory = tmp_path / "analysis"
    spec = invented_spec()
    spec["fits"] = spec["fits"][1:]
    spec["output"]["dir"] = "heron_out"
    spec_path = write_invented_run(directory, spec)
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    monkeypatch.chdir(elsewhere)   # output.dir is relative to the spec file, not the cwd
    res = run_spec(spec_path, plots=False, jobs=1, progress=False)
    written = directory / "heron_out" / "results.json"
    assert written.is_file()
    assert _read_json(written) == res
    assert list(elsewhere.iterdir()) == []
@pytest.mark.slow   # a process pool or subprocess
def test_results_do_not_depend_on_the_number_of_jobs(tmp_path):
    spec_path = write_invented_run(tmp_path)
    out = tmp_path / "out"
    run_spec(spec_path, out, plots=False, jobs=1, progress=False)
    serial = _read_json(out / "results.json")
    run_spec(spec_path, out, plots=False, jobs=2, progress=False)
    parallel = _read_json(out / "results.json")
    for res in (serial, parallel):
        del res["provenance"]["created"]
    assert parallel == serial


@pytest.mark.slow   # draws and writes every plot of the run
def test_with_plots_the_report_page_and_plots_are_written(tmp_path):
    spec = invented_spec()
    spec["fits"] = spec["fits"][1:]
    del spec["observables"]["kaon"]     # one observable: fewer plots to draw
    spec["output"]["plots"] = True
    spec_path = write_invented_run(tmp_path, spec)
    out = tmp_path / "out"
    res = run_spec(spec_path, out, plots=True, jobs=1, progress=False)
    page = (out / "report.html").read_text(encoding="utf-8")
    assert page.startswith("<!DOCTYPE html>")
    assert "heron-a24" in page
    pngs = sorted((out / "plots").glob("*.png"))
    assert pngs, "no plots written"
    stems = {p.stem for p in pngs}
    assert any("effmass" in s for s in stems) and any("autocorr" in s for s in stems)
    for png in pngs:
        assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n", png
        assert png.with_suffix(".pdf").is_file(), png
    assert (out / "results.json").is_file() and _read_json(out / "results.json") == res


def test_output_plots_false_in_the_spec_wins_over_plots_true(tmp_path):
    spec = invented_spec()
    spec["fits"] = spec["fits"][1:]
    spec_path = write_invented_run(tmp_path, spec)   # output.plots: false
    out = tmp_path / "out"
    run_spec(spec_path, out, plots=True, jobs=1, progress=False)
    assert (out / "results.json").is_file()
    assert not (out / "report.html").exists() and not (out / "plots").exists()


def test_a_simultaneous_fit_over_two_observables_and_two_state_counts(tmp_path):
    # a second invented operator with the kaon's energies and its own amplitudes
    write_invented_data(tmp_path)
    rng = np.random.default_rng(SEED + 1)
    np.save(tmp_path / "kaon_ax.npy", invented_correlator(rng, [(0.42, 0.6), (1.45, 1.1)]))
    spec = invented_spec()
    spec["observables"]["kaon_ax"] = {"file": "kaon_ax.npy"}
    spec["fits"] = [{"name": "kaon2", "observables": ["kaon", "kaon_ax"], "model": "cosh",
                     "states": [1, 2], "tmin": [3, 6, 3], "tmax": 12,
                     "priors": {"E1": [1.4, 0.5]}}]
    res = run_spec(write_spec(tmp_path, spec), tmp_path / "out", plots=False, jobs=1,
                   progress=False)
    fit = res["fits"]["kaon2"]
    scan = fit["scan"]
    assert [(r["states"], r["tmin"]) for r in scan] == [(1, 3), (1, 6), (2, 3), (2, 6)]
    for r in scan:
        # both observables' timeslices tmin..tmax are fitted: the amplitudes of both appear
        assert {"E0", "A0.kaon", "A0.kaon_ax"} <= set(r["params"])
        assert ("E1" in r["params"]) == (r["states"] == 2)
        assert r["dof"] == 2 * (12 - r["tmin"] + 1) - len(r["params"])   # priors add no dof
    # one covariance over all timeslices of both observables (a block matrix)
    shown = fit["chosen"]
    n_points = 2 * (shown["tmax"] - shown["tmin"] + 1)
    assert fit["covariance"]["n_points"] == n_points
    assert np.shape(fit["covariance"]["correlation"]) == (n_points, n_points)
    e0 = shown["params"]["E0"]
    assert abs(e0["value"] - TRUTH_E0["kaon"]) < 3 * e0["error"], e0
    # E1 exists in the two-state fits only: averaged over those that resolve it
    # (state 1 not flagged unresolved), weights renormalised there
    def resolves_e1(r):
        return r["states"] == 2 and not any(f.startswith("state-unresolved:E1")
                                            for f in r["flags"])
    w = np.array([r["weight"] for r in scan])
    two = np.array([resolves_e1(r) for r in scan])
    assert two.any() and (w[two] > 0).any()
    v = np.array([r["params"]["E1"]["value"] for r in scan if resolves_e1(r)])
    assert shown["params"]["E1"]["value"] == pytest.approx(float(w[two] @ v / w[two].sum()),
                                                           rel=1e-10)
