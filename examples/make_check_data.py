"""Write the small invented data set of examples/check_example.yaml.

A fictional ensemble, ``wren-b16``: T = 16, two Monte Carlo streams of 220 and
180 configurations. Two correlators from a known truth:

* ``pion`` (text, one row per configuration):
  ``C(t) = A0 (e^{-E0 t} + e^{-E0 (T-t)}) + A1 (e^{-E1 t} + e^{-E1 (T-t)})``
  with E0 = 0.32, A0 = 1.0, E1 = 0.95, A1 = 0.6;
* ``rho`` (long CSV with ``stream,config,t,value``; configuration ids count
  trajectories, 10 apart): one state, E0 = 0.58, A0 = 0.4.

Noise is multiplicative, ``C(t) (1 + s(t) eta(t))`` with ``s(t) = 0.004 e^{0.12 t}``
(the relative error grows with t, as in real data). ``eta`` is correlated
across timeslices (a shared component) and autocorrelated in Monte Carlo time:
an AR(1) process ``eta_n = phi eta_{n-1} + sqrt(1 - phi^2) z_n`` per stream with
phi = 0.5 for pion and 0.3 for rho, whose exact integrated autocorrelation time
is ``tau_int = 1/2 + phi/(1 - phi)`` (1.5 and about 0.93) in the
1/2 + sum rho convention.

Usage::

    python examples/make_check_data.py
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from plateaufit.atomic import write_text

SEED = 20240611
T = 16
STREAMS = (220, 180)
HERE = Path(__file__).resolve().parent
OUT = HERE / "check_data"


def ar1(rng: np.random.Generator, n: int, k: int, phi: float) -> np.ndarray:
    """(n, k) unit-variance AR(1) series in the first axis, started stationary."""
    z = rng.standard_normal((n, k))
    x = np.empty((n, k))
    x[0] = z[0]
    c = np.sqrt(1.0 - phi * phi)
    for i in range(1, n):
        x[i] = phi * x[i - 1] + c * z[i]
    return x


def correlated_noise(rng: np.random.Generator, phi: float, shared: float = 0.7) -> np.ndarray:
    """(n_cfg, T) noise: per stream AR(1) in Monte Carlo time, partly shared across t."""
    pieces = []
    for n in STREAMS:
        common = ar1(rng, n, 1, phi)
        own = ar1(rng, n, T, phi)
        pieces.append(shared * common + np.sqrt(1.0 - shared**2) * own)
    return np.concatenate(pieces, axis=0)


def truth(t: np.ndarray, states: list[tuple[float, float]]) -> np.ndarray:
    return sum(a * (np.exp(-e * t) + np.exp(-e * (T - t))) for e, a in states)


def main() -> None:
    rng = np.random.default_rng(SEED)
    t = np.arange(T)
    size = 0.004 * np.exp(0.12 * t)
    pion = truth(t, [(0.32, 1.0), (0.95, 0.6)]) * (1.0 + size * correlated_noise(rng, 0.5))
    rho = truth(t, [(0.58, 0.4)]) * (1.0 + size * correlated_noise(rng, 0.3))

    rows = [" ".join(f"{x:.6e}" for x in row) for row in pion]
    write_text(OUT / "pion.txt",
               "# invented data (examples/make_check_data.py): ensemble wren-b16, T = 16\n"
               f"# one row per configuration, Monte Carlo order; streams of {STREAMS[0]} "
               f"and {STREAMS[1]}\n" + "\n".join(rows) + "\n")

    lines = ["stream,config,t,value"]
    i = 0
    for stream, n in enumerate(STREAMS, start=1):
        for k in range(n):
            config = 1000 * stream + 10 * k
            lines += [f"{stream},{config},{tt},{rho[i, tt]:.6e}" for tt in range(T)]
            i += 1
    write_text(OUT / "rho.csv", "\n".join(lines) + "\n")


if __name__ == "__main__":
    main()
