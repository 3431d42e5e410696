"""Invented correlator-matrix data sets and specs for the matrix tests.

The data are the demo's invented axial channel (:mod:`plateaufit.demo.matrix`:
three operators L, S, W, four states E = 0.38, 0.62, 0.90, 1.25, so the
truncation is real), generated from that known truth with a fixed seed, here
with fewer configurations where a test only needs the mechanics.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import yaml

from plateaufit.demo.matrix import AXIAL, DemoMatrix, matrix_npz_bytes, simulate_matrix

T = 48
SMALL_STREAMS = (("a", 300), ("b", 200))
SEED = 2024_1010

#: level fits of the 3 x 3 axial matrix at t0 = 2 (the demo's ranges)
LEVEL_FITS = [
    {"name": "axial_0", "matrix": "axial", "level": 0, "model": "cosh", "states": [1, 2],
     "tmin": [3, 9], "tmax": [14, 18, 2], "priors": {"E1": [1.2, 0.5]}},
    {"name": "axial_1", "matrix": "axial", "level": 1, "model": "cosh", "states": [1, 2],
     "tmin": [3, 7], "tmax": [10, 12], "priors": {"E1": [1.2, 0.5]}},
    {"name": "axial_2", "matrix": "axial", "level": 2, "model": "cosh", "states": [1, 2],
     "tmin": [3, 5], "tmax": [7, 9], "priors": {"E1": [1.4, 0.5]}},
]


def write_matrix_data(directory: Path, *, noise0: float | None = None, seed: int = SEED,
                      streams: tuple[tuple[str, int], ...] = SMALL_STREAMS,
                      matrix: DemoMatrix = AXIAL, replace: dict[str, np.ndarray] | None = None
                      ) -> Path:
    """Write the invented matrix as one npz archive (float64 when nearly noise-free)."""
    dtype = np.float64 if noise0 is not None and noise0 < 1e-4 else np.float32
    values = simulate_matrix(matrix, seed, noise0=noise0, streams=streams, dtype=dtype)
    values.update(replace or {})
    path = Path(directory) / matrix.file
    if dtype is np.float64:
        np.savez(path, **values)
    else:
        path.write_bytes(matrix_npz_bytes(values))
    return path


def matrix_spec(data_file: Path, *, t0: int | str = 2, fits: list[dict] | None = None,
                streams: tuple[tuple[str, int], ...] = SMALL_STREAMS,
                matrix: DemoMatrix = AXIAL, out: str = "results") -> dict[str, Any]:
    """A spec of the matrix's nine observables, the matrix, and its level fits."""
    fits = LEVEL_FITS if fits is None else fits
    return {
        "ensemble": {"name": "invented", "time_extent": T, "streams": [n for _, n in streams]},
        "observables": {matrix.observable(e): {"file": str(data_file), "array": e}
                        for e in matrix.entries},
        "matrices": {matrix.name: {"grid": matrix.grid(), "t0": t0,
                                   "operators": list(matrix.operators)}},
        "fits": [dict(f) for f in fits],
        "output": {"dir": out, "plots": False},
        "truth": {f["name"]: {"E0": matrix.energies[f["level"]]} for f in fits
                  if f.get("matrix") == matrix.name and isinstance(f.get("level"), int)
                  and 0 <= f["level"] < matrix.size},
    }


def write_spec(directory: Path, spec: dict[str, Any], name: str = "spec.yaml") -> Path:
    path = Path(directory) / name
    path.write_text(yaml.safe_dump(spec, sort_keys=False), encoding="utf-8")
    return path
