"""The files of a run: what they are called, what the run reads, and writing them.

:func:`output_folder` builds the :class:`~plateaufit.run_folder.RunFolder` of a
spec (the output folder, its key for errors, and every file the run reads);
:func:`output_names` lists the files a run writes, so that
:meth:`~plateaufit.run_folder.RunFolder.preflight` can refuse, before any
fitting, an output that would replace an input; :func:`write_outputs` writes
them (into the folder's staging area: see :mod:`plateaufit.run_folder`).
"""

from __future__ import annotations

import json
import os
from pathlib import Path
from typing import Any

from plateaufit.run_folder import COMPLETION, RunFolder
from plateaufit.specfile import Spec

__all__ = ["spec_inputs", "output_names", "output_folder", "write_outputs", "FIXED_OUTPUTS"]

#: the files every run writes besides the scan tables and the plots
FIXED_OUTPUTS = (COMPLETION, "run.log", "results.tex")
#: written with plots on
PAGE = "report.html"


def spec_inputs(spec: Spec) -> list[Path]:
    """Every file the run of ``spec`` reads: the spec file and every observable's file."""
    files = [spec.path] if spec.path is not None else []
    files += [spec.observable_path(name) for name in spec.observables]
    return files


def output_names(spec: Spec, *, plots: bool) -> list[str]:
    """The files a run of ``spec`` writes (relative to its output folder), plots aside."""
    from plateaufit.report.tables import scan_table_names

    names = [*FIXED_OUTPUTS, *scan_table_names(fit.name for fit in spec.fits)]
    return names + [PAGE] if plots else names


def output_folder(spec: Spec, out: str | os.PathLike[str] | None = None) -> RunFolder:
    """The output folder of a run of ``spec``: ``out``, else the spec's ``output.dir``."""
    path = Path(out) if out is not None else spec.output_dir
    return RunFolder(path, key="--out" if out is not None else "output.dir",
                     inputs=spec_inputs(spec))


def write_outputs(results: Any, data: dict[str, Any], out_dir: Path, *, plots: bool,
                  log_lines: list[str]) -> None:
    """Tables, plots and the page, run.log, and results.json into ``out_dir``.

    ``out_dir`` is the staging folder of :meth:`RunFolder.writing`, which moves
    the files into place with results.json last.
    """
    from plateaufit.atomic import write_text
    from plateaufit.report.tables import write_tables

    write_tables(results, out_dir)
    if plots:
        from plateaufit.report.html import write_report
        from plateaufit.report.plots import make_all_plots

        write_report(results, out_dir, figures=make_all_plots(results, out_dir))
    write_text(out_dir / "run.log", "\n".join(log_lines) + "\n")
    write_text(out_dir / COMPLETION, json.dumps(data, indent=1, allow_nan=False) + "\n")
