"""A realistic, invented results dict for the report tests.

The numbers follow a known truth, generated with a fixed seed, in the layout of
results.json (DEVELOPERS.md, "results dict"): a two-state spectrum
(E0 = 0.30, E1 = 0.62 for the "pion" fit on two smeared observables; E0 = 0.48,
E1 = 0.85 for the single-observable "kaon" fit), a scan over tmin 2..12,
tmax 18..22 and 1..2 states, chi2 invented from the excited-state contamination
a one-state fit would see, AIC = chi2 + 2k + 2 n_cut (Jay & Neil 2021, Phys.
Rev. D 103, 114502) and weights proportional to exp(-AIC/2). Nothing here is
fitted: it is the kind of dict the runner writes, with invented content.
"""

from __future__ import annotations

import copy
import hashlib
import json
import math
from typing import Any

import numpy as np
from scipy import stats

N_T = 25            # folded timeslices (T = 48)
TIME_EXTENT = 48
STREAM_SIZES = [503, 501]
BIN_SIZE = 8
N_BINS = sum(s // BIN_SIZE for s in STREAM_SIZES)

TRUTH = {
    "pion": {"E0": 0.30, "E1": 0.62, "A0.pion_ll": 1.10, "A1.pion_ll": 0.80,
             "A0.pion_ls": 0.55, "A1.pion_ls": -0.20},
    "kaon": {"E0": 0.48, "E1": 0.85, "A0.kaon_ll": 0.90, "A1.kaon_ll": 0.60},
}
OBSERVABLES = {"pion": ["pion_ll", "pion_ls"], "kaon": ["kaon_ll"]}
SCANS = {"pion": dict(tmins=range(2, 13), tmaxs=range(18, 23), states=(1, 2)),
         "kaon": dict(tmins=range(3, 11), tmaxs=(20, 21), states=(1, 2))}
AR1_PHI = {"pion_ll": 0.6, "pion_ls": 0.55, "kaon_ll": 0.4}


def _jsonable(obj: Any) -> Any:
    """numpy to plain JSON types; NaN and inf to None (as the runner writes them)."""
    if isinstance(obj, dict):
        return {str(k): _jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_jsonable(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return _jsonable(obj.tolist())
    if isinstance(obj, (bool, np.bool_)):
        return bool(obj)
    if isinstance(obj, (int, np.integer)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        return float(obj) if math.isfinite(float(obj)) else None
    return obj


def _param_entry(value: float, stat: float, sys_err: float = 0.0) -> dict[str, float]:
    return {"value": value, "error": math.hypot(stat, sys_err), "stat_error": stat,
            "sys_error": sys_err}


def _scan(fit: str, rng: np.random.Generator) -> list[dict[str, Any]]:
    truth = TRUTH[fit]
    obs = OBSERVABLES[fit]
    gap = truth["E1"] - truth["E0"]
    points = []
    for states in SCANS[fit]["states"]:
        for tmax in SCANS[fit]["tmaxs"]:
            for tmin in SCANS[fit]["tmins"]:
                n_per = tmax - tmin + 1
                n_points = len(obs) * n_per
                k = states * (1 + len(obs))
                dof = n_points - k
                n_cut = len(obs) * N_T - n_points
                if states == 1:
                    contamination = math.exp(-gap * tmin)
                    chi2 = float(rng.chisquare(dof)) + 1500.0 * contamination ** 2 * len(obs)
                    e0_err = 0.0015 * math.exp(0.12 * (tmin - 2))
                    e0 = truth["E0"] + 0.25 * contamination + rng.normal(0, 0.3 * e0_err)
                else:
                    # a third state (E2 = E0 + 2.2 gap) the two-state fit does not model
                    third = math.exp(-2.2 * gap * tmin)
                    chi2 = float(rng.chisquare(dof)) + 3000.0 * third ** 2 * len(obs)
                    e0_err = 0.0030 * math.exp(0.10 * (tmin - 2))
                    e0 = truth["E0"] + 0.1 * third + rng.normal(0, 0.3 * e0_err)
                params = {"E0": {"value": e0, "error": e0_err}}
                if states == 2:
                    e1_err = 0.02 * math.exp(0.2 * (tmin - 2))
                    params["E1"] = {"value": truth["E1"] + rng.normal(0, 0.5 * e1_err),
                                    "error": e1_err}
                for name in obs:
                    for n in range(states):
                        key = f"A{n}.{name}"
                        err = 0.01 * (n + 1) * math.exp(0.1 * (tmin - 2))
                        params[key] = {"value": truth[key] + rng.normal(0, 0.3 * err),
                                       "error": err}
                converged = not (fit == "pion" and states == 2 and tmin == 12 and tmax == 18)
                points.append({
                    "tmin": tmin, "tmax": tmax, "model": "exp", "states": states,
                    "chi2": chi2, "chi2_data": chi2, "chi2_prior": 0.0, "dof": dof,
                    "n_points": n_points, "n_priors": 0,
                    "p_value": float(stats.chi2.sf(chi2, dof)),
                    # Hotelling T^2 -> F (invented use of the usual relation)
                    "p_value_hotelling": float(stats.f.sf(
                        chi2 * (N_BINS - dof) / (dof * (N_BINS - 1)), dof, N_BINS - dof)),
                    "aic": chi2 + 2 * k + 2 * n_cut,
                    "weight": 0.0, "converged": converged,
                    "n_refit_failed": 2 if (states == 2 and tmin == 11 and tmax == 22) else 0,
                    "params": params,
                })
    return points


def _aic_weights(points: list[dict[str, Any]]) -> np.ndarray:
    aic = np.array([p["aic"] for p in points])
    ok = np.array([p["converged"] for p in points])
    w = np.zeros(len(points))
    w[ok] = np.exp(-(aic[ok] - aic[ok].min()) / 2)
    return w / w.sum()


def _average(points: list[dict[str, Any]], weights: np.ndarray) -> dict[str, dict[str, float]]:
    names: list[str] = []
    for p in points:
        names += [n for n in p["params"] if n not in names]
    params = {}
    for name in names:
        idx = [i for i, p in enumerate(points) if name in p["params"]]
        w = weights[idx]
        if w.sum() == 0:
            continue
        w = w / w.sum()
        c = np.array([points[i]["params"][name]["value"] for i in idx])
        s = np.array([points[i]["params"][name]["error"] for i in idx])
        value = float(w @ c)
        stat = float(w @ s)     # invented stand-in for the jackknife of the average
        sys_err = float(math.sqrt(max(w @ c ** 2 - value ** 2, 0.0)))
        params[name] = _param_entry(value, stat, sys_err)
    return params


def _effective_mass(fit: str, obs: str, rng: np.random.Generator) -> dict[str, Any]:
    truth = TRUTH[fit]
    t = np.arange(N_T)
    corr = (truth[f"A0.{obs}"] * np.exp(-truth["E0"] * t)
            + truth[f"A1.{obs}"] * np.exp(-truth["E1"] * t))
    meff = np.log(corr[:-1] / corr[1:])
    err = 0.0008 * np.exp(0.17 * t[:-1])
    value = meff + rng.normal(0, 0.6, size=meff.shape) * err
    value[-1] = np.nan          # a noisy last timeslice (log of a negative ratio)
    return {"t": t[:-1], "value": value, "error": err, "kind": "log"}


def _covariance(fit: str, best: dict[str, Any], shrinkage: float,
                rng: np.random.Generator) -> dict[str, Any]:
    obs = OBSERVABLES[fit]
    ts = np.arange(best["tmin"], best["tmax"] + 1)
    tt = np.concatenate([ts] * len(obs))
    block = np.repeat(np.arange(len(obs)), len(ts))
    true_corr = np.exp(-np.abs(tt[:, None] - tt[None, :]) / 4.0)
    true_corr = true_corr * np.where(block[:, None] == block[None, :], 1.0, 0.8)
    np.fill_diagonal(true_corr, 1.0)
    draws = rng.multivariate_normal(np.zeros(len(tt)), true_corr, size=N_BINS)
    raw = np.corrcoef(draws, rowvar=False)
    shrunk = (1 - shrinkage) * raw + shrinkage * np.eye(len(tt))
    ev_raw = np.sort(np.linalg.eigvalsh(raw))[::-1]
    ev = np.sort(np.linalg.eigvalsh(shrunk))[::-1]
    return {"correlation": shrunk, "eigenvalues": ev, "eigenvalues_raw": ev_raw,
            "shrinkage": shrinkage, "target": "diagonal",
            "condition_number": float(ev[0] / ev[-1]),
            "condition_number_raw": float(ev_raw[0] / ev_raw[-1]),
            "n_bins": N_BINS, "n_points": len(tt), "tmin": best["tmin"],
            "tmax": best["tmax"], "states": best["states"]}


def _autocorrelation(obs: str, rng: np.random.Generator, reliable: bool) -> tuple[dict, dict, dict]:
    phi = AR1_PHI[obs]
    n = sum(STREAM_SIZES)
    lags = np.arange(60)
    rho = phi ** lags + rng.normal(0, 1 / math.sqrt(n), size=lags.shape) * (lags > 0)
    tau_by_window = 0.5 + np.concatenate([[0.0], np.cumsum(rho[1:])])
    window = int(np.argmax(lags >= 4 * (0.5 + phi / (1 - phi)))) or 1
    tau = float(tau_by_window[window])
    # Madras & Sokal (1988): var(tau_int) ~ 2 (2W + 1) / N tau_int^2
    err = tau * math.sqrt(2 * (2 * window + 1) / n)
    t_worst = 9
    tau_entry = {"value": tau, "error": err, "window": window, "t": t_worst, "reliable": reliable}
    ac_entry = {"t": t_worst, "rho": rho, "tau_by_window": tau_by_window, "window": window}
    sizes = np.array([1, 2, 3, 4, 6, 8, 12, 16, 24, 32])
    naive = 0.0021
    # exact variance of the mean of an AR(1) chain in bins of b:
    # 1 + 2 sum_{k=1}^{b-1} (1 - k/b) phi^k  (exact result, AR(1))
    factor = np.array([1 + 2 * sum((1 - k / b) * phi ** k for k in range(1, b)) for b in sizes])
    # relative error of an error estimate from m bins: 1/sqrt(2 (m - 1)) (common practice)
    n_bins = np.array([sum(s // b for s in STREAM_SIZES) for b in sizes])
    errors = naive * np.sqrt(factor) * (1 + rng.normal(0, 1, size=sizes.shape)
                                        / np.sqrt(2 * (n_bins - 1)))
    bin_entry = {"t": t_worst, "sizes": sizes, "errors": errors, "naive_error": naive}
    return tau_entry, ac_entry, bin_entry


def make_results(*, seed: int = 20240611, truth: bool = True, hostile: bool = False,
                 strong_shrinkage: bool = False, unreliable_tau: bool = False) -> dict[str, Any]:
    """An invented results dict in the layout of results.json.

    Parameters
    ----------
    seed : int
        Seed of the generator for all invented noise.
    truth : bool
        Include ``results['truth']`` (as the demo does).
    hostile : bool
        Rename the pion fit's second observable to ``<script>alert(1)</script>&"x"``
        and the kaon fit to ``kaon & <b>co</b>``, to test escaping.
    strong_shrinkage : bool
        Give the pion fit a shrinkage intensity of 0.7 (above the warning level).
    unreliable_tau : bool
        Mark kaon_ll's tau_int as unreliable (no window found).
    """
    rng = np.random.default_rng(seed)
    observables = copy.deepcopy(OBSERVABLES)
    truths = copy.deepcopy(TRUTH)
    fit_names = {"pion": "pion", "kaon": "kaon"}
    if hostile:
        bad = '<script>alert(1)</script>&"x"'
        observables["pion"][1] = bad
        truths["pion"] = {k.replace("pion_ls", bad): v for k, v in truths["pion"].items()}
        fit_names["kaon"] = "kaon & <b>co</b>"

    ensemble: dict[str, Any] = {
        "name": "b6.0_L24T48_invented", "time_extent": TIME_EXTENT,
        "n_configs": sum(STREAM_SIZES), "n_streams": len(STREAM_SIZES),
        "stream_sizes": STREAM_SIZES, "n_bins": N_BINS, "bin_size": BIN_SIZE,
        "n_dropped": sum(s % BIN_SIZE for s in STREAM_SIZES),
        "tau_int_convention": "1/2 + sum_{t>=1} rho(t)",
        "tau_int": {}, "autocorrelation": {}, "binning_study": {}, "observables": {},
    }
    fits: dict[str, Any] = {}
    all_obs = [o for key in ("pion", "kaon") for o in observables[key]]
    for key, obs_list in (("pion", observables["pion"]), ("kaon", observables["kaon"])):
        for real, obs in zip(OBSERVABLES[key], obs_list):
            tau_e, ac_e, bin_e = _autocorrelation(
                real, rng, reliable=not (unreliable_tau and real == "kaon_ll"))
            ensemble["tau_int"][obs] = tau_e
            ensemble["autocorrelation"][obs] = ac_e
            ensemble["binning_study"][obs] = bin_e
            ensemble["observables"][obs] = {"n_t": N_T, "boundary": "periodic", "folded": True}

    # pion: model average over the whole scan
    points = _scan("pion", rng)
    weights = _aic_weights(points)
    for p, w in zip(points, weights):
        p["weight"] = float(w)
    params = _average(points, weights)
    best = points[int(np.argmax(weights))]
    pion_chosen = {
        "method": "average", "tmin": best["tmin"], "tmax": best["tmax"],
        "states": best["states"], "params": params, "n_fits": len(points),
        "n_excluded": sum(not p["converged"] for p in points),
        "best": {"tmin": best["tmin"], "tmax": best["tmax"], "states": best["states"],
                 "weight": float(weights.max())},
        "chi2": best["chi2"], "dof": best["dof"], "p_value": best["p_value"],
        "p_value_hotelling": best["p_value_hotelling"], "converged": True,
        "band": {"tmin": min(p["tmin"] for p in points), "tmax": max(p["tmax"] for p in points)},
    }
    if hostile:
        for p in points:
            p["params"] = {k.replace("pion_ls", observables["pion"][1]): v
                           for k, v in p["params"].items()}
        pion_chosen["params"] = {k.replace("pion_ls", observables["pion"][1]): v
                                 for k, v in params.items()}
    fits["pion"] = {
        "observables": observables["pion"], "model": "exp", "chosen": pion_chosen,
        "scan": points,
        "effective_mass": {o: _effective_mass("pion", real, rng)
                           for real, o in zip(OBSERVABLES["pion"], observables["pion"])},
        "covariance": _covariance("pion", best, 0.7 if strong_shrinkage else 0.18, rng),
        "warnings": ["fit pion: 1 of 110 scan points did not converge and were given weight 0",
                     "fit pion: 2 jackknife refit(s) did not converge even with the fallback "
                     "fitter"],
    }

    # kaon: a single chosen fit
    points = _scan("kaon", rng)
    pick = next(i for i, p in enumerate(points)
                if (p["tmin"], p["tmax"], p["states"]) == (6, 20, 2))
    for i, p in enumerate(points):
        p["weight"] = 1.0 if i == pick else 0.0
    chosen_point = points[pick]
    kaon_chosen = {
        "method": "single", "tmin": 6, "tmax": 20, "states": 2,
        "params": {n: _param_entry(v["value"], v["error"]) for n, v in
                   chosen_point["params"].items()},
        "chi2": chosen_point["chi2"], "dof": chosen_point["dof"],
        "p_value": chosen_point["p_value"],
        "p_value_hotelling": chosen_point["p_value_hotelling"], "converged": True,
        "band": {"tmin": 6, "tmax": 20},
    }
    fits[fit_names["kaon"]] = {
        "observables": observables["kaon"], "model": "exp", "chosen": kaon_chosen,
        "scan": points,
        "effective_mass": {o: _effective_mass("kaon", o, rng) for o in observables["kaon"]},
        "covariance": _covariance("kaon", chosen_point, 0.05, rng),
        "warnings": [],
    }
    warnings = ["pion_ll: binning: 4 configuration(s) at stream ends dropped"]
    if unreliable_tau:
        warnings.append("kaon_ll: the autocorrelation window was not found for every "
                        "timeslice; tau_int is a lower bound there")
    results = {
        "version": "0.1.0",
        "output": {"dir": "results"},
        "ensemble": ensemble,
        "fits": fits,
        "truth": ({"pion": truths["pion"], fit_names["kaon"]: truths["kaon"]} if truth else {}),
        "warnings": warnings,
        "provenance": {
            "version": "0.1.0", "spec": "fit_specs/invented.yaml",
            "spec_sha256": hashlib.sha256(b"invented spec").hexdigest(),
            "data_sha256": {o: hashlib.sha256(o.encode()).hexdigest() for o in all_obs},
            "seeds": {"demo": seed}, "created": "2024-06-11T12:00:00+00:00",
        },
    }
    # Through JSON and back, as rebuild_report would see it.
    return json.loads(json.dumps(_jsonable(results), allow_nan=False))
