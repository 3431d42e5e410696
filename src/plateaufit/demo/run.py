"""``plateaufit demo``: write the demo data and spec, fit them, print value against truth."""

from __future__ import annotations

from pathlib import Path
from typing import Any

from plateaufit.atomic import write_text
from plateaufit.demo.files import generate_demo_data
from plateaufit.demo.scenario import ENSEMBLE_NAME, demo_derived_truth, demo_truth
from plateaufit.demo.spec import demo_spec_text

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
