"""Model averaging checked against the published formulas and astropy.

Source: W. I. Jay, E. T. Neil, "Bayesian model averaging for analysis of lattice
field theory results", Phys. Rev. D 103 (2021) 114502 -- model weights
pr(M|D) ∝ exp(-AIC/2), averaged mean <a> = sum_M <a>_M pr(M|D), variance
sigma^2 = sum_M sigma_M^2 pr(M|D) + sum_M <a>_M^2 pr(M|D) - <a>^2.
"""

from __future__ import annotations

import math

import numpy as np
from astropy.stats import jackknife_resampling, jackknife_stats

from plateaufit.fit.average import aic_weights, model_average


def test_hand_worked_three_fit_example():
    # Three fits of one parameter, S = 3 jackknife samples each; worked by hand
    # from the Jay & Neil (2021) formulas.
    aic = [10.0, 12.0, 14.0]
    central = np.array([[0.50], [0.52], [0.47]])
    samples = np.array([[[0.49], [0.50], [0.51]],
                        [[0.51], [0.52], [0.53]],
                        [[0.48], [0.47], [0.46]]])
    # weights: exp(-(AIC - 10)/2) = 1, e^-1 = 0.36787944117, e^-2 = 0.13533528324;
    # their sum is 1.50321472441, so
    w_hand = np.array([1.0, 0.36787944117, 0.13533528324]) / 1.50321472441
    # = 0.66524095577, 0.24472847105, 0.09003057317
    np.testing.assert_allclose(w_hand, [0.66524095577, 0.24472847105, 0.09003057317], rtol=1e-10)
    # value = 0.66524095577*0.50 + 0.24472847105*0.52 + 0.09003057317*0.47
    #       = 0.33262047789 + 0.12725880495 + 0.04231436939 = 0.50219365223
    value_hand = 0.50219365223
    # sum w a^2 = 0.66524095577*0.25 + 0.24472847105*0.2704 + 0.09003057317*0.2209
    #           = 0.16631023894 + 0.06617457857 + 0.01988775362 = 0.25237257113
    # sys^2 = 0.25237257113 - 0.50219365223^2 = 0.25237257113 - 0.25219846434 = 0.00017410679
    sys_hand = math.sqrt(0.00017410679)          # = 0.0131949532
    # averaged jackknife samples: value + delta * (-1, 0, +1) with
    # delta = 0.01 * (w0 + w1 - w2) = 0.01 * 0.81993885365 = 0.0081993885365;
    # jackknife error sqrt((S-1)/S * sum (x - xbar)^2) = sqrt(2/3 * 2 delta^2)
    stat_hand = 0.0081993885365 * math.sqrt(4.0 / 3.0)   # = 0.0094678384
    total_hand = math.sqrt(stat_hand ** 2 + sys_hand ** 2)  # = 0.0162402819

    avg = model_average(central, samples, aic, [True, True, True], ["E0"])
    # source: Jay & Neil (2021), weights pr(M|D) ∝ exp(-AIC/2)
    np.testing.assert_allclose(avg.weights, w_hand, rtol=1e-10)
    # source: Jay & Neil (2021), <a> = sum_M <a>_M pr(M|D)
    assert math.isclose(avg.value["E0"], value_hand, rel_tol=1e-10)
    # source: Jay & Neil (2021), the model-spread term sum <a>_M^2 pr - <a>^2
    assert math.isclose(avg.sys_error["E0"], sys_hand, rel_tol=1e-7)
    assert math.isclose(avg.stat_error["E0"], stat_hand, rel_tol=1e-9)
    assert math.isclose(avg.error["E0"], total_hand, rel_tol=1e-7)
    assert avg.n_excluded == 0


def test_aic_weights_match_published_formula_on_random_aics():
    rng = np.random.default_rng(11)
    aic = rng.uniform(5.0, 40.0, size=25)
    converged = rng.random(25) > 0.2
    w = aic_weights(aic, converged)
    # source: Jay & Neil (2021): pr(M|D) = exp(-AIC_M/2) / sum_M' exp(-AIC_M'/2), over
    # the models kept; written here without the shift by min AIC (no overflow at these sizes)
    direct = np.where(converged, np.exp(-aic / 2.0), 0.0)
    np.testing.assert_allclose(w, direct / direct.sum(), rtol=1e-12, atol=1e-300)


def test_total_variance_equals_published_formula_when_samples_move_together():
    # When every fit's jackknife samples are the central value plus a common shift
    # scaled per fit (perfectly correlated fits with equal errors), the jackknife error
    # of the averaged samples equals the sum_M sigma_M^2 pr(M|D) term, so the total
    # equals Jay & Neil's variance exactly.
    rng = np.random.default_rng(5)
    n_fits, n_samples = 6, 40
    central = rng.normal(0.3, 0.01, size=(n_fits, 1))
    shift = rng.normal(0.0, 0.002, size=n_samples)
    samples = central[:, None, :] + shift[None, :, None]
    aic = rng.uniform(10.0, 20.0, size=n_fits)
    avg = model_average(central, samples, aic, np.ones(n_fits, bool), ["E0"])
    w = avg.weights
    sigma2 = np.array([(n_samples - 1) / n_samples * np.sum((s - s.mean()) ** 2)
                       for s in samples[:, :, 0]])
    mean = np.sum(w * central[:, 0])
    # source: Jay & Neil (2021), sigma^2 = sum sigma_M^2 pr + sum <a>_M^2 pr - <a>^2
    var_published = np.sum(w * sigma2) + np.sum(w * central[:, 0] ** 2) - mean ** 2
    assert math.isclose(avg.error["E0"] ** 2, var_published, rel_tol=1e-9)


def test_stat_error_never_exceeds_published_weighted_variance():
    # In general Var(sum w x) <= sum w Var(x) (Cauchy-Schwarz); the jackknife of the
    # averaged samples keeps the fits' correlation and so is bounded by the published term.
    rng = np.random.default_rng(8)
    n_fits, n_samples = 5, 30
    central = rng.normal(1.0, 0.02, size=(n_fits, 2))
    samples = central[:, None, :] + rng.normal(0.0, 0.01, size=(n_fits, n_samples, 2))
    aic = rng.uniform(0.0, 4.0, size=n_fits)
    avg = model_average(central, samples, aic, np.ones(n_fits, bool), ["E0", "A0.pion"])
    for j, name in enumerate(["E0", "A0.pion"]):
        s = samples[:, :, j]
        sigma2 = (n_samples - 1) / n_samples * np.sum((s - s.mean(axis=1, keepdims=True)) ** 2,
                                                      axis=1)
        # source: Jay & Neil (2021), the sum_M sigma_M^2 pr(M|D) term
        assert avg.stat_error[name] ** 2 <= np.sum(avg.weights * sigma2) * (1 + 1e-12)


def test_single_fit_stat_error_is_astropy_jackknife_error():
    # One fit: no spread, and the stat error is the delete-one jackknife error of the
    # samples, which for the mean statistic astropy.stats.jackknife_stats computes too.
    rng = np.random.default_rng(3)
    data = rng.normal(0.25, 0.05, size=37)
    loo = jackknife_resampling(data).mean(axis=1)      # astropy: delete-one resamples
    avg = model_average(np.array([[data.mean()]]), loo[None, :, None], [3.0], [True], ["E0"])
    _, _, std_err, _ = jackknife_stats(data, np.mean)  # source: astropy.stats.jackknife_stats
    assert math.isclose(avg.stat_error["E0"], std_err, rel_tol=1e-10)
    assert avg.sys_error["E0"] == 0.0


def _fake_fit(e0, aic, samples, flags=(), converged=True):
    """A scan point as average_fits sees it (reported E0 only)."""
    from types import SimpleNamespace

    from plateaufit.fit.diagnostics import Flag, is_degenerate

    flags = tuple(Flag(code, code) for code in flags)
    return SimpleNamespace(model=SimpleNamespace(reported_names=("E0",)),
                           central=SimpleNamespace(reported={"E0": e0}, aic=aic),
                           samples=np.asarray(samples, float)[:, None], converged=converged,
                           flags=flags, degenerate=is_degenerate(flags), undetermined=set())


def _jk(x):
    x = np.asarray(x, float)
    return math.sqrt((x.size - 1) / x.size * np.sum((x - x.mean()) ** 2))


def test_average_error_against_jay_neil_by_hand_on_a_constructed_scan():
    # Three fits sharing S = 4 jackknife samples: two move together, one against.
    # Hand computation with weights from AIC = 0, 1, 2.
    from plateaufit.fit.average import average_fits

    z = np.array([-1.5, -0.5, 0.5, 1.5]) * 1e-4
    fits = [_fake_fit(0.300, 0.0, 0.300 + z), _fake_fit(0.301, 1.0, 0.301 + 2 * z),
            _fake_fit(0.299, 2.0, 0.299 - z)]
    avg = average_fits(fits)
    w = np.exp(-0.5 * np.array([0.0, 1.0, 2.0]))
    w /= w.sum()
    np.testing.assert_allclose(avg.weights, w, rtol=1e-12)
    # fixed central weights: averaged samples = value + (w0 + 2 w1 - w2) z
    stat_hand = abs(w[0] + 2 * w[1] - w[2]) * _jk(z)
    assert math.isclose(avg.stat_error["E0"], stat_hand, rel_tol=1e-10)
    # source: Jay & Neil (2021), stat^2 <= sum_M sigma_M^2 pr(M|D); and the
    # triangle inequality stat <= sum_M pr(M|D) sigma_M
    sigma = np.array([_jk(z), 2 * _jk(z), _jk(z)])
    assert avg.stat_error["E0"] <= w @ sigma <= math.sqrt(w @ sigma ** 2)
    # source: Jay & Neil (2021), the spread term
    mean = w @ [0.300, 0.301, 0.299]
    assert math.isclose(avg.sys_error["E0"], math.sqrt(w @ (np.array([0.300, 0.301, 0.299])
                                                           - mean) ** 2), rel_tol=1e-9)


def test_wild_refits_of_a_degenerate_point_do_not_move_the_average():
    from plateaufit.fit.average import average_fits

    rng = np.random.default_rng(3)
    z = rng.standard_normal(200) * 1e-5
    good = [_fake_fit(0.300, 0.0, 0.300 + z), _fake_fit(0.3001, 0.5, 0.3001 + 1.2 * z)]
    # a point whose refits wander between two minima, with the lowest AIC of all
    wild = 0.300 + np.where(rng.random(200) < 0.5, 0.0, 0.08)
    base = average_fits(good)
    flagged = average_fits(good + [_fake_fit(0.3, -5.0, wild, flags=("refits-wide",))])
    assert flagged.weights[2] == 0.0 and flagged.n_excluded == 1
    assert flagged.stat_error["E0"] == base.stat_error["E0"]
    assert flagged.value["E0"] == base.value["E0"]


def test_a_tiny_weight_point_moves_the_error_by_at_most_its_weight_times_its_error():
    # Fixed weights make the jackknife error a seminorm of the averaged samples:
    # |stat(with) - stat(without, renormalised)| is bounded by what the weights
    # and errors allow (triangle inequality), however wild the point is.
    from plateaufit.fit.average import average_fits

    rng = np.random.default_rng(4)
    z = rng.standard_normal(200) * 1e-5
    good = [_fake_fit(0.300, 0.0, 0.300 + z), _fake_fit(0.3001, 0.5, 0.3001 + 1.2 * z)]
    wild = 0.300 + rng.standard_normal(200) * 0.01          # error 1000x the others
    avg = average_fits(good + [_fake_fit(0.300, 20.0, wild)])
    w = avg.weights
    assert 0 < w[2] < 1e-4
    sigma = np.array([_jk(0.3 + z), _jk(1.2 * z), _jk(wild)])
    assert avg.stat_error["E0"] <= w @ sigma * (1 + 1e-12)
    without = average_fits(good)
    # the averaged samples differ by w2 (wild - rest); its jackknife error bounds the change
    assert abs(avg.stat_error["E0"] - (1 - w[2]) * without.stat_error["E0"]) <= \
        w[2] * sigma[2] * (1 + 1e-9) + 1e-18
