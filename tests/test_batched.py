"""Behaviour of the batched jackknife refit engine (plateaufit.fit.batched).

Invented data: two-state cosh correlators from a known truth with correlated
multiplicative noise, fixed seeds. Agreement with outside minimisers is in
tests/reference/test_batched_agreement.py; here: the convergence mask, the
isolation of an unfittable sample, warm starts, per-sample covariance factors,
priors, bounds and bad input.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.optimize
from scipy.linalg import solve_triangular

from plateaufit.errors import FitError
from plateaufit.fit.batched import batched_refits
from plateaufit.fit.refits import jackknife_refits
from plateaufit.fit.whitening import batched_cholesky, whitening_matrices
from plateaufit.fit.models import make_model

T = 40
TRUTH = np.array([0.25, 0.6, 2.0, 1.5])      # E0, E1, A0.pi, A1.pi
N_CFG = 30


@pytest.fixture(scope="module")
def problem():
    rng = np.random.default_rng(2024)
    t = np.arange(3, 16)
    model = make_model("cosh", 2, ["pi"], {"pi": t}, T)
    centre = model.predict(model.from_reported(TRUTH))
    eps = rng.standard_normal((N_CFG, t.size))
    for i in range(1, t.size):
        eps[:, i] = 0.6 * eps[:, i - 1] + 0.8 * eps[:, i]
    x = centre * (1.0 + 0.002 * eps)
    y_samples = (x.sum(axis=0) - x) / (N_CFG - 1)
    cov = np.cov(x, rowvar=False) / N_CFG
    chol = np.linalg.cholesky(cov)

    def residual(theta):
        return solve_triangular(chol, model.predict(theta) - x.mean(axis=0), lower=True)

    start = scipy.optimize.least_squares(
        residual, model.from_reported(TRUTH), method="lm", xtol=1e-15, ftol=1e-15,
        jac=lambda th: solve_triangular(chol, model.jacobian(th), lower=True)).x
    return model, x, y_samples, cov, chol, start


def test_all_samples_converge_and_move_off_the_start(problem):
    model, x, y_samples, cov, chol, start = problem
    theta, converged = batched_refits(y_samples, model, start, chol=chol)
    assert theta.shape == (N_CFG, 4) and converged.shape == (N_CFG,)
    assert converged.dtype == bool and converged.all()
    # each sample has its own minimum, near but not at the central fit
    assert np.all(np.any(theta != start, axis=1))
    spread = np.std(model.to_reported(theta), axis=0)
    assert np.all(spread > 0)
    assert np.allclose(model.to_reported(theta).mean(axis=0), model.to_reported(start),
                       rtol=1e-3)


def test_convergence_mask_reports_unfinished_samples(problem):
    model, x, y_samples, cov, chol, start = problem
    # One Gauss-Newton step cannot meet a 1e-12 step tolerance ...
    _, converged_one = batched_refits(y_samples, model, start, chol=chol, max_iter=1)
    assert not converged_one.any()
    # ... and the mask grows with the iteration budget until all are done.
    counts = [batched_refits(y_samples, model, start, chol=chol, max_iter=k)[1].sum()
              for k in (2, 4, 8, 100)]
    assert counts == sorted(counts) and counts[-1] == N_CFG


def test_nan_sample_is_flagged_and_leaves_the_others_alone(problem):
    model, x, y_samples, cov, chol, start = problem
    clean, _ = batched_refits(y_samples, model, start, chol=chol)
    bad = y_samples.copy()
    bad[7, 4] = np.nan
    theta, converged = batched_refits(bad, model, start, chol=chol)
    assert not converged[7]
    assert converged[np.arange(N_CFG) != 7].all()
    others = np.arange(N_CFG) != 7
    np.testing.assert_allclose(theta[others], clean[others], rtol=1e-12, atol=0)


def test_overflowing_sample_is_flagged(problem):
    model, x, y_samples, cov, chol, start = problem
    bad = y_samples.copy()
    bad[3] = np.inf
    _, converged = batched_refits(bad, model, start, chol=chol)
    assert not converged[3] and converged[np.arange(N_CFG) != 3].all()


def test_warm_start_shared_or_per_sample_gives_the_same_refits(problem):
    model, x, y_samples, cov, chol, start = problem
    shared, ok1 = batched_refits(y_samples, model, start, chol=chol)
    tiled, ok2 = batched_refits(y_samples, model, np.tile(start, (N_CFG, 1)), chol=chol)
    assert ok1.all() and ok2.all()
    np.testing.assert_allclose(tiled, shared, rtol=1e-10, atol=0)
    # Different starts per sample (a few error bars away) reach the same minima.
    rng = np.random.default_rng(5)
    scattered = start + 1e-3 * np.abs(start) * rng.standard_normal((N_CFG, 4))
    moved, ok3 = batched_refits(y_samples, model, scattered, chol=chol)
    assert ok3.all()
    np.testing.assert_allclose(model.to_reported(moved), model.to_reported(shared),
                               rtol=1e-9)


def test_compact_and_fixed_size_working_sets_agree(problem):
    model, x, y_samples, cov, chol, start = problem
    a, ok_a = batched_refits(y_samples, model, start, chol=chol, compact=True)
    b, ok_b = batched_refits(y_samples, model, start, chol=chol, compact=False)
    np.testing.assert_array_equal(ok_a, ok_b)
    np.testing.assert_allclose(a, b, rtol=1e-12, atol=0)


def test_per_sample_factors_and_a_broken_one(problem):
    model, x, y_samples, cov, chol, start = problem
    cov_samples = np.array([np.cov(np.delete(x, s, axis=0), rowvar=False) / (N_CFG - 1)
                            for s in range(N_CFG)])
    cov_samples[11] = -cov_samples[11]                      # not positive definite
    chol_samples, ok = batched_cholesky(cov_samples)
    assert not ok[11] and ok[np.arange(N_CFG) != 11].all()
    assert np.isnan(chol_samples[11]).all()
    theta, converged = batched_refits(y_samples, model, start, chol_samples=chol_samples)
    assert not converged[11] and converged[np.arange(N_CFG) != 11].all()
    # with its own covariance a sample's minimum differs from the frozen one
    frozen, _ = batched_refits(y_samples, model, start, chol=chol)
    assert not np.allclose(theta[0], frozen[0], rtol=1e-9)


def test_batched_cholesky_matches_numpy_and_flags_bad_matrices():
    rng = np.random.default_rng(3)
    m = rng.standard_normal((6, 5, 5))
    cov = m @ m.transpose(0, 2, 1) + 0.1 * np.eye(5)
    cov[2, 0, 0] = np.nan
    cov[4] = np.outer(np.arange(5.0), np.arange(5.0))         # rank one
    chol, ok = batched_cholesky(cov)
    assert ok.tolist() == [True, True, False, True, False, True]
    for s in np.flatnonzero(ok):
        np.testing.assert_allclose(chol[s], np.linalg.cholesky(cov[s]), rtol=1e-13)
    with pytest.raises(ValueError, match="shape"):
        batched_cholesky(cov[0])


def test_whitening_matrices_invert_the_factor():
    rng = np.random.default_rng(4)
    m = rng.standard_normal((3, 6, 6))
    chol = np.linalg.cholesky(m @ m.transpose(0, 2, 1) + np.eye(6))
    w = whitening_matrices(chol)
    np.testing.assert_allclose(w @ chol, np.broadcast_to(np.eye(6), (3, 6, 6)), atol=1e-12)
    np.testing.assert_allclose(whitening_matrices(chol[0]), w[0], rtol=1e-14)
    broken = chol.copy()
    broken[1, 2, 2] = 0.0
    assert np.isnan(whitening_matrices(broken)[1]).all()


def test_a_narrow_prior_pins_its_parameter(problem):
    model, x, y_samples, cov, chol, start = problem
    pinned = 0.61
    theta, converged = batched_refits(y_samples, model, start, chol=chol,
                                      priors={"E1": (pinned, 1e-7)})
    assert converged.all()
    e1 = model.to_reported(theta)[:, 1]
    np.testing.assert_allclose(e1, pinned, atol=1e-6)


def test_samples_ending_on_a_bound_fall_back(problem):
    model, x, y_samples, cov, chol, start = problem
    free, _ = batched_refits(y_samples, model, start, chol=chol)
    a0 = model.to_reported(free)[:, 2]
    cut = float(np.median(a0))
    # A bound through the middle of the samples' A0 values: the samples whose
    # free minimum lies beyond it end on the bound and must be reported.
    theta, converged = batched_refits(y_samples, model, start, chol=chol,
                                      bounds={"A0.pi": (None, cut)})
    beyond = a0 > cut
    assert beyond.any() and (~beyond).any()
    assert not converged[beyond].any()
    assert converged[~beyond].all()
    np.testing.assert_allclose(theta[~beyond], free[~beyond], rtol=1e-10)
    assert np.all(model.to_reported(theta)[:, 2] <= cut)


def test_unknown_prior_or_bound_names_are_errors(problem):
    model, x, y_samples, cov, chol, start = problem
    with pytest.raises(FitError) as err:
        batched_refits(y_samples, model, start, chol=chol, priors={"E7": (1.0, 0.1)})
    assert err.value.where == "priors.E7"
    with pytest.raises(FitError) as err:
        batched_refits(y_samples, model, start, chol=chol, bounds={"A0.kaon": (0, 1)})
    assert err.value.where == "bounds.A0.kaon"


def test_bad_shapes_are_refused(problem):
    model, x, y_samples, cov, chol, start = problem
    with pytest.raises(ValueError, match="start"):
        batched_refits(y_samples, model, start[:3], chol=chol)
    with pytest.raises(ValueError, match="exactly one"):
        batched_refits(y_samples, model, start)
    with pytest.raises(ValueError, match="exactly one"):
        batched_refits(y_samples, model, start, chol=chol,
                       chol_samples=np.broadcast_to(chol, (N_CFG,) + chol.shape))
    with pytest.raises(ValueError, match="chol"):
        batched_refits(y_samples, model, start, chol=chol[:-1, :-1])


def test_seam_in_correlated_uses_the_engine_without_fallback(problem):
    # jackknife_refits (plateaufit.fit.refits) is the caller: its batched
    # engine should need no lmfit fallback on good data, and agree with its
    # own lmfit engine (the central fit's minimiser) to 1e-8 relative.
    model, x, y_samples, cov, chol, start = problem
    fast = jackknife_refits(y_samples, model, start, cov=cov, engine="batched")
    assert fast.engine == "batched" and fast.n_fallback == 0 and fast.converged.all()
    slow = jackknife_refits(y_samples[:6], model, start, cov=cov, engine="lmfit")
    np.testing.assert_allclose(fast.reported[:6], slow.reported, rtol=1e-8)


class _FusedModel:
    """The real model, also offering prediction and Jacobian from one call."""

    def __init__(self, model):
        self._model = model
        self.calls = {"fused": 0, "jacobian": 0}

    def __getattr__(self, name):
        return getattr(self._model, name)

    def jacobian(self, theta):
        self.calls["jacobian"] += 1
        return self._model.jacobian(theta)

    def predict_and_jacobian(self, theta):
        self.calls["fused"] += 1
        return self._model.predict(theta), self._model.jacobian(theta)


def test_a_fused_prediction_and_jacobian_is_used_and_changes_nothing(problem):
    model, x, y_samples, cov, chol, start = problem
    plain, ok_plain = batched_refits(y_samples, model, start, chol=chol)
    fused = _FusedModel(model)
    theta, ok = batched_refits(y_samples, fused, start, chol=chol)
    np.testing.assert_array_equal(ok, ok_plain)
    np.testing.assert_array_equal(theta, plain)
    # every Jacobian came with its prediction, the one at the shared start too
    assert fused.calls["fused"] >= 3 and fused.calls["jacobian"] == 0
