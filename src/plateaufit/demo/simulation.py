"""The demo's noise model and :func:`simulate`: configurations from the known truth.

See :mod:`plateaufit.demo` for the model (Parisi signal-to-noise, smooth
correlation in t, AR(1) autocorrelation in Monte Carlo time).

References
----------
G. Parisi, "The strategy for computing the hadronic mass spectrum", Phys. Rept.
103 (1984) 203.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from plateaufit.demo.scenario import (DEMO_SEED, OBSERVABLES, PION_NOISE_CORRELATION, STREAM_FIRST_TRAJECTORY,
                                      STREAMS, TIME_EXTENT, TRAJECTORY_STEP, DemoObservable)

def _smooth_in_t(z: np.ndarray, a: float, burn_in: int) -> np.ndarray:
    """Smooth stationary noise along the last axis, unit variance.

    The AR(1) filter ``y_t = a y_{t-1} + sqrt(1 - a^2) x_t`` applied twice to
    white noise gives correlation ``(1 + d (1 - a^2)/(1 + a^2)) a^d`` at
    distance ``d`` (smooth, like real correlator noise, whose neighbouring
    timeslices are almost fully correlated) and variance
    ``(1 + a^2)/(1 - a^2)``, divided out. The first ``burn_in`` columns of
    ``z`` bring the filter to equilibrium and are dropped.
    """
    scale = math.sqrt(1.0 - a * a)
    first = np.empty_like(z)
    second = np.empty_like(z)
    first[..., 0] = z[..., 0]
    second[..., 0] = first[..., 0]
    for t in range(1, z.shape[-1]):
        first[..., t] = a * first[..., t - 1] + scale * z[..., t]
        second[..., t] = a * second[..., t - 1] + scale * first[..., t]
    return second[..., burn_in:] * math.sqrt((1.0 - a * a) / (1.0 + a * a))


def _ar1_in_configs(z: np.ndarray, phi: float) -> np.ndarray:
    """AR(1) along the first axis (Monte Carlo time), stationary from the start."""
    out = np.empty_like(z)
    out[0] = z[0]
    scale = math.sqrt(1.0 - phi * phi)
    for i in range(1, z.shape[0]):
        out[i] = phi * out[i - 1] + scale * z[i]
    return out


def _noise(rng: np.random.Generator, obs: DemoObservable, n: int, T: int) -> np.ndarray:
    """Unit-variance noise eta (n, T): smooth plus rough in t, AR(1) in configurations."""
    burn_in = int(math.ceil(8 * obs.xi))
    smooth = _smooth_in_t(rng.standard_normal((n, burn_in + T)), math.exp(-1.0 / obs.xi),
                          burn_in)
    rough = rng.standard_normal((n, T))
    eta = math.sqrt(1.0 - obs.rough) * smooth + math.sqrt(obs.rough) * rough
    return _ar1_in_configs(eta, obs.phi)


def _round9(values: np.ndarray) -> tuple[np.ndarray, list[str]]:
    """Round to nine significant digits; return the floats and their %.8e strings."""
    text = [f"{v:.8e}" for v in values.ravel().tolist()]
    return np.array([float(s) for s in text]).reshape(values.shape), text


def simulate(seed: int = DEMO_SEED) -> dict[str, Any]:
    """Generate the demo measurements in memory.

    Parameters
    ----------
    seed : int
        Seed of the numpy random generator (PCG64).

    Returns
    -------
    dict
        ``values``: name -> (n_cfg, T) float64 (rounded to nine significant
        digits, as written); ``text``: name -> list of the ``%.8e`` strings,
        row-major; ``streams``: (n_cfg,) stream labels; ``config_ids``: (n_cfg,)
        trajectory numbers.

    References
    ----------
    G. Parisi, Phys. Rept. 103 (1984) 203 (see the module docstring) -- the
    growth of the relative noise with t.
    """
    rng = np.random.default_rng(seed)
    T = TIME_EXTENT
    t = np.arange(T)
    eta: dict[str, list[np.ndarray]] = {obs.name: [] for obs in OBSERVABLES}
    for _label, n in STREAMS:
        for obs in OBSERVABLES:
            e = _noise(rng, obs, n, T)
            if obs.name == "pion_sl":
                rho = PION_NOISE_CORRELATION
                e = rho * eta["pion_ss"][-1] + math.sqrt(1.0 - rho * rho) * e
            eta[obs.name].append(e)
    values: dict[str, np.ndarray] = {}
    text: dict[str, list[str]] = {}
    for obs in OBSERVABLES:
        noise = np.concatenate(eta[obs.name], axis=0)
        raw = obs.truth(t, T) * (1.0 + obs.relative_noise(t, T) * noise)
        values[obs.name], text[obs.name] = _round9(raw)
    streams = np.concatenate([np.full(n, label) for label, n in STREAMS])
    ids = np.concatenate([STREAM_FIRST_TRAJECTORY[label] + TRAJECTORY_STEP * np.arange(n)
                          for label, n in STREAMS]).astype(np.int64)
    return {"values": values, "text": text, "streams": streams, "config_ids": ids}
