"""Synthetic replicas checked against outside facts.

Sources: exact results for Gaussian data (Wishart moments of a sample
covariance; the chi-square law of Gaussian quadratic forms, via scipy.stats),
exact AR(1) results (tau_int = (1 + phi) / (2 (1 - phi)) in our convention
tau_int = 1/2 + sum_{t>=1} rho(t); lag-one correlation phi), emcee's
integrated autocorrelation time (convention 1 + 2 sum rho, twice ours), and
independence of separate Monte Carlo streams.
"""

from __future__ import annotations

import emcee
import numpy as np
import pytest
from scipy import stats
from scipy.signal import lfilter

from plateaufit.stats.autocorr import tau_int
from plateaufit.stats.autocov_matrix import windowed_covariance
from plateaufit.stats.gamma_covariance import gamma_covariance
from plateaufit.stats.replicas import fit_replica_model


def ar1_unit(phi: float, shape: tuple[int, ...], rng: np.random.Generator) -> np.ndarray:
    """Stationary AR(1) along axis 0 with unit variance."""
    e = rng.standard_normal(shape)
    e[1:] *= np.sqrt(1 - phi**2)
    return lfilter([1.0], [1.0, -phi], e, axis=0)


def exact_tau(phi: float) -> float:
    return (1.0 + phi) / (2.0 * (1.0 - phi))  # exact result for AR(1), 1/2 + sum rho


# ------------------------------------------------------------------ i.i.d.


@pytest.mark.parametrize("method", ["ar1-factors", "stationary-bootstrap"])
def test_iid_gaussian_replicas_reproduce_the_covariance(method):
    rng = np.random.default_rng(1)
    n, m = 3000, 200
    cov = np.array(
        [[1.0, 0.8, 0.5, 0.1], [0.8, 1.5, 0.7, 0.0], [0.5, 0.7, 2.0, -0.4], [0.1, 0.0, -0.4, 0.3]]
    )
    x = rng.multivariate_normal([5.0, 4.0, 3.0, 2.0], cov, size=n)
    source = np.cov(x, rowvar=False)
    model = fit_replica_model(x, method=method, shrinkage="none")
    covs = np.array([np.cov(r, rowvar=False) for r in model.draws(m, seed=2)])
    # Test statistic: z_ij = (mean_m S_m,ij - S_ij) / sd_ij with the Wishart
    # standard deviation of a sample covariance of n Gaussian vectors,
    # sd_ij = sqrt((S_ii S_jj + S_ij^2) / (n - 1)) (exact Wishart second moment),
    # divided by sqrt(m) for the mean over m replicas.
    d = np.diag(source)
    wishart_sd = np.sqrt((np.outer(d, d) + source**2) / (n - 1))
    z = (covs.mean(axis=0) - source) / (wishart_sd / np.sqrt(m))
    assert np.max(np.abs(z)) < 4.0
    # and each replica is as noisy as a real sample of n: the spread of S_m,ij
    # over replicas is the Wishart one (its own relative error ~ 1/sqrt(2 m))
    ratio = covs.std(axis=0, ddof=1) / wishart_sd
    if method == "ar1-factors":
        assert np.all(np.abs(ratio - 1.0) < 4.0 / np.sqrt(2 * m))
    else:  # resampled rows: a non-Gaussian (discrete) law; the spread is still close
        assert np.all(np.abs(ratio - 1.0) < 0.4)


# ------------------------------------------------------------------- AR(1)


def test_ar1_replicas_have_the_ar1_tau_int():
    phi, n, m = 0.8, 20_000, 60
    rng = np.random.default_rng(3)
    x = 0.7 + 0.1 * ar1_unit(phi, (n,), rng)
    src = tau_int(x)
    model = fit_replica_model(x[:, None])
    assert model.model_taus[0] == pytest.approx(src.tau, rel=1e-10)
    ours, theirs = [], []
    for rep in model.draws(m, seed=4):
        ours.append(tau_int(rep[:, 0]).tau)
        # emcee's integrated_time is 1 + 2 sum rho: twice our convention
        theirs.append(float(emcee.autocorr.integrated_time(rep[:, 0])[0]) / 2.0)  # source: emcee
    ours, theirs = np.array(ours), np.array(theirs)
    sd = ours.std(ddof=1) / np.sqrt(m)
    # the replicas' truth is the source's estimate; measured on replicas it comes back
    assert abs(ours.mean() - src.tau) < 4 * sd
    assert abs(theirs.mean() - src.tau) < 4 * theirs.std(ddof=1) / np.sqrt(m) + 0.01 * src.tau
    # and the exact AR(1) value, within the source's own error (Madras-Sokal)
    assert abs(ours.mean() - exact_tau(phi)) < 4 * np.hypot(src.error, sd)  # exact result
    assert abs(theirs.mean() - exact_tau(phi)) < 4 * np.hypot(src.error, sd)  # exact result / emcee


def test_bootstrap_replicas_lose_autocorrelation_beyond_the_block_length():
    """Stationary bootstrap with mean block length L: the resampled series has
    rho*(k) ~= (1 - 1/L)^k rho(k) for a long chain (Politis & Romano 1994; from
    memory), so for AR(1) tau* = 1/2 + phi q / (1 - phi q), q = 1 - 1/L."""
    phi, n, m, length = 0.8, 20_000, 40, 30.0
    rng = np.random.default_rng(5)
    x = ar1_unit(phi, (n,), rng)[:, None]
    model = fit_replica_model(x, method="stationary-bootstrap", block_length=length)
    taus = np.array([tau_int(r[:, 0]).tau for r in model.draws(m, seed=6)])
    q = 1 - 1 / length
    expected = 0.5 + phi * q / (1 - phi * q)  # exact AR(1) rho, damped as above
    src = tau_int(x[:, 0])
    assert expected < exact_tau(phi) - 0.4  # the damping is visible at this block length
    err = np.hypot(src.error * expected / src.tau, taus.std(ddof=1) / np.sqrt(m))
    assert abs(taus.mean() - expected) < 4 * err


# ----------------------------------------------------------------- streams


def test_no_correlation_across_a_stream_boundary():
    phi, m = 0.8, 3000
    rng = np.random.default_rng(7)
    sizes = (600, 400)
    x = np.concatenate([ar1_unit(phi, (s, 2), rng) for s in sizes]) @ np.array([[1.0, 0.6], [0.0, 0.8]])
    model = fit_replica_model(x, stream_sizes=sizes, shrinkage="none")
    assert model.stream_sizes == sizes
    reps = np.array([r[[598, 599, 600, 601]] for r in model.draws(m, seed=8)])  # (m, 4, 2)
    dev = reps - model.truth

    def corr(a, b):
        return float(np.corrcoef(a, b)[0, 1])

    # independent streams: the sample correlation of independent Gaussians has
    # standard deviation 1/sqrt(m) (exact for zero correlation, large m)
    for i in range(2):
        for j in range(2):
            assert abs(corr(dev[:, 1, i], dev[:, 2, j])) < 4 / np.sqrt(m)
    # inside each stream the lag-one correlation is that of the model's AR(1)
    # factors (exact: rho_i(1) = sum_k B_ki^2 phi_k / sum_k B_ki^2); the sample
    # correlation has standard deviation (1 - r^2) / sqrt(m) (Fisher 1915; from memory)
    b2 = model.mixing**2
    lag1 = (b2 * model.phi[:, None]).sum(axis=0) / b2.sum(axis=0)
    for i in range(2):
        for first in (0, 2):
            r_in = corr(dev[:, first, i], dev[:, first + 1, i])
            assert abs(r_in - lag1[i]) < 4 * (1 - lag1[i] ** 2) / np.sqrt(m)
        # and that is the data's AR(1) coefficient, within the error of the source's
        # tau_int carried to phi = (2 tau - 1) / (2 tau + 1) (exact AR(1) relation)
        src = tau_int(x[:, i], streams=model.streams)
        assert abs(lag1[i] - phi) < 4 * 4 / (2 * src.tau + 1) ** 2 * src.error
    # every stream starts in the stationary law: the variance at the first
    # configuration of stream 2 is Gamma(0); a sample variance of m Gaussians
    # has relative standard deviation sqrt(2 / (m - 1)) (chi-square, exact)
    var_start = dev[:, 2].var(axis=0, ddof=1)
    np.testing.assert_allclose(var_start, np.diag(model.covariance), rtol=4 * np.sqrt(2 / (m - 1)))


# --------------------------------------------------------- correlator-like


def correlator_ensemble(sizes: tuple[int, ...], n_t: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """Invented two-point function data: A exp(-E t) with relative noise growing
    like exp(0.3 t), neighbouring timeslices correlated ~0.87, a slow Monte
    Carlo mode (phi = 0.92) weighing most on early timeslices and a fast one
    (phi = 0.7): tau_int from ~5.5 down to ~4 across t."""
    rng = np.random.default_rng(seed)
    t = np.arange(n_t)
    truth = 1.3 * np.exp(-0.45 * t)
    sigma = 0.004 * truth * np.exp(0.3 * t)
    corr = np.exp(-np.abs(t[:, None] - t[None, :]) / 5.0)
    chol = np.linalg.cholesky(corr)
    a = np.sqrt(np.linspace(0.5, 0.2, n_t))
    parts = []
    for n in sizes:
        slow = ar1_unit(0.92, (n, 1), rng)
        fast = ar1_unit(0.7, (n, n_t), rng) @ chol.T
        parts.append(truth + sigma * (a * slow + np.sqrt(1 - a**2) * fast))
    return np.concatenate(parts), truth


@pytest.fixture(scope="module")
def hard_case():
    sizes = (3000, 2000)
    x, truth = correlator_ensemble(sizes, 16, seed=9)
    model = fit_replica_model(x, truth, stream_sizes=sizes, shrinkage="none")
    reps = list(model.draws(400, seed=10))
    return x, model, reps


def test_hard_case_scenario_is_hard(hard_case):
    x, model, _ = hard_case
    taus = np.array([tau_int(x[:, j], streams=model.streams).tau for j in range(x.shape[1])])
    assert 3.0 < np.median(taus) < 6.0 and taus.max() > 4.5
    sd = np.sqrt(np.diag(model.covariance))
    # absolute errors spread over an order of magnitude, relative ones grow ~90-fold
    assert sd[-1] / sd[0] < 0.2 and (sd[-1] / model.truth[-1]) / (sd[0] / model.truth[0]) > 50
    assert np.corrcoef(x, rowvar=False)[5, 6] > 0.8
    assert model.n_clipped == 0


def test_hard_case_covariance_of_the_mean(hard_case):
    x, model, reps = hard_case
    source = gamma_covariance(x, model.streams, shrinkage="none", window=model.window).matrix
    means = np.array([r.mean(axis=0) for r in reps]) - model.truth  # (m, p), known mean
    m, p = means.shape
    # Test statistic: with the right covariance C of the mean, d^T C^{-1} d of
    # each replica is chi-square with p degrees of freedom; summed over m
    # replicas, chi-square with p m (exact for Gaussian replicas; scipy.stats)
    w, v = np.linalg.eigh(source)
    proj = means @ v / np.sqrt(w)  # whitened: i.i.d. N(0, 1) entries if C is right
    total = float(np.sum(proj**2))
    pval = stats.chi2.sf(total, p * m)
    assert 1e-4 < pval < 1 - 1e-4  # source: scipy.stats.chi2
    # every principal direction separately: sum_m proj_k^2 ~ chi2(m)
    per_dir = np.sum(proj**2, axis=0)
    pvals = stats.chi2.sf(per_dir, m)
    assert np.all((pvals > 1e-4 / p) & (pvals < 1 - 1e-4 / p))  # Bonferroni over p
    # and the diagonal: the variance of each timeslice's mean
    ratio = means.var(axis=0) / np.diag(source)
    assert np.all(np.abs(ratio - 1) < 4 * np.sqrt(2 / m))


def test_hard_case_tau_int_per_timeslice(hard_case):
    x, model, reps = hard_case
    p = x.shape[1]
    blocks = [(0, 3000), (3000, 5000)]
    # at the common window: the replicas' tau_int of each timeslice against the
    # model's exact one, which equals the source's at that window (test_replicas)
    at_w = []
    for r in reps[:80]:
        g0, lr = windowed_covariance(r, blocks, model.window)
        at_w.append(np.diag(lr) / (2 * np.diag(g0)))
    at_w = np.array(at_w)
    sd = at_w.std(axis=0, ddof=1) / np.sqrt(len(at_w))
    assert np.all(np.abs(at_w.mean(axis=0) - model.taus) < 4 * sd + 0.02 * model.taus)
    # each with its own automatic window, as a user sees it: the replicas'
    # tau_int against the source's, within the source's Madras-Sokal error
    cols = range(0, p, 3)
    src = [tau_int(x[:, j], streams=model.streams) for j in cols]
    own = np.array([[tau_int(r[:, j], streams=model.streams).tau for j in cols] for r in reps[:40]])
    for k, s in enumerate(src):
        spread = own[:, k].std(ddof=1) / np.sqrt(len(own))
        assert abs(own[:, k].mean() - s.tau) < 3 * np.hypot(s.error, spread)
    # emcee on the most autocorrelated timeslice of one stream of the replicas
    # (emcee: one chain, 1 + 2 sum rho = twice ours)
    j = int(np.argmax(model.taus))
    em = np.array([float(emcee.autocorr.integrated_time(r[:3000, j], quiet=True)[0]) / 2 for r in reps[:40]])
    first = tau_int(x[:3000, j])
    assert abs(em.mean() - first.tau) < 3 * np.hypot(first.error, em.std(ddof=1) / np.sqrt(len(em)))  # emcee
