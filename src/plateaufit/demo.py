"""The invented demo scenario: synthetic correlators with a known truth, and a run.

The ensemble ``heron-a24t48`` is fictional: a 24^3 x 48 lattice (T = 48) with
two independent Monte Carlo streams, ``a`` (600 configurations) and ``b``
(400), every 8th trajectory saved. Four correlators are "measured" on it:

==========  =====================================  ========  ==========  ======
name        operator                               file      boundary    model
==========  =====================================  ========  ==========  ======
pion_ss     pseudoscalar, smeared source and sink  text      periodic    cosh
pion_sl     pseudoscalar, smeared source, local    npy       periodic    cosh
            sink
vector      vector meson, smeared-smeared          hdf5      periodic    cosh
nucleon     positive-parity nucleon                csv       antiperio-  exp
                                                             dic, not
                                                             folded
==========  =====================================  ========  ==========  ======

Each correlator is a sum of two states (ground and first excited) with known
energies and amplitudes. The two pion correlators share the states and factorise,
``A_n = Z_n.source * Z_n.sink``, with operators ``S`` (smeared) and ``L``
(local), so a simultaneous or factorised fit is possible.

The nucleon is measured with antiperiodic boundary conditions for the quarks:
in the back half of the lattice the negative-parity partner propagates
backwards, with the opposite sign (sign as for antiperiodic quark boundary
conditions; from memory). Folding would mix it with the positive-parity
forward signal, so the realistic choice is not to fold and to fit the forward
half with the ``exp`` model; the partner's contribution there is below
``1e-8`` of the signal.

The noise model
---------------
Each configuration ``i`` has ``C_i(t) = C(t) (1 + r(t) eta_i(t))`` with
zero-mean unit-variance Gaussian ``eta``, so the ensemble mean is exactly the
truth ``C(t)``:

* Signal-to-noise falls with ``t`` as Parisi and Lepage argued: the variance
  of a correlator is dominated by the lightest state in its square, of energy
  ``E_noise`` (``2 m_pi`` for mesons, ``3 m_pi`` for the nucleon), so the
  relative noise grows like ``r(t) = r0 exp((E0 - E_noise/2) d(t))`` with
  ``d(t) = min(t, T - t)``. (The pion's signal-to-noise is constant.)
* The noise is correlated across timeslices, smoothly as in real data: in
  ``t``, most of ``eta`` is white noise passed twice through an AR(1) filter,
  with correlation ``(1 + d (1 - a^2)/(1 + a^2)) a^d`` at distance ``d``,
  ``a = exp(-1/xi)``; a small fraction ``rough`` of the variance is
  independent per timeslice, which keeps the smallest eigenvalues of the
  correlation matrix away from zero, as in real data.
* It is autocorrelated in Monte Carlo time: in the configuration index, within
  each stream, an AR(1) chain with coefficient ``phi``, so the integrated
  autocorrelation time is exactly ``tau_int = 1/2 + phi/(1 - phi)`` (the
  1/2 + sum rho convention), different per observable. Each stream starts in
  equilibrium (a stationary draw).
* The smeared-local pion shares most of its noise with the smeared-smeared
  one (same propagators): ``eta_sl = rho eta_ss + sqrt(1 - rho^2) eta'``.

The numbers are written with nine significant digits (``%.8e``), in every
format, so the files are reproduced byte for byte from the seed.

References
----------
G. Parisi, "The strategy for computing the hadronic mass spectrum", Phys. Rept.
103 (1984) 203.
G. P. Lepage, "The analysis of algorithms for lattice field theory", in From
Actions to Answers, Proceedings of the 1989 Theoretical Advanced Study
Institute, World Scientific (1990) 97.
"""

from __future__ import annotations

import io
import json
import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from plateaufit.atomic import write_bytes, write_text

#: The seed of the committed demo data (examples/demo_data).
DEMO_SEED = 20240617

ENSEMBLE_NAME = "heron-a24t48"
TIME_EXTENT = 48
#: (label, number of configurations) of the Monte Carlo streams, in file order.
STREAMS: tuple[tuple[str, int], ...] = (("a", 600), ("b", 400))
#: Trajectories between saved configurations, and the first trajectory of each stream.
TRAJECTORY_STEP = 8
STREAM_FIRST_TRAJECTORY = {"a": 1000, "b": 21000}

PION_MASS = 0.20   # lattice units; sets the Parisi-Lepage noise energies


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
        ``E_noise`` of the Parisi-Lepage argument.
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
        """r(t) = r0 exp((E0 - E_noise/2) min(t, T - t)) (Parisi 1984; Lepage 1989)."""
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


def _by_name(name: str) -> DemoObservable:
    return next(obs for obs in OBSERVABLES if obs.name == name)


def demo_truth() -> dict[str, dict[str, float]]:
    """The known truth of each demo fit, in the fits' reported parameter names.

    Returns
    -------
    dict
        Fit name -> parameter name (``E0``, ``E1``, ``A0.pion_ss``, ``Z0.S``, ...)
        -> true value. Amplitudes follow the models' conventions:
        ``A (exp(-E t) + exp(-E (T - t)))`` for cosh, ``A exp(-E t)`` for exp.
    """
    pion_ss, pion_sl = _by_name("pion_ss"), _by_name("pion_sl")
    vector, nucleon = _by_name("vector"), _by_name("nucleon")

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
    return {
        "pion": states([pion_ss, pion_sl]),
        "pion_factorised": factorised,
        "vector": states([vector]),
        "nucleon": states([nucleon]),
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
    vector = _by_name("vector")
    exact = {
        "gap_pion": _PION_E[1] - _PION_E[0],
        "ratio_vector_pion": vector.energies[0] / _PION_E[0],
    }
    return {name: float(f"{exact[name]:.12g}") for name in DEMO_DERIVED}


# ----------------------------------------------------------------------- generation


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
    G. Parisi, Phys. Rept. 103 (1984) 203; G. P. Lepage, TASI 1989 (see the
    module docstring) -- the growth of the relative noise with t.
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


def _stream_summary() -> str:
    return ", ".join(f"stream {label}: {n}" for label, n in STREAMS)


def _text_file(obs: DemoObservable, strings: list[str], n_cfg: int) -> str:
    T = TIME_EXTENT
    head = [
        f"# {ENSEMBLE_NAME} (invented demo ensemble), {obs.name}: pseudoscalar two-point "
        f"correlator, source {obs.source}, sink {obs.sink}",
        f"# one row per configuration in Monte Carlo order ({n_cfg} rows: "
        f"{_stream_summary()}), one column per timeslice t = 0..{T - 1}",
    ]
    rows = [" ".join(strings[i * T:(i + 1) * T]) for i in range(n_cfg)]
    return "\n".join(head + rows) + "\n"


def _npy_bytes(values: np.ndarray) -> bytes:
    buf = io.BytesIO()
    np.save(buf, np.ascontiguousarray(values, dtype="<f8"), allow_pickle=False)
    return buf.getvalue()


def hdf5_library_version() -> str:
    """The h5py and HDF5 versions (the HDF5 file's bytes depend on them)."""
    import h5py

    return f"h5py {h5py.__version__}, HDF5 {h5py.version.hdf5_version}"


def _hdf5_bytes(values: np.ndarray, ids: np.ndarray) -> bytes:
    import h5py

    buf = io.BytesIO()
    with h5py.File(buf, "w", libver="earliest", track_order=False) as h5:
        h5.attrs["ensemble"] = ENSEMBLE_NAME
        h5.attrs["time_extent"] = TIME_EXTENT
        h5.attrs["description"] = ("vector meson two-point correlator, smeared source and sink, "
                                   f"one row per configuration ({_stream_summary()})")
        # the bytes of an HDF5 file depend on the library version: record it
        h5.attrs["written_with"] = hdf5_library_version()
        h5.create_dataset(VECTOR_DATASET, data=np.ascontiguousarray(values, dtype="<f8"),
                          track_times=False)
        h5.create_dataset(VECTOR_IDS_DATASET, data=ids.astype("<i8"), track_times=False)
    return buf.getvalue()


def _csv_file(strings: list[str], streams: np.ndarray, ids: np.ndarray) -> str:
    T = TIME_EXTENT
    lines = [f"# {ENSEMBLE_NAME} (invented demo ensemble), nucleon (positive parity) "
             "two-point correlator, antiperiodic in time; long form",
             "config,t,value,stream"]
    for i, (cfg, stream) in enumerate(zip(ids.tolist(), streams.tolist())):
        for t in range(T):
            lines.append(f"{cfg},{t},{strings[i * T + t]},{stream}")
    return "\n".join(lines) + "\n"


def _readme(seed: int) -> str:
    rows = []
    for obs in OBSERVABLES:
        rows.append(f"  {obs.name:8s} {obs.file:12s} {obs.format:5s} {obs.form:4s} "
                    f"E = {', '.join(f'{e:g}' for e in obs.energies):12s} "
                    f"tau_int = {obs.tau_int:.2f}")
    return "\n".join([
        f"Invented demo data for plateaufit: ensemble {ENSEMBLE_NAME} (fictional), "
        f"T = {TIME_EXTENT},",
        f"{sum(n for _, n in STREAMS)} configurations ({_stream_summary()}), seed {seed}.",
        "Written by examples/make_demo_data.py (plateaufit.demo.generate_demo_data);",
        "the exact truth is in truth.json. Do not edit by hand.",
        "",
        "  name     file         fmt   form energies     autocorrelation (1/2 + sum rho)",
        *rows,
        "",
        "pion_ss and pion_sl share their states (operators S, L: A_n = Z_n.src * Z_n.snk).",
        "nucleon: antiperiodic, not folded; the backward parity partner enters with a",
        "minus sign. Relative noise grows like exp((E0 - E_noise/2) t) (Parisi 1984,",
        "Lepage 1989) with E_noise = 2 m_pi (mesons), 3 m_pi (nucleon), m_pi = "
        f"{PION_MASS:g}.",
        "",
    ])


def _truth_document(seed: int) -> dict[str, Any]:
    return {
        "ensemble": {"name": ENSEMBLE_NAME, "time_extent": TIME_EXTENT,
                     "streams": {label: n for label, n in STREAMS}, "seed": seed},
        "observables": {
            obs.name: {
                "file": obs.file, "format": obs.format, "form": obs.form,
                "energies": list(obs.energies), "amplitudes": list(obs.amplitudes),
                "backward_partner": (None if obs.backward is None else
                                     {"energy": obs.backward[0], "amplitude": -obs.backward[1]}),
                "noise": {"r0": obs.noise0, "E_noise": obs.noise_energy,
                          "xi_t": obs.xi, "rough": obs.rough, "phi": obs.phi},
                "tau_int": obs.tau_int,
                "source": obs.source, "sink": obs.sink,
            } for obs in OBSERVABLES
        },
        "fits": demo_truth(),
    }


def demo_files(seed: int = DEMO_SEED) -> dict[str, bytes]:
    """The demo data files' contents, file name -> bytes (nothing is written).

    Parameters
    ----------
    seed : int
        Seed of the random generator.

    Returns
    -------
    dict
        ``pion_ss.txt``, ``pion_sl.npy``, ``vector.h5``, ``nucleon.csv``,
        ``truth.json`` and ``README.txt``.
    """
    sim = simulate(seed)
    n_cfg = sim["streams"].shape[0]
    files = {
        "pion_ss.txt": _text_file(_by_name("pion_ss"), sim["text"]["pion_ss"], n_cfg).encode(),
        "pion_sl.npy": _npy_bytes(sim["values"]["pion_sl"]),
        "vector.h5": _hdf5_bytes(sim["values"]["vector"], sim["config_ids"]),
        "nucleon.csv": _csv_file(sim["text"]["nucleon"], sim["streams"],
                                 sim["config_ids"]).encode(),
        "truth.json": (json.dumps(_truth_document(seed), indent=2, sort_keys=True)
                       + "\n").encode(),
        "README.txt": _readme(seed).encode(),
    }
    return files


def generate_demo_data(out_dir: str | Path, seed: int = DEMO_SEED) -> dict[str, Any]:
    """Write the invented demo data set and its truth into ``out_dir``.

    Parameters
    ----------
    out_dir : path-like
        Directory to write into (created when missing). Existing demo files
        are replaced atomically.
    seed : int, optional
        Seed of the random generator; the default reproduces the committed
        ``examples/demo_data`` byte for byte.

    Returns
    -------
    dict
        ``files``: file name -> path written; ``truth``: fit name -> parameter
        -> true value (as :func:`demo_truth`); ``ensemble``: name, time_extent,
        stream counts; ``observables``: name -> file, format, energies,
        amplitudes, tau_int.

    References
    ----------
    G. Parisi, Phys. Rept. 103 (1984) 203; G. P. Lepage, TASI 1989 -- the
    signal-to-noise model (see the module docstring).
    """
    out = Path(out_dir)
    written = {name: write_bytes(out / name, data) for name, data in demo_files(seed).items()}
    doc = _truth_document(seed)
    return {"files": written, "truth": doc["fits"], "ensemble": doc["ensemble"],
            "observables": doc["observables"]}


# ----------------------------------------------------------------------- the demo spec

_SPEC_TEMPLATE = """\
# The plateaufit demo: an invented ensemble with a known truth.
# Data: plateaufit.demo (regenerate with examples/make_demo_data.py).
# Paths are relative to this file.

ensemble:
  name: {ensemble}
  time_extent: {T}
  streams: [{stream_counts}]            # configurations per Monte Carlo stream, in file order

observables:
  pion_ss:                        # text: one row per configuration
    file: {data}/pion_ss.txt
    boundary: periodic
    source: S
    sink: S
  pion_sl:                        # npy array (n_cfg, T)
    file: {data}/pion_sl.npy
    boundary: periodic
    source: S
    sink: L
  vector:                         # HDF5 with configuration ids
    file: {data}/vector.h5
    dataset: {vector_dataset}
    ids_dataset: {vector_ids}
    boundary: periodic
  nucleon:                        # CSV long form with a stream column
    file: {data}/nucleon.csv
    boundary: antiperiodic        # the back half holds the negative-parity partner:
    fold: false                   # do not fold, fit the forward half

binning:
  size: auto

covariance:
  shrinkage: ledoit-wolf
  target: diagonal

# Loose priors on the first excited state keep the two-state fits at large tmin,
# where the data cannot resolve it, from running away; the one-state fits of a
# scan have no E1 and take no prior.
fits:
  - name: pion                    # both smearings at once, shared energies
    observables: [pion_ss, pion_sl]
    model: cosh
    states: [1, 2]
    tmin: [2, 10]
    tmax: [18, 22, 2]
    priors: {{E1: [1.0, 0.5]}}
    choose: average
  - name: pion_factorised         # A_n = Z_n.source * Z_n.sink
    observables: [pion_ss, pion_sl]
    model: cosh
    factorised: true
    states: 2
    tmin: [2, 6]
    tmax: 20
    priors: {{E1: [1.0, 0.5]}}
    choose: average
  - name: vector
    observables: [vector]
    model: cosh
    states: [1, 2]
    tmin: [3, 10]
    tmax: [16, 20, 2]
    priors: {{E1: [1.0, 0.3]}}
    choose: average
  - name: nucleon
    observables: [nucleon]
    model: exp
    states: [1, 2]
    tmin: [2, 10]
    tmax: [14, 18, 2]
    priors: {{E1: [1.1, 0.4]}}
    choose: average

# Derived quantities: functions of the chosen (here averaged) fit parameters; their
# jackknife errors keep the correlations between fits on the same bins.
derived:
{derived}
output:
  dir: {output}
  plots: true

# The known truth of the invented data (shown beside the results).
truth:
{truth}"""


def _yaml_number(x: float) -> str:
    return repr(float(x))


def demo_spec_text(data_dir: str = "../examples/demo_data",
                   output_dir: str = "../demo_output") -> str:
    """The demo specification (YAML text), data and output paths as given.

    Parameters
    ----------
    data_dir : str
        Directory of the data files, relative to where the spec will be.
    output_dir : str
        ``output.dir``, relative to where the spec will be.

    Returns
    -------
    str
        The YAML text; ``fit_specs/demo.yaml`` is this text with the defaults.
    """
    truth_lines = []
    for fit, params in demo_truth().items():
        truth_lines.append(f"  {fit}:")
        truth_lines.extend(f"    {name}: {_yaml_number(value)}" for name, value in params.items())
    truth_lines.append("  derived:                        # the derived quantities' truth")
    truth_lines.extend(f"    {name}: {_yaml_number(value)}"
                       for name, value in demo_derived_truth().items())
    derived_lines = [f'  {name}: "{expression}"' for name, expression in DEMO_DERIVED.items()]
    return _SPEC_TEMPLATE.format(
        ensemble=ENSEMBLE_NAME, T=TIME_EXTENT,
        stream_counts=", ".join(str(n) for _, n in STREAMS),
        data=data_dir.rstrip("/"), output=output_dir,
        vector_dataset=VECTOR_DATASET, vector_ids=VECTOR_IDS_DATASET,
        derived="\n".join(derived_lines) + "\n",
        truth="\n".join(truth_lines) + "\n")


# ----------------------------------------------------------------------- the demo run


def _pull_rows(results: dict[str, Any]) -> list[tuple[str, str, str, str, str]]:
    from plateaufit.report.tables import format_value_error

    rows = []
    truth = results.get("truth") or {**demo_truth(), "derived": demo_derived_truth()}
    for fit_name, fit in results["fits"].items():
        params = fit["chosen"]["params"]
        for name, true_value in truth.get(fit_name, {}).items():
            if name not in params:
                rows.append((fit_name, name, "(not fitted)", f"{true_value:g}", ""))
                continue
            value = float(params[name]["value"])
            error = float(params[name]["error"])
            pull = (value - true_value) / error if error > 0 else float("nan")
            rows.append((fit_name, name, format_value_error(value, error), f"{true_value:g}",
                         f"{pull:+.2f}"))
    derived = results.get("derived") or {}
    derived_truth = truth.get("derived") if "derived" not in results["fits"] else None
    for name, true_value in (derived_truth or {}).items():
        if name not in derived:
            rows.append(("derived", name, "(not computed)", f"{true_value:g}", ""))
            continue
        value = float(derived[name]["value"])
        error = float(derived[name]["error"])
        pull = (value - true_value) / error if error > 0 else float("nan")
        rows.append(("derived", name, format_value_error(value, error), f"{true_value:g}",
                     f"{pull:+.2f}"))
    return rows


def format_truth_table(results: dict[str, Any]) -> str:
    """Plain-text table of fitted values against the truth, with pulls in sigma.

    The fits' parameters come first, then the derived quantities (fit column
    ``derived``) whose truth is under ``truth.derived``.

    Parameters
    ----------
    results : dict
        The results of the demo run (``run_spec``'s return value).

    Returns
    -------
    str
    """
    header = ("fit", "parameter", "fitted", "truth", "pull (sigma)")
    rows = [header] + _pull_rows(results)
    widths = [max(len(r[i]) for r in rows) for i in range(len(header))]
    lines = ["  ".join(cell.ljust(w) for cell, w in zip(row, widths)).rstrip() for row in rows]
    lines.insert(1, "  ".join("-" * w for w in widths))
    return "\n".join(lines)


def run_demo(out: str | Path, jobs: int | None = None, progress: bool = True) -> dict[str, Any]:
    """Write the demo data and spec into ``out``, fit them, print value vs truth.

    Parameters
    ----------
    out : path-like
        Output directory: the data go to ``out/data``, the spec to
        ``out/demo.yaml`` (with ``output.dir`` = ``out``), the results,
        tables, plots and the report page (``out/report.html``) beside them.
    jobs : int, optional
        Worker processes for the scan points (default: all cores).
    progress : bool, optional
        Progress bars (on a terminal only).

    Returns
    -------
    dict
        The results (as results.json).
    """
    from plateaufit.pipeline.run import run_spec

    out = Path(out)
    generate_demo_data(out / "data")
    spec_path = write_text(out / "demo.yaml", demo_spec_text(data_dir="data", output_dir="."))
    results = run_spec(spec_path, out, plots=True, jobs=jobs, progress=progress, echo=True)
    print()
    print(f"{ENSEMBLE_NAME} (invented): fitted values against the truth")
    print(format_truth_table(results))
    print()
    print(f"report page: {out / 'report.html'}")
    return results
