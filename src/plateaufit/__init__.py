"""plateaufit: hadron energies with honest errors from lattice two-point correlators.

The public API, re-exported from the subpackages (imported on first use, so
that the command line starts quickly):

- autocorrelation: :func:`tau_int`, :func:`tau_int_derived`, :func:`binning_study`,
  :func:`choose_bin_size`
- resampling: :func:`bin_samples`, :func:`jackknife_samples`, :func:`jackknife_error`,
  :func:`jackknife_covariance`, :func:`bootstrap_samples`
- covariance: :func:`covariance_of_mean`, :class:`MeanCovariance`
- effective masses: :func:`effective_mass`, :func:`effective_mass_jackknife`
- fits: :func:`make_model`, :func:`fit_correlator`, :func:`scan`, :func:`model_average`,
  :func:`average_fits`, :func:`evaluate_derived`
- data: :func:`load_correlator`, :func:`fold`
- the whole job from a spec: :func:`run_spec`, :func:`load_spec`
- typed results of a scan, for the report's plots: :func:`summarise_scan` ->
  :class:`FitResult`; :func:`plot_stability`, :func:`plot_weights`,
  :func:`plot_effective_mass`, :func:`plot_correlation`, :func:`plot_eigenvalues`,
  :func:`save_figure`
"""

from __future__ import annotations

import importlib
from typing import Any

from plateaufit.errors import DataError, FitError, PlateaufitError, SpecError

__version__ = "0.1.0"

_EXPORTS: dict[str, str] = {
    "tau_int": "plateaufit.stats.autocorr",
    "tau_int_derived": "plateaufit.stats.autocorr",
    "binning_study": "plateaufit.stats.autocorr",
    "choose_bin_size": "plateaufit.stats.autocorr",
    "TauIntResult": "plateaufit.stats.autocorr",
    "ShortChainWarning": "plateaufit.stats.autocorr",
    "bin_samples": "plateaufit.stats.resample",
    "jackknife_samples": "plateaufit.stats.resample",
    "jackknife_error": "plateaufit.stats.resample",
    "jackknife_covariance": "plateaufit.stats.resample",
    "jackknife_bias_corrected": "plateaufit.stats.resample",
    "bootstrap_samples": "plateaufit.stats.resample",
    "covariance_of_mean": "plateaufit.stats.covariance",
    "MeanCovariance": "plateaufit.stats.covariance",
    "CovarianceResult": "plateaufit.stats.covariance",
    "effective_mass": "plateaufit.stats.effmass",
    "effective_mass_jackknife": "plateaufit.stats.effmass",
    "make_model": "plateaufit.fit.models",
    "Prior": "plateaufit.fit.constraints",
    "correlated_fit": "plateaufit.fit.central",
    "fit_correlator": "plateaufit.fit.correlator_fit",
    "CorrelatorFit": "plateaufit.fit.correlator_fit",
    "scan": "plateaufit.fit.scan",
    "scan_points": "plateaufit.fit.scan",
    "aic_weights": "plateaufit.fit.average",
    "model_average": "plateaufit.fit.average",
    "average_fits": "plateaufit.fit.average",
    "evaluate_derived": "plateaufit.fit.derived",
    "load_correlator": "plateaufit.data.loaders",
    "fold": "plateaufit.data.transforms",
    "load_spec": "plateaufit.pipeline.rules",
    "run_spec": "plateaufit.pipeline.run",
    "summarise_scan": "plateaufit.pipeline.summary",
    "Results": "plateaufit.pipeline.results",
    "FitResult": "plateaufit.pipeline.results",
    "plot_effective_mass": "plateaufit.report.fit_plots",
    "plot_stability": "plateaufit.report.fit_plots",
    "plot_weights": "plateaufit.report.fit_plots",
    "plot_correlation": "plateaufit.report.fit_plots",
    "plot_eigenvalues": "plateaufit.report.fit_plots",
    "save_figure": "plateaufit.report.plots",
}

__all__ = ["__version__", "PlateaufitError", "SpecError", "DataError", "FitError", *_EXPORTS]


def __getattr__(name: str) -> Any:
    try:
        module = _EXPORTS[name]
    except KeyError:
        raise AttributeError(f"module 'plateaufit' has no attribute {name!r}") from None
    value = getattr(importlib.import_module(module), name)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted(__all__)
