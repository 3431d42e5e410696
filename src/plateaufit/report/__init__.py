"""Reports of a run's results: value(error) tables, CSV and LaTeX, plots, one HTML page.

The report reads typed results (:class:`plateaufit.pipeline.results.Results`,
or a results.json dict it converts) and never refits; it renders the warnings
the pipeline decided (:mod:`plateaufit.pipeline.warnings`) and decides none.

- :mod:`plateaufit.report.tables` -- ``format_value_error``, ``scan_table_csv``,
  ``latex_results_table``, ``write_tables``
- :mod:`plateaufit.report.plots` -- the plan, ``save_figure``, ``make_all_plots``; the
  ``plot_*`` functions (in :mod:`~plateaufit.report.fit_plots` and
  :mod:`~plateaufit.report.ensemble_plots`) take typed results
- :mod:`plateaufit.report.html` -- ``write_report``, ``rebuild_report``

The names below are imported on first use, so ``import plateaufit.report.tables``
does not load matplotlib.
"""

from __future__ import annotations

import importlib
from typing import Any

_WHERE = {
    "format_value_error": "tables",
    "format_value_errors": "tables",
    "scan_table_csv": "tables",
    "latex_results_table": "tables",
    "write_tables": "tables",
    "make_all_plots": "plots",
    "save_figure": "plots",
    "write_report": "html",
    "rebuild_report": "html",
    "render_report": "html",
    "plot_plan": "plots",
    "check_results": "validate",
}

__all__ = sorted(_WHERE)


def __getattr__(name: str) -> Any:
    if name in _WHERE:
        module = importlib.import_module(f"plateaufit.report.{_WHERE[name]}")
        return getattr(module, name)
    raise AttributeError(f"module 'plateaufit.report' has no attribute {name!r}")
