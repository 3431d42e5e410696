"""``covariance.estimator: gamma``: the covariance a fit uses against tau_int per timeslice.

Source: plateaufit.stats.autocorr.tau_int (the Gamma method of one series,
Wolff 2004, itself checked against emcee and exact AR(1) results in
test_autocorr_reference.py). At the same window W the variance of the mean of
timeslice t is 2 tau_int(W) Gamma_tt(0) / N; Wolff's bias correction
Gamma(tau) -> Gamma(tau) + C_F / N multiplies it by 1 + (2W + 1) / N (each of
the 2W + 1 terms of C_F gains C_F / N), which is the matrix form
gamma_covariance applies. Shrinkage toward the diagonal keeps the diagonal.
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pytest

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from calibration_ensembles import single_state, write_spec  # noqa: E402

from plateaufit.fit.correlator_fit import fit_correlator  # noqa: E402
from plateaufit.pipeline.gamma import gamma_fit_covariance  # noqa: E402
from plateaufit.pipeline.inputs import load_ensemble  # noqa: E402
from plateaufit.pipeline.prepare import prepare  # noqa: E402
from plateaufit.pipeline.rules import load_spec  # noqa: E402
from plateaufit.stats.autocorr import tau_int  # noqa: E402


@pytest.fixture(scope="module")
def gamma_spec(tmp_path_factory):
    data = single_state(21, 6000, tau=3.0, streams=(3500, 2500))
    path = write_spec(tmp_path_factory.mktemp("gamma"), data, tmin=4, tmax=12,
                      covariance={"estimator": "gamma"}, streams=[3500, 2500])
    spec = load_spec(path)
    prepared = prepare(spec, load_ensemble(spec))
    return spec, prepared


def test_diagonal_equals_tau_int_variance_of_every_timeslice(gamma_spec):
    spec, prepared = gamma_spec
    emb = gamma_fit_covariance(spec, spec.fits[0], prepared)
    est = emb.estimate
    assert est.n_clipped == 0
    w, n = est.window, prepared.ensemble.n_configs
    series = prepared.ensemble.correlators["corr"]
    labels = prepared.ensemble.stream_labels
    for j, t in enumerate(range(emb.tmin, emb.tmax + 1)):
        raw = tau_int(series[:, t], streams=labels, bias_correction=False)
        gamma0 = raw.value_error ** 2 * n / (2 * raw.tau)
        expected = 2 * raw.tau_by_window[w] * gamma0 / n * (1 + (2 * w + 1) / n)
        # source: tau_int at the common window; the diagonal survives diagonal shrinkage
        assert emb.matrix[t, t] == pytest.approx(expected, rel=1e-9)
        assert est.matrix[j, j] == pytest.approx(expected, rel=1e-9)
    # the timeslice the window was chosen on: tau_int's own bias-corrected error
    t = emb.tmin + est.component
    own = tau_int(series[:, t], streams=labels)
    assert own.window == w
    assert emb.matrix[t, t] == pytest.approx(own.value_error ** 2, rel=1e-9)   # source: tau_int
    # outside the scanned span nothing was estimated
    assert np.isnan(emb.matrix[emb.tmin - 1, emb.tmin]) and np.isnan(emb.matrix[-1, -1])


def test_the_fit_uses_the_block_of_its_range(gamma_spec):
    spec, prepared = gamma_spec
    emb = gamma_fit_covariance(spec, spec.fits[0], prepared)
    fit = fit_correlator(prepared.binned["corr"], form="cosh", states=1, tmin=6, tmax=10,
                         time_extent=32, covariance_matrix=emb)
    np.testing.assert_array_equal(fit.covariance.matrix, emb.matrix[6:11, 6:11])
    assert fit.covariance.shrinkage == emb.shrinkage
    # the gamma covariance of the mean is the variance of the bin means divided by
    # the number of bins when the bins are long against tau (Flyvbjerg & Petersen
    # 1989): the two estimators agree on the variances within their noise (~20%
    # for ~100 bins of this chain)
    binned = fit_correlator(prepared.binned["corr"], form="cosh", states=1, tmin=6, tmax=10,
                            time_extent=32)
    ratio = np.diag(fit.covariance.matrix) / np.diag(binned.covariance.matrix)
    assert np.all(np.abs(ratio - 1) < 0.5)
