"""Behaviour of plateaufit.stats.autocorr: streams, short chains, edge cases, errors."""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from scipy.signal import lfilter

from plateaufit.errors import DataError, SpecError
from plateaufit.stats.autocorr import (
    BinningWarning,
    ShortChainWarning,
    binning_study,
    choose_bin_size,
    tau_int,
    tau_int_derived,
)


def ar1(phi, n, seed):
    rng = np.random.default_rng(seed)
    x0 = rng.standard_normal() / np.sqrt(1 - phi**2)
    x, _ = lfilter([1.0], [1.0, -phi], rng.standard_normal(n), zi=[phi * x0])
    return x


def direct_gamma(x, streams, t):
    """Wolff's replica formula written out as plain sums over in-stream pairs."""
    dev = x - x.mean()
    num, pairs = 0.0, 0
    for label in np.unique(streams):
        seg = dev[streams == label]
        if len(seg) > t:
            num += float(np.sum(seg[: len(seg) - t] * seg[t:]))
            pairs += len(seg) - t
    return num / pairs


def test_gamma_by_fft_equals_direct_in_stream_sums():
    rng = np.random.default_rng(1)
    x = np.concatenate([ar1(0.6, 300, 2), ar1(0.6, 170, 3), ar1(0.6, 230, 4)]) + 0.1 * rng.standard_normal(700)
    streams = np.repeat([0, 1, 2], [300, 170, 230])
    r = tau_int(x, streams=streams, bias_correction=False)
    g0 = direct_gamma(x, streams, 0)
    for t in range(0, min(len(r.rho), 30)):
        assert r.rho[t] == pytest.approx(direct_gamma(x, streams, t) / g0, rel=1e-9, abs=1e-12)


def test_pairs_never_cross_a_stream_boundary():
    # Streams of 4 independent values each, but every stream starts with a copy
    # of the previous stream's last value. Within a stream there is no
    # autocorrelation (tau = 1/2 exactly); read as one chain, the copies make
    # rho(1) ~ 1/4 and tau ~ 3/4.
    rng = np.random.default_rng(5)
    k, length = 20_000, 4
    x = rng.standard_normal((k, length))
    x[1:, 0] = x[:-1, -1]
    x = x.reshape(-1)
    streams = np.repeat(np.arange(k), length)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ShortChainWarning)
        as_streams = tau_int(x, streams=streams)
        as_one = tau_int(x)
    assert abs(as_streams.tau - 0.5) < 0.02
    assert abs(as_streams.rho[1]) < 0.02
    assert as_one.rho[1] == pytest.approx(0.25, abs=0.02)
    assert as_one.tau > 0.7


def test_streams_with_inconsistent_means_raise_tau():
    # The overall mean is subtracted (Wolff 2004): a spread between streams much
    # larger than their errors shows up as a large tau_int, so the error of the
    # overall mean accounts for it.
    rng = np.random.default_rng(6)
    x = np.concatenate([rng.standard_normal(5000), 3.0 + rng.standard_normal(5000)])
    streams = np.repeat([0, 1], 5000)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ShortChainWarning)
        r = tau_int(x, streams=streams)
    assert r.tau > 50
    # the error of the mean is of the order of the spread of the two stream means
    assert r.value_error > 0.5


def test_window_not_found_warns_and_returns_lower_bound():
    # 300 streams of 6 strongly correlated measurements: the largest usable lag
    # is 3, where the windowing criterion is not yet met.
    k, length = 300, 6
    x = np.concatenate([ar1(0.95, length, 1000 + i) for i in range(k)])
    streams = np.repeat(np.arange(k), length)
    with pytest.warns(ShortChainWarning, match="no autocorrelation window"):
        r = tau_int(x, streams=streams)
    assert not r.reliable
    assert r.window == len(r.tau_by_window) - 1 == 3
    assert r.tau == pytest.approx(r.tau_by_window[-1])
    assert r.tau < (1 + 0.95) / (2 * 0.05)  # a lower bound of the true 19.5


def test_chain_shorter_than_min_length_tau_is_flagged():
    x = ar1(0.9, 300, 7)
    with pytest.warns(ShortChainWarning, match="shorter than 50 x tau_int"):
        r = tau_int(x)
    assert not r.reliable
    assert np.isfinite(r.tau) and r.tau > 0.5


def test_long_uncorrelated_chain_is_reliable_without_warning():
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        r = tau_int(np.random.default_rng(8).standard_normal(5000))
    assert r.reliable and abs(r.tau - 0.5) < 0.05
    assert len(r.rho) == len(r.tau_by_window) >= 21


def test_constant_series_is_a_clear_result():
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        r = tau_int(np.full(100, 3.25))
    assert r.tau == 0.5 and r.error == 0.0 and r.window == 0 and r.reliable
    assert r.value == 3.25 and r.value_error == 0.0
    d = tau_int_derived(np.column_stack([np.ones(50), np.full(50, 2.0)]), lambda m: m[0] / m[1])
    assert d.tau == 0.5 and d.value == 0.5 and d.value_error == 0.0


def test_single_measurement_per_stream_never_crashes():
    with pytest.warns(ShortChainWarning):
        r = tau_int(np.arange(10.0), streams=np.arange(10))
    assert r.tau == 0.5 and not r.reliable and r.window == 0


def test_bad_input_gets_clear_errors():
    with pytest.raises(DataError, match="configuration 3"):
        tau_int(np.array([1.0, 2.0, 3.0, np.nan, 5.0]))
    with pytest.raises(DataError, match="1-d"):
        tau_int(np.ones((10, 2)))
    with pytest.raises(DataError, match="empty"):
        tau_int(np.array([]))
    with pytest.raises(SpecError, match="window parameter S"):
        tau_int(np.arange(10.0), S=0)
    with pytest.raises(DataError, match="5 stream labels for 10"):
        tau_int(np.arange(10.0), streams=np.zeros(5))
    with pytest.raises(DataError, match="not finite"):
        tau_int_derived(np.ones((10, 2)) + np.arange(10)[:, None], lambda m: np.log(m[0] - 100))


def test_binning_study_shapes_streams_and_default_sizes():
    rng = np.random.default_rng(9)
    x = rng.standard_normal((1000, 3))
    streams = np.repeat([0, 1], [600, 400])
    s = binning_study(x, streams=streams)
    assert s.errors.shape == (len(s.sizes), 3)
    assert s.naive_error.shape == (3,)
    assert list(s.sizes[:6]) == [1, 2, 3, 4, 6, 8]
    assert np.all(s.n_bins >= 10)
    assert s.n_bins[0] == 1000
    # the largest size is the largest leaving 10 bins with bins inside streams
    assert 600 // s.sizes[-1] + 400 // s.sizes[-1] >= 10
    one = binning_study(x[:, 0], sizes=[5])
    assert isinstance(one.naive_error, float)


def test_choose_bin_size_rule_and_cap():
    assert choose_bin_size([0.5, 0.5], 1000) == 1  # uncorrelated: no binning needed
    assert choose_bin_size([1.0, 2.0, np.nan], 1000) == int(np.ceil(5 * (2 - 1 / 8)))
    assert choose_bin_size([2.0], 1000, factor=10) == int(np.ceil(10 * (2 - 1 / 8)))
    with pytest.warns(BinningWarning, match="keep at least 20 bins"):
        size = choose_bin_size([9.5], [100, 130])
    assert 100 // size + 130 // size >= 20 and 100 // (size + 1) + 130 // (size + 1) < 20
    with pytest.warns(BinningWarning, match="fewer than 20 bins"):
        assert choose_bin_size([3.0], 12) == 1
    with pytest.raises(DataError, match="no finite tau_int"):
        choose_bin_size([np.nan], 100)


# --------------------------------------------------------------------------- too short to estimate


def test_two_measurements_give_nan_not_a_negative_tau():
    # With N = 2, Gamma(1) = -Gamma(0) exactly, so the estimated variance of the mean
    # is negative: there is no estimate (it used to print -2.50 +- -7.07).
    with pytest.warns(ShortChainWarning, match="too short"):
        r = tau_int(np.array([0.31, 0.42]))
    assert np.isnan(r.tau) and np.isnan(r.error) and np.isnan(r.value_error)
    assert not r.reliable
    assert r.value == pytest.approx(0.365)


def test_three_measurements_either_positive_and_unreliable_or_nan():
    # monotone: a (poor) positive estimate, flagged unreliable, with a non-negative error
    with pytest.warns(ShortChainWarning):
        r = tau_int(np.array([1.0, 2.0, 4.0]))
    assert r.tau > 0 and r.error >= 0 and not r.reliable and np.isfinite(r.value_error)
    # the middle one the largest: the variance of the mean comes out negative -> NaN
    with pytest.warns(ShortChainWarning, match="too short"):
        r = tau_int(np.array([1.0, 3.0, 2.0]))
    assert np.isnan(r.tau) and np.isnan(r.error) and not r.reliable


@pytest.mark.parametrize("n", [2, 3, 4, 5, 6, 8, 12])
def test_short_series_never_give_a_negative_tau_or_error(n):
    rng = np.random.default_rng(40 + n)
    for _ in range(200):
        x = rng.standard_normal(n)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", ShortChainWarning)
            r = tau_int(x)
            d = tau_int_derived(np.column_stack([x, x**2 + 3]), lambda m: m[1] / (1 + m[0] ** 2))
        for res in (r, d):
            assert np.isnan(res.tau) or res.tau > 0
            assert np.isnan(res.error) or res.error >= 0
            assert np.isnan(res.tau) == np.isnan(res.error)
            assert np.isnan(res.tau) <= (not res.reliable)


def test_strictly_alternating_series_has_no_tau_estimate():
    with pytest.warns(ShortChainWarning, match="anticorrelated"):
        r = tau_int(np.tile([1.0, -1.0], 200))
    assert np.isnan(r.tau) and not r.reliable


def test_constant_short_series_and_a_single_measurement():
    for n in (2, 3):
        with warnings.catch_warnings():
            warnings.simplefilter("error")
            r = tau_int(np.full(n, 0.75))
        assert r.tau == 0.5 and r.error == 0.0 and r.value_error == 0.0 and r.reliable
    with pytest.raises(DataError, match="at least 2 measurements") as err:
        tau_int(np.array([0.75]))
    assert err.value.where == "series"
    with pytest.raises(DataError, match="at least 2 measurements"):
        tau_int_derived(np.ones((1, 2)), lambda m: m[0])
