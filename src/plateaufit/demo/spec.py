"""The demo's spec file: the package data file ``demo_spec.template`` filled in.

``fit_specs/demo.yaml`` is :func:`demo_spec_text` with its defaults
(``examples/make_demo_data.py`` writes it; a test checks it byte for byte).
"""

from __future__ import annotations

from importlib import resources

from plateaufit.demo.matrix import AXIAL, DemoMatrix
from plateaufit.demo.scenario import (DEMO_DERIVED, ENSEMBLE_NAME, STREAMS, TIME_EXTENT,
                                      VECTOR_DATASET, VECTOR_IDS_DATASET, demo_derived_truth,
                                      demo_truth)


def _template() -> str:
    """The spec template (``str.format`` fields: ensemble, T, data, truth, ...)."""
    return resources.files("plateaufit.demo").joinpath("demo_spec.template").read_text(
        encoding="utf-8")

def _yaml_number(x: float) -> str:
    return repr(float(x))


def matrix_spec_parts(matrix: DemoMatrix, data_dir: str) -> dict[str, str]:
    """The template fields of a demo matrix: its observables, grid and operator labels."""
    observables = []
    for entry in matrix.entries:
        head = f"  {matrix.observable(entry)}:"
        if entry == matrix.entries[0]:
            head = head.ljust(34) + "# the matrix entries: npz arrays (float32)"
        observables += [head,
                        f"    file: {data_dir}/{matrix.file}",
                        f"    array: {entry}",
                        "    boundary: periodic"]
    grid = [f"      - [{', '.join(row)}]" for row in matrix.grid()]
    return {"matrix": matrix.name, "matrix_observables": "\n".join(observables),
            "matrix_grid": "\n".join(grid), "matrix_operators": ", ".join(matrix.operators)}


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
    return _template().format(
        ensemble=ENSEMBLE_NAME, T=TIME_EXTENT,
        stream_counts=", ".join(str(n) for _, n in STREAMS),
        data=data_dir.rstrip("/"), output=output_dir,
        **matrix_spec_parts(AXIAL, data_dir.rstrip("/")),
        vector_dataset=VECTOR_DATASET, vector_ids=VECTOR_IDS_DATASET,
        derived="\n".join(derived_lines) + "\n",
        truth="\n".join(truth_lines) + "\n")
