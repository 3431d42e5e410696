"""Reports from a results dict: value(error) tables, CSV and LaTeX, plots, one HTML page.

The report reads results dicts (the layout of results.json) and never refits.

- :mod:`plateaufit.report.tables` -- ``format_value_error``, ``scan_table_csv``,
  ``latex_results_table``, ``write_tables``
- :mod:`plateaufit.report.plots` -- one ``plot_*`` function per figure,
  ``save_figure``, ``make_all_plots``
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
    "collect_warnings": "html",
    "check_results": "validate",
}

__all__ = sorted(_WHERE)


def __getattr__(name: str) -> Any:
    if name in _WHERE:
        module = importlib.import_module(f"plateaufit.report.{_WHERE[name]}")
        return getattr(module, name)
    raise AttributeError(f"module 'plateaufit.report' has no attribute {name!r}")
