# %% [markdown]
# # plateaufit from Python: a walkthrough on an invented ensemble
#
# Every step of `plateaufit fit`, done by hand with the public API
# (`import plateaufit as pf`) on arrays made up here from a known truth, so each
# number printed can be held against what it should be.
#
# The ensemble, `kestrel-c32`, is fictional: T = 32, two Monte Carlo streams of
# 400 and 360 configurations, one periodic pseudoscalar-like correlator with two
# states,
#
#     C(t) = sum_n A_n (exp(-E_n t) + exp(-E_n (T - t))),
#     E0 = 0.36, A0 = 1.2, E1 = 0.95, A1 = 0.9,
#
# times multiplicative noise `1 + s(t) eta(t)`. `eta` is an AR(1) Markov chain in
# Monte Carlo time, `eta_n = phi eta_{n-1} + sqrt(1 - phi^2) z_n`, phi = 0.6,
# partly shared between timeslices (so neighbouring t are correlated, as in real
# data). The exact integrated autocorrelation time of an AR(1) chain is
# `tau_int = 1/2 + phi / (1 - phi) = 2.0` in the 1/2 + sum rho convention
# (sum of a geometric series), and C(t) is linear in eta, so that is the truth
# at every timeslice.
#
# Run it as a script (`python examples/api_walkthrough.py [PLOT_DIR]`) or cell by
# cell in an editor that understands `# %%`. The plot goes to PLOT_DIR, or to a
# temporary directory when none is given. At the end, `SUMMARY` holds the
# numbers the test of this walkthrough checks.

# %%
from __future__ import annotations

import sys
import tempfile
from pathlib import Path

import numpy as np

import plateaufit as pf

SEED = 3211
T = 32
STREAMS = (400, 360)
PHI = 0.6
TRUTH = {"E0": 0.36, "A0": 1.2, "E1": 0.95, "A1": 0.9}
TAU_EXACT = 0.5 + PHI / (1.0 - PHI)     # AR(1), 1/2 + sum rho convention


def ar1_chain(rng: np.random.Generator, n: int, k: int, phi: float) -> np.ndarray:
    """(n, k) unit-variance AR(1) chains along the first axis, started stationary."""
    z = rng.standard_normal((n, k))
    x = np.empty((n, k))
    x[0] = z[0]
    c = np.sqrt(1.0 - phi * phi)
    for i in range(1, n):
        x[i] = phi * x[i - 1] + c * z[i]
    return x


rng = np.random.default_rng(SEED)
t_all = np.arange(T)
exact = sum(TRUTH[f"A{n}"] * (np.exp(-TRUTH[f"E{n}"] * t_all)
                              + np.exp(-TRUTH[f"E{n}"] * (T - t_all))) for n in (0, 1))
SHARED = 0.7     # weight of the component common to all timeslices; the rest is per t
noise = np.concatenate([SHARED * ar1_chain(rng, n, 1, PHI)
                        + np.sqrt(1.0 - SHARED**2) * ar1_chain(rng, n, T, PHI)
                        for n in STREAMS])     # unit variance, AR(1) with PHI at every t
raw = exact * (1.0 + 0.01 * np.exp(0.05 * t_all) * noise)     # (760, 32), Monte Carlo order
streams = np.repeat(np.arange(len(STREAMS)), STREAMS)         # one stream label per config
print(f"ensemble kestrel-c32: {raw.shape[0]} configurations in {len(STREAMS)} streams "
      f"{STREAMS}, T = {T}")

# %% [markdown]
# ## Folding
# A periodic correlator is symmetric about T/2; averaging C(t) and C(T - t)
# leaves t = 0..T/2.

# %%
folded = pf.fold(raw, "periodic")
print(f"folded: {raw.shape} -> {folded.shape} (t = 0..{folded.shape[1] - 1})")

# %% [markdown]
# ## Autocorrelation: tau_int per timeslice
# Streams are independent replicas: pairs never cross a stream boundary.

# %%
tau_results = [pf.tau_int(folded[:, t], streams=streams) for t in range(folded.shape[1])]
print(f"tau_int (1/2 + sum rho convention) per timeslice; exact AR(1) value {TAU_EXACT:.2f}")
for t, r in enumerate(tau_results):
    flag = "" if r.reliable else "  (lower bound: window not found)"
    print(f"  t = {t:2d}: tau_int = {r.tau:.2f} +- {r.error:.2f}, window W = {r.window}{flag}")
taus = np.array([r.tau for r in tau_results])
T_MID = 8

# %% [markdown]
# ## Binning study
# The jackknife error of the mean grows with the bin size until the bins are
# effectively independent; it levels off at sqrt(2 tau_int) times the naive
# error (here sqrt(2 * 2.0) = 2).

# %%
study = pf.binning_study(folded[:, T_MID], sizes=[1, 2, 4, 8, 12, 16, 20, 24, 32],
                         streams=streams)
ratio = study.errors / study.naive_error
print(f"binning study at t = {T_MID}: error / naive error")
for size, r in zip(study.sizes, ratio):
    print(f"  bin size {int(size):3d}: {r:.2f}")
# bins of 16..32 configurations are 8..16 tau_int long: on the plateau
plateau = float(ratio[study.sizes >= 16].mean())
print(f"  plateau (bin sizes 16..32) {plateau:.2f}; expected sqrt(2 tau_int) = "
      f"{np.sqrt(2 * TAU_EXACT):.2f}")

bin_size = pf.choose_bin_size(taus, list(STREAMS))
binned, n_dropped = pf.bin_samples(folded, bin_size, streams, return_dropped=True)
print(f"bin size {bin_size} (from the largest tau_int, {taus.max():.2f}): "
      f"{binned.shape[0]} bins, {n_dropped} configurations dropped at stream ends")

# %% [markdown]
# ## Jackknife
# Delete-one means of the binned data; the error is
# sqrt((N - 1)/N sum (x_i - xbar)^2), which for the mean equals the standard
# error of the bins.

# %%
jk = pf.jackknife_samples(binned)            # (n_bins, 17)
jk_error = pf.jackknife_error(jk)
naive = folded.std(axis=0, ddof=1) / np.sqrt(folded.shape[0])
print(f"C({T_MID}) = {binned[:, T_MID].mean():.6g} +- {jk_error[T_MID]:.2g} "
      f"(jackknife on bins; the naive error ignoring autocorrelation is {naive[T_MID]:.2g}, "
      f"ratio {jk_error[T_MID] / naive[T_MID]:.2f})")

# %% [markdown]
# ## Covariance of the mean, with shrinkage
# Over the fit range t = 2..16 (15 points). Ledoit-Wolf shrinkage toward the
# diagonal regularises it when there are few bins for many points.

# %%
TMIN, TMAX = 2, 16
cov = pf.covariance_of_mean(binned[:, TMIN:TMAX + 1], shrinkage="ledoit-wolf",
                            target="diagonal")
print(f"covariance t = {TMIN}..{TMAX}: Ledoit-Wolf intensity {cov.shrinkage:.3f}, "
      f"condition number {cov.condition_number_raw:.3g} raw -> {cov.condition_number:.3g}")

# %% [markdown]
# ## Effective mass
# The cosh effective mass solves C(t)/C(t+1) = cosh(m (T/2 - t)) / cosh(m (T/2 - t - 1));
# it falls from above onto E0 as the excited state dies away.

# %%
em = pf.effective_mass_jackknife(binned, kind="cosh", time_extent=T)
print("effective mass (cosh), jackknife over bins:")
for t, m, e in zip(em.t, em.value, em.error):
    print(f"  t = {int(t):2d}: {m:.4f} +- {e:.4f}")

# %% [markdown]
# ## A correlated two-state fit
# Central fit to the mean with the shrunk covariance, then a refit on every
# jackknife sample for the errors.

# %%
fit = pf.fit_correlator({"kestrel": binned}, form="cosh", states=2, tmin=TMIN, tmax=TMAX,
                        time_extent=T)
c = fit.central
E0, dE0 = c.reported["E0"], fit.errors["E0"]
E1, dE1 = c.reported["E1"], fit.errors["E1"]
print(f"two-state cosh fit t = {TMIN}..{TMAX}: chi2/dof = {c.chi2:.2f}/{c.dof}, "
      f"p = {c.p_value:.2f}, converged {fit.converged}")
print(f"  E0 = {E0:.5f} +- {dE0:.5f}   (truth {TRUTH['E0']}, pull "
      f"{(E0 - TRUTH['E0']) / dE0:+.2f} sigma)")
print(f"  E1 = {E1:.4f} +- {dE1:.4f}   (truth {TRUTH['E1']}, pull "
      f"{(E1 - TRUTH['E1']) / dE1:+.2f} sigma)")

# %% [markdown]
# ## A small scan and the model average
# One and two states, tmin = 3, 5, 7, tmax = 16, averaged with AIC weights
# (Jay & Neil 2021, "Bayesian model averaging for analysis of lattice field
# theory results", Phys. Rev. D 103, 114502). One-state fits from early tmin
# miss the excited state; their chi2 is large and their weight small.

# %%
fits = pf.scan({"kestrel": binned}, tmin=[3, 7, 2], tmax=TMAX, states=[1, 2], form="cosh",
               time_extent=T)
central = np.array([[f.central.reported["E0"]] for f in fits])
samples = np.stack([f.samples[:, [f.names.index("E0")]] for f in fits])
# a point enters the average when it converged and no diagnostic flag makes it
# degenerate (fit.flags: a collapsed ground state, a bound, wandering refits, ...)
avg = pf.model_average(central, samples, [f.central.aic for f in fits],
                       [f.converged and not f.degenerate for f in fits], ["E0"])
print("scan: states tmin tmax   chi2/dof   AIC     weight  E0")
for f, w in zip(fits, avg.weights):
    print(f"      {f.states:6d} {f.tmin:4d} {f.tmax:4d} {f.central.chi2:6.1f}/{f.central.dof:<3d} "
          f"{f.central.aic:7.1f} {w:7.3f}  {f.central.reported['E0']:.5f} +- {f.errors['E0']:.5f}")
print(f"model average: E0 = {avg.value['E0']:.5f} +- {avg.error['E0']:.5f} "
      f"(stat {avg.stat_error['E0']:.5f}, sys {avg.sys_error['E0']:.5f}); truth {TRUTH['E0']}")

# %% [markdown]
# ## A plot: the effective mass with the fitted E0

# %%
import matplotlib  # noqa: E402

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402

plot_dir = Path(sys.argv[1]) if len(sys.argv) > 1 else Path(tempfile.mkdtemp(prefix="walk_"))
plot_dir.mkdir(parents=True, exist_ok=True)
fig, ax = plt.subplots(figsize=(5.0, 3.4), layout="constrained")
ok = np.isfinite(em.value) & np.isfinite(em.error)
ax.errorbar(em.t[ok], em.value[ok], yerr=em.error[ok], fmt="o", ms=3, capsize=2,
            label="cosh effective mass")
ax.axhspan(avg.value["E0"] - avg.error["E0"], avg.value["E0"] + avg.error["E0"], alpha=0.3,
           label="model-averaged E0")
ax.axhline(TRUTH["E0"], ls="--", lw=1, color="k", label="invented truth")
ax.set_xlabel("t")
ax.set_ylabel("effective mass (lattice units)")
ax.set_ylim(TRUTH["E0"] - 0.03, TRUTH["E0"] + 0.15)
ax.legend(fontsize=8)
plot_path = plot_dir / "kestrel_effective_mass.png"
fig.savefig(plot_path, dpi=120)
plt.close(fig)
print(f"plot written to {plot_path}")

# %% [markdown]
# ## The report's plots of this scan
# `pf.summarise_scan` turns the scan into the typed result a spec run reports for a
# fit (the model average over every parameter, the highest-weight point, the
# covariance behind it and, given the binned data, the effective mass); the
# report's plot functions take it as they take a run's results.

# %%
result = pf.summarise_scan(fits, name="kestrel", binned={"kestrel": binned}, time_extent=T)
e0 = result.chosen.params["E0"]
print(f"summarised scan: {result.chosen.method} of {result.chosen.n_fits} fits, "
      f"E0 = {e0.value:.5f} +- {e0.error:.5f}, highest weight "
      f"[{result.chosen.point.tmin}, {result.chosen.point.tmax}], "
      f"{result.chosen.point.states} states")
report_plots = []
for kind, figure in (("stability", pf.plot_stability(result, truth=TRUTH)),
                     ("weights", pf.plot_weights(result)),
                     ("effmass", pf.plot_effective_mass(result, "kestrel", truth=TRUTH))):
    png, _pdf = pf.save_figure(figure, plot_dir / f"kestrel_{kind}")
    report_plots.append(str(png))
print(f"report plots written: {', '.join(Path(p).name for p in report_plots)}")

# %% [markdown]
# ## Summary (what the test of this walkthrough checks)

# %%
SUMMARY = {
    "truth": dict(TRUTH),
    "tau_int_exact": TAU_EXACT,
    "tau_int": {"t": T_MID, "value": float(taus[T_MID]),
                "error": float(tau_results[T_MID].error)},
    "binning_plateau": plateau,
    "bin_size": int(bin_size),
    "n_bins": int(binned.shape[0]),
    "shrinkage": float(cov.shrinkage),
    "fit": {"E0": float(E0), "E0_error": float(dE0), "E1": float(E1), "E1_error": float(dE1),
            "p_value": float(c.p_value), "converged": bool(fit.converged)},
    "average": {"E0": float(avg.value["E0"]), "E0_error": float(avg.error["E0"]),
                "weights": [float(w) for w in avg.weights]},
    "plot": str(plot_path),
    "summarised": {"E0": float(e0.value), "E0_error": float(e0.error),
                   "method": result.chosen.method, "plots": report_plots},
}
print(SUMMARY)
