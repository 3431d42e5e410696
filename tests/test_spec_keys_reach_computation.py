"""Every covariance, binning and fit key of a spec reaches the computation.

Each test runs the whole job (``run_spec``) on the invented ``heron-a24``
ensemble of ``tests/test_runner_end_to_end.py`` with one key set, and checks
two things: the keyword arguments the fit core received (a spy on
``fit_correlator``, which the serial executor calls in this process), and,
where the key changes numbers, that the results equal the numerical core
called by hand with that keyword on the same binned data.

The eigenvalue floor was validated by ``check`` but silently dropped by
``fit`` before the pipeline was restructured; ``test_eigenvalue_floor_*``
failed on that code.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pytest

import importlib
from plateaufit.fit.constraints import Prior

scan_module = importlib.import_module("plateaufit.fit.scan")   # fit/ exports scan() too
from plateaufit.fit.correlator_fit import fit_correlator
from plateaufit.pipeline.run import run_spec
from plateaufit.stats.covariance import covariance_of_mean
from test_runner_end_to_end import (T, folded_binned, invented_spec, write_invented_data,
                                    write_spec)



def _eta_only(**covariance: Any) -> dict[str, Any]:
    spec = invented_spec()
    spec["fits"] = [f for f in spec["fits"] if f["name"] == "eta"]
    spec["covariance"].update(covariance)
    return spec


@pytest.fixture
def spy(monkeypatch):
    """Record the fit options of every scan point as the fit core received them.

    The scan sets every point up with ``prepare_range`` (once for the central
    phase and again in the refit task); one record per point.
    """
    calls: list[dict[str, Any]] = []
    seen: set[tuple] = set()
    real = scan_module.prepare_range

    def recording(binned, **kwargs):
        options = {k: v for k, v in kwargs.items() if k != "effective_masses"}
        key = (options["tmin"], options["tmax"], options["states"])
        if key not in seen:
            seen.add(key)
            calls.append(options)
        return real(binned, **kwargs)

    monkeypatch.setattr(scan_module, "prepare_range", recording)
    return calls


@pytest.fixture(scope="module")
def data_dir(tmp_path_factory) -> Path:
    directory = tmp_path_factory.mktemp("keys")
    write_invented_data(directory)
    return directory


def _run(data_dir: Path, spec: dict[str, Any], name: str) -> dict[str, Any]:
    path = write_spec(data_dir, spec, f"{name}.yaml")
    return run_spec(path, data_dir / f"out-{name}", plots=False, jobs=1, progress=False)


def _by_hand(data_dir: Path, results: dict[str, Any], **kwargs: Any):
    binned = folded_binned(data_dir, "eta", results["ensemble"]["bin_size"],
                           results["ensemble"]["binning_correction"])
    base = dict(form="cosh", states=1, tmin=4, tmax=11, time_extent=T)
    base.update(kwargs)
    return fit_correlator({"eta": binned}, **base), binned


def _assert_same_fit(results: dict[str, Any], fit) -> None:
    chosen = results["fits"]["eta"]["chosen"]["params"]
    # the parameters of a state the data do not resolve are withheld (null), never results
    unresolved = set(fit.undetermined)
    assert set(results["fits"]["eta"]["chosen"]["withheld"]) == unresolved
    for name in fit.model.reported_names:
        if name in unresolved:
            assert chosen[name]["value"] is None and chosen[name]["error"] is None
            continue
        assert chosen[name]["value"] == pytest.approx(fit.central.reported[name], rel=1e-10)
        assert chosen[name]["error"] == pytest.approx(fit.errors[name], rel=1e-8)
    cov = results["fits"]["eta"]["covariance"]
    assert cov["condition_number"] == pytest.approx(fit.covariance.condition_number, rel=1e-10)
    assert cov["shrinkage"] == pytest.approx(fit.covariance.shrinkage, rel=1e-10, abs=1e-15)


# --------------------------------------------------------------------------- covariance.*


def test_eigenvalue_floor_reaches_the_fit(data_dir, spy) -> None:
    results = _run(data_dir, _eta_only(eigenvalue_floor=0.05), "floor")
    assert spy and all(call.get("eigenvalue_floor") == 0.05 for call in spy)
    fit, binned = _by_hand(data_dir, results, eigenvalue_floor=0.05)
    _assert_same_fit(results, fit)
    # the floor changes the covariance: without it the condition number is larger
    plain = covariance_of_mean(binned[:, 4:12])
    assert fit.covariance.condition_number < 0.99 * plain.condition_number


def test_eigenvalue_floor_is_the_same_in_check_and_fit(data_dir) -> None:
    from plateaufit.pipeline.check import check_spec

    path = write_spec(data_dir, _eta_only(eigenvalue_floor=0.05), "floor-check.yaml")
    results = run_spec(path, data_dir / "out-floor-check", plots=False, jobs=1, progress=False)
    text = check_spec(path)
    binned = folded_binned(data_dir, "eta", results["ensemble"]["bin_size"],
                           results["ensemble"]["binning_correction"])
    widest = covariance_of_mean(binned[:, 4:12], eigenvalue_floor=0.05)
    assert f"{widest.condition_number:.3g} after shrinkage" in text
    assert results["fits"]["eta"]["covariance"]["condition_number"] == pytest.approx(
        widest.condition_number, rel=1e-10)


@pytest.mark.parametrize("key, value, kwarg", [
    ("shrinkage", "oas", "oas"),
    ("shrinkage", 0.3, 0.3),
    ("shrinkage", "none", "none"),
    ("target", "identity", "identity"),
    ("per_sample", False, False),      # the default is auto: per-sample with few bins
])
def test_covariance_keys_reach_the_fit(data_dir, spy, key, value, kwarg) -> None:
    results = _run(data_dir, _eta_only(**{key: value}), f"cov-{key}-{value}")
    name = {"shrinkage": "shrinkage", "target": "target", "per_sample": "per_sample"}[key]
    assert spy and all(call[name] == kwarg for call in spy)
    fit, _ = _by_hand(data_dir, results, **{name: kwarg})
    _assert_same_fit(results, fit)
    default, _ = _by_hand(data_dir, results)
    assert fit.errors["E0"] != default.errors["E0"]   # the key changes the numbers


def test_binning_correction_reaches_the_bins(data_dir) -> None:
    # binning.correction (default true): the bins are scaled about their mean by
    # stats.autocorr.binning_correction(largest tau_int, bin size); false leaves them
    from plateaufit.stats.autocorr import binning_correction

    on = _run(data_dir, _eta_only(), "correction-on")
    off_spec = _eta_only()
    off_spec["binning"] = {**off_spec.get("binning", {}), "correction": False}
    off = _run(data_dir, off_spec, "correction-off")
    factor = on["ensemble"]["binning_correction"]
    bin_size = on["ensemble"]["bin_size"]
    # the median tau_int of the data: between the factors of the smallest and largest
    largest = max(v["value"] for v in on["ensemble"]["tau_int"].values())
    assert 1.0 < factor <= binning_correction(largest, bin_size)
    assert factor > 1 and off["ensemble"]["binning_correction"] == 1.0
    e_on = on["fits"]["eta"]["chosen"]["params"]["E0"]
    e_off = off["fits"]["eta"]["chosen"]["params"]["E0"]
    assert e_on["value"] == pytest.approx(e_off["value"], rel=1e-6)      # centres unchanged
    assert e_on["stat_error"] == pytest.approx(factor * e_off["stat_error"], rel=0.05)


# --------------------------------------------------------------------------- binning.size


def test_binning_size_reaches_the_binned_data(data_dir, spy) -> None:
    spec = _eta_only()
    spec["binning"] = {"size": 4}
    results = _run(data_dir, spec, "bin4")
    assert results["ensemble"]["bin_size"] == 4
    assert results["ensemble"]["n_bins"] == sum(n // 4 for n in (170, 150))
    fit, _ = _by_hand(data_dir, results)
    _assert_same_fit(results, fit)


# --------------------------------------------------------------------------- fits[i].*


def _fit_spec(**keys: Any) -> dict[str, Any]:
    spec = _eta_only()
    spec["fits"][0].update(keys)
    return spec


FIT_KEYS = [
    ("model", {"model": "exp", "tmin": 3, "tmax": 7}, {"form": "exp", "tmin": 3, "tmax": 7}),
    ("states", {"states": 2, "tmin": 1, "tmax": 11, "priors": {"E1": [1.4, 0.5]}},
     {"states": 2, "tmin": 1, "priors": {"E1": Prior(1.4, 0.5)}}),
    ("oscillating", {"oscillating": 1, "tmin": 2, "tmax": 11,
                     "priors": {"Eosc0": [1.0, 0.5], "Aosc0.eta": [0.0, 0.1]}},
     {"oscillating": 1, "tmin": 2,
      "priors": {"Eosc0": Prior(1.0, 0.5), "Aosc0.eta": Prior(0.0, 0.1)}}),
    ("constant", {"constant": True, "priors": {"c.eta": [0.0, 1e-3]}},
     {"constant": True, "priors": {"c.eta": Prior(0.0, 1e-3)}}),
    ("tmin", {"tmin": 5}, {"tmin": 5}),
    ("tmax", {"tmax": 10}, {"tmax": 10}),
    ("priors", {"priors": {"E0": [0.65, 0.01]}}, {"priors": {"E0": Prior(0.65, 0.01)}}),
    ("bounds", {"bounds": {"E0": [0.6, 0.7]}}, {"bounds": {"E0": (0.6, 0.7)}}),
    ("start", {"start": {"E0": 0.7}}, {"start": {"E0": 0.7}}),
    ("formula", {"model": "formula", "formula": {
        "expression": "a*(exp(-m*t) + exp(-m*(T - t)))", "params": {"a": 1.0, "m": 0.6}}},
     {"form": "formula", "formula": {"expression": "a*(exp(-m*t) + exp(-m*(T - t)))",
                                     "params": {"a": 1.0, "m": 0.6}}}),
]


@pytest.mark.parametrize("key, spec_keys, kwargs", FIT_KEYS, ids=[k[0] for k in FIT_KEYS])
def test_fit_keys_reach_the_fit(data_dir, spy, key, spec_keys, kwargs) -> None:
    results = _run(data_dir, _fit_spec(**spec_keys), f"fit-{key}")
    assert len(spy) == 1
    for name, value in kwargs.items():
        assert spy[0][name] == value, name
    fit, _ = _by_hand(data_dir, results, **kwargs)
    _assert_same_fit(results, fit)


def test_factorised_reaches_the_fit(data_dir, spy) -> None:
    spec = _fit_spec(factorised=True)
    spec["observables"]["eta"].update(source="g5", sink="g5")
    results = _run(data_dir, spec, "fit-factorised")
    assert spy[0]["operators"] == {"eta": ("g5", "g5")}
    assert set(results["fits"]["eta"]["chosen"]["params"]) == {"E0", "Z0.g5"}
    fit, _ = _by_hand(data_dir, results, operators={"eta": ("g5", "g5")})
    _assert_same_fit(results, fit)


def test_choose_reaches_the_chosen_result(data_dir, spy) -> None:
    spec = _fit_spec(tmin=[4, 6], tmax=11, choose={"tmin": 6, "tmax": 11})
    results = _run(data_dir, spec, "fit-choose")
    chosen = results["fits"]["eta"]["chosen"]
    assert (chosen["method"], chosen["tmin"], chosen["tmax"]) == ("single", 6, 11)
    fit, _ = _by_hand(data_dir, results, tmin=6)
    for name in fit.model.reported_names:
        assert chosen["params"][name]["value"] == pytest.approx(fit.central.reported[name],
                                                                rel=1e-10)
