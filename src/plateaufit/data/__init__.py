"""Data in: loaders for correlator files, folding, and the aligned :class:`Ensemble`."""

from plateaufit.data.ensemble import Ensemble, align_observables
from plateaufit.data.loaders import FORMATS, SUFFIXES, RawCorrelator, format_from_suffix, load_correlator
from plateaufit.data.transforms import BOUNDARIES, fold, folded_extent

__all__ = [
    "RawCorrelator",
    "load_correlator",
    "format_from_suffix",
    "FORMATS",
    "SUFFIXES",
    "BOUNDARIES",
    "fold",
    "folded_extent",
    "Ensemble",
    "align_observables",
]
