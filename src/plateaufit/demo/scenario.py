"""The demo's invented ensemble ``heron-a24t48``: streams, observables and their truth.

See :mod:`plateaufit.demo` for the scenario and the noise model.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

#: The seed of the committed demo data (examples/demo_data).
DEMO_SEED = 20240617

ENSEMBLE_NAME = "heron-a24t48"
TIME_EXTENT = 48
#: (label, number of configurations) of the Monte Carlo streams, in file order.
STREAMS: tuple[tuple[str, int], ...] = (("a", 600), ("b", 400))
#: Trajectories between saved configurations, and the first trajectory of each stream.
TRAJECTORY_STEP = 8
STREAM_FIRST_TRAJECTORY = {"a": 1000, "b": 21000}

PION_MASS = 0.20   # lattice units; sets the Parisi noise energies


@dataclass(frozen=True)
class DemoObservable:
    """One synthetic correlator of the demo scenario.

    Attributes
    ----------
    name, file, format : str
        Observable name, file name inside the data directory, file format.
    form : str
        ``cosh`` (periodic meson) or ``exp`` (forward baryon).
    energies, amplitudes : tuple of float
        Ground and excited states, ``C(t) = sum_n A_n g(E_n, t)``.
    noise_energy : float
        ``E_noise`` of the Parisi argument.
    noise0 : float
        Relative noise per configuration at t = 0, ``r0``.
    phi : float
        AR(1) coefficient in Monte Carlo time (per stream).
    xi : float
        Correlation length of the smooth part of the noise in t.
    rough : float
        Fraction of the noise variance that is independent from timeslice to
        timeslice (it sets the smallest eigenvalues of the correlation matrix).
    backward : tuple of float or None
        ``(energy, amplitude)`` of the backward-propagating parity partner
        (antiperiodic nucleon), entering with a minus sign.
    source, sink : str or None
        Operator labels (pion: for the factorised fit).
    """

    name: str
    file: str
    format: str
    form: str
    energies: tuple[float, ...]
    amplitudes: tuple[float, ...]
    noise_energy: float
    noise0: float
    phi: float
    xi: float
    rough: float
    backward: tuple[float, float] | None = None
    source: str | None = None
    sink: str | None = None

    @property
    def tau_int(self) -> float:
        """Exact tau_int (1/2 + sum rho convention) of the AR(1) noise chain."""
        return 0.5 + self.phi / (1.0 - self.phi)

    def truth(self, t: np.ndarray, time_extent: int) -> np.ndarray:
        """The exact correlator C(t) (the mean of the generated data)."""
        t = np.asarray(t, dtype=float)
        out = np.zeros_like(t)
        for energy, amp in zip(self.energies, self.amplitudes):
            out += amp * np.exp(-energy * t)
            if self.form == "cosh":
                out += amp * np.exp(-energy * (time_extent - t))
        if self.backward is not None:
            energy, amp = self.backward
            out -= amp * np.exp(-energy * (time_extent - t))
        return out

    def relative_noise(self, t: np.ndarray, time_extent: int) -> np.ndarray:
        """r(t) = r0 exp((E0 - E_noise/2) min(t, T - t)) (Parisi 1984)."""
        t = np.asarray(t, dtype=float)
        distance = np.minimum(t, time_extent - t)
        return self.noise0 * np.exp((self.energies[0] - 0.5 * self.noise_energy) * distance)


# Overlaps of the pion operators: Z_n.S (smeared), Z_n.L (local).
_Z_PION = {"S": (1.20, 0.45), "L": (0.30, 0.40)}
_PION_E = (0.20, 0.72)


def _pion_amplitudes(source: str, sink: str) -> tuple[float, float]:
    # A_n = Z_n.source * Z_n.sink, rounded to 12 digits so the truth reads cleanly
    return tuple(float(f"{_Z_PION[source][n] * _Z_PION[sink][n]:.12g}") for n in range(2))

#: The scenario: the four correlators, in the order they are generated.
OBSERVABLES: tuple[DemoObservable, ...] = (
    DemoObservable("pion_ss", "pion_ss.txt", "text", "cosh", _PION_E,
                   _pion_amplitudes("S", "S"),
                   noise_energy=2 * PION_MASS, noise0=0.06, phi=5 / 7, xi=8.0, rough=0.08,
                   source="S", sink="S"),
    DemoObservable("pion_sl", "pion_sl.npy", "npy", "cosh", _PION_E,
                   _pion_amplitudes("S", "L"),
                   noise_energy=2 * PION_MASS, noise0=0.08, phi=5 / 7, xi=8.0, rough=0.08,
                   source="S", sink="L"),
    DemoObservable("vector", "vector.h5", "hdf5", "cosh", (0.44, 0.90), (0.80, 0.50),
                   noise_energy=2 * PION_MASS, noise0=0.02, phi=0.6, xi=6.0, rough=0.08),
    DemoObservable("nucleon", "nucleon.csv", "csv", "exp", (0.56, 0.92), (0.90, 0.60),
                   noise_energy=3 * PION_MASS, noise0=0.04, phi=0.5, xi=5.0, rough=0.10,
                   backward=(0.80, 0.70)),
)
#: Correlation of the smeared-local pion's noise with the smeared-smeared one's.
PION_NOISE_CORRELATION = 0.7
#: HDF5 dataset names of the vector file.
VECTOR_DATASET = "vector"
VECTOR_IDS_DATASET = "config_ids"


def by_name(name: str) -> DemoObservable:
    return next(obs for obs in OBSERVABLES if obs.name == name)


def demo_truth() -> dict[str, dict[str, float]]:
    """The known truth of each demo fit, in the fits' reported parameter names.

    Returns
    -------
    dict
        Fit name -> parameter name (``E0``, ``E1``, ``A0.pion_ss``, ``Z0.S``, ...)
        -> true value; the level fits of the matrix (``axial_0``, ...) have their
        level's energy as ``E0`` (:func:`plateaufit.demo.matrix.matrix_truth`).
        Amplitudes follow the models' conventions: ``A (exp(-E t) + exp(-E (T - t)))``
        for cosh, ``A exp(-E t)`` for exp.
    """
    pion_ss, pion_sl = by_name("pion_ss"), by_name("pion_sl")
    vector, nucleon = by_name("vector"), by_name("nucleon")

    def states(obs_list: list[DemoObservable]) -> dict[str, float]:
        out = {f"E{n}": obs_list[0].energies[n] for n in range(len(obs_list[0].energies))}
        for n in range(len(obs_list[0].energies)):
            for obs in obs_list:
                out[f"A{n}.{obs.name}"] = obs.amplitudes[n]
        return out

    factorised = {f"E{n}": _PION_E[n] for n in range(2)}
    for n in range(2):
        for op in ("S", "L"):
            factorised[f"Z{n}.{op}"] = _Z_PION[op][n]
    from plateaufit.demo.matrix import matrix_truth   # it imports this module

    return {
        "pion": states([pion_ss, pion_sl]),
        "pion_factorised": factorised,
        "vector": states([vector]),
        "nucleon": states([nucleon]),
        **matrix_truth(),
    }


#: The demo's derived quantities (spec key ``derived:``): name -> expression.
DEMO_DERIVED: dict[str, str] = {
    "gap_pion": "pion.E1 - pion.E0",
    "ratio_vector_pion": "vector.E0 / pion.E0",
}


def demo_derived_truth() -> dict[str, float]:
    """The known truth of the demo's derived quantities (:data:`DEMO_DERIVED`).

    Returns
    -------
    dict
        Name -> true value, from the true energies, rounded to 12 significant
        digits so the truth reads cleanly (``0.52``, not ``0.5199999999999999``).
    """
    vector = by_name("vector")
    exact = {
        "gap_pion": _PION_E[1] - _PION_E[0],
        "ratio_vector_pion": vector.energies[0] / _PION_E[0],
    }
    return {name: float(f"{exact[name]:.12g}") for name in DEMO_DERIVED}
