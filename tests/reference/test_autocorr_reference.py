"""tau_int, rho and binning checked against exact AR(1) results and emcee.

AR(1): x_t = phi x_{t-1} + e_t has rho(t) = phi^t exactly, hence
tau_int = 1/2 + sum_{t>=1} phi^t = (1 + phi) / (2 (1 - phi)) (exact result),
and the variance of the mean is 2 tau_int var / N for N >> tau.
"""

from __future__ import annotations

import emcee
import numpy as np
import pytest
from scipy.signal import lfilter

from plateaufit.stats.autocorr import binning_study, choose_bin_size, tau_int, tau_int_derived
from plateaufit.stats.resample import bin_samples, jackknife_error, jackknife_samples


def ar1(phi: float, n: int, seed: int, sigma: float = 1.0) -> np.ndarray:
    """Stationary AR(1) series with innovation width sigma (stationary start)."""
    rng = np.random.default_rng(seed)
    e = sigma * rng.standard_normal(n)
    x0 = sigma * rng.standard_normal() / np.sqrt(1.0 - phi**2)
    x, _ = lfilter([1.0], [1.0, -phi], e, zi=[phi * x0])
    return x


def exact_tau(phi: float) -> float:
    return (1.0 + phi) / (2.0 * (1.0 - phi))  # exact result for AR(1)


@pytest.mark.parametrize("phi", [0.5, 0.8, 0.9])
def test_tau_int_of_ar1_matches_exact_value(phi):
    r = tau_int(ar1(phi, 200_000, seed=11))
    # exact AR(1) result, within 4 standard errors of the Madras-Sokal error
    assert abs(r.tau - exact_tau(phi)) < 4 * r.error
    assert r.error < 0.05 * r.tau  # long chain: a few per cent
    assert r.reliable
    assert r.tau_by_window[r.window] == pytest.approx(r.tau, rel=1e-12)


@pytest.mark.parametrize("phi", [0.5, 0.9])
def test_tau_int_agrees_with_emcee(phi):
    x = ar1(phi, 200_000, seed=12)
    r = tau_int(x)
    # emcee.autocorr.integrated_time uses 1 + 2 sum rho (twice our convention)
    # and its own window (smallest M >= 5 tau); both estimate the same number,
    # so they agree within the statistical error of the estimate.
    tau_emcee = float(emcee.autocorr.integrated_time(x)[0]) / 2.0  # source: emcee
    assert abs(r.tau - tau_emcee) < 2 * r.error


def test_rho_of_ar1_is_geometric():
    phi, n = 0.8, 200_000
    r = tau_int(ar1(phi, n, seed=13))
    t = np.arange(1, 16)
    # exact: rho(t) = phi^t. Tolerance: 4 x Bartlett's standard error of an
    # estimated autocorrelation of AR(1), var ~ (1+phi^2)/(1-phi^2)/N
    # (M. S. Bartlett, J. R. Stat. Soc. Suppl. 8 (1946) 27; formula from memory).
    tol = 4 * np.sqrt((1 + phi**2) / (1 - phi**2) / n)
    np.testing.assert_allclose(r.rho[t], phi**t, atol=tol)
    assert r.rho[0] == 1.0


def test_error_of_the_mean_matches_ar1_variance():
    phi, sigma, n = 0.8, 0.3, 200_000
    r = tau_int(ar1(phi, n, seed=14, sigma=sigma))
    var = sigma**2 / (1 - phi**2)  # exact stationary variance of AR(1)
    exact = np.sqrt(2 * exact_tau(phi) * var / n)  # exact for N >> tau
    assert r.value_error == pytest.approx(exact, rel=0.05)
    assert abs(r.value) < 5 * exact  # true mean is 0


def test_two_streams_as_replicas_give_the_ar1_value():
    phi = 0.8
    x = np.concatenate([ar1(phi, 100_000, seed=15), ar1(phi, 80_000, seed=16)])
    streams = np.repeat([3, 7], [100_000, 80_000])
    r = tau_int(x, streams=streams)
    assert abs(r.tau - exact_tau(phi)) < 4 * r.error  # exact AR(1) result
    assert r.n == 180_000 and r.reliable


def test_many_short_streams_give_the_ar1_value():
    # 400 independent streams of 400 measurements each: only pairs inside a
    # stream enter Gamma(t), normalised by the number of pairs (Wolff 2004).
    phi, length, k = 0.5, 400, 400
    x = np.concatenate([ar1(phi, length, seed=100 + i) for i in range(k)])
    streams = np.repeat(np.arange(k), length)
    r = tau_int(x, streams=streams)
    assert abs(r.tau - exact_tau(phi)) < 4 * r.error  # exact AR(1) result
    np.testing.assert_allclose(r.rho[1:4], phi ** np.arange(1, 4), atol=0.02)


def test_derived_linear_function_equals_tau_of_the_combination():
    # Linearisation of a linear function is exact (Wolff 2004): the projected
    # series is the combination itself minus its mean.
    x = np.column_stack([ar1(0.9, 50_000, seed=17), ar1(0.5, 50_000, seed=18), ar1(0.7, 50_000, seed=19)])
    c = np.array([0.7, -1.3, 2.0])
    d = tau_int_derived(x, lambda m: float(c @ m))
    r = tau_int(x @ c)
    assert d.tau == pytest.approx(r.tau, rel=1e-9)
    assert d.window == r.window
    assert d.value == pytest.approx(float(c @ x.mean(axis=0)), rel=1e-12)
    assert d.value_error == pytest.approx(r.value_error, rel=1e-9)


def test_derived_ratio_matches_linearised_ar1_theory():
    # a = 2 + u, b = 5 + v with u, v independent AR(1) of the same phi.
    # f = <a>/<b> linearises to u/5 - 2 v/25, an AR(1) with the same phi, so
    # tau = (1+phi)/(2(1-phi)) and var(f) = (var u / 25 + 4 var v / 625) 2 tau / N
    # (exact for AR(1) to leading order in 1/N; delta method).
    phi, n, su, sv = 0.8, 200_000, 0.4, 0.6
    a = 2.0 + ar1(phi, n, seed=20, sigma=su)
    b = 5.0 + ar1(phi, n, seed=21, sigma=sv)
    d = tau_int_derived(np.column_stack([a, b]), lambda m: m[0] / m[1])
    var_u, var_v = su**2 / (1 - phi**2), sv**2 / (1 - phi**2)
    theory_err = np.sqrt((var_u / 25 + 4 * var_v / 625) * 2 * exact_tau(phi) / n)
    assert abs(d.tau - exact_tau(phi)) < 4 * d.error
    assert d.value_error == pytest.approx(theory_err, rel=0.05)
    assert abs(d.value - 0.4) < 5 * theory_err


def test_binned_jackknife_error_is_sqrt_2tau_times_naive():
    # Variance inflation, exact for AR(1): bins much longer than tau are
    # independent and the jackknife error of the mean tends to
    # sqrt(2 tau_int) x the naive error (Flyvbjerg & Petersen 1989).
    phi, n = 0.8, 200_000
    x = ar1(phi, n, seed=22)
    naive = np.std(x, ddof=1) / np.sqrt(n)
    err = float(jackknife_error(jackknife_samples(bin_samples(x, 200))))
    assert err / naive == pytest.approx(np.sqrt(2 * exact_tau(phi)), rel=0.10)
    study = binning_study(x, sizes=[1, 200])
    assert study.errors[0] == pytest.approx(naive, rel=1e-9)  # no binning: naive error
    assert study.errors[1] == pytest.approx(err, rel=1e-12)


def test_binned_variance_bias_at_the_chosen_size_matches_ar1_theory():
    # The rule B = ceil(5 (tau - 1/(4 tau))) should leave the variance of the
    # mean underestimated by about (tau - 1/(4 tau)) / B <= 20 %. Exact for
    # AR(1): B var(bin mean) / var = 1 + 2 sum_{t<B} (1 - t/B) phi^t.
    phi, n = 0.9, 200_000
    tau = exact_tau(phi)
    size = choose_bin_size([tau], n)
    assert size == int(np.ceil(5 * (tau - 1 / (4 * tau))))
    t = np.arange(1, size)
    expected = (1 + 2 * np.sum((1 - t / size) * phi**t)) / (2 * tau)  # exact AR(1)
    assert 0.78 < expected < 0.85
    x = ar1(phi, n, seed=23)
    var = 1 / (1 - phi**2)
    err = float(jackknife_error(jackknife_samples(bin_samples(x, size))))
    measured = err**2 / (2 * tau * var / n)
    # statistical error of a variance from ~4000 bins: sqrt(2/4000) ~ 2 %
    assert measured == pytest.approx(expected, abs=0.08)
