"""Speed and accuracy of the synthetic replicas and of the Gamma-method covariance.

Run with ``.venv/bin/python benchmarks/bench_replicas.py`` (not part of the tests).
Prints a table and writes ``benchmarks/output/replicas.json``.

Speed -- time to fit the noise model and per replica, for
  (a) 8000 configurations x 50 components, one stream;
  (b) 1000 configurations x 100 components, two streams (600 + 400);
both methods; and ``gamma_covariance`` on 10,000 x 200.
Target: 200 replicas of (a) in a few seconds.

Accuracy -- the correlator-like hard case: 24 timeslices, relative noise
growing like exp(0.3 t), neighbouring timeslices correlated ~0.87, a slow
(phi = 0.92) and a fast (phi = 0.7) Monte Carlo mode mixed differently across
t, two streams (3000 + 2000). Reported: per timeslice, the source's tau_int
(1/2 + sum rho convention, own automatic window) against the mean over
replicas, and the covariance of the mean (the covariance of the replica
means over many replicas) against the source's gamma_covariance, as ratios of
the diagonal, the largest correlation difference and the chi-square per
degree of freedom of the whitened replica means. The naive alternative
(independent AR(1) in the principal components of Gamma(0)) is shown beside
it for comparison.

The data are invented, from a fixed seed.
"""

from __future__ import annotations

import json
import time
from pathlib import Path

import numpy as np
from scipy.signal import lfilter

from plateaufit.stats.autocorr import tau_int
from plateaufit.stats.gamma_covariance import gamma_covariance
from plateaufit.stats.replicas import fit_replica_model

HERE = Path(__file__).resolve().parent
OUTPUT = HERE / "output" / "replicas.json"


def ar1_unit(phi: float, shape: tuple[int, ...], rng: np.random.Generator) -> np.ndarray:
    e = rng.standard_normal(shape)
    e[1:] *= np.sqrt(1 - phi**2)
    return lfilter([1.0], [1.0, -phi], e, axis=0)


def smooth_ensemble(n: int, p: int, seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    t = np.arange(p)
    corr = np.exp(-np.abs(t[:, None] - t[None, :]) / 8.0)
    e = ar1_unit(0.8, (n, p), rng) @ np.linalg.cholesky(corr).T
    return np.exp(-0.1 * t) + 0.01 * e * np.exp(0.05 * t)


def correlator_ensemble(sizes, n_t, seed):
    rng = np.random.default_rng(seed)
    t = np.arange(n_t)
    truth = 1.3 * np.exp(-0.45 * t)
    sigma = 0.004 * truth * np.exp(0.3 * t)
    chol = np.linalg.cholesky(np.exp(-np.abs(t[:, None] - t[None, :]) / 5.0))
    a = np.sqrt(np.linspace(0.5, 0.2, n_t))
    parts = []
    for n in sizes:
        slow = ar1_unit(0.92, (n, 1), rng)
        fast = ar1_unit(0.7, (n, n_t), rng) @ chol.T
        parts.append(truth + sigma * (a * slow + np.sqrt(1 - a**2) * fast))
    return np.concatenate(parts), truth


def time_replicas(x, sizes, method, n_rep=200, repeats=3):
    t0 = time.perf_counter()
    model = fit_replica_model(x, stream_sizes=sizes, method=method)
    fit_s = time.perf_counter() - t0
    best = np.inf
    for k in range(repeats):
        t0 = time.perf_counter()
        for _ in model.draws(n_rep, seed=k):
            pass
        best = min(best, time.perf_counter() - t0)
    return {"fit_s": fit_s, "per_replica_ms": 1e3 * best / n_rep, f"{n_rep}_replicas_s": best,
            "n_factors": model.n_factors, "window": model.window, "shrinkage": model.shrinkage}


def naive_pca_long_run(x, labels):
    """Independent AR(1) in the principal components of Gamma(0): its long-run covariance."""
    d = x - x.mean(axis=0)
    w, v = np.linalg.eigh(d.T @ d / len(d))
    taus = np.array([tau_int(d @ v[:, k], streams=labels).tau for k in range(len(w))])
    return (v * (w * 2 * taus)) @ v.T / len(d)


def accuracy(n_rep=400, n_tau=60):
    sizes = (3000, 2000)
    x, truth = correlator_ensemble(sizes, 24, seed=9)
    model = fit_replica_model(x, truth, stream_sizes=sizes, shrinkage="none")
    labels = model.streams
    src_tau = np.array([tau_int(x[:, j], streams=labels).tau for j in range(x.shape[1])])
    src_err = np.array([tau_int(x[:, j], streams=labels).error for j in range(x.shape[1])])
    src_cov = gamma_covariance(x, labels, shrinkage="none", window=model.window).matrix
    means, rep_tau = [], []
    for k, rep in enumerate(model.draws(n_rep, seed=10)):
        means.append(rep.mean(axis=0) - truth)
        if k < n_tau:
            rep_tau.append([tau_int(rep[:, j], streams=labels).tau for j in range(x.shape[1])])
    means, rep_tau = np.array(means), np.array(rep_tau)
    cov = means.T @ means / n_rep
    sd = np.sqrt(np.diag(src_cov))
    w, v = np.linalg.eigh(src_cov)
    chi2 = float(np.sum((means @ v / np.sqrt(w)) ** 2) / means.size)
    naive = naive_pca_long_run(x, labels)
    return {
        "timeslices": x.shape[1],
        "source_tau": src_tau.round(3).tolist(),
        "source_tau_error": src_err.round(3).tolist(),
        "replica_tau_mean": rep_tau.mean(axis=0).round(3).tolist(),
        "replica_tau_sem": (rep_tau.std(axis=0, ddof=1) / np.sqrt(n_tau)).round(3).tolist(),
        "tau_ratio_replica_over_source": (rep_tau.mean(axis=0) / src_tau).round(3).tolist(),
        "mean_cov_diag_ratio": (np.diag(cov) / np.diag(src_cov)).round(3).tolist(),
        "mean_cov_max_corr_diff": float(np.max(np.abs(cov - src_cov) / np.outer(sd, sd))),
        "mean_cov_expected_sd_of_ratio": float(np.sqrt(2 / n_rep)),
        "chi2_per_dof_whitened_means": chi2,
        "chi2_per_dof_expected_sd": float(np.sqrt(2 / means.size)),
        "naive_pca_diag_ratio": (np.diag(naive) / np.diag(src_cov)).round(3).tolist(),
        "naive_pca_max_corr_diff": float(np.max(np.abs(naive - src_cov) / np.outer(sd, sd))),
    }


def main() -> None:
    out = {"speed": {}}
    a = smooth_ensemble(8000, 50, seed=1)
    b = smooth_ensemble(1000, 100, seed=2)
    for method in ("ar1-factors", "stationary-bootstrap"):
        out["speed"][f"8000x50/{method}"] = time_replicas(a, None, method)
        out["speed"][f"1000x100x2streams/{method}"] = time_replicas(b, (600, 400), method)
    big = smooth_ensemble(10_000, 200, seed=3)
    t0 = time.perf_counter()
    res = gamma_covariance(big)
    out["speed"]["gamma_covariance 10000x200"] = {"seconds": time.perf_counter() - t0, "window": res.window}
    for key, val in out["speed"].items():
        print(f"{key:42s} " + ", ".join(f"{k}={v:.4g}" if isinstance(v, float) else f"{k}={v}" for k, v in val.items()))
    out["accuracy"] = acc = accuracy()
    print("hard case (24 timeslices, streams 3000 + 2000):")
    for k, v in acc.items():
        print(f"  {k}: {v}")
    OUTPUT.parent.mkdir(parents=True, exist_ok=True)
    OUTPUT.write_text(json.dumps(out, indent=1))


if __name__ == "__main__":
    main()
