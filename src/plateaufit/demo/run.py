"""``plateaufit demo``: write the demo data and spec, fit them, print value against truth."""

from __future__ import annotations

from pathlib import Path
from typing import Any

from plateaufit.atomic import write_bytes
from plateaufit.demo.files import demo_files
from plateaufit.demo.scenario import ENSEMBLE_NAME, demo_derived_truth, demo_truth
from plateaufit.demo.spec import demo_spec_text
from plateaufit.errors import DataError

#: the demo's spec file, in the output folder
DEMO_SPEC = "demo.yaml"


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
            if params[name]["value"] is None or params[name]["error"] is None:
                rows.append((fit_name, name, "(not a result)", f"{true_value:g}", ""))
                continue
            value = float(params[name]["value"])
            error = float(params[name]["error"])
            pull = (value - true_value) / error if error > 0 else float("nan")
            rows.append((fit_name, name, format_value_error(value, error), f"{true_value:g}",
                         f"{pull:+.2f}"))
    derived = results.get("derived") or {}
    derived_truth = truth.get("derived") if "derived" not in results["fits"] else None
    for name, true_value in (derived_truth or {}).items():
        if name not in derived or derived[name]["value"] is None \
                or derived[name]["error"] is None:
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


def demo_inputs() -> dict[str, bytes]:
    """The files ``plateaufit demo`` writes before fitting: relative path -> bytes."""
    files = {f"data/{name}": data for name, data in demo_files().items()}
    files[DEMO_SPEC] = demo_spec_text(data_dir="data", output_dir=".").encode("utf-8")
    return files


def write_demo_inputs(out: Path) -> Path:
    """Write the demo's data and spec into ``out``; never over a file that is not the demo's.

    A file already there with exactly the demo's bytes (an earlier ``plateaufit
    demo``) is left as it is; any other file at one of the demo's names is
    refused before anything is written.

    Returns
    -------
    Path
        The spec file.

    Raises
    ------
    DataError
        Naming the file that is in the way (or that could not be written).
    """
    files = demo_inputs()
    if out.exists() and not out.is_dir():
        raise DataError(str(out), "is a file; `plateaufit demo --out` needs a folder (new or "
                        "empty) for the demo's data, spec and results")
    for rel, data in files.items():
        path = out / rel
        for parent in reversed(Path(rel).parents[:-1]):
            if (out / parent).exists() and not (out / parent).is_dir():
                raise DataError(str(out / parent), "is a file, but `plateaufit demo` writes "
                                "its data into a folder of that name; choose another --out")
        if path.is_dir() or (path.exists() and not _same_bytes(path, data)):
            raise DataError(str(path), "is in the way: `plateaufit demo` would overwrite it "
                            "with its own file, and this one is not the demo's. Choose another "
                            "--out (a new or empty folder), or move the file")
    for rel, data in files.items():
        path = out / rel
        if path.exists():
            continue   # the demo's own bytes already
        try:
            write_bytes(path, data)
        except OSError as exc:
            raise DataError(str(exc.filename or path), f"cannot write the demo's files "
                            f"({exc.strerror or exc}); choose another --out") from None
    return out / DEMO_SPEC


def _same_bytes(path: Path, data: bytes) -> bool:
    try:
        if not path.is_file() or path.stat().st_size != len(data):
            return False
        return path.read_bytes() == data
    except OSError:
        return False


def run_demo(out: str | Path, jobs: int | None = None, progress: bool = True) -> dict[str, Any]:
    """Write the demo data and spec into ``out``, fit them, print value vs truth.

    Parameters
    ----------
    out : path-like
        Output directory: the data go to ``out/data``, the spec to
        ``out/demo.yaml`` (with ``output.dir`` = ``out``), the results,
        tables, plots and the report page (``out/report.html``) beside them.
        A file there at one of the demo's names that is not the demo's own is
        refused (DataError), never overwritten.
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
    spec_path = write_demo_inputs(out)
    results = run_spec(spec_path, out, plots=True, jobs=jobs, progress=progress, echo=True)
    print()
    print(f"{ENSEMBLE_NAME} (invented): fitted values against the truth")
    print(format_truth_table(results))
    print()
    print(f"report page: {out / 'report.html'}")
    return results
