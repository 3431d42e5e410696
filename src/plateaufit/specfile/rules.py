"""What the spec's cross-checks need to know about models, passed in by the caller.

The file contract (:mod:`plateaufit.specfile`) imports nothing above
:mod:`plateaufit.data`, yet some checks depend on the fit core's rules: which
parameters a model has (the names written in ``priors:``, ``bounds:``,
``start:``), whether a user formula is safe, and whether a derived expression
names known ``FIT.PARAM`` references. Those rules have one home, the fit core;
:class:`ModelRules` carries them in, and
:data:`plateaufit.pipeline.rules.FIT_RULES` is the instance the pipeline (and
``plateaufit.load_spec``) passes.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

__all__ = ["ModelRules"]


@dataclass(frozen=True)
class ModelRules:
    """The model-dependent rules the spec's cross-checks call.

    Attributes
    ----------
    reported_names : callable
        ``reported_names(observables, states, *, oscillating, constant, operators)``
        -> list of the reported parameter names (``E0, A0.NAME, ...``) of a
        built-in model form.
    check_formula : callable
        ``check_formula(expression, param_names)``; raises ``ValueError`` saying
        what is not allowed in a user formula.
    check_derived : callable
        ``check_derived(expression, known)`` with ``known`` fit name -> the
        parameters a derived quantity may use; raises ``ValueError``.
    """

    reported_names: Callable[..., Sequence[str]]
    check_formula: Callable[[str, list[str]], Any]
    check_derived: Callable[[str, Mapping[str, list[str]]], Any]
