"""Derived quantities of a spec (``derived:``) from the fits' chosen or averaged parameters.

Every fit of a spec shares the bins, so jackknife sample k of every fit's
parameters leaves out the same bin: a derived quantity's samples keep the
correlations between the fits (see :mod:`plateaufit.fit.derived`).

References
----------
B. Efron, "The Jackknife, the Bootstrap and Other Resampling Plans", SIAM
(1982) -- jackknife propagation.
"""

from __future__ import annotations

from plateaufit.errors import FitError, PlateaufitError, SpecError
from plateaufit.fit.derived import DerivedExpression, evaluate_derived
from plateaufit.pipeline.results import DerivedQuantity, FitResult, ParamEstimate
from plateaufit.specfile import Spec

__all__ = ["derive"]


def derive(spec: Spec, fits: dict[str, FitResult]) -> dict[str, DerivedQuantity]:
    """``derived.NAME`` of the spec, evaluated on the fits' ``derived_inputs``.

    A quantity one of whose references is withheld (the chosen fit is not a
    fit, see :func:`plateaufit.pipeline.summary.withheld_parameters`) is NaN,
    with ``withheld_inputs`` saying which.

    Raises
    ------
    FitError
        At ``derived.NAME`` when a reference has no result (no fit of that
        scan with the parameter converged) or the evaluation fails.
    """
    out: dict[str, DerivedQuantity] = {}
    if not spec.derived:
        return out
    known = spec.reference_names()
    for name, text in spec.derived.items():
        where = f"derived.{name}"
        try:
            expr = DerivedExpression(text, known)
        except ValueError as exc:      # load_spec checked it already
            raise SpecError(where, str(exc)) from None
        inputs = {}
        withheld = [ref for ref in expr.references if expr.parts[ref][1] in
                    getattr(getattr(fits[expr.parts[ref][0]], "chosen", None), "withheld", ())]
        if withheld:   # an input that is not a result: neither is the quantity
            nan = float("nan")
            out[name] = DerivedQuantity(expression=text, references=list(expr.references),
                                        estimate=ParamEstimate(nan, nan, nan, nan),
                                        withheld_inputs=tuple(withheld))
            continue
        for ref in expr.references:
            fit_name, param = expr.parts[ref]
            if param not in fits[fit_name].derived_inputs:
                raise FitError(where, f"{ref} has no result: no fit of {fit_name}'s scan that "
                               f"has {param} converged; fix that fit (priors, ranges, states) "
                               "or leave the reference out")
            inputs[ref] = fits[fit_name].derived_inputs[param]
        try:
            result = evaluate_derived(expr, inputs)
        except PlateaufitError as err:     # the expression's own error, at its key
            raise type(err)(where, err.message) from None
        out[name] = DerivedQuantity(
            expression=text, references=list(result.references),
            estimate=ParamEstimate.of(result.value, result.stat_error, result.sys_error),
            n_dropped=int(result.n_dropped))
    return out
