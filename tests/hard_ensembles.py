"""Invented ensembles that are hard for a fitter, shared by several tests.

``precise_two_state``: N configurations of a periodic two-state correlator,
T = 48, truth E = (0.30, 0.90), A = (1.0, 0.5); relative noise 0.3% at t = 0
growing as exp(0.05 t) (very precise early timeslices), correlated in t (AR(1)
along t, coefficient 0.8) and along the Monte Carlo chain (AR(1), phi = 0.5,
tau_int = (1 + phi) / (2 (1 - phi)) = 1.5). The excited state is resolved at
small tmin and invisible beyond t ~ 9: the data cannot tell its energy there.
"""

from __future__ import annotations

import numpy as np

TRUTH = {"E0": 0.30, "E1": 0.90, "A0": 1.0, "A1": 0.5}
T = 48


def precise_two_state(seed: int, n_configs: int = 1000, phi: float = 0.5) -> np.ndarray:
    """(n_configs, T) per-configuration correlators, periodic, from the truth above."""
    rng = np.random.default_rng(seed)
    t = np.arange(T)
    truth = sum(TRUTH[f"A{n}"] * (np.exp(-TRUTH[f"E{n}"] * t)
                                  + np.exp(-TRUTH[f"E{n}"] * (T - t))) for n in (0, 1))
    z = rng.standard_normal((n_configs, T))
    for i in range(1, T):
        z[:, i] = 0.8 * z[:, i - 1] + 0.6 * z[:, i]
    for k in range(1, n_configs):
        z[k] = phi * z[k - 1] + np.sqrt(1 - phi ** 2) * z[k]
    rel = 0.003 * np.exp(0.05 * np.minimum(t, T - t))
    return truth * (1 + rel * z)


def write_text(path, data: np.ndarray) -> None:
    """One row per configuration, as the text loader reads it."""
    np.savetxt(path, data, header="invented precise two-state correlator")
