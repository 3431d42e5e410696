"""Shared fixtures: small invented correlator data from a known truth, fixed seeds."""

from __future__ import annotations

import numpy as np
import pytest


def _invented_correlator(n_cfg: int = 40, T: int = 16, *, energy: float = 0.5,
                         amplitude: float = 2.0, noise: float = 0.01, seed: int = 7,
                         periodic: bool = True) -> np.ndarray:
    """``(n_cfg, T)``: A (e^{-E t} + e^{-E (T - t)}) times (1 + noise * N(0, 1))."""
    rng = np.random.default_rng(seed)
    t = np.arange(T)
    truth = amplitude * np.exp(-energy * t)
    if periodic:
        truth = truth + amplitude * np.exp(-energy * (T - t))
    return truth * (1.0 + noise * rng.standard_normal((n_cfg, T)))


@pytest.fixture
def make_correlator():
    """Factory ``make_correlator(n_cfg=40, T=16, *, energy, amplitude, noise, seed, periodic)``
    of invented single-state correlators with multiplicative Gaussian noise."""
    return _invented_correlator
