"""Results produced by the pipeline, for the report's tests.

:func:`make_results` runs ``run_spec`` once (per test session) on an invented
ensemble, ``marten-b48`` (T = 48, two Monte Carlo streams of 520 and 500
configurations, periodic), generated with a fixed seed from a known truth:

* ``pion_ll``, ``pion_ls``: two states, E0 = 0.30, E1 = 0.62 (amplitudes in
  :data:`TRUTH`), fitted together by the ``pion`` fit, a model average over
  tmin 3..9, tmax 16..18 and 1 or 2 states;
* ``kaon_ll``: two states, E0 = 0.48, E1 = 0.85, fitted by the ``kaon`` fit
  with ``choose: {tmin: 6, tmax: 20, states: 2}``.

The noise is multiplicative, ``C(t) (1 + s(t) eta(t))``, with ``eta`` an AR(1)
process in Monte Carlo time (per stream), partly shared between timeslices.

Variants (``truth=False``, ``hostile=True``, ``strong_shrinkage=True``,
``unreliable_tau=True``) edit a copy of those results, as a damaged or unusual
results.json would read, and recompute the warnings with the pipeline's rules.
One point of the pion scan is marked as not converged, with weight 0, and one
with two failed refits, since the invented data give clean fits (and the
report must show both); the provenance records a seed as a generated data set
would.
"""

from __future__ import annotations

import copy
import functools
import json
import tempfile
from pathlib import Path
from typing import Any

import numpy as np
import yaml

SEED = 48_0311
T = 48
STREAMS = (520, 500)
TRUTH = {
    "pion": {"E0": 0.30, "E1": 0.62, "A0.pion_ll": 1.10, "A1.pion_ll": 0.80,
             "A0.pion_ls": 0.55, "A1.pion_ls": -0.20},
    "kaon": {"E0": 0.48, "E1": 0.85, "A0.kaon_ll": 0.90, "A1.kaon_ll": 0.60},
}
_STATES = {"pion_ll": ("pion", "pion_ll"), "pion_ls": ("pion", "pion_ls"),
           "kaon_ll": ("kaon", "kaon_ll")}
PHI = 0.5

SPEC: dict[str, Any] = {
    "ensemble": {"name": "marten-b48", "time_extent": T, "streams": list(STREAMS)},
    "observables": {name: {"file": f"{name}.npy"} for name in _STATES},
    "fits": [
        {"name": "pion", "observables": ["pion_ll", "pion_ls"], "model": "cosh",
         "states": [1, 2], "tmin": [3, 9], "tmax": [16, 18],
         "priors": {"E1": [0.6, 0.3]}},
        {"name": "kaon", "observables": ["kaon_ll"], "model": "cosh", "states": 2,
         "tmin": [4, 8], "tmax": [18, 20], "priors": {"E1": [0.85, 0.3]},
         "choose": {"tmin": 6, "tmax": 20, "states": 2}},
    ],
    "output": {"dir": "results", "plots": False},
    "truth": {"pion": {"E0": 0.30, "E1": 0.62}, "kaon": {"E0": 0.48, "E1": 0.85}},
}


def _ar1(rng: np.random.Generator, n: int, k: int) -> np.ndarray:
    z = rng.standard_normal((n, k))
    x = np.empty((n, k))
    x[0] = z[0]
    for i in range(1, n):
        x[i] = PHI * x[i - 1] + np.sqrt(1.0 - PHI * PHI) * z[i]
    return x


def write_data(directory: Path, seed: int = SEED) -> None:
    """The three invented correlators as .npy files in ``directory``."""
    rng = np.random.default_rng(seed)
    t = np.arange(T)
    for name, (fit, obs) in _STATES.items():
        truth = TRUTH[fit]
        exact = sum(truth[f"A{n}.{obs}"] * (np.exp(-truth[f"E{n}"] * t)
                                           + np.exp(-truth[f"E{n}"] * (T - t)))
                    for n in range(2))
        noise = np.concatenate([0.7 * _ar1(rng, n, 1) + 0.7 * _ar1(rng, n, T)
                                for n in STREAMS])
        np.save(directory / f"{name}.npy", exact * (1.0 + 0.015 * np.exp(0.03 * t) * noise))


@functools.lru_cache(maxsize=1)
def _run() -> str:
    from plateaufit.pipeline.run import run_spec

    with tempfile.TemporaryDirectory(prefix="pf-report-") as tmp:
        directory = Path(tmp)
        write_data(directory)
        path = directory / "spec.yaml"
        path.write_text(yaml.safe_dump(SPEC, sort_keys=False), encoding="utf-8")
        results = run_spec(path, directory / "out", plots=False, jobs=1, progress=False)
    return json.dumps(results)


def _rewarn(results: dict[str, Any]) -> dict[str, Any]:
    """The warnings of edited results, by the pipeline's rules."""
    from plateaufit.pipeline.results import Results
    from plateaufit.pipeline.warnings import with_warnings

    return with_warnings(Results.from_dict(results)).to_dict()


def _rename(results: dict[str, Any], old: str, new: str, *, fit: bool) -> None:
    """Rename an observable (``fit=False``) or a fit (``fit=True``) everywhere."""
    if fit:
        results["fits"] = {new if k == old else k: v for k, v in results["fits"].items()}
        results["truth"] = {new if k == old else k: v for k, v in results["truth"].items()}
        return
    ens = results["ensemble"]
    for part in ("tau_int", "autocorrelation", "binning_study", "observables"):
        ens[part] = {new if k == old else k: v for k, v in ens[part].items()}
    results["provenance"]["data_sha256"] = {
        new if k == old else k: v for k, v in results["provenance"]["data_sha256"].items()}
    for f in results["fits"].values():
        f["observables"] = [new if o == old else o for o in f["observables"]]
        f["effective_mass"] = {new if k == old else k: v for k, v in f["effective_mass"].items()}
        for entry in [f["chosen"]] + f["scan"]:
            entry["params"] = {k.replace(f".{old}", f".{new}"): v
                               for k, v in entry["params"].items()}


def make_results(*, truth: bool = True, hostile: bool = False, strong_shrinkage: bool = False,
                 unreliable_tau: bool = False) -> dict[str, Any]:
    """The pipeline's results.json dict of the invented run (see the module notes)."""
    results = json.loads(_run())
    pion = results["fits"]["pion"]
    # one point not converged (weight 0) and one with failed refits, among the low weights
    order = sorted((i for i in range(len(pion["scan"])) if pion["scan"][i]["weight"] > 0),
                   key=lambda i: pion["scan"][i]["weight"])
    failed, refits = pion["scan"][order[0]], pion["scan"][order[1]]
    failed["converged"], failed["weight"] = False, 0.0
    refits["n_refit_failed"] = 2
    pion["chosen"]["n_excluded"] += 1
    results["provenance"]["seeds"] = {"demo": 20240611}
    if not truth:
        results["truth"] = {}
    if strong_shrinkage:
        pion["covariance"]["shrinkage"] = 0.7
    if unreliable_tau:
        results["ensemble"]["tau_int"]["kaon_ll"]["reliable"] = False
    if hostile:
        _rename(results, "pion_ls", '<script>alert(1)</script>&"x"', fit=False)
        _rename(results, "kaon", "kaon & <b>co</b>", fit=True)
    return copy.deepcopy(_rewarn(results))
