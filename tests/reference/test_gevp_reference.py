"""The GEVP checked against scipy, exact multi-state correlators and Blossier et al. (2009).

Sources outside the project, named beside each assertion:
* scipy.linalg.eigh(a, b) -- LAPACK's generalised symmetric-definite solver;
* scipy.optimize.linear_sum_assignment -- the assignment problem;
* exact results: a matrix of exactly r exponentials (or cosh) gives principal
  correlators exp(-E_n (t - t0)) and eigenvectors dual to the amplitudes;
* B. Blossier, M. Della Morte, G. von Hippel, T. Mendes, R. Sommer, JHEP 04
  (2009) 094: with t0 >= t/2 the effective energies approach E_n as
  exp(-(E_r - E_n) t).
"""

from __future__ import annotations

import itertools
import warnings

import numpy as np
import pytest
import scipy.linalg
from scipy.optimize import linear_sum_assignment

from plateaufit.stats import (
    half_t0_effective_energy,
    overlaps,
    principal_effective_energy,
    solve_gevp,
)
from plateaufit.stats.gevp import best_permutations
from plateaufit.stats.resample import jackknife_samples

T = 32


def exact_matrix(amplitudes: np.ndarray, energies: np.ndarray, n_t: int,
                 form: str = "exp", time_extent: int = T) -> np.ndarray:
    """``C_ij(t) = sum_n Z_in Z_jn g(E_n, t)``, shape (r, r, n_t)."""
    t = np.arange(n_t)
    g = np.exp(-np.outer(energies, t))
    if form == "cosh":
        g = g + np.exp(-np.outer(energies, time_extent - t))
    return np.einsum("in,jn,nt->ijt", amplitudes, amplitudes, g)


def noisy_bins(central: np.ndarray, n_bins: int, noise: float, seed: int) -> np.ndarray:
    """Binned data (n_bins, r, r, n_t): the central matrix times (1 + noise * N(0,1))
    with the noise correlated along t and symmetric in (i, j)."""
    rng = np.random.default_rng(seed)
    r, _, n_t = central.shape
    z = rng.standard_normal((n_bins, r, r, n_t))
    z = 0.5 * (z + np.swapaxes(z, 1, 2))
    for k in range(1, n_t):
        z[..., k] = 0.7 * z[..., k - 1] + 0.71 * z[..., k]
    return central[None] * (1.0 + noise * z)


def scipy_descending(c_t: np.ndarray, c_t0: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    w, v = scipy.linalg.eigh(c_t, c_t0)
    return w[::-1], v[:, ::-1]


# ---------------------------------------------------------------------------
# one matrix against scipy
# ---------------------------------------------------------------------------

@pytest.mark.parametrize("ill_conditioned", [False, True])
def test_every_timeslice_equals_scipy_generalised_eigh(ill_conditioned):
    rng = np.random.default_rng(101)
    r, n_t = 4, 16
    z = rng.uniform(0.2, 1.5, (r, r + 2))
    if ill_conditioned:          # two operators nearly the same combination of states
        z[3] = z[2] + 1e-3 * rng.standard_normal(r + 2)
    c = exact_matrix(z, np.array([0.2, 0.45, 0.7, 0.9, 1.3, 1.6]), n_t)
    bins = noisy_bins(c, 20, 1e-6 if ill_conditioned else 1e-3, seed=5)
    central, samples = bins.mean(axis=0), jackknife_samples(bins)
    t0 = 3
    res = solve_gevp(central, samples, t0)
    sym = 0.5 * (central + central.transpose(1, 0, 2))
    for t in range(n_t):
        if t == t0:
            continue
        w, v = scipy_descending(sym[..., t], sym[..., t0])      # scipy.linalg.eigh(a, b)
        # levels are followed by eigenvector, scipy sorts by eigenvalue: compare in
        # scipy's order (before t0 and where noise wins the two differ)
        order = np.argsort(-res.eigenvalues[:, t], kind="stable")
        # round-off of the Cholesky reduction: a few eps times cond C(t0)
        tol = 10 * np.finfo(float).eps * res.condition_number_t0
        np.testing.assert_allclose(res.eigenvalues[order, t], w, rtol=0,
                                   atol=tol * np.abs(w).max())
        # eigenvectors equal scipy's up to sign (both normalised v^T C(t0) v = 1)
        mine = res.eigenvectors[t][:, order]
        signs = np.sign(np.sum(mine * v, axis=0))
        np.testing.assert_allclose(mine, v * signs, rtol=0, atol=tol * np.abs(v).max())
    assert np.all(res.eigenvalues[:, t0] == 1.0)


def test_jackknife_errors_equal_a_per_sample_scipy_loop():
    rng = np.random.default_rng(7)
    r, n_t = 3, 14
    z = rng.uniform(0.3, 1.2, (r, r + 1)) + np.eye(r, r + 1)
    c = exact_matrix(z, np.array([0.25, 0.6, 0.95, 1.5]), n_t)
    bins = noisy_bins(c, 12, 2e-3, seed=8)          # few bins: 12 jackknife samples
    central, samples = bins.mean(axis=0), jackknife_samples(bins)
    t0 = 2
    res = solve_gevp(central, samples, t0)
    assert res.crossings.sum() == 0                 # the loop below orders by eigenvalue
    n = samples.shape[0]
    loop = np.empty((n, r, n_t))
    for s in range(n):
        cs = 0.5 * (samples[s] + samples[s].transpose(1, 0, 2))
        for t in range(n_t):
            w = scipy_descending(cs[..., t], cs[..., t0])[0]   # scipy.linalg.eigh
            loop[s, :, t] = w[::-1] if t < t0 else w           # ascending before t0
    loop[:, :, t0] = 1.0
    # jackknife error sqrt((N-1)/N sum (x_s - xbar)^2) (Efron 1982) of scipy's eigenvalues
    err = np.sqrt((n - 1) / n * ((loop - loop.mean(axis=0)) ** 2).sum(axis=0))
    np.testing.assert_allclose(res.eigenvalue_samples, loop, rtol=1e-10, atol=0)
    np.testing.assert_allclose(res.eigenvalue_errors, err, rtol=1e-10, atol=1e-300)
    # and of the log effective energies log(lambda(t) / lambda(t+1)) built on them
    eff = np.log(loop[..., :-1] / loop[..., 1:])
    eff_err = np.sqrt((n - 1) / n * ((eff - eff.mean(axis=0)) ** 2).sum(axis=0))
    mine = principal_effective_energy(res)
    good = np.isfinite(mine.error)
    assert good[:, : n_t // 2].all()
    np.testing.assert_allclose(mine.error[good], eff_err[good], rtol=1e-10)


# ---------------------------------------------------------------------------
# exact results: exactly r states
# ---------------------------------------------------------------------------

AMPS = np.array([[1.30, 0.62, 0.35, 0.21],
                 [0.74, 1.10, 0.48, 0.33],
                 [0.41, 0.57, 0.95, 0.60],
                 [0.25, 0.40, 0.66, 1.05]])
ENERGIES = np.array([0.21, 0.43, 0.67, 0.92])


@pytest.mark.parametrize("t0", [0, 2, 5])
def test_exactly_r_states_give_the_energies_at_every_t(t0):
    n_t = 22
    c = exact_matrix(AMPS, ENERGIES, n_t)
    samples = np.stack([c * (1 + 1e-3 * k) for k in range(3)])
    res = solve_gevp(c, samples, t0)
    t = np.arange(n_t)
    # exact: lambda_n(t, t0) = exp(-E_n (t - t0))
    np.testing.assert_allclose(res.eigenvalues, np.exp(-np.outer(ENERGIES, t - t0)), rtol=1e-9)
    eff = principal_effective_energy(res)
    np.testing.assert_allclose(eff.value, np.repeat(ENERGIES[:, None], n_t - 1, 1), rtol=1e-9)
    half = half_t0_effective_energy(res)
    np.testing.assert_allclose(half.value, np.repeat(ENERGIES[:, None], n_t - 1, 1), rtol=1e-9)
    np.testing.assert_array_equal(half.t0, (np.arange(n_t - 1) + 1) // 2)
    # samples scaled by a constant have the same eigenvalues: errors 0 up to rounding, which
    # grows as exp((E_3 - E_0) t) eps
    assert np.nanmax(eff.error) < 1e-9


def test_exactly_r_cosh_states_give_the_energies_with_the_cosh_form():
    n_t = T // 2 + 1
    c = exact_matrix(AMPS, ENERGIES, n_t, form="cosh")
    res = solve_gevp(c, np.stack([c, 1.01 * c]), 3)
    # exact: lambda_n = cosh(E_n (T/2 - t)) / cosh(E_n (T/2 - t0)), so the cosh effective
    # mass of each principal correlator is E_n at every t (but the last pair, which straddles
    # nothing for even T: all n_t - 1 pairs are solvable)
    eff = principal_effective_energy(res, "cosh", T)
    np.testing.assert_allclose(eff.value, np.repeat(ENERGIES[:, None], n_t - 1, 1), rtol=1e-8)
    half = half_t0_effective_energy(res, "cosh", T)
    np.testing.assert_allclose(half.value, np.repeat(ENERGIES[:, None], n_t - 1, 1), rtol=1e-8)
    # the log form is biased near T/2 by the backward state
    assert np.all(principal_effective_energy(res).value[:, -1] < 0.9 * ENERGIES)


@pytest.mark.parametrize("form", ["exp", "cosh"])
@pytest.mark.parametrize("t_z", [3, 7])
def test_overlaps_reproduce_the_amplitudes(form, t_z):
    n_t = T // 2 + 1
    c = exact_matrix(AMPS, ENERGIES, n_t, form=form)
    samples = np.stack([c * (1 + 0.01 * k) for k in range(4)])
    res = solve_gevp(c, samples, 2)
    e_samples = np.tile(ENERGIES, (4, 1))
    z = overlaps(res, ENERGIES, e_samples, t=t_z, form=form, time_extent=T)
    # exact: C(t) v_n is proportional to Z_n and v_n^T C(t) v_n = g(E_n, t) (Z_n . v_n)^2
    np.testing.assert_allclose(z.value, AMPS, rtol=1e-9)
    # a sample scaled by (1 + x) has amplitudes Z sqrt(1 + x)
    scale = np.sqrt(1 + 0.01 * np.arange(4))
    np.testing.assert_allclose(z.samples, AMPS[None] * scale[:, None, None], rtol=1e-9)
    rel = np.abs(AMPS) / np.abs(AMPS).max(axis=1, keepdims=True)
    np.testing.assert_allclose(z.relative, rel, rtol=1e-9)


def test_overlaps_of_sinh_states():
    n_t = T // 2                      # C(T/2) = 0 for a sinh: stop before it
    t = np.arange(n_t)
    g = np.exp(-np.outer(ENERGIES, t)) - np.exp(-np.outer(ENERGIES, T - t))
    c = np.einsum("in,jn,nt->ijt", AMPS, AMPS, g)
    res = solve_gevp(c, np.stack([c, 1.02 * c]), 1)
    z = overlaps(res, ENERGIES, np.tile(ENERGIES, (2, 1)), t=4, form="sinh", time_extent=T)
    np.testing.assert_allclose(z.value, AMPS, rtol=1e-9)            # exact, as above
    eff = principal_effective_energy(res, "sinh", T)
    np.testing.assert_allclose(eff.value[:, :-1], np.repeat(ENERGIES[:, None], n_t - 2, 1),
                               rtol=1e-8)


# ---------------------------------------------------------------------------
# r + 1 states: the approach to the plateau (Blossier et al. 2009)
# ---------------------------------------------------------------------------

def test_half_t0_corrections_fall_as_the_gap_to_the_first_unresolved_state():
    """Noise-free, r = 3 operators and 4 states; t0 = ceil(t/2).

    Blossier et al. (2009): for t0 >= t/2, E_eff,n(t) - E_n = O(exp(-(E_3 - E_n) t)).
    The choice of numbers makes this resolvable in float64: the unresolved state
    lies far above the basis' levels (gaps 0.8 .. 1.3 to it, against spacings of
    0.25 among them) and the basis is diagonally dominant, so the leading term
    dominates the higher-order ones from t ~ 6; and the corrections stay above
    1e-11 up to t = 18, four orders of magnitude over the rounding of lambda_n
    (~1e-16 times exp((E_n - E_0) (t - t0)) times cond C(t0) ~ 1e-15 there).
    ceil(t/2) alternates between t0 = t/2 and (t+1)/2, which changes the
    coefficient of the correction with the parity of t, so slopes are taken
    between t and t + 2.
    """
    z = np.array([[1.0, 0.3, 0.2, 0.5],
                  [0.4, 1.0, 0.3, 0.6],
                  [0.2, 0.5, 1.0, 0.7]])
    e = np.array([0.30, 0.55, 0.80, 1.60])
    n_t = 24
    c = exact_matrix(z, e, n_t)
    res = solve_gevp(c, np.stack([c, c]), 1)
    half = half_t0_effective_energy(res)
    fixed = principal_effective_energy(res)
    for n in range(3):
        gap = e[3] - e[n]
        delta = half.value[n] - e[n]
        assert np.all(delta[6:19] > 0)
        log_delta = np.log(delta)
        slope = (log_delta[8:17] - log_delta[10:19]) / 2        # from t, t+2 for t = 8 .. 16
        # Blossier et al. 2009: slope -> E_r - E_n
        np.testing.assert_allclose(slope, gap, rtol=0.01)
        # contrast: at fixed t0 = 1 the approach is governed by t0, not t -- the slope
        # collapses (so the test above does tell the two apart)
        log_fixed = np.log(np.abs(fixed.value[n] - e[n]))
        assert (log_fixed[16] - log_fixed[18]) / 2 < 0.6 * gap


# ---------------------------------------------------------------------------
# the assignment problem
# ---------------------------------------------------------------------------

@pytest.mark.parametrize("r", [2, 3, 5, 6, 7])
def test_best_permutations_agree_with_linear_sum_assignment(r):
    rng = np.random.default_rng(r)
    scores = rng.uniform(size=(40, r, r))
    perm = best_permutations(scores)
    for k in range(40):
        rows, cols = linear_sum_assignment(scores[k], maximize=True)   # scipy.optimize
        best = scores[k][rows, cols].sum()
        mine = scores[k][perm[k], np.arange(r)].sum()
        assert mine == pytest.approx(best, rel=1e-14)
        assert sorted(perm[k]) == list(range(r))
    if r <= 6:     # and both equal a brute-force search
        k = 0
        brute = max(itertools.permutations(range(r)),
                    key=lambda p: scores[k][list(p), np.arange(r)].sum())
        assert tuple(perm[k]) == brute


def test_no_warnings_on_noisy_large_t():
    """Large t where the noise wins: negative principal correlators give NaN
    effective energies, silently, and the early t stay finite."""
    z = AMPS
    n_t = 40
    c = exact_matrix(z, ENERGIES, n_t)
    rng = np.random.default_rng(3)
    bins = c[None] + 2e-4 * rng.standard_normal((16, 4, 4, n_t)) * c[..., :1][None]
    central, samples = bins.mean(axis=0), jackknife_samples(bins)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        res = solve_gevp(central, samples, 2)
        eff = principal_effective_energy(res)
        half = half_t0_effective_energy(res)
        overlaps(res, ENERGIES, np.tile(ENERGIES, (16, 1)), t=4)
    assert np.isnan(eff.value[3, -5:]).any() or np.isnan(eff.error[3, -5:]).any()
    assert np.isfinite(eff.value[:, :4]).all() and np.isfinite(half.value[:, :4]).all()
