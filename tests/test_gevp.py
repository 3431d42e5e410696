"""GEVP behaviour: following levels through crossings, counting crossings, bad input.

Invented data throughout, from a known truth with fixed seeds. The checks against
outside sources (scipy, exact results, Blossier et al. 2009) are in
tests/reference/test_gevp_reference.py.
"""

from __future__ import annotations

import numpy as np
import pytest

from plateaufit.errors import DataError, SpecError
from plateaufit.stats import (
    asymmetry_significance,
    half_t0_effective_energy,
    overlaps,
    principal_effective_energy,
    solve_gevp,
    symmetrise,
)
from plateaufit.stats.resample import jackknife_samples


def spectral_matrix(basis: np.ndarray, levels: np.ndarray) -> np.ndarray:
    """``C(t) = B diag(f(t)) B^T``: (r, r, n_t) from basis (r, r), levels (..., r, n_t)."""
    return np.einsum("in,jn,...nt->...ijt", basis, basis, levels)


def crossing_levels(n_t: int) -> np.ndarray:
    """Three level functions; levels 1 and 2 cross near t = 12.

    f_0 = exp(-0.2 t); f_1 = exp(-0.45 t); f_2 = exp(-1.2 t) + 0.1 exp(-0.3 t): at t0 + 1 = 2
    level 2 has the smaller principal correlator, later it decays more slowly than level 1.
    """
    t = np.arange(n_t)
    return np.stack([np.exp(-0.2 * t), np.exp(-0.45 * t),
                     np.exp(-1.2 * t) + 0.1 * np.exp(-0.3 * t)])


BASIS = np.array([[1.0, 0.5, 0.3],
                  [0.4, 1.1, 0.6],
                  [0.2, 0.3, 0.9]])


# ---------------------------------------------------------------------------
# following levels
# ---------------------------------------------------------------------------

def test_levels_are_followed_through_a_crossing_of_principal_correlators():
    n_t, t0 = 20, 1
    f = crossing_levels(n_t)
    c = spectral_matrix(BASIS, f)
    res = solve_gevp(c, np.stack([c, c]), t0)
    truth = f / f[:, t0:t0 + 1]          # lambda_n = f_n(t) / f_n(t0): eigenvectors fixed
    np.testing.assert_allclose(res.eigenvalues, truth, rtol=1e-10)
    # the levels do cross: sorting by eigenvalue would have swapped them from t = 12 on
    crossed = (truth[2] > truth[1]) & (np.arange(n_t) > t0)
    assert crossed[12:].all() and not crossed[:12].any()
    np.testing.assert_array_equal(res.central_swapped[1], crossed)
    np.testing.assert_array_equal(res.central_swapped[2], crossed)
    assert not res.central_swapped[0].any()
    assert np.all(res.level_separation[1, 12:] < 0) and np.all(res.level_separation[1, 2:12] > 0)
    # each level keeps its eigenvector (the columns of B^{-T}), same sign at every t
    for t in range(n_t):
        np.testing.assert_allclose(res.eigenvectors[t], res.eigenvectors[t0 + 1], atol=1e-9)
    # effective energies follow the level: level 2 goes from ~1.2 to ~0.3, level 1 stays 0.45
    eff = principal_effective_energy(res)
    np.testing.assert_allclose(eff.value[1], 0.45, rtol=1e-9)
    assert eff.value[2, 2] > 0.6 and abs(eff.value[2, -1] - 0.3) < 0.01


def test_samples_are_assigned_to_the_central_levels_and_crossings_counted():
    """Per-sample noise on the level functions only: eigenvectors stay fixed, so each
    sample's assigned eigenvalues are known, and so is which samples change order."""
    n_t, t0, n_s = 20, 1, 40
    f = crossing_levels(n_t)
    rng = np.random.default_rng(12)
    eps = 0.03 * rng.standard_normal((n_s, 3, n_t))
    fs = f[None] * (1 + eps)
    c = spectral_matrix(BASIS, f)
    cs = spectral_matrix(BASIS, fs)
    res = solve_gevp(c, cs, t0)
    truth_s = fs / fs[..., t0:t0 + 1]
    np.testing.assert_allclose(res.eigenvalue_samples, truth_s, rtol=1e-9)
    # expected crossings: samples whose order of the three differs from the central's
    order_c = np.argsort(np.argsort(-(f / f[:, t0:t0 + 1]), axis=0), axis=0)
    order_s = np.argsort(np.argsort(-truth_s, axis=1), axis=1)
    expected = order_s != order_c[None]
    expected[..., t0] = False
    np.testing.assert_array_equal(res.sample_swapped, expected)
    np.testing.assert_array_equal(res.crossings, expected.sum(axis=0))
    assert res.crossings[1:, 10:14].sum() > 0          # near the crossing, samples flip
    assert res.crossings[:, :8].sum() == 0 and res.crossings[0].sum() == 0
    # the sample eigenvectors point the central's way (sign aligned, metric of the sample)
    for s in range(n_s):
        for t in (3, 11, 12, 19):
            v, w = res.eigenvector_samples[s, t], res.eigenvectors[t]
            cos = np.sum(v * w, 0) / np.linalg.norm(v, axis=0) / np.linalg.norm(w, axis=0)
            np.testing.assert_allclose(cos, 1.0, atol=1e-9)
    # an effective energy is flagged when its level is out of order at t or t + 1
    eff = principal_effective_energy(res)
    np.testing.assert_array_equal(eff.crossings,
                                  (expected[..., :-1] | expected[..., 1:]).sum(axis=0))


def test_a_seven_operator_basis_is_followed_with_the_assignment_solver():
    """r = 7 takes the linear_sum_assignment path; a crossing pair is followed."""
    rng = np.random.default_rng(4)
    r, n_t, t0 = 7, 18, 2
    basis = np.eye(r) + 0.3 * rng.uniform(size=(r, r))
    t = np.arange(n_t)
    energies = np.array([0.1, 0.3, 0.5, 0.7, 0.9, 1.1, 1.3])
    f = np.exp(-np.outer(energies, t))
    f[5] = np.exp(-1.6 * t) + 0.05 * np.exp(-0.6 * t)     # crosses level 4 at t ~ 9
    c = spectral_matrix(basis, f)
    res = solve_gevp(c, np.stack([c, c, c]), t0)
    truth = f / f[:, t0:t0 + 1]
    np.testing.assert_allclose(res.eigenvalues, truth, rtol=1e-8)
    # expected: level n out of place in the eigenvalue order (descending after t0,
    # ascending before); level 5 passes level 4 at t ~ 9 and level 3 at t ~ 17
    rank = np.argsort(np.argsort(-truth, axis=0), axis=0)
    rank[:, :t0] = np.argsort(np.argsort(truth[:, :t0], axis=0), axis=0)
    expected = rank != np.arange(r)[:, None]
    expected[:, t0] = False
    assert expected[5].sum() > 5 and expected[4].any() and expected[3].any()
    np.testing.assert_array_equal(res.central_swapped, expected)


def test_degenerate_levels_show_as_crossings_and_as_no_separation():
    """Levels 1 and 2 exactly degenerate (distinct operators, same energy), six bins: the
    data cannot tell them apart. Any sample that swaps them counts for both; the ground
    state, far away, never swaps; the separation in errors says what the count cannot."""
    rng = np.random.default_rng(21)
    r, n_t, t0, n_bins = 3, 16, 2, 6
    t = np.arange(n_t)
    c = spectral_matrix(BASIS, np.exp(-np.outer([0.2, 0.6, 0.6], t)))
    z = rng.standard_normal((n_bins, r, r, n_t))
    bins = c[None] * (1 + 0.01 * 0.5 * (z + np.swapaxes(z, 1, 2)))
    res = solve_gevp(bins.mean(axis=0), jackknife_samples(bins), t0)
    assert res.crossings[0].sum() == 0
    assert res.crossings[1].sum() > 0
    np.testing.assert_array_equal(res.crossings[1], res.crossings[2])
    assert np.all(res.crossings <= n_bins)
    after = slice(t0 + 1, None)
    assert np.median(np.abs(res.level_separation[1, after])) < 3
    assert np.min(res.level_separation[0, after]) > 10
    assert np.all(res.level_separation[0, :t0] > 10)    # sign flipped before t0: in order


# ---------------------------------------------------------------------------
# what the solver returns
# ---------------------------------------------------------------------------

def test_shapes_signs_and_the_metric_normalisation():
    rng = np.random.default_rng(5)
    r, n_t, n_s = 4, 12, 9
    basis = np.eye(r) + 0.4 * rng.uniform(size=(r, r))
    f = np.exp(-np.outer([0.2, 0.5, 0.8, 1.1], np.arange(n_t)))
    c = spectral_matrix(basis, f)
    cs = c[None] * (1 + 1e-3 * rng.standard_normal((n_s, 1, 1, n_t)))
    res = solve_gevp(c, cs, 3)
    assert res.eigenvalues.shape == (r, n_t) and res.eigenvalue_samples.shape == (n_s, r, n_t)
    assert res.eigenvectors.shape == (n_t, r, r)
    assert res.eigenvector_samples.shape == (n_s, n_t, r, r)
    assert res.crossings.shape == (r, n_t) and res.n_levels == r and res.n_samples == n_s
    np.testing.assert_array_equal(res.eigenvalue_samples[:, :, 3], 1.0)
    g = c[..., 3]
    for t in (0, 5, 11):
        v = res.eigenvectors[t]
        np.testing.assert_allclose(v.T @ g @ v, np.eye(r), atol=1e-10)   # v^T C(t0) v = 1
        w = g @ v          # largest component of C(t0) v_n is positive
        assert np.all(w[np.argmax(np.abs(w), axis=0), np.arange(r)] > 0)
    assert 1 < res.condition_number_t0 < 1e6


def test_asymmetric_input_is_symmetrised_and_a_misplaced_entry_is_flagged():
    rng = np.random.default_rng(8)
    r, n_t, n_bins = 3, 10, 40
    f = np.exp(-np.outer([0.3, 0.6, 0.9], np.arange(n_t)))
    c = spectral_matrix(BASIS, f)
    # C_ij and C_ji measured separately: independent noise, symmetric only on average
    bins = c[None] * (1 + 0.01 * rng.standard_normal((n_bins, r, r, n_t)))
    central, samples = bins.mean(axis=0), jackknife_samples(bins)
    res = solve_gevp(central, samples, 1)
    same = solve_gevp(symmetrise(central), symmetrise(samples), 1)
    np.testing.assert_allclose(res.eigenvalue_samples, same.eigenvalue_samples, rtol=1e-13)
    np.testing.assert_allclose(res.matrix, 0.5 * (central + central.transpose(1, 0, 2)))
    assert res.asymmetry.max() < 5            # noise: a few jackknife errors at most
    wrong = bins.copy()
    wrong[:, 0, 1] = bins[:, 0, 2]            # one grid entry points at the wrong data
    z = asymmetry_significance(wrong.mean(axis=0), jackknife_samples(wrong))
    assert z[0, 1] > 50 and z[1, 0] == z[0, 1]
    np.testing.assert_array_equal(np.diag(z), 0.0)


def test_half_t0_skips_a_t0_that_is_not_positive_definite():
    n_t = 14
    f = np.exp(-np.outer([0.3, 0.6, 0.9], np.arange(n_t)))
    c = spectral_matrix(BASIS, f)
    cs = np.stack([c, 1.01 * c, 0.99 * c])
    cs[1, ..., 5] = np.diag([1.0, -1.0, 1.0]) * c[0, 0, 5]     # sample 1: C(5) indefinite
    res = solve_gevp(c, cs, 2)
    half = half_t0_effective_energy(res)
    assert half.skipped_t0 == (5,)
    bad = half.t0 == 5                                       # t = 9 and 10
    np.testing.assert_array_equal(np.flatnonzero(bad), [9, 10])
    assert np.isnan(half.value[:, bad]).all()
    # elsewhere exact except where the broken timeslice enters as C(t) (t = 4, 5 use C(5))
    ok = ~bad & ~np.isin(half.t, [4, 5])
    expected = np.broadcast_to(np.array([[0.3], [0.6], [0.9]]), half.value[:, ok].shape)
    np.testing.assert_allclose(half.value[:, ok], expected, rtol=1e-9)


def test_overlap_errors_come_from_the_samples():
    rng = np.random.default_rng(9)
    n_t = 12
    f = np.exp(-np.outer([0.3, 0.6, 0.9], np.arange(n_t)))
    c = spectral_matrix(BASIS, f)
    bins = c[None] * (1 + 0.002 * rng.standard_normal((20, 1, 1, n_t)))
    res = solve_gevp(bins.mean(axis=0), jackknife_samples(bins), 2)
    e = np.array([0.3, 0.6, 0.9])
    es = e + 1e-3 * rng.standard_normal((20, 3))
    z = overlaps(res, e, es, t=5)
    n = 20
    dev = z.samples - z.samples.mean(axis=0)
    np.testing.assert_allclose(z.error, np.sqrt((n - 1) / n * (dev ** 2).sum(axis=0)))
    assert np.all(z.error > 0)
    np.testing.assert_allclose(np.nanmax(z.relative, axis=1), 1.0)
    # a level without an energy has no overlaps, the others are unaffected
    e_nan = e.copy()
    e_nan[2] = np.nan
    z2 = overlaps(res, e_nan, es, t=5)
    assert np.isnan(z2.value[:, 2]).all()
    np.testing.assert_allclose(z2.value[:, :2], z.value[:, :2])


# ---------------------------------------------------------------------------
# bad input
# ---------------------------------------------------------------------------

def _good(n_t: int = 10) -> tuple[np.ndarray, np.ndarray]:
    c = spectral_matrix(BASIS, np.exp(-np.outer([0.3, 0.6, 0.9], np.arange(n_t))))
    return c, np.stack([c, 1.01 * c, 0.99 * c, 1.02 * c])


def test_a_matrix_that_is_not_square_is_refused():
    c, cs = _good()
    with pytest.raises(DataError, match="square") as err:
        solve_gevp(c[:, :2], cs[:, :, :2], 2)
    assert err.value.where == "matrix"


def test_a_single_operator_is_refused():
    c, cs = _good()
    with pytest.raises(DataError, match="at least two operators"):
        solve_gevp(c[:1, :1], cs[:, :1, :1], 2)


def test_samples_that_do_not_match_are_refused():
    c, cs = _good()
    with pytest.raises(DataError) as err:
        solve_gevp(c, cs[..., :-1], 2)
    assert err.value.where == "matrix_samples"
    with pytest.raises(DataError, match="at least 2 samples"):
        solve_gevp(c, cs[:1], 2)
    bad = cs.copy()
    bad[2, 0, 0, 4] = np.nan
    with pytest.raises(DataError, match="samples 2"):
        solve_gevp(c, bad, 2)


@pytest.mark.parametrize("t0", [-1, 9, 10, 2.5, True, "half"])
def test_t0_out_of_range_or_not_an_integer_is_refused(t0):
    c, cs = _good(10)
    with pytest.raises(SpecError) as err:
        solve_gevp(c, cs, t0)
    assert err.value.where == "t0"
    assert "t0" in err.value.message


def test_a_central_c_t0_that_is_not_positive_definite_names_t0():
    c, cs = _good()
    c = c.copy()
    c[..., 4] = np.diag([1.0, -0.2, 1.0])
    with pytest.raises(DataError) as err:
        solve_gevp(c, cs, 4)
    assert err.value.where == "t0"
    msg = err.value.message
    assert "t0 = 4" in msg and "not positive definite" in msg
    assert "smaller t0" in msg and "smaller operator basis" in msg
    solve_gevp(c, cs, 3)        # another t0 is fine


def test_samples_whose_c_t0_is_not_positive_definite_are_named():
    c, cs = _good()
    cs = cs.copy()
    cs[[1, 3], ..., 4] = np.diag([1.0, 1.0, -1e-3])
    with pytest.raises(DataError) as err:
        solve_gevp(c, cs, 4)
    msg = err.value.message
    assert "t0 = 4" in msg and "2 of 4 jackknife samples" in msg and "samples 1, 3" in msg
    assert "every sample" in msg


def test_bad_arguments_of_the_effective_energies_and_overlaps():
    c, cs = _good()
    res = solve_gevp(c, cs, 2)
    with pytest.raises(SpecError):
        principal_effective_energy(res, "cosh")          # needs the time extent
    with pytest.raises(SpecError):
        half_t0_effective_energy(res, "plateau")
    e = np.array([0.3, 0.6, 0.9])
    with pytest.raises(DataError) as err:
        overlaps(res, e[:2], np.tile(e, (4, 1)), t=4)
    assert err.value.where == "energies"
    with pytest.raises(DataError) as err:
        overlaps(res, e, np.tile(e, (3, 1)), t=4)
    assert err.value.where == "energy_samples"
    with pytest.raises(SpecError) as err:
        overlaps(res, e, np.tile(e, (4, 1)), t=10)
    assert err.value.where == "t"
    with pytest.raises(SpecError):
        overlaps(res, e, np.tile(e, (4, 1)), t=4, form="cosh")
    with pytest.raises(SpecError):
        overlaps(res, e, np.tile(e, (4, 1)), t=4, form="linear")


def test_operator_normalisations_far_apart_change_nothing_but_the_overlaps():
    """Operators normalised 1e-6 .. 1e6 apart (C -> D C D): the GEVP is invariant, the
    eigenvalues and their errors are the same, the overlaps scale with D."""
    rng = np.random.default_rng(14)
    n_t, n_bins = 14, 12
    e = np.array([0.3, 0.6, 0.9])
    c = spectral_matrix(BASIS, np.exp(-np.outer(e, np.arange(n_t))))
    z = rng.standard_normal((n_bins, 3, 3, n_t))
    bins = c[None] * (1 + 0.01 * 0.5 * (z + np.swapaxes(z, 1, 2)))
    d = np.array([1e-6, 1.0, 1e6])
    scaled = bins * d[:, None, None] * d[None, :, None]
    plain = solve_gevp(bins.mean(0), jackknife_samples(bins), 2)
    wide = solve_gevp(scaled.mean(0), jackknife_samples(scaled), 2)
    np.testing.assert_allclose(wide.eigenvalues, plain.eigenvalues, rtol=1e-9)
    np.testing.assert_allclose(wide.eigenvalue_errors, plain.eigenvalue_errors, rtol=1e-6)
    np.testing.assert_array_equal(wide.crossings, plain.crossings)
    es = np.tile(e, (n_bins, 1))
    zp = overlaps(plain, e, es, t=5)
    zw = overlaps(wide, e, es, t=5)
    np.testing.assert_allclose(np.abs(zw.value), np.abs(zp.value) * d[:, None], rtol=1e-8)
