"""Shared pieces of the benchmarks: invented data, timing wrappers, memory, report rows.

The data are invented: multi-state correlators from a known truth with noise
correlated in Euclidean time and along the Monte Carlo chain (AR(1)), from a
fixed seed. Stage timings come from thin timing wrappers installed around the
package's functions for the duration of a run.
"""

from __future__ import annotations

import contextlib
import importlib
import os
import platform
import resource
import sys
import time
import tracemalloc

import numpy as np


def invented_ensemble(n_cfg: int, time_extent: int, observables: dict[str, list[float]],
                      energies: list[float], noise: float, tau_mc: float,
                      seed: int, growth: float = 0.0) -> dict[str, np.ndarray]:
    """Per-configuration periodic correlators of several observables, (n_cfg, T) each.

    ``C_o(t) = sum_n A_n.o (exp(-E_n t) + exp(-E_n (T - t)))`` times
    ``(1 + noise * exp(growth * min(t, T - t)) * eta)``, where ``eta`` is
    AR(1)-correlated along t (coefficient 0.8), between observables (a shared
    component), and along the Monte Carlo chain (``phi = exp(-1/tau_mc)``, so
    tau_int = (1 + phi) / (2 (1 - phi)) in the 1/2 + sum rho convention).
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
    rel = noise * np.exp(growth * np.minimum(t, time_extent - t))
    out = {}
    for name, amps in observables.items():
        truth = np.asarray(amps) @ basis
        eta = 0.7 * shared + np.sqrt(1 - 0.7 ** 2) * correlated_noise()
        out[name] = truth * (1.0 + rel * eta)
    return out


def prepare(n_cfg, time_extent, observables, energies, noise, tau_mc, seed, bin_size,
            growth=0.0):
    from plateaufit.data.transforms import fold
    from plateaufit.stats.resample import bin_samples

    raw = invented_ensemble(n_cfg, time_extent, observables, energies, noise, tau_mc, seed,
                            growth)
    return {name: bin_samples(fold(v, "periodic"), bin_size) for name, v in raw.items()}


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
    """Time the stages of a scan: central fits, refits (and the engine inside),
    starting points, covariances. Also counts refits, engine iterations per
    refit and lmfit fallbacks. ``capture`` keeps that many engine calls' inputs
    for replays."""
    import plateaufit.fit.correlator_fit as correlator_fit
    import plateaufit.fit.range_stack as range_stack
    import plateaufit.fit.refits as refits
    import plateaufit.stats.covariance as covariance
    import plateaufit.stats.resample as resample

    # (plateaufit.fit re-exports the function scan, which hides the module)
    scan_module = importlib.import_module("plateaufit.fit.scan")
    clock = StageClock()
    clock.iterations = 0

    def on_batched(args, kwargs, out):
        clock.refits += np.shape(args[0])[0]
        if len(clock.captured) < capture:
            clock.captured.append((args, {k: v for k, v in kwargs.items() if k != "info"}))

    def on_refits(args, kwargs, out):
        clock.fallbacks += int(out.n_fallback)

    # the engine, with its iteration count
    original = refits.batched_refits

    def engine(*args, **kwargs):
        info = {}
        out = original(*args, **{**kwargs, "info": info})
        clock.iterations += int(np.sum(info.get("iterations", 0)))
        return out

    refits.batched_refits = engine
    clock._undo.append((refits, "batched_refits", original))
    clock.wrap(refits, "batched_refits", "refits: batched engine", on_batched)
    clock.wrap(correlator_fit, "jackknife_refits", "refits: total (incl. lmfit fallback)",
               on_refits)
    clock.wrap(scan_module, "central_fits", "central fits (stacked engine)")
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

def scan_and_average(binned, *, tmin, tmax, states, form, time_extent, **options):
    """What a spec run does for one fit entry, minus writing: scan, then average."""
    from plateaufit.fit.average import average_fits
    from plateaufit.fit.scan import scan

    fits = scan(binned, tmin=tmin, tmax=tmax, states=states, form=form,
                time_extent=time_extent, **options)
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
    """Time jackknife refits of a few scan fits with the given engine.

    The fits are spread evenly over the scan's clean (not degenerate) points:
    a loop of lmfit fits on a degenerate point can take a hundred times
    longer per refit, which would flatter the comparison.
    """
    from plateaufit.fit.refits import jackknife_refits
    from plateaufit.stats.resample import jackknife_samples

    clean = [i for i, f in enumerate(fits) if not getattr(f, "degenerate", False)]
    chosen = [clean[k] for k in np.linspace(0, len(clean) - 1, n_fits).round().astype(int)]
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


def verdict(value: float, target: float, larger_is_better: bool = False) -> str:
    ok = value >= target if larger_is_better else value <= target
    return "met" if ok else "MISSED"


def print_rows(title: str, rows: list[tuple[str, str, str, str]],
               stages: dict[str, float] | None = None) -> None:
    """A workload's table: (name, value, target, verdict) rows, then stage times."""
    print(f"{title:<46}{'value':>14}  {'target':>8}  ")
    for name, val, tgt, ok in rows:
        print(f"{name:<46}{val:>14}  {tgt:>8}  {ok}")
    if stages:
        print("  time by stage (s):")
        for stage, sec in sorted(stages.items(), key=lambda kv: -kv[1]):
            print(f"    {stage:<42}{sec:>10.3f}")


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


