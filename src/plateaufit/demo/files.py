"""The demo's data files in every supported format, byte for byte from the seed.

text, npy, HDF5 (with configuration ids) and csv (long form with a stream
column), a README and the truth document; :func:`generate_demo_data` writes them
atomically.
"""

from __future__ import annotations

import io
import json
from pathlib import Path
from typing import Any

import numpy as np

from plateaufit.atomic import write_bytes
from plateaufit.demo.scenario import (DEMO_SEED, ENSEMBLE_NAME, OBSERVABLES, PION_MASS, STREAMS,
                                      TIME_EXTENT, VECTOR_DATASET, VECTOR_IDS_DATASET,
                                      DemoObservable, by_name, demo_truth)
from plateaufit.demo.matrix import AXIAL, matrix_npz_bytes, simulate_matrix
from plateaufit.demo.simulation import simulate

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
        "minus sign. Relative noise grows like exp((E0 - E_noise/2) t) (Parisi 1984)",
        "with E_noise = 2 m_pi (mesons), 3 m_pi (nucleon), m_pi = "
        f"{PION_MASS:g}.",
        "",
        f"{AXIAL.file}: a {AXIAL.size} x {AXIAL.size} correlator matrix of the axial channel, "
        f"operators {', '.join(AXIAL.operators)},",
        f"one float32 array (n_cfg, T) per entry XY (sink X, source Y); four states, "
        f"E = {', '.join(f'{e:g}' for e in AXIAL.energies)}",
        f"(the fourth not resolved by {AXIAL.size} operators); tau_int = {AXIAL.tau_int:.2f}.",
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
        "matrices": {
            AXIAL.name: {
                "file": AXIAL.file, "format": "npz", "form": "cosh",
                "operators": list(AXIAL.operators), "entries": AXIAL.entries,
                "energies": list(AXIAL.energies),
                "overlaps": [list(row) for row in AXIAL.overlaps],
                "noise": {"r0": AXIAL.noise0, "E_noise": 2 * PION_MASS, "xi_t": AXIAL.xi,
                          "shared": AXIAL.shared, "pair": AXIAL.pair, "phi": AXIAL.phi},
                "tau_int": AXIAL.tau_int,
            },
        },
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
        ``axial.npz`` (the correlator matrix), ``truth.json`` and ``README.txt``.
    """
    sim = simulate(seed)
    n_cfg = sim["streams"].shape[0]
    files = {
        "pion_ss.txt": _text_file(by_name("pion_ss"), sim["text"]["pion_ss"], n_cfg).encode(),
        "pion_sl.npy": _npy_bytes(sim["values"]["pion_sl"]),
        "vector.h5": _hdf5_bytes(sim["values"]["vector"], sim["config_ids"]),
        "nucleon.csv": _csv_file(sim["text"]["nucleon"], sim["streams"],
                                 sim["config_ids"]).encode(),
        AXIAL.file: matrix_npz_bytes(simulate_matrix(AXIAL, seed)),
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
    G. Parisi, Phys. Rept. 103 (1984) 203 -- the signal-to-noise model (see the
    module docstring).
    """
    out = Path(out_dir)
    written = {name: write_bytes(out / name, data) for name, data in demo_files(seed).items()}
    doc = _truth_document(seed)
    return {"files": written, "truth": doc["fits"], "ensemble": doc["ensemble"],
            "observables": doc["observables"]}
