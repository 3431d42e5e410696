"""fit subpackage: correlator models, starting values, correlated fits, scans, averages."""

from plateaufit.fit.correlated import (CentralFit, CorrelatorFit, Prior, RefitResult,
                                       correlated_fit, fit_correlator, jackknife_refits)
from plateaufit.fit.guesses import starting_values
from plateaufit.fit.models import (CorrelatorModel, FormulaModel, check_formula, make_model,
                                   physical_parameter_names)

__all__ = ["CentralFit", "CorrelatorFit", "CorrelatorModel", "FormulaModel", "Prior",
           "RefitResult", "check_formula", "correlated_fit", "fit_correlator",
           "jackknife_refits", "make_model", "physical_parameter_names", "starting_values"]
