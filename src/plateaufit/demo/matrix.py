"""The demo's correlator matrix: three operators of one invented channel, four states.

The axial-vector channel of ``heron-a24t48`` (invented) is "measured" with
three interpolating operators -- local (``L``), smeared (``S``) and wide-smeared
(``W``) -- as the full 3 x 3 matrix ``C_ij(t) = <O_i(t) O_j(0)^dagger>``. Four
states contribute, so the three-operator basis cannot resolve them all: the
fourth one contaminates the principal correlators at small ``t``, with
corrections of order ``exp(-(E_3 - E_n) t)`` (Blossier et al. 2009).
Periodic in time, cosh form for every state:

    C_ij(t) = sum_n Z_in Z_jn (exp(-E_n t) + exp(-E_n (T - t))).

Noise: each configuration has ``C_ij(t) (1 + r(t) eta_ij(t))`` with the
Parisi growth of :mod:`plateaufit.demo` (``E_noise = 2 m_pi``), and
``eta`` made of a part shared by all entries (one gauge configuration), a part
shared by ``C_ij`` and ``C_ji`` (the same propagators with sources and sinks
exchanged) and a part of each entry's own -- so the measured matrix is not
exactly symmetric and the analysis symmetrises it. Every part is smooth in
``t`` and AR(1)-autocorrelated in Monte Carlo time within each stream. The
data are stored as float32 (seven significant digits, far below the noise) in
one npz archive, one array per grid entry (``LL``, ``LS``, ...).

The random numbers come from their own generator (seeded with
``[seed, MATRIX_STREAM]``), so the other demo files are unchanged by it.

References
----------
.. [1] B. Blossier, M. Della Morte, G. von Hippel, T. Mendes, R. Sommer, JHEP 04
   (2009) 094.
.. [2] G. Parisi, Phys. Rept. 103 (1984) 203 -- the growth of the noise.
"""

from __future__ import annotations

import io
import math
import zipfile
from dataclasses import dataclass

import numpy as np

from plateaufit.demo.scenario import DEMO_SEED, PION_MASS, STREAMS, TIME_EXTENT
from plateaufit.demo.simulation import _ar1_in_configs, _smooth_in_t

__all__ = ["DemoMatrix", "AXIAL", "MATRIX_STREAM", "simulate_matrix", "matrix_npz_bytes",
           "matrix_truth"]

#: the second word of the matrix's seed (the demo's other files use ``seed`` alone)
MATRIX_STREAM = 3


@dataclass(frozen=True)
class DemoMatrix:
    """An invented correlator matrix with known states.

    Attributes
    ----------
    name : str
        Matrix (and channel) name; the observables are ``NAME_XY``.
    file : str
        The npz archive, one array per grid entry ``XY`` (sink X, source Y).
    operators : tuple of str
        Operator labels (rows of the grid).
    energies : tuple of float
        All states, ascending; more than operators (the truncation is real).
    overlaps : tuple of tuple of float
        ``overlaps[i][n] = Z_in = <0|O_i|n>``.
    noise0 : float
        Relative noise per configuration at t = 0.
    phi : float
        AR(1) coefficient in Monte Carlo time.
    xi : float
        Correlation length in t of the noise.
    shared, pair : float
        Fractions of the noise variance shared by all entries, and by C_ij and C_ji;
        the rest is each entry's own.
    """

    name: str
    file: str
    operators: tuple[str, ...]
    energies: tuple[float, ...]
    overlaps: tuple[tuple[float, ...], ...]
    noise0: float
    phi: float
    xi: float
    shared: float
    pair: float

    @property
    def size(self) -> int:
        return len(self.operators)

    @property
    def entries(self) -> list[str]:
        """Grid entry labels ``XY`` in row-major order (sink X, source Y)."""
        return [a + b for a in self.operators for b in self.operators]

    def observable(self, entry: str) -> str:
        """The observable name of grid entry ``XY``."""
        return f"{self.name}_{entry}"

    def grid(self) -> list[list[str]]:
        """The grid of observable names."""
        return [[self.observable(a + b) for b in self.operators] for a in self.operators]

    @property
    def tau_int(self) -> float:
        """Exact tau_int (1/2 + sum rho convention) of the AR(1) noise chain."""
        return 0.5 + self.phi / (1.0 - self.phi)

    def truth(self, t: np.ndarray, time_extent: int) -> np.ndarray:
        """The exact matrix ``(r, r, len(t))`` (the mean of the generated data)."""
        t = np.asarray(t, dtype=float)
        e = np.asarray(self.energies)[:, None]
        g = np.exp(-e * t) + np.exp(-e * (time_extent - t))
        z = np.asarray(self.overlaps)
        return np.einsum("in,jn,nt->ijt", z, z, g)

    def relative_noise(self, t: np.ndarray, time_extent: int) -> np.ndarray:
        """``r(t) = r0 exp((E0 - m_pi) min(t, T - t))`` (Parisi 1984, E_noise = 2 m_pi)."""
        d = np.minimum(np.asarray(t, dtype=float), time_extent - np.asarray(t, dtype=float))
        return self.noise0 * np.exp((self.energies[0] - PION_MASS) * d)


#: The demo's matrix: three operators, four states (the fourth not resolved).
AXIAL = DemoMatrix(
    name="axial", file="axial.npz", operators=("L", "S", "W"),
    energies=(0.38, 0.62, 0.90, 1.25),
    overlaps=((0.90, 0.60, 0.40, 0.45),
              (1.10, 0.30, -0.35, 0.30),
              (0.80, -0.50, 0.30, 0.40)),
    noise0=0.01, phi=0.5, xi=6.0, shared=0.5, pair=0.35)


def simulate_matrix(matrix: DemoMatrix = AXIAL, seed: int = DEMO_SEED, *,
                    noise0: float | None = None,
                    streams: tuple[tuple[str, int], ...] = STREAMS,
                    time_extent: int = TIME_EXTENT,
                    dtype: type = np.float32) -> dict[str, np.ndarray]:
    """Per-configuration matrices of the invented channel, as stored (float32 values).

    Parameters
    ----------
    matrix : DemoMatrix
    seed : int
        The generator is ``default_rng([seed, MATRIX_STREAM])``.
    noise0 : float, optional
        Override the relative noise at t = 0 (e.g. ``1e-6`` for nearly noise-free data).
    streams : tuple of (label, n_configs)
        Monte Carlo streams (each starts in equilibrium).
    time_extent : int
        ``T``.
    dtype : numpy dtype
        Precision the values are rounded to (float32 as stored in the demo; float64 for
        nearly noise-free data, whose noise is below float32's rounding).

    Returns
    -------
    dict
        Grid entry ``XY`` -> ``(n_cfg, T)`` float64 array of the rounded values.

    References
    ----------
    G. Parisi, Phys. Rept. 103 (1984) 203 -- the growth of the relative noise.
    """
    rng = np.random.default_rng([seed, MATRIX_STREAM])
    r, T = matrix.size, time_extent
    t = np.arange(T)
    a = math.exp(-1.0 / matrix.xi)
    burn_in = int(math.ceil(8 * matrix.xi))
    own = 1.0 - matrix.shared - matrix.pair
    parts = []
    for _label, n in streams:
        def smooth(shape: tuple[int, ...]) -> np.ndarray:
            z = rng.standard_normal(shape[:-1] + (burn_in + shape[-1],))
            return _smooth_in_t(z, a, burn_in)

        shared = smooth((n, 1, 1, T))
        paired = smooth((n, r, r, T))
        paired = (paired + np.swapaxes(paired, 1, 2)) / math.sqrt(2.0)
        # the diagonal of (x + x^T)/sqrt(2) has variance 2: scale it back to 1
        paired[:, np.arange(r), np.arange(r)] /= math.sqrt(2.0)
        eta = (math.sqrt(matrix.shared) * shared + math.sqrt(matrix.pair) * paired
               + math.sqrt(own) * smooth((n, r, r, T)))
        parts.append(_ar1_in_configs(eta, matrix.phi))
    eta = np.concatenate(parts, axis=0)
    noise = matrix.relative_noise(t, T) if noise0 is None else \
        noise0 / matrix.noise0 * matrix.relative_noise(t, T)
    values = (matrix.truth(t, T)[None] * (1.0 + noise * eta)).astype(dtype)
    return {matrix.operators[i] + matrix.operators[j]: values[:, i, j].astype(np.float64)
            for i in range(r) for j in range(r)}


def matrix_npz_bytes(values: dict[str, np.ndarray]) -> bytes:
    """An uncompressed npz archive of float32 arrays, byte for byte reproducible.

    ``numpy.savez`` stamps the members with the current time; here every member
    has the fixed date 1980-01-01, so the same values give the same bytes.
    """
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w", compression=zipfile.ZIP_STORED) as archive:
        for name, array in values.items():
            member = io.BytesIO()
            np.lib.format.write_array(member, np.ascontiguousarray(array, dtype="<f4"),
                                      allow_pickle=False)
            info = zipfile.ZipInfo(f"{name}.npy", date_time=(1980, 1, 1, 0, 0, 0))
            info.external_attr = 0o644 << 16
            archive.writestr(info, member.getvalue())
    return buf.getvalue()


def matrix_truth(matrix: DemoMatrix = AXIAL) -> dict[str, dict[str, float]]:
    """The known energy of each level fit (``NAME_n``: ``E0`` of level ``n``)."""
    return {f"{matrix.name}_{n}": {"E0": matrix.energies[n]} for n in range(matrix.size)}
