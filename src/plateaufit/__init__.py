"""plateaufit: hadron energies with honest errors from lattice two-point correlators.

The public API is re-exported here; see DEVELOPERS.md for the layout.
"""

from __future__ import annotations

__version__ = "0.1.0"

from plateaufit.errors import DataError, FitError, PlateaufitError, SpecError

__all__ = ["__version__", "PlateaufitError", "SpecError", "DataError", "FitError"]
