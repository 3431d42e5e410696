"""Behaviour of the synthetic replica ensembles (stats/replicas.py)."""

from __future__ import annotations

import pickle

import numpy as np
import pytest
from scipy.signal import lfilter

from plateaufit.errors import DataError, SpecError
from plateaufit.stats import REPLICA_METHODS, fit_replica_model, gamma_covariance, stream_labels


def chain(n: int, p: int, phi: float, seed: int) -> np.ndarray:
    """Invented correlated data: AR(1) along the chain, neighbouring components correlated."""
    rng = np.random.default_rng(seed)
    t = np.arange(p)
    corr = np.exp(-np.abs(t[:, None] - t[None, :]) / 3.0)
    e = rng.standard_normal((n, p)) @ np.linalg.cholesky(corr).T
    e[0] /= np.sqrt(1 - phi**2)
    return 1.0 + lfilter([1.0], [1.0, -phi], e, axis=0) * np.exp(0.1 * t)


@pytest.mark.parametrize("method", REPLICA_METHODS)
def test_shape_streams_and_truth(method):
    x = chain(900, 5, 0.6, seed=1)
    truth = np.linspace(2.0, 1.0, 5)
    model = fit_replica_model(x, truth, stream_sizes=[500, 300, 100], method=method)
    assert model.stream_sizes == (500, 300, 100) and model.n_configs == 900
    np.testing.assert_array_equal(model.streams, np.repeat([0, 1, 2], [500, 300, 100]))
    reps = np.array(list(model.draws(200, seed=3)))
    assert reps.shape == (200, 900, 5) and np.all(np.isfinite(reps))
    # the replicas scatter around the truth, not around the data mean
    grand = reps.mean(axis=(0, 1))
    sd_of_grand = np.sqrt(np.diag(model.mean_covariance) / 200)
    assert np.all(np.abs(grand - truth) < 5 * sd_of_grand)


def test_stream_labels_and_sizes_are_the_same_input():
    x = chain(600, 3, 0.5, seed=2)
    labels = np.repeat([7, 2], [350, 250])
    a = fit_replica_model(x, streams=labels)
    b = fit_replica_model(x, stream_sizes=(350, 250))
    np.testing.assert_array_equal(a.draw(5), b.draw(5))
    np.testing.assert_array_equal(stream_labels([2, 1]), [0, 0, 1])


@pytest.mark.parametrize("method", REPLICA_METHODS)
def test_same_seed_same_replicas_different_seeds_differ(method):
    x = chain(700, 4, 0.7, seed=3)
    model = fit_replica_model(x, method=method, stream_sizes=[400, 300])
    a = list(model.draws(3, seed=11))
    b = list(model.draws(3, seed=11))
    for u, v in zip(a, b):
        np.testing.assert_array_equal(u, v)  # bitwise
    assert not np.array_equal(a[0], a[1])
    c = list(model.draws(3, seed=12))
    assert not np.array_equal(a[0], c[0])
    # replica k alone, from its own seed (what a worker process does)
    seeds = model.replica_seeds(3, 11)
    np.testing.assert_array_equal(model.draw(seeds[2]), a[2])
    # the same from an unpickled model
    clone = pickle.loads(pickle.dumps(model))
    np.testing.assert_array_equal(clone.draw(seeds[1]), a[1])
    # a Generator is advanced, not reset
    rng = np.random.default_rng(4)
    assert not np.array_equal(model.draw(rng), model.draw(rng))


def test_model_reproduces_the_gamma_covariance_of_the_source_exactly():
    """By construction (no shrinkage, no clipping): Gamma(0) and the window sum are kept."""
    x = chain(3000, 8, 0.8, seed=4)
    model = fit_replica_model(x, shrinkage="none")
    assert model.n_clipped == 0 and model.n_factors == 8
    ref = gamma_covariance(x, shrinkage="none", window=model.window)
    np.testing.assert_allclose(model.mean_covariance, ref.matrix, rtol=1e-9, atol=1e-12 * ref.matrix.max())
    np.testing.assert_allclose(model.model_taus, ref.taus, rtol=1e-9)
    np.testing.assert_allclose(model.taus, ref.taus, rtol=1e-12)


def test_shrinkage_keeps_every_variance_and_tau():
    x = chain(3000, 30, 0.5, seed=5)
    shrunk = fit_replica_model(x)
    plain = fit_replica_model(x, shrinkage="none")
    assert shrunk.shrinkage > 0 and plain.shrinkage == 0
    np.testing.assert_allclose(np.diag(shrunk.covariance), np.diag(plain.covariance), rtol=1e-9)
    assert shrunk.n_clipped == 0
    np.testing.assert_allclose(shrunk.model_taus, plain.taus, rtol=1e-9)


def test_more_components_than_configurations():
    x = chain(60, 90, 0.3, seed=6)
    shrunk = fit_replica_model(x)
    assert shrunk.n_factors == 90 and shrunk.shrinkage > 0
    assert np.linalg.eigvalsh(shrunk.covariance)[0] > 0  # full rank truth
    plain = fit_replica_model(x, shrinkage="none")
    assert plain.n_factors <= 59  # only the directions that carry variance
    rep = plain.draw(1)
    assert rep.shape == (60, 90) and np.all(np.isfinite(rep))
    dev = rep - rep.mean(axis=0)
    assert np.linalg.matrix_rank(dev) <= plain.n_factors


@pytest.mark.parametrize("method", REPLICA_METHODS)
def test_constant_component_stays_constant(method):
    x = chain(500, 4, 0.5, seed=7)
    x[:, 0] = 1.0  # e.g. a correlator normalised at t = 0
    model = fit_replica_model(x, np.array([1.0, 2.0, 3.0, 4.0]), method=method)
    rep = model.draw(2)
    np.testing.assert_array_equal(rep[:, 0], 1.0)
    assert np.std(rep[:, 1]) > 0


def test_bootstrap_block_length_and_residuals():
    x = chain(1000, 3, 0.8, seed=8)
    model = fit_replica_model(x, method="stationary-bootstrap", stream_sizes=[600, 400])
    assert model.block_length == pytest.approx(min(20 * model.taus.max(), 400))
    one = fit_replica_model(x, method="stationary-bootstrap", block_length=1)
    rep = one.draw(3) - one.truth
    # every row of a replica is a row of the deviations from the stream mean
    rows = {tuple(r) for r in np.round(one.residuals, 12)}
    assert all(tuple(r) in rows for r in np.round(rep, 12))


@pytest.mark.parametrize(
    "kwargs, where, exc",
    [
        ({"method": "magic"}, "method", SpecError),
        ({"truth": np.zeros(3)}, "truth", DataError),
        ({"truth": np.array([0.0, np.nan, 0.0, 0.0])}, "truth", DataError),
        ({"streams": np.zeros(10)}, "streams", DataError),
        ({"stream_sizes": [100, 100]}, "stream_sizes", DataError),
        ({"stream_sizes": [299, 1]}, "data", DataError),
        ({"streams": np.zeros(300), "stream_sizes": [300]}, "stream_sizes", SpecError),
        ({"shrinkage": "lots"}, "shrinkage", SpecError),
        ({"method": "stationary-bootstrap", "block_length": 0.5}, "block_length", SpecError),
        ({"window": 1000}, "window", SpecError),
    ],
)
def test_bad_input_names_the_argument(kwargs, where, exc):
    x = chain(300, 4, 0.5, seed=9)
    with pytest.raises(exc) as err:
        fit_replica_model(x, **kwargs)
    assert err.value.where == where


@pytest.mark.parametrize("method", REPLICA_METHODS)
def test_short_chain_is_flagged(method):
    x = chain(60, 2, 0.97, seed=11)
    assert not fit_replica_model(x, method=method).reliable
    assert fit_replica_model(chain(3000, 2, 0.5, seed=12), method=method).reliable


def test_bad_data_and_seeds():
    x = chain(300, 4, 0.5, seed=10)
    bad = x.copy()
    bad[5, 1] = np.inf
    with pytest.raises(DataError, match="configuration 5"):
        fit_replica_model(bad)
    with pytest.raises(DataError, match="too few"):
        fit_replica_model(x[:6])
    model = fit_replica_model(x)
    with pytest.raises(SpecError) as err:
        list(model.draws(2, seed=np.random.default_rng(1)))
    assert err.value.where == "seed"
    with pytest.raises(SpecError):
        model.replica_seeds(-1, 0)
