"""fold and folded_extent: exact on hand examples and on pure exponentials."""

from __future__ import annotations

import numpy as np
import pytest

from plateaufit.data.transforms import fold, folded_extent
from plateaufit.errors import DataError


def test_periodic_fold_even_T_by_hand():
    c = np.array([[10.0, 6.0, 3.0, 1.0, 5.0, 8.0]])  # T = 6
    # t=0 as is; t=1: (6+8)/2; t=2: (3+5)/2; t=3 = T/2 as is
    np.testing.assert_array_equal(fold(c, "periodic"), [[10.0, 7.0, 4.0, 1.0]])


def test_antiperiodic_fold_even_T_by_hand():
    c = np.array([[10.0, 6.0, 3.0, 1.0, -5.0, -8.0]])
    # t=1: (6-(-8))/2 = 7; t=2: (3-(-5))/2 = 4; t=3 kept (not (1-1)/2 = 0)
    np.testing.assert_array_equal(fold(c, "antiperiodic"), [[10.0, 7.0, 4.0, 1.0]])


def test_fold_odd_T_by_hand():
    c = np.array([[1.0, 2.0, 3.0, 4.0, 5.0]])  # T = 5 -> t = 0, 1, 2
    np.testing.assert_array_equal(fold(c, "periodic"), [[1.0, 3.5, 3.5]])
    np.testing.assert_array_equal(fold(c, "antiperiodic"), [[1.0, -1.5, -0.5]])


def test_open_is_unchanged_copy():
    c = np.arange(12.0).reshape(2, 6)
    out = fold(c, "open")
    np.testing.assert_array_equal(out, c)
    out[0, 0] = 99.0
    assert c[0, 0] == 0.0


def test_fold_of_exact_cosh_is_the_first_half():
    # exact result: A (e^{-Et} + e^{-E(T-t)}) is symmetric, folding returns it unchanged
    T, E = 24, 0.37
    t = np.arange(T)
    c = np.vstack([a * (np.exp(-E * t) + np.exp(-E * (T - t))) for a in (1.0, 2.5)])
    np.testing.assert_allclose(fold(c, "periodic"), c[:, : T // 2 + 1], rtol=1e-14)
    s = np.vstack([np.exp(-E * t) - np.exp(-E * (T - t))])  # antisymmetric (sinh-like)
    np.testing.assert_allclose(fold(s, "antiperiodic")[:, 1:T // 2], s[:, 1:T // 2], rtol=1e-14)


def test_fold_works_on_each_row():
    rng = np.random.default_rng(0)
    c = rng.normal(size=(7, 10))
    out = fold(c, "periodic")
    assert out.shape == (7, 6)
    for i in range(7):
        np.testing.assert_array_equal(out[i], fold(c[i], "periodic"))


def test_folded_extent():
    assert folded_extent(64, "periodic", True) == 33
    assert folded_extent(63, "antiperiodic", True) == 32
    assert folded_extent(64, "periodic", False) == 64
    assert folded_extent(64, "open", True) == 64
    assert fold(np.zeros((2, 63)), "periodic").shape[1] == folded_extent(63, "periodic", True)


def test_unknown_boundary():
    with pytest.raises(DataError, match="periodic, antiperiodic, open"):
        fold(np.zeros((2, 4)), "twisted")
    with pytest.raises(DataError, match="twisted"):
        folded_extent(4, "twisted", True)
