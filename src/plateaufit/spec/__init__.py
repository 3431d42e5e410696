"""The analysis specification: the YAML schema, its data inputs, and ``plateaufit check``."""

from plateaufit.spec.check import check_spec
from plateaufit.spec.inputs import data_checksums, load_ensemble
from plateaufit.spec.schema import Spec, load_spec, validate_spec

__all__ = ["Spec", "load_spec", "validate_spec", "load_ensemble", "data_checksums", "check_spec"]
