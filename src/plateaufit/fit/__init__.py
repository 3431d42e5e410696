"""fit subpackage: correlator models, starting values, correlated fits, scans, averages."""

from plateaufit.fit.central import CentralFit, correlated_fit
from plateaufit.fit.constraints import Prior
from plateaufit.fit.correlator_fit import CorrelatorFit, fit_correlator
from plateaufit.fit.refits import RefitResult, jackknife_refits
from plateaufit.fit.average import ModelAverage, aic_weights, average_fits, model_average
from plateaufit.fit.derived import DerivedExpression, DerivedInput, DerivedResult, evaluate_derived
from plateaufit.fit.guesses import starting_values
from plateaufit.fit.models import (CorrelatorModel, FormulaModel, check_formula, make_model,
                                   reported_parameter_names)
from plateaufit.fit.scan import ScanPoint, expand_range, scan, scan_points

__all__ = ["CentralFit", "CorrelatorFit", "CorrelatorModel", "FormulaModel", "ModelAverage",
           "Prior", "RefitResult", "ScanPoint", "aic_weights", "average_fits", "DerivedExpression",
           "DerivedInput", "DerivedResult", "evaluate_derived", "check_formula",
           "correlated_fit", "expand_range", "fit_correlator", "jackknife_refits", "make_model",
           "model_average", "reported_parameter_names", "scan", "scan_points", "starting_values"]
