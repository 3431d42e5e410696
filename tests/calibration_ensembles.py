"""Invented ensembles for ``plateaufit calibrate``: a known Monte Carlo autocorrelation.

``single_state``: N configurations of a periodic one-state correlator
``A0 (exp(-E0 t) + exp(-E0 (T - t)))`` with truth E0 = 0.35, A0 = 1.2 (a
fictional meson); relative noise ``rel0 * exp(0.12 t)`` on the folded
half (the signal-to-noise falls with t), correlated along t (AR(1) along t,
coefficient 0.7) and along the Monte Carlo chain: each configuration's noise
is an AR(1) process in Monte Carlo time with coefficient ``phi``, so every
timeslice has tau_int = (1 + phi) / (2 (1 - phi)) exactly (1/2 + sum rho
convention; Brockwell & Davis, "Time Series: Theory and Methods", 1991):
phi = 0.8 gives 4.5.

:func:`write_spec` writes the data as text and a spec that fits them.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import yaml
from scipy.signal import lfilter

TRUTH = {"E0": 0.35, "A0": 1.2}


def phi_for_tau(tau: float) -> float:
    """AR(1) coefficient with tau_int = tau (exact: tau = (1 + phi) / (2 (1 - phi)))."""
    return (2.0 * tau - 1.0) / (2.0 * tau + 1.0)


def single_state(seed: int, n_configs: int = 1000, time_extent: int = 32, tau: float = 4.5,
                 rel0: float = 0.004, streams: tuple[int, ...] | None = None) -> np.ndarray:
    """(n_configs, T) per-configuration correlators with the truth above."""
    rng = np.random.default_rng(seed)
    T = time_extent
    t = np.arange(T)
    truth = TRUTH["A0"] * (np.exp(-TRUTH["E0"] * t) + np.exp(-TRUTH["E0"] * (T - t)))
    z = rng.standard_normal((n_configs, T))
    z = lfilter([np.sqrt(1 - 0.7 ** 2)], [1.0, -0.7], z, axis=1)   # correlated along t
    z[:, 0] /= np.sqrt(1 - 0.7 ** 2)
    phi = phi_for_tau(tau)
    sizes = streams or (n_configs,)
    start = 0
    for n in sizes:   # each stream its own stationary AR(1) chain
        block = z[start:start + n].copy()
        block[1:] *= np.sqrt(1 - phi ** 2)
        z[start:start + n] = lfilter([1.0], [1.0, -phi], block, axis=0)
        start += n
    rel = rel0 * np.exp(0.12 * np.minimum(t, T - t))
    return truth * (1.0 + rel * z)


def write_spec(directory: Path, data: np.ndarray, *, time_extent: int = 32, tmin=6, tmax=11,
               states=1, bin_size="auto", covariance: dict | None = None,
               streams: list[int] | None = None, choose=None, name: str = "meson") -> Path:
    """The data as ``corr.txt`` and a one-fit spec ``spec.yaml`` in ``directory``."""
    directory = Path(directory)
    directory.mkdir(parents=True, exist_ok=True)
    np.savetxt(directory / "corr.txt", data, header="invented one-state correlator")
    spec = {
        "ensemble": {"name": "wren-t32", "time_extent": time_extent},
        "observables": {"corr": {"file": "corr.txt", "boundary": "periodic"}},
        "binning": {"size": bin_size},
        "covariance": dict(covariance or {}),
        "fits": [{"name": name, "observables": ["corr"], "model": "cosh", "states": states,
                  "tmin": tmin, "tmax": tmax}],
        "output": {"dir": "results"},
    }
    if streams:
        spec["ensemble"]["streams"] = list(streams)
    if choose is not None:
        spec["fits"][0]["choose"] = choose
    path = directory / "spec.yaml"
    path.write_text(yaml.safe_dump(spec, sort_keys=False))
    return path
