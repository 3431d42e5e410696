"""Correlator models: multi-state exponential, cosh and sinh forms, and user formulas.

A model maps an internal parameter vector ``theta`` to the predicted correlator
values at the timeslices of a fit (all observables concatenated, in the fit's
order). Every method is batched: ``theta`` may carry leading batch axes.

Parameter names
---------------
The *reported* names (what users write in ``priors:`` and read in results) are
given by :func:`physical_parameter_names`. Internally the energies of higher
states are positive log-gaps, ``E_n = E_{n-1} + exp(lgap_n)``, so the order of
the states is kept during a fit.

References
----------
G. P. Lepage, B. Clark, C. T. H. Davies, K. Hornbostel, P. B. Mackenzie,
C. Morningstar, H. Trottier, "Constrained curve fitting", Nucl. Phys. B (Proc.
Suppl.) 106 (2002) 12 -- multi-state fits with ordered energies.
"""

from __future__ import annotations

import ast
from collections.abc import Iterable, Mapping, Sequence

#: Functions a user formula may call (all element-wise numpy functions).
FORMULA_FUNCTIONS: tuple[str, ...] = (
    "exp", "log", "cosh", "sinh", "tanh", "sqrt", "abs", "cos", "sin", "where",
)
#: Names always available in a user formula besides its parameters.
FORMULA_VARIABLES: tuple[str, ...] = ("t", "T", "pi")

_ALLOWED_BINOPS = (ast.Add, ast.Sub, ast.Mult, ast.Div, ast.Pow, ast.Mod, ast.FloorDiv)
_ALLOWED_UNARYOPS = (ast.UAdd, ast.USub)
_ALLOWED_CMPOPS = (ast.Eq, ast.NotEq, ast.Lt, ast.LtE, ast.Gt, ast.GtE)


def operator_labels(operators: Mapping[str, tuple[str, str]],
                    observables: Sequence[str]) -> list[str]:
    """Distinct operator labels of a factorised fit, in order of first appearance.

    Parameters
    ----------
    operators : mapping
        Observable name -> ``(source, sink)`` operator labels.
    observables : sequence of str
        The fit's observables, in the fit's order.

    Returns
    -------
    list of str
        Each label once, scanning observables in order, source before sink.
    """
    labels: list[str] = []
    for name in observables:
        if name not in operators:
            raise ValueError(
                f"factorised amplitudes need source and sink operators for observable "
                f"'{name}'; give them as operators['{name}'] = (source, sink)")
        for label in operators[name]:
            if label not in labels:
                labels.append(label)
    return labels


def physical_parameter_names(observables: Sequence[str], states: int, *,
                             oscillating: int = 0, constant: bool = False,
                             operators: Mapping[str, tuple[str, str]] | None = None
                             ) -> list[str]:
    """Reported parameter names of a built-in (exp/cosh/sinh) correlator model.

    The order is: energies ``E0 .. E{states-1}``; amplitudes ``A{n}.NAME``
    (state-major: all observables for state 0, then state 1, ...), or, for
    factorised fits, overlaps ``Z{n}.OP`` for each distinct operator label;
    oscillating energies ``Eosc0 ..``; oscillating amplitudes ``Aosc{n}.NAME``
    (factorised: ``Zosc{n}.OP``); constants ``c.NAME``.

    Parameters
    ----------
    observables : sequence of str
        Observable names, in the fit's order.
    states : int
        Number of ordinary states (>= 1).
    oscillating : int, optional
        Number of oscillating partner states ((-1)^t terms).
    constant : bool, optional
        Whether each observable has a constant term.
    operators : mapping, optional
        Observable name -> ``(source, sink)``; when given the amplitudes are
        factorised, ``A_n = Z_n.source * Z_n.sink``.

    Returns
    -------
    list of str
    """
    observables = list(observables)
    if states < 1:
        raise ValueError(f"states must be at least 1, got {states}")
    if oscillating < 0:
        raise ValueError(f"oscillating must be 0 or more, got {oscillating}")
    if not observables:
        raise ValueError("a fit needs at least one observable")
    if len(set(observables)) != len(observables):
        raise ValueError(f"observables are repeated in {observables}; list each once")
    names = [f"E{n}" for n in range(states)]
    if operators is not None:
        labels = operator_labels(operators, observables)
        names += [f"Z{n}.{op}" for n in range(states) for op in labels]
    else:
        names += [f"A{n}.{obs}" for n in range(states) for obs in observables]
    names += [f"Eosc{n}" for n in range(oscillating)]
    if operators is not None:
        names += [f"Zosc{n}.{op}" for n in range(oscillating) for op in labels]
    else:
        names += [f"Aosc{n}.{obs}" for n in range(oscillating) for obs in observables]
    if constant:
        names += [f"c.{obs}" for obs in observables]
    return names


def check_formula(expression: str, param_names: Iterable[str]) -> ast.Expression:
    """Check that a user formula uses only arithmetic on allowed names.

    Allowed: numbers, ``+ - * / ** % //``, unary ``+ -``, comparisons, the
    parameters ``param_names``, the variables ``t`` (timeslice), ``T`` (time
    extent) and ``pi``, and calls of the functions in
    :data:`FORMULA_FUNCTIONS` with positional arguments. Anything else
    (attribute access, subscripts, lambdas, imports, keyword arguments,
    strings, other calls, other names) is refused.

    Parameters
    ----------
    expression : str
        The formula, a single Python-syntax expression, e.g.
        ``"a * exp(-m * t) + a * exp(-m * (T - t))"``.
    param_names : iterable of str
        The formula's parameter names.

    Returns
    -------
    ast.Expression
        The parsed expression (safe to compile and evaluate with numpy
        functions as the only globals).

    Raises
    ------
    ValueError
        With a message naming the offending piece and what is allowed.
    """
    params = list(param_names)
    for name in params:
        if not isinstance(name, str) or not name.isidentifier():
            raise ValueError(f"formula parameter name {name!r} is not a plain identifier; "
                             "use letters, digits and underscores")
        if name in FORMULA_FUNCTIONS or name in FORMULA_VARIABLES:
            raise ValueError(f"formula parameter name '{name}' is reserved; choose another name")
    if not isinstance(expression, str) or not expression.strip():
        raise ValueError("the formula expression is empty; write e.g. 'a * exp(-m * t)'")
    try:
        tree = ast.parse(expression.strip(), mode="eval")
    except SyntaxError as exc:
        raise ValueError(f"the formula {expression!r} is not a valid expression "
                         f"({exc.msg}); write arithmetic in t, T and the parameters") from None
    allowed_names = set(params) | set(FORMULA_VARIABLES)
    allowed = (f"parameters {params}, t, T, pi, numbers, + - * / ** % //, comparisons and "
               f"the functions {list(FORMULA_FUNCTIONS)}")

    def visit(node: ast.AST) -> None:
        if isinstance(node, ast.Expression):
            visit(node.body)
        elif isinstance(node, ast.BinOp):
            if not isinstance(node.op, _ALLOWED_BINOPS):
                raise ValueError(f"operator {type(node.op).__name__} is not allowed in a "
                                 f"formula; allowed are {allowed}")
            visit(node.left)
            visit(node.right)
        elif isinstance(node, ast.UnaryOp):
            if not isinstance(node.op, _ALLOWED_UNARYOPS):
                raise ValueError(f"operator {type(node.op).__name__} is not allowed in a "
                                 f"formula; allowed are {allowed}")
            visit(node.operand)
        elif isinstance(node, ast.Compare):
            for op in node.ops:
                if not isinstance(op, _ALLOWED_CMPOPS):
                    raise ValueError(f"comparison {type(op).__name__} is not allowed in a "
                                     f"formula; allowed are {allowed}")
            visit(node.left)
            for comp in node.comparators:
                visit(comp)
        elif isinstance(node, ast.Constant):
            if isinstance(node.value, bool) or not isinstance(node.value, (int, float)):
                raise ValueError(f"constant {node.value!r} is not allowed in a formula; "
                                 "only real numbers are")
        elif isinstance(node, ast.Name):
            if node.id in FORMULA_FUNCTIONS:
                raise ValueError(f"function '{node.id}' must be called, e.g. {node.id}(x)")
            if node.id not in allowed_names:
                raise ValueError(f"unknown name '{node.id}' in formula {expression!r}; "
                                 f"declare it under params or use only {allowed}")
        elif isinstance(node, ast.Call):
            if not isinstance(node.func, ast.Name) or node.func.id not in FORMULA_FUNCTIONS:
                what = (repr(node.func.id) if isinstance(node.func, ast.Name)
                        else "a computed expression")
                raise ValueError(f"calling {what} is not allowed in a formula; only "
                                 f"{list(FORMULA_FUNCTIONS)} may be called")
            if node.keywords:
                raise ValueError(f"keyword arguments are not allowed in formula calls "
                                 f"({node.func.id}); pass arguments by position")
            want = 3 if node.func.id == "where" else 1
            if len(node.args) != want:
                raise ValueError(f"{node.func.id}() takes {want} argument(s) in a formula, "
                                 f"got {len(node.args)}")
            for arg in node.args:
                if isinstance(arg, ast.Starred):
                    raise ValueError("starred arguments are not allowed in a formula")
                visit(arg)
        else:
            raise ValueError(f"{type(node).__name__} syntax is not allowed in a formula "
                             f"{expression!r}; allowed are {allowed}")

    visit(tree)
    return tree
