"""Speed and memory benchmarks of the fit-range scan and its jackknife refits.

Run with ``make bench`` (or ``.venv/bin/python benchmarks/run_benchmarks.py``).
Prints a table and writes ``benchmarks/output/latest.json``.

Workload A -- N = 1000 configurations, T = 48, one cosh observable, bin size 5
(200 jackknife samples); scan tmin 4..13 x tmax 18..23 x states {1, 2}
(120 fits, 24,000 refits). Reported: seconds per refit of the batched engine
over the whole scan and of the lmfit loop on a subset of the same fits, their
ratio, the wall time of the whole scan (central fits, covariances, refits and
the model average; no plots), where that time goes, the compact versus
fixed-size working set of the engine, and peak memory.
Targets: ratio >= 200, whole scan < 3 s, peak memory < 500 MB.

Workload B -- N = 10,000 configurations, T = 96, four observables in one
simultaneous two-state fit, bin size 50 (200 jackknife samples); a scan of 20
fit ranges. Targets: < 30 s and < 2 GB.

The data are invented: multi-state correlators from a known truth with noise
correlated in Euclidean time and along the Monte Carlo chain (AR(1)), from a
fixed seed. The pipeline pieces are the package's own: fold, bin_samples,
plateaufit.fit.scan.scan (with the refit engine chosen as the scan chooses it)
and plateaufit.fit.average.average_fits. Stage timings come from thin timing
wrappers installed around the package's functions for the duration of a run.

By default the benchmark runs twice: in this process with the environment as
given, and in a subprocess with OPENBLAS_NUM_THREADS=1 (and, when they are
set, once more without OPENBLAS_CORETYPE / OPENBLAS_L2_SIZE): multi-threaded
OpenBLAS calls on small matrices can be very slow on a busy machine, and the
figures show by how much.

GEVP -- a 4 x 4 correlator matrix, N = 1000 configurations, T = 64 (33 folded
timeslices), bin size 10 (100 jackknife samples), from a known truth of five
states (one more than the basis resolves) with noise correlated in Euclidean
time, between matrix entries and along the Monte Carlo chain. Timed: the GEVP at
a fixed t0 on every timeslice and sample with level tracking, the log and cosh
effective energies of the principal correlators, the t0 = ceil(t/2) effective
energies and the overlaps. Target: the whole GEVP well under 1 s. Run alone
with ``--only gevp``.

Options: ``--quick`` (smaller lmfit subset), ``--skip-b``, ``--no-variants``
(only the run as given), ``--profile`` (cProfile of workload A's scan, top
entries printed), ``--only {a,b,gevp}`` (one workload; the default runs A, B
and the GEVP).
"""

from __future__ import annotations

import argparse
import contextlib
import cProfile
import io
import json
import os
import platform
import pstats
import resource
import subprocess
import sys
import time
import tracemalloc
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
OUTPUT = HERE / "output" / "latest.json"
TARGETS = {"A.ratio": 200.0, "A.scan_seconds": 3.0, "A.peak_mb": 500.0,
           "B.scan_seconds": 30.0, "B.peak_mb": 2048.0, "GEVP.seconds": 1.0}


# ---------------------------------------------------------------------------
# invented data
# ---------------------------------------------------------------------------

def invented_ensemble(n_cfg: int, time_extent: int, observables: dict[str, list[float]],
                      energies: list[float], noise: float, tau_mc: float,
                      seed: int) -> dict[str, np.ndarray]:
    """Per-configuration periodic correlators of several observables, (n_cfg, T) each.

    ``C_o(t) = sum_n A_n.o (exp(-E_n t) + exp(-E_n (T - t)))`` times
    ``(1 + noise * eta)``, where ``eta`` is AR(1)-correlated along t
    (coefficient 0.8), between observables (a shared component), and along
    the Monte Carlo chain (autocorrelation time about ``tau_mc``).
    """
    rng = np.random.default_rng(seed)
    t = np.arange(time_extent)
    e = np.asarray(energies)[:, None]
    basis = np.exp(-e * t) + np.exp(-e * (time_extent - t))      # (states, T)
    phi = np.exp(-1.0 / tau_mc) if tau_mc > 0 else 0.0

    def correlated_noise() -> np.ndarray:
        z = rng.standard_normal((n_cfg, time_extent))
        for i in range(1, time_extent):                # along Euclidean time
            z[:, i] = 0.8 * z[:, i - 1] + 0.6 * z[:, i]
        for k in range(1, n_cfg):                       # along the Monte Carlo chain
            z[k] = phi * z[k - 1] + np.sqrt(1 - phi ** 2) * z[k]
        return z

    shared = correlated_noise()
    out = {}
    for name, amps in observables.items():
        truth = np.asarray(amps) @ basis
        eta = 0.7 * shared + np.sqrt(1 - 0.7 ** 2) * correlated_noise()
        out[name] = truth * (1.0 + noise * eta)
    return out


def prepare(n_cfg, time_extent, observables, energies, noise, tau_mc, seed, bin_size):
    from plateaufit.data.transforms import fold
    from plateaufit.stats.resample import bin_samples

    raw = invented_ensemble(n_cfg, time_extent, observables, energies, noise, tau_mc, seed)
    return {name: bin_samples(fold(v, "periodic"), bin_size) for name, v in raw.items()}


# ---------------------------------------------------------------------------
# timing wrappers
# ---------------------------------------------------------------------------

class StageClock:
    """Accumulate wall time and calls of selected package functions."""

    def __init__(self) -> None:
        self.seconds: dict[str, float] = {}
        self.calls: dict[str, int] = {}
        self.refits = 0
        self.fallbacks = 0
        self.captured: list[tuple] = []
        self._undo: list[tuple] = []

    def wrap(self, module, attr: str, stage: str, hook=None) -> None:
        original = getattr(module, attr)

        def timed(*args, **kwargs):
            t0 = time.perf_counter()
            try:
                out = original(*args, **kwargs)
            finally:
                self.seconds[stage] = self.seconds.get(stage, 0.0) + time.perf_counter() - t0
                self.calls[stage] = self.calls.get(stage, 0) + 1
            if hook is not None:
                hook(args, kwargs, out)
            return out

        setattr(module, attr, timed)
        self._undo.append((module, attr, original))

    def restore(self) -> None:
        for module, attr, original in reversed(self._undo):
            setattr(module, attr, original)
        self._undo.clear()


@contextlib.contextmanager
def stage_clock(capture: int = 0):

    import plateaufit.fit.correlator_fit as correlator_fit
    import plateaufit.fit.range_stack as range_stack
    import plateaufit.fit.refits as refits
    import plateaufit.stats.covariance as covariance
    import plateaufit.stats.resample as resample

    clock = StageClock()

    def on_batched(args, kwargs, out):
        clock.refits += np.shape(args[0])[0]
        if len(clock.captured) < capture:
            clock.captured.append((args, kwargs))

    def on_refits(args, kwargs, out):
        clock.fallbacks += int(out.n_fallback)

    clock.wrap(refits, "batched_refits", "refits: batched engine", on_batched)
    clock.wrap(correlator_fit, "jackknife_refits", "refits: total (incl. lmfit fallback)",
               on_refits)
    clock.wrap(range_stack, "central_fits", "central fits (stacked engine)")
    clock.wrap(range_stack, "starting_points", "starting points")
    clock.wrap(covariance, "covariance_of_mean", "covariance of the mean")
    clock.wrap(covariance, "per_sample_covariances", "per-sample covariances")
    clock.wrap(resample, "jackknife_samples", "jackknife samples")
    try:
        yield clock
    finally:
        clock.restore()


# ---------------------------------------------------------------------------
# the pipeline measured
# ---------------------------------------------------------------------------

def scan_and_average(binned, *, tmin, tmax, states, form, time_extent):
    """What a spec run does for one fit entry, minus writing: scan, then average."""
    from plateaufit.fit.average import average_fits
    from plateaufit.fit.scan import scan

    fits = scan(binned, tmin=tmin, tmax=tmax, states=states, form=form,
                time_extent=time_extent)
    t0 = time.perf_counter()
    averages = average_fits(fits)   # every parameter over the fits that have it, as the runner
    return fits, averages, time.perf_counter() - t0


def peak_memory(fn) -> tuple[float, float]:
    """(tracemalloc peak of Python allocations in MB, process max RSS in MB) of fn()."""
    tracemalloc.start()
    try:
        fn()
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    rss_kb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss   # kilobytes on Linux
    return peak / 2 ** 20, rss_kb / 1024


def lmfit_subset(fits, n_fits: int, binned, engine: str = "lmfit") -> tuple[float, int, list]:
    """Time jackknife refits of a few scan fits with the given engine."""
    from plateaufit.fit.refits import jackknife_refits
    from plateaufit.stats.resample import jackknife_samples

    chosen = np.linspace(0, len(fits) - 1, n_fits).round().astype(int)
    total, count, results = 0.0, 0, []
    for i in chosen:
        f = fits[i]
        names = list(f.observables)
        x = np.concatenate([binned[n][:, f.tmin:f.tmax + 1] for n in names], axis=1)
        y_samples = jackknife_samples(x)
        t0 = time.perf_counter()
        res = jackknife_refits(y_samples, f.model, f.central.theta, cov=f.covariance.matrix,
                               engine=engine)
        total += time.perf_counter() - t0
        count += y_samples.shape[0]
        results.append((i, res))
    return total, count, results


def engine_variants(captured, repeats: int = 3) -> dict[str, float]:
    """CPU seconds per refit of the engine, compact or fixed-size working set.

    The refits of the whole scan are replayed (same inputs as in the scan),
    alternating the two variants, and the best of ``repeats`` is kept.
    """
    from plateaufit.fit.batched import batched_refits

    best = {"compact": np.inf, "fixed-size": np.inf}
    n = sum(np.shape(args[0])[0] for args, _ in captured)
    for _ in range(repeats):
        for name, compact in (("compact", True), ("fixed-size", False)):
            c0 = time.process_time()
            for args, kwargs in captured:
                batched_refits(*args, **{**kwargs, "compact": compact})
            best[name] = min(best[name], (time.process_time() - c0) / n)
    return best


def workload_a(n_lmfit_fits: int, profile: bool) -> dict:
    print("workload A: N=1000, T=48, bin 5 -> 200 samples; tmin 4..13 x tmax 18..23 x "
          "states {1,2} on one cosh observable", flush=True)
    t0 = time.perf_counter()
    binned = prepare(1000, 48, {"pion": [3.0, 2.0, 1.5]}, [0.21, 0.55, 0.95],
                     noise=0.02, tau_mc=2.0, seed=20240601, bin_size=5)
    prep = time.perf_counter() - t0
    spec = dict(tmin=[4, 13], tmax=[18, 23], states=[1, 2], form="cosh", time_extent=48)
    data = binned["pion"]

    # warm-up (imports, first-call set-up of lmfit/scipy), not timed
    scan_and_average(data, tmin=[4, 5], tmax=[18, 18], states=[1], form="cosh",
                     time_extent=48)

    with stage_clock(capture=10 ** 6) as clock:
        t0, c0 = time.perf_counter(), time.process_time()
        fits, averages, t_avg = scan_and_average(data, **spec)
        wall, cpu = time.perf_counter() - t0, time.process_time() - c0
    n_fits = len(fits)
    stages = dict(clock.seconds)
    stages["model average"] = t_avg
    batched_s = stages.get("refits: batched engine", float("nan"))
    per_refit_batched = batched_s / max(clock.refits, 1)

    lm_total, lm_count, lm_results = lmfit_subset(fits, n_lmfit_fits, {"corr": data})
    per_refit_lmfit = lm_total / lm_count
    # the same subset with the batched engine, for a like-for-like ratio
    b_total, b_count, b_results = lmfit_subset(fits, n_lmfit_fits, {"corr": data},
                                               engine="batched")
    per_refit_subset_batched = b_total / b_count
    agreement = 0.0
    for (_, a), (_, b) in zip(lm_results, b_results):
        ok = a.converged & b.converged
        agreement = max(agreement, float(np.nanmax(np.abs(b.physical[ok] / a.physical[ok] - 1))))

    variants = engine_variants(clock.captured)

    def again():
        scan_and_average(data, **spec)

    tm_peak, rss = peak_memory(again)

    prof_text = ""
    if profile:
        prof = cProfile.Profile()
        prof.enable()
        scan_and_average(data, **spec)
        prof.disable()
        buf = io.StringIO()
        pstats.Stats(prof, stream=buf).sort_stats("cumulative").print_stats(30)
        buf2 = io.StringIO()
        pstats.Stats(prof, stream=buf2).sort_stats("tottime").print_stats(25)
        prof_text = buf.getvalue() + buf2.getvalue()

    e0 = averages if "E0" in averages.names else None
    return {
        "n_fits": n_fits, "n_refits": clock.refits, "n_fallback": clock.fallbacks,
        "prepare_seconds": prep,
        "scan_seconds": wall,
        "stages_seconds": stages,
        "batched_seconds_per_refit": per_refit_batched,
        "lmfit_seconds_per_refit": per_refit_lmfit,
        "lmfit_subset": {"fits": n_lmfit_fits, "refits": lm_count,
                         "batched_seconds_per_refit_same_subset": per_refit_subset_batched,
                         "max_relative_difference": agreement},
        "ratio": per_refit_lmfit / per_refit_batched,
        "ratio_same_subset": per_refit_lmfit / per_refit_subset_batched,
        "engine_working_set_seconds_per_refit": variants,
        "tracemalloc_peak_mb": tm_peak, "max_rss_mb": rss,
        "E0": None if e0 is None else {"value": e0.value["E0"], "error": e0.error["E0"],
                                       "truth": 0.21},
        "profile": prof_text,
        "scan_cpu_seconds": cpu,
    }


def workload_b() -> dict:
    print("workload B: N=10000, T=96, 4 observables simultaneous, 2 states, bin 50 -> 200 "
          "samples; 20 fit ranges", flush=True)
    t0 = time.perf_counter()
    obs = {"pp": [3.0, 2.5], "pa": [1.2, -0.9], "ap": [1.1, -1.0], "aa": [0.6, 0.5]}
    binned = prepare(10_000, 96, obs, [0.18, 0.50], noise=0.03, tau_mc=3.0,
                     seed=20240602, bin_size=50)
    prep = time.perf_counter() - t0
    spec = dict(tmin=[6, 10], tmax=[30, 33], states=[2], form="cosh", time_extent=96)

    def run():
        return scan_and_average(binned, **spec)

    with stage_clock() as clock:
        t0, c0 = time.perf_counter(), time.process_time()
        fits, averages, t_avg = run()
        wall, cpu = time.perf_counter() - t0, time.process_time() - c0
    stages = dict(clock.seconds)
    stages["model average"] = t_avg
    tm_peak, rss = peak_memory(run)
    e0 = averages if "E0" in averages.names else None
    return {
        "n_fits": len(fits), "n_refits": clock.refits, "n_fallback": clock.fallbacks,
        "n_points": int(fits[0].model.n_points), "n_params": int(fits[0].model.n_params),
        "prepare_seconds": prep, "scan_seconds": wall, "scan_cpu_seconds": cpu,
        "stages_seconds": stages,
        "batched_seconds_per_refit": clock.seconds.get("refits: batched engine", np.nan)
        / max(clock.refits, 1),
        "tracemalloc_peak_mb": tm_peak, "max_rss_mb": rss,
        "E0": None if e0 is None else {"value": e0.value["E0"], "error": e0.error["E0"],
                                       "truth": 0.18},
    }


# ---------------------------------------------------------------------------
# GEVP
# ---------------------------------------------------------------------------

GEVP_TRUTH = {
    "energies": [0.18, 0.42, 0.66, 0.93, 1.35],       # the last is not resolved by 4 operators
    "amplitudes": [[1.00, 0.45, 0.25, 0.15, 0.30],   # Z[i, n] = <0|O_i|n>, 4 operators
                   [0.55, 0.90, 0.35, 0.20, 0.35],
                   [0.30, 0.40, 0.85, 0.30, 0.40],
                   [0.20, 0.30, 0.45, 0.80, 0.45]],
}


def invented_matrix_ensemble(n_cfg: int, time_extent: int, energies, amplitudes,
                             noise: float, tau_mc: float, seed: int) -> np.ndarray:
    """Per-configuration periodic correlator matrices, (n_cfg, r, r, T).

    ``C_ij(t) = sum_n Z_in Z_jn (exp(-E_n t) + exp(-E_n (T - t)))`` times
    ``(1 + noise * eta_ij(t))``; ``eta`` is symmetric in ``(i, j)`` up to an
    independent part (sources and sinks measured separately), AR(1)-correlated
    along t (0.8), shares a component between all entries, and is AR(1)-correlated
    along the Monte Carlo chain (autocorrelation time about ``tau_mc``).
    """
    rng = np.random.default_rng(seed)
    z = np.asarray(amplitudes, dtype=float)
    e = np.asarray(energies, dtype=float)
    r = z.shape[0]
    t = np.arange(time_extent)
    basis = np.exp(-np.outer(e, t)) + np.exp(-np.outer(e, time_extent - t))
    truth = np.einsum("in,jn,nt->ijt", z, z, basis)
    phi = np.exp(-1.0 / tau_mc) if tau_mc > 0 else 0.0
    eta = rng.standard_normal((n_cfg, r, r, time_extent))
    eta = 0.6 * 0.5 * (eta + np.swapaxes(eta, 1, 2)) + 0.3 * eta
    eta += 0.6 * rng.standard_normal((n_cfg, 1, 1, time_extent))   # shared by all entries
    for i in range(1, time_extent):                                 # along Euclidean time
        eta[..., i] = 0.8 * eta[..., i - 1] + 0.6 * eta[..., i]
    for k in range(1, n_cfg):                                       # along the chain
        eta[k] = phi * eta[k - 1] + np.sqrt(1 - phi ** 2) * eta[k]
    return truth[None] * (1.0 + noise * eta)


def workload_gevp(repeats: int = 5) -> dict:
    """The variational method's numerical core on invented 4 x 4 data.

    Prepared once (fold, bin, jackknife); then timed, best of ``repeats``: the
    GEVP at t0 = 3 with tracking, log and cosh effective energies, t0 = half
    effective energies, and overlaps at t = 6 from the true energies (fits come
    later; the lead can put the per-level fit scan after this).
    """
    from plateaufit.data.transforms import fold
    from plateaufit.stats.gevp import solve_gevp
    from plateaufit.stats.principal import (half_t0_effective_energy, overlaps,
                                            principal_effective_energy)
    from plateaufit.stats.resample import bin_samples, jackknife_samples

    n_cfg, time_extent, bin_size, t0 = 1000, 64, 10, 3
    print(f"GEVP: 4 x 4 matrix, N={n_cfg}, T={time_extent}, bin {bin_size} -> "
          f"{n_cfg // bin_size} samples; t0 = {t0} and t0 = half", flush=True)
    t_start = time.perf_counter()
    raw = invented_matrix_ensemble(n_cfg, time_extent, GEVP_TRUTH["energies"],
                                   GEVP_TRUTH["amplitudes"], noise=0.02, tau_mc=3.0,
                                   seed=20240603)
    binned = bin_samples(fold(raw, "periodic"), bin_size)         # (100, 4, 4, 33)
    central, samples = binned.mean(axis=0), jackknife_samples(binned)
    prep = time.perf_counter() - t_start
    e_true = np.asarray(GEVP_TRUTH["energies"][:4])

    def run():
        stages = {}
        c0 = time.perf_counter()
        res = solve_gevp(central, samples, t0)
        stages["solve + tracking"] = time.perf_counter() - c0
        c1 = time.perf_counter()
        log = principal_effective_energy(res)
        cosh = principal_effective_energy(res, "cosh", time_extent)
        stages["effective energies (log, cosh)"] = time.perf_counter() - c1
        c2 = time.perf_counter()
        half = half_t0_effective_energy(res)
        stages["effective energies t0 = half"] = time.perf_counter() - c2
        c3 = time.perf_counter()
        z = overlaps(res, e_true, np.tile(e_true, (res.n_samples, 1)), t=6, form="cosh",
                     time_extent=time_extent)
        stages["overlaps"] = time.perf_counter() - c3
        return time.perf_counter() - c0, stages, (res, log, cosh, half, z)

    run()   # warm-up (imports, first calls), not timed
    best, best_stages, out = np.inf, {}, None
    for _ in range(repeats):
        total, stages, out = run()
        if total < best:
            best, best_stages = total, stages
    res, log, cosh, half, z = out

    def plateau(eff, lo, hi):
        v, e = eff.value[:, lo:hi + 1], eff.error[:, lo:hi + 1]
        w = 1.0 / e ** 2
        return (np.nansum(w * v, axis=1) / np.nansum(w, axis=1)).tolist()

    return {
        "prepare_seconds": prep,
        "gevp_seconds": best,
        "stages_seconds": best_stages,
        "n_samples": int(res.n_samples), "n_t": int(res.t.size), "t0": t0,
        "crossings_total": int(res.crossings.sum()),
        "condition_number_t0": res.condition_number_t0,
        "max_asymmetry": float(np.max(res.asymmetry)),
        "cosh_plateau_t5_9": plateau(cosh, 5, 9),
        "half_t0_plateau_t5_9": plateau(half, 5, 9),
        "energies_truth": e_true.tolist(),
        # per level: the top level's eigenvectors carry O(exp(-(E_4 - E_3) t0)) corrections
        "overlap_max_relative_deviation": np.nanmax(
            np.abs(z.value / np.asarray(GEVP_TRUTH["amplitudes"])[:, :4] - 1), axis=0).tolist(),
    }


# ---------------------------------------------------------------------------
# report
# ---------------------------------------------------------------------------

def verdict(value: float, target: float, larger_is_better: bool = False) -> str:
    ok = value >= target if larger_is_better else value <= target
    return "met" if ok else "MISSED"


def print_report(res: dict) -> None:
    a = res.get("A")
    line = "-" * 78
    print(line)
    env = res["environment"]
    end = env.get("load_average_end")
    print(f"plateaufit benchmarks -- {env['label']} (load average "
          f"{env['load_average'][0]:.1f} on {env['cpus']} CPUs at the start"
          + (f", {end[0]:.1f} at the end)" if end else ")"))
    print(line)
    if a:
        print(f"{'Workload A':<46}{'value':>14}  {'target':>8}  ")
        rows = [
            ("batched engine, s per refit (whole scan)", f"{a['batched_seconds_per_refit']:.2e}",
             "", ""),
            (f"lmfit loop, s per refit ({a['lmfit_subset']['fits']} fits x "
             f"{a['lmfit_subset']['refits'] // max(a['lmfit_subset']['fits'], 1)})",
             f"{a['lmfit_seconds_per_refit']:.2e}", "", ""),
            ("ratio lmfit / batched", f"{a['ratio']:.0f}x", ">= 200",
             verdict(a["ratio"], TARGETS["A.ratio"], True)),
            ("  (same subset, batched incl. fallbacks)", f"{a['ratio_same_subset']:.0f}x", "",
             ""),
            (f"whole scan wall time ({a['n_fits']} fits, {a['n_refits']} refits)",
             f"{a['scan_seconds']:.2f} s", "< 3 s",
             verdict(a["scan_seconds"], TARGETS["A.scan_seconds"])),
            ("  (its process CPU time)", f"{a['scan_cpu_seconds']:.2f} s", "", ""),
            ("peak memory, tracemalloc (Python)", f"{a['tracemalloc_peak_mb']:.0f} MB",
             "< 500", verdict(a["tracemalloc_peak_mb"], TARGETS["A.peak_mb"])),
            ("peak memory, ru_maxrss (process)", f"{a['max_rss_mb']:.0f} MB", "< 500",
             verdict(a["max_rss_mb"], TARGETS["A.peak_mb"])),
            ("refits handed back to lmfit", f"{a['n_fallback']}", "", ""),
            ("max rel. difference batched vs lmfit (subset)",
             f"{a['lmfit_subset']['max_relative_difference']:.1e}", "", ""),
        ]
        for name, val, tgt, ok in rows:
            print(f"{name:<46}{val:>14}  {tgt:>8}  {ok}")
        print("  time by stage (s):")
        for stage, sec in sorted(a["stages_seconds"].items(), key=lambda kv: -kv[1]):
            print(f"    {stage:<42}{sec:>10.3f}")
        ws = a["engine_working_set_seconds_per_refit"]
        print("  engine working set, CPU s per refit (replayed): " +
              ", ".join(f"{k} {v:.2e}" for k, v in ws.items()))
        if a["E0"]:
            print(f"  model-averaged E0 = {a['E0']['value']:.5f} +- {a['E0']['error']:.5f} "
                  f"(truth {a['E0']['truth']})")
        print(line)
    b = res.get("B")
    if b:
        print(f"{'Workload B':<46}{'value':>14}  {'target':>8}  ")
        rows = [
            (f"whole scan wall time ({b['n_fits']} fits, {b['n_points']} points, "
             f"{b['n_params']} params)", f"{b['scan_seconds']:.2f} s", "< 30 s",
             verdict(b["scan_seconds"], TARGETS["B.scan_seconds"])),
            ("  (its process CPU time)", f"{b['scan_cpu_seconds']:.2f} s", "", ""),
            ("batched engine, s per refit", f"{b['batched_seconds_per_refit']:.2e}", "", ""),
            ("peak memory, tracemalloc (Python)", f"{b['tracemalloc_peak_mb']:.0f} MB",
             "< 2048", verdict(b["tracemalloc_peak_mb"], TARGETS["B.peak_mb"])),
            ("peak memory, ru_maxrss (process)", f"{b['max_rss_mb']:.0f} MB", "< 2048",
             verdict(b["max_rss_mb"], TARGETS["B.peak_mb"])),
            ("refits handed back to lmfit", f"{b['n_fallback']}", "", ""),
        ]
        for name, val, tgt, ok in rows:
            print(f"{name:<46}{val:>14}  {tgt:>8}  {ok}")
        print("  time by stage (s):")
        for stage, sec in sorted(b["stages_seconds"].items(), key=lambda kv: -kv[1]):
            print(f"    {stage:<42}{sec:>10.3f}")
        if b["E0"]:
            print(f"  model-averaged E0 = {b['E0']['value']:.5f} +- {b['E0']['error']:.5f} "
                  f"(truth {b['E0']['truth']})")
        print(line)
    g = res.get("GEVP")
    if g:
        print(f"{'GEVP':<46}{'value':>14}  {'target':>8}  ")
        name = f"whole GEVP, best of 5 ({g['n_samples']} samples x {g['n_t']} t)"
        print(f"{name:<46}{g['gevp_seconds']:>12.3f} s  {'< 1 s':>8}  "
              + verdict(g["gevp_seconds"], TARGETS["GEVP.seconds"]))
        print("  time by stage (s):")
        for stage, sec in sorted(g["stages_seconds"].items(), key=lambda kv: -kv[1]):
            print(f"    {stage:<42}{sec:>10.4f}")
        print(f"  prepare (invent, fold, bin, jackknife): {g['prepare_seconds']:.2f} s")
        print(f"  crossings (all levels and t): {g['crossings_total']}; cond C(t0) = "
              f"{g['condition_number_t0']:.3g}; largest asymmetry {g['max_asymmetry']:.1f} sigma")
        fmt = lambda xs: ", ".join(f"{x:.4f}" for x in xs)   # noqa: E731
        print(f"  cosh plateau t = 5..9:         {fmt(g['cosh_plateau_t5_9'])}")
        print(f"  t0 = half plateau t = 5..9:    {fmt(g['half_t0_plateau_t5_9'])}")
        print(f"  truth:                         {fmt(g['energies_truth'])}")
        print(f"  overlaps at t = 6, largest relative deviation from the truth per level: "
              f"{fmt(g['overlap_max_relative_deviation'])}")
        print(line)
    print("(stage times overlap: 'refits: total' contains 'refits: batched engine'; the "
          "central fits contain their own covariance checks.)")


def load_average() -> tuple[float, float, float]:
    try:
        return os.getloadavg()
    except OSError:
        return (float("nan"),) * 3


def environment(label: str) -> dict:
    keys = ("OPENBLAS_NUM_THREADS", "OPENBLAS_CORETYPE", "OPENBLAS_L2_SIZE",
            "OMP_NUM_THREADS", "MKL_NUM_THREADS")
    return {"label": label, "python": sys.version.split()[0], "numpy": np.__version__,
            "machine": platform.machine(), "cpus": os.cpu_count(),
            "load_average": load_average(), "env": {k: os.environ.get(k) for k in keys}}


def run_all(args) -> dict:
    res = {"environment": environment(args.label)}
    only = getattr(args, "only", None)
    if only in (None, "a"):
        res["A"] = workload_a(2 if args.quick else 5, args.profile)
    if only == "b" or (only is None and not args.skip_b):
        res["B"] = workload_b()
    if only in (None, "gevp"):
        res["GEVP"] = workload_gevp()
    # the machine may be shared: the load at the end tells whether it changed
    res["environment"]["load_average_end"] = load_average()
    return res


def blas_variants(argv: list[str]) -> list[tuple[str, dict]]:
    variants = []
    if os.environ.get("OPENBLAS_NUM_THREADS") != "1":
        variants.append(("OPENBLAS_NUM_THREADS=1", {"OPENBLAS_NUM_THREADS": "1"}))
    if os.environ.get("OPENBLAS_CORETYPE") or os.environ.get("OPENBLAS_L2_SIZE"):
        variants.append(("without OPENBLAS_CORETYPE/L2_SIZE",
                         {"OPENBLAS_CORETYPE": None, "OPENBLAS_L2_SIZE": None}))
    out = []
    for label, change in variants:
        env = dict(os.environ)
        for k, v in change.items():
            if v is None:
                env.pop(k, None)
            else:
                env[k] = v
        cmd = [sys.executable, str(Path(__file__).resolve()), "--child", "--label", label]
        cmd += [a for a in argv if a in ("--quick", "--skip-b")]
        if "--only" in argv:
            cmd += argv[argv.index("--only"):argv.index("--only") + 2]
        cmd += [a for a in argv if a.startswith("--only=")]
        proc = subprocess.run(cmd, env=env, capture_output=True, text=True, check=True)
        out.append((label, json.loads(proc.stdout.strip().splitlines()[-1])))
    return out


def main(argv: list[str] | None = None) -> int:
    argv = sys.argv[1:] if argv is None else argv
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="smaller lmfit subset")
    parser.add_argument("--skip-b", action="store_true", help="only workload A")
    parser.add_argument("--profile", action="store_true", help="cProfile workload A's scan")
    parser.add_argument("--no-variants", action="store_true",
                        help="do not repeat the run with other OpenBLAS settings")
    parser.add_argument("--only", choices=("a", "b", "gevp"), default=None,
                        help="run one workload only")
    parser.add_argument("--label", default="environment as given")
    parser.add_argument("--child", action="store_true", help=argparse.SUPPRESS)
    args = parser.parse_args(argv)

    res = run_all(args)
    if args.child:   # a variant run: hand the figures to the parent as one JSON line
        res.get("A", {}).pop("profile", None)
        print(json.dumps(res, default=float))
        return 0
    print_report(res)
    if args.profile and res.get("A", {}).get("profile"):
        print("cProfile of workload A's scan (top entries):")
        print(res["A"]["profile"])
    runs = [res]
    if not args.no_variants:
        for label, other in blas_variants(argv):
            print_report(other)
            runs.append(other)
    from plateaufit.atomic import write_text

    for r in runs:
        if "A" in r:
            r["A"].pop("profile", None)
    # a single workload does not overwrite the full run's figures
    out = OUTPUT if args.only is None else OUTPUT.with_name(f"latest_{args.only}.json")
    write_text(out, json.dumps({"runs": runs, "targets": TARGETS}, indent=2, default=float))
    print(f"wrote {out.relative_to(HERE.parent)}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
