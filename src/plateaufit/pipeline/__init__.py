"""What ``plateaufit fit`` and ``plateaufit check`` do, each step once.

- :mod:`~plateaufit.pipeline.rules` -- the fit core's model rules for the spec's
  cross-checks; ``load_spec``, ``validate_spec``, ``as_spec``
- :mod:`~plateaufit.pipeline.inputs` -- spec -> Ensemble (files, folding, alignment)
- :mod:`~plateaufit.pipeline.prepare` -- tau_int per timeslice, the bin size, binned data
- :mod:`~plateaufit.pipeline.fits` -- spec keys -> ``fit_correlator`` arguments, scan,
  choose or average
- :mod:`~plateaufit.pipeline.summary` -- typed results from the fit core's objects
  (``summarise_scan``, for notebooks too)
- :mod:`~plateaufit.pipeline.derived` -- ``derived:`` quantities
- :mod:`~plateaufit.pipeline.warnings` -- the table of warning rules
- :mod:`~plateaufit.pipeline.results` -- the typed results, their one ``to_dict``/``from_dict``
- :mod:`~plateaufit.pipeline.keys` -- the one map from the core's argument names to spec keys
- :mod:`~plateaufit.pipeline.run` -- ``run_spec``; :mod:`~plateaufit.pipeline.check` -- ``check_spec``

The names below are imported on first use, so importing
``plateaufit.pipeline.results`` (as the report does) loads nothing else.
"""

from __future__ import annotations

import importlib
from typing import Any

_WHERE = {
    "load_spec": "rules",
    "validate_spec": "rules",
    "as_spec": "rules",
    "FIT_RULES": "rules",
    "load_ensemble": "inputs",
    "data_checksums": "inputs",
    "prepare": "prepare",
    "Prepared": "prepare",
    "fit_kwargs": "fits",
    "run_fit": "fits",
    "summarise_scan": "summary",
    "derive": "derived",
    "collect_warnings": "warnings",
    "Results": "results",
    "FitResult": "results",
    "EnsembleResult": "results",
    "run_spec": "run",
    "run_analysis": "run",
    "check_spec": "check",
}

__all__ = sorted(_WHERE)


def __getattr__(name: str) -> Any:
    if name in _WHERE:
        module = importlib.import_module(f"plateaufit.pipeline.{_WHERE[name]}")
        return getattr(module, name)
    raise AttributeError(f"module 'plateaufit.pipeline' has no attribute {name!r}")
