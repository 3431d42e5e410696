"""Level fits of correlator matrices against outside sources.

* Exact results: a matrix of exactly ``r`` states, nearly noise-free, gives
  every level's energy exactly (the principal correlators are then single
  cosh functions, Lüscher and Wolff 1990); with a fourth state the truncation
  bias of each fitted level is bounded by the deviation of the exact (noise-free)
  effective energy from the truth over its fit range (Blossier et al. 2009:
  ``E_eff,n(t) - E_n = O(exp(-(E_r - E_n) t))``), and is really there.
* scipy: the fit of a principal correlator -- central fit to ``lambda_n`` of the
  mean matrix, a refit on every jackknife sample, the jackknife covariance of
  ``lambda_n`` -- equals ``scipy.optimize.curve_fit`` with that covariance,
  sample by sample.
* Coverage: on independent replicas of noisy data the pulls of the three
  levels behave like standard normal ones (common practice: about 68% within
  1 sigma, 95% within 2).

Data: the invented axial channel of plateaufit.demo.matrix, fixed seeds.
"""

from __future__ import annotations

import dataclasses
import sys
from pathlib import Path

import numpy as np
import pytest
from scipy.optimize import curve_fit

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from matrix_cases import LEVEL_FITS, T, matrix_spec, write_matrix_data  # noqa: E402
from plateaufit.data.transforms import fold  # noqa: E402
from plateaufit.demo.matrix import AXIAL  # noqa: E402
from plateaufit.fit.correlator_fit import fit_correlator  # noqa: E402
from plateaufit.pipeline.matrices import level_data, range_used  # noqa: E402
from plateaufit.pipeline.rules import validate_spec  # noqa: E402
from plateaufit.pipeline.run import run_analysis  # noqa: E402
from plateaufit.stats.gevp import solve_gevp  # noqa: E402
from plateaufit.stats.principal import principal_effective_energy  # noqa: E402
from plateaufit.stats.resample import bin_samples, jackknife_samples  # noqa: E402

EXACT_THREE = dataclasses.replace(
    AXIAL, overlaps=tuple(row[:3] + (0.0,) for row in AXIAL.overlaps))


def _run(tmp_path: Path, matrix, noise0: float, seed: int = 11):
    data_file = write_matrix_data(tmp_path, noise0=noise0, matrix=matrix, seed=seed)
    spec = matrix_spec(data_file, matrix=matrix)
    return run_analysis(validate_spec(spec, base_dir=tmp_path))


def _exact_effective_energies(matrix, t0: int = 2) -> np.ndarray:
    c = fold(matrix.truth(np.arange(T), T).reshape(-1, T), "periodic").reshape(
        matrix.size, matrix.size, -1)
    res = solve_gevp(c, np.stack([c, c]), t0)
    return principal_effective_energy(res, "cosh", T).value


def test_exactly_three_states_give_every_level_exactly(tmp_path):
    # no fourth state: lambda_n(t, t0) = cosh(E_n (T/2 - t)) / cosh(E_n (T/2 - t0)) exactly
    # (exact result), so a one-state cosh fit gives E_n; noise 1e-6 per configuration
    results = _run(tmp_path, EXACT_THREE, noise0=1e-6)
    for n in range(3):
        e0 = results.fits[f"axial_{n}"].chosen.params["E0"]
        assert e0.value == pytest.approx(AXIAL.energies[n], abs=max(5 * e0.error, 1e-9))
        assert e0.error < 1e-5


def test_truncation_bias_is_that_of_the_exact_effective_energies(tmp_path):
    # The noise-free effective energy of level n deviates from E_n by the truncation
    # (exact result: the GEVP of the exact matrix); it falls as exp(-(E_3 - E_n) t)
    # (Blossier et al. 2009). A fit over [tmin, tmax] carries a bias of the size of the
    # effective energies' deviation over its range: within a factor 2 of the largest one
    # (common practice: a correlated fit weighs the slope near tmin, so it may land a
    # little beyond the range's effective energies), and from above, as they approach.
    results = _run(tmp_path, AXIAL, noise0=1e-6)
    eff = _exact_effective_energies(AXIAL)
    biases = []
    for n in range(3):
        fit = results.fits[f"axial_{n}"]
        lo, hi = range_used(fit)
        bound = float(np.max(np.abs(eff[n, lo:hi] - AXIAL.energies[n])))
        e0 = fit.chosen.params["E0"]
        deviation = e0.value - AXIAL.energies[n]
        assert -5 * e0.stat_error - 1e-9 <= deviation <= 2 * bound + 5 * e0.stat_error, \
            (n, deviation, bound)
        biases.append(abs(deviation))
    # the exact effective energies fall with the gap to the fourth state
    gap = AXIAL.energies[3] - AXIAL.energies[2]
    ratio = (eff[2, 8] - AXIAL.energies[2]) / (eff[2, 6] - AXIAL.energies[2])
    assert ratio == pytest.approx(np.exp(-2 * gap), rel=0.25)
    # the truncation is real: level 2's exact effective energy at t = 3 sits visibly
    # above E_2, and a fit that starts there carries a bias of that size at most
    assert eff[2, 3] - AXIAL.energies[2] > 1e-3
    assert biases[2] <= 2 * (eff[2, 3] - AXIAL.energies[2])


def test_a_level_fit_is_a_correlated_fit_of_lambda_n_sample_by_sample_as_scipy_does(tmp_path):
    # the principal correlator's jackknife samples as bins (pseudo-values): the central
    # fit to lambda_n of the mean matrix and the refits on every sample, with the
    # jackknife covariance of lambda_n (no shrinkage), are scipy.optimize.curve_fit with
    # that covariance (source: scipy), and the error is the jackknife error of the refits
    values = {e: v for e, v in __import__("plateaufit.demo.matrix", fromlist=["x"])
              .simulate_matrix(AXIAL, 5, streams=(("a", 400),)).items()}
    r = AXIAL.size
    raw = np.stack([np.stack([values[a + b] for b in AXIAL.operators], axis=1)
                    for a in AXIAL.operators], axis=1)               # (n, r, r, T)
    folded = fold(raw.reshape(-1, T), "periodic").reshape(raw.shape[0], r, r, -1)
    bins = bin_samples(folded, 10)
    res = solve_gevp(bins.mean(axis=0), jackknife_samples(bins), 2)
    level, tmin, tmax = 1, 4, 10
    data, central = level_data(res, level, "axial")
    fit = fit_correlator(data, central=central, form="cosh", states=1, tmin=tmin, tmax=tmax,
                         time_extent=T, shrinkage="none", per_sample=False)

    t = np.arange(tmin, tmax + 1)
    samples = res.eigenvalue_samples[:, level, tmin:tmax + 1]
    n = samples.shape[0]
    cov = (n - 1) / n * np.einsum("si,sj->ij", samples - samples.mean(0),
                                  samples - samples.mean(0))

    def model(tt, a, e):
        return a * (np.exp(-e * tt) + np.exp(-e * (T - tt)))

    p0 = [fit.central.reported["A0.axial"], fit.central.reported["E0"]]
    ref, _ = curve_fit(model, t, res.eigenvalues[level, tmin:tmax + 1], p0=p0, sigma=cov,
                       absolute_sigma=True, xtol=1e-14, ftol=1e-14)
    assert fit.central.reported["E0"] == pytest.approx(ref[1], rel=1e-8)
    refits = np.array([curve_fit(model, t, y, p0=ref, sigma=cov, absolute_sigma=True,
                                 xtol=1e-14, ftol=1e-14)[0][1] for y in samples])
    jack = np.sqrt((n - 1) / n * np.sum((refits - refits.mean()) ** 2))
    assert fit.errors["E0"] == pytest.approx(jack, rel=1e-4)
    assert fit.central.reported["E0"] == pytest.approx(AXIAL.energies[level], abs=5 * jack)


@pytest.mark.slow   # twelve pipeline runs
def test_level_errors_cover_the_truth_over_independent_replicas(tmp_path):
    # common practice: honest errors put about 68% of pulls within 1 sigma and 95%
    # within 2; with 36 pulls the binomial spread is about 8% and 4%
    fits = [dict(f, states=1, priors={}, tmin=[f["tmin"][0] + 2, f["tmin"][1]])
            for f in LEVEL_FITS]
    pulls = []
    for seed in range(12):
        directory = tmp_path / str(seed)
        directory.mkdir()
        data_file = write_matrix_data(directory, seed=1000 + seed)
        spec = matrix_spec(data_file, fits=fits)
        results = run_analysis(validate_spec(spec, base_dir=directory))
        for n in range(3):
            e0 = results.fits[f"axial_{n}"].chosen.params["E0"]
            pulls.append((e0.value - AXIAL.energies[n]) / e0.error)
    pulls = np.abs(np.array(pulls))
    assert np.mean(pulls < 1) >= 0.5
    assert np.mean(pulls < 2) >= 0.85
    assert np.mean(pulls < 1) <= 0.9        # errors not inflated either
