"""Behaviour of plateaufit.stats.resample: binning by stream, errors, bootstrap."""

from __future__ import annotations

import numpy as np
import pytest

from plateaufit.errors import DataError
from plateaufit.stats.resample import (
    bin_samples,
    bin_streams,
    bootstrap_samples,
    jackknife_samples,
    stream_blocks,
)


def test_bins_stay_inside_streams_and_leftovers_are_counted():
    # values encode (stream, index) so a bin mixing streams would be visible
    streams = np.repeat([4, 9, 2], [7, 5, 9])
    data = np.concatenate([np.full(7, 100.0), np.full(5, 200.0), np.full(9, 300.0)])
    data = np.column_stack([data, np.arange(21.0)])
    binned, dropped = bin_samples(data, 3, streams, return_dropped=True)
    assert binned.shape == (2 + 1 + 3, 2)
    assert dropped == 1 + 2 + 0
    np.testing.assert_array_equal(binned[:, 0], [100, 100, 200, 300, 300, 300])
    # first bin of each stream starts at the stream's first configuration
    np.testing.assert_allclose(binned[:, 1], [1, 4, 8, 13, 16, 19])
    np.testing.assert_array_equal(bin_streams(streams, 3), [4, 4, 9, 2, 2, 2])


def test_binning_without_streams_keeps_trailing_axes():
    x = np.random.default_rng(1).normal(size=(10, 3, 2))
    b = bin_samples(x, 4)
    assert b.shape == (2, 3, 2)
    np.testing.assert_allclose(b[1], x[4:8].mean(axis=0))
    assert bin_samples(x, 1).shape == x.shape
    np.testing.assert_array_equal(bin_streams(None, 4, n=10), [0, 0])


def test_stream_changes_define_blocks():
    assert stream_blocks(np.array([0, 0, 1, 1, 0]), 5) == [(0, 2), (2, 4), (4, 5)]
    assert stream_blocks(None, 3) == [(0, 3)]


@pytest.mark.parametrize("size", [0, -2, 2.5, "four", True])
def test_bad_bin_size_is_a_data_error_naming_the_size_argument(size):
    with pytest.raises(DataError) as err:
        bin_samples(np.ones(10), size)
    assert err.value.where == "size"


def test_bin_larger_than_every_stream():
    with pytest.raises(DataError, match="larger than every stream") as err:
        bin_samples(np.ones(10), 6, np.repeat([0, 1], 5))
    assert err.value.where == "size"
    assert "5" in err.value.message


def test_jackknife_needs_two_bins():
    with pytest.raises(DataError, match="at least 2 bins"):
        jackknife_samples(np.ones((1, 4)))


def test_jackknife_samples_are_delete_one_means():
    x = np.random.default_rng(2).normal(size=(6, 3))
    j = jackknife_samples(x)
    for i in range(6):
        np.testing.assert_allclose(j[i], np.delete(x, i, axis=0).mean(axis=0), rtol=1e-14)


def test_bootstrap_is_reproducible_and_resamples_bins():
    x = np.random.default_rng(3).normal(size=(20, 4))
    a = bootstrap_samples(x, 500, seed=7)
    b = bootstrap_samples(x, 500, seed=7)
    c = bootstrap_samples(x, 500, seed=8)
    assert a.shape == (500, 4)
    np.testing.assert_array_equal(a, b)
    assert not np.array_equal(a, c)
    # bootstrap error of the mean ~ std(ddof=0)/sqrt(n) (Efron 1979); 500 samples: ~3 %
    np.testing.assert_allclose(a.std(axis=0), x.std(axis=0) / np.sqrt(20), rtol=0.12)
    # each sample is an average of the original rows: inside their range
    assert np.all(a <= x.max(axis=0)) and np.all(a >= x.min(axis=0))
    with pytest.raises(DataError, match="n_boot"):
        bootstrap_samples(x, 0, seed=1)
