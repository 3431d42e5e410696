"""Derived quantities: functions of fit parameters, with jackknife errors.

The last step of an analysis turns fit results into the numbers a paper
quotes: a mass ratio ``vector.E0 / pion.E0``, an energy gap
``pion.E1 - pion.E0``, a combination of energies and amplitudes. Such an
expression is written over references ``FIT.PARAM`` (the fit's name, a dot,
a reported parameter name such as ``E0``, ``A0.pion_ss`` or ``Z1.S``),
numbers, and the functions a user formula may call
(:data:`plateaufit.fit.models.FORMULA_FUNCTIONS`, checked by
:func:`plateaufit.fit.models.check_formula`).

Errors
------
*Statistical.* Every fit of one analysis is fitted to the same binned data,
and its ``k``-th jackknife sample leaves out the same bin ``k``. Evaluating
``f`` on the ``k``-th samples of all its inputs therefore gives the ``k``-th
jackknife sample of ``f`` itself, and the jackknife error of those samples,
``sqrt((S-1)/S sum_k (f_k - fbar)^2)``, carries every correlation between the
inputs -- between two parameters of one fit and between fits on the same
ensemble -- with no covariance to estimate or propagate by hand. To first
order it equals the delta-method error ``sqrt(g^T C g)`` with ``g`` the
gradient of ``f`` and ``C`` the jackknife covariance of the inputs (exactly,
for a linear ``f``).

*Systematic.* An input's systematic error (the spread of a model average) is
propagated linearly with a numerical gradient, in quadrature,
``sys^2 = sum_i (df/dx_i)^2 sys_i^2``. This assumes the systematic shifts of
the different inputs are independent. Two parameters of one averaged fit
(``E0`` and ``E1`` of one scan) move together when the fit range changes, so
for their combinations this is an approximation that may over- or
under-state the systematic error. The total error is
``sqrt(stat^2 + sys^2)``.

References
----------
M. H. Quenouille, "Notes on bias in estimation", Biometrika 43 (1956) 353.
B. Efron, "The Jackknife, the Bootstrap and Other Resampling Plans", SIAM,
Philadelphia (1982) -- the jackknife variance of a smooth function of means
and its agreement with the delta method (infinitesimal jackknife).
"""

from __future__ import annotations

import ast
import difflib
import re
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import NamedTuple

import numpy as np

from plateaufit.errors import FitError
from plateaufit.fit.models import FORMULA_FUNCTIONS, _ConstantsToNames, check_formula
from plateaufit.stats.resample import jackknife_error

__all__ = ["DerivedExpression", "DerivedInput", "DerivedResult", "evaluate_derived"]

# a name of the expression that is neither a reference nor a function
_CONSTANTS = {"pi": np.pi}
_GLOBALS = {"__builtins__": {}, **{name: getattr(np, name) for name in FORMULA_FUNCTIONS},
            **_CONSTANTS}


class DerivedInput(NamedTuple):
    """One input of a derived quantity: a fit parameter's result.

    Attributes
    ----------
    value : float
        The central value.
    samples : numpy.ndarray
        ``(S,)`` jackknife samples, on the same bins as every other input.
    sys_error : float
        Systematic error (0 for a single fit).
    """

    value: float
    samples: np.ndarray
    sys_error: float = 0.0


@dataclass(frozen=True)
class DerivedResult:
    """Result of :func:`evaluate_derived`.

    Attributes
    ----------
    expression : str
        The expression as written.
    references : tuple of str
        The ``FIT.PARAM`` references it uses, in order of first appearance.
    value : float
        ``f`` of the inputs' central values.
    stat_error : float
        Jackknife error of ``f`` evaluated on each jackknife sample.
    sys_error : float
        Linear propagation of the inputs' systematic errors, in quadrature.
    error : float
        ``sqrt(stat_error^2 + sys_error^2)``.
    samples : numpy.ndarray
        ``(S,)`` the jackknife samples of ``f`` (NaN where dropped).
    n_dropped : int
        Jackknife samples left out because an input was not finite there
        (a failed refit).
    """

    expression: str
    references: tuple[str, ...]
    value: float
    stat_error: float
    sys_error: float
    error: float
    samples: np.ndarray
    n_dropped: int


def _dotted_name(node: ast.Attribute) -> bool:
    """``a.b.c`` (names and dots only): a reference the expression meant to make."""
    base: ast.AST = node
    while isinstance(base, ast.Attribute):
        base = base.value
    return isinstance(base, ast.Name)


def _suggest(word: str, choices: Sequence[str]) -> str:
    close = difflib.get_close_matches(word, list(choices), n=1)
    return f"; did you mean {close[0]!r}?" if close else ""


class DerivedExpression:
    """An expression over ``FIT.PARAM`` references, checked and compiled.

    Each reference is replaced by a plain placeholder name, and the result is
    checked by :func:`plateaufit.fit.models.check_formula` (the whitelist of
    user formulas: arithmetic, comparisons, numbers, ``pi`` and the functions
    ``exp log cosh sinh tanh sqrt abs cos sin where``). ``t`` and ``T`` are
    refused: a derived quantity is a number, not a function of time.

    Parameters
    ----------
    expression : str
        E.g. ``"vector.E0 / pion.E0"``, ``"pion.E1 - pion.E0"``,
        ``"sqrt(pion.E0**2 + (2*pi/24)**2)"``.
    known : mapping or iterable of str
        Fit name -> its parameter names (then an unknown fit and an unknown
        parameter are told apart in the message), or the allowed references
        ``FIT.PARAM`` themselves.

    Attributes
    ----------
    expression : str
    references : tuple of str
        The references used, in order of first appearance.
    parts : dict
        Reference -> ``(fit, parameter)`` (empty when ``known`` lists
        references rather than fits).

    Raises
    ------
    ValueError
        With a message naming what is wrong: an empty expression, an unknown
        fit or parameter, a bare name, ``t`` or ``T``, syntax outside the
        whitelist, or no reference at all.

    Notes
    -----
    A reference is the longest ``FIT.PARAM`` among the known ones that is not
    preceded or followed by a letter, digit, ``_`` or ``.``; so fit names
    with ``-`` or ``.`` in them work, and ``pion-2.E0`` means fit ``pion-2``
    when there is one.
    """

    def __init__(self, expression: str, known: Mapping[str, Sequence[str]] | Iterable[str]) -> None:
        if not isinstance(expression, str) or not expression.strip():
            raise ValueError("the expression is empty; write e.g. 'vector.E0 / pion.E0' "
                             "(FIT.PARAM references, numbers and functions such as sqrt)")
        self.expression = expression
        owners: dict[str, list[tuple[str, str]]] = {}
        if isinstance(known, Mapping):
            self._fits: dict[str, list[str]] | None = {str(f): [str(p) for p in ps]
                                                       for f, ps in known.items()}
            for f, ps in self._fits.items():
                for p in ps:
                    owners.setdefault(f"{f}.{p}", []).append((f, p))
            allowed = list(owners)
        else:
            self._fits = None
            allowed = [str(r) for r in known]
        self._allowed = allowed
        prefix = "_r"
        while prefix in expression:        # placeholders never clash with the user's text
            prefix = "_" + prefix
        self._prefix = prefix
        substituted, refs = self._substitute(expression, allowed)
        self.references: tuple[str, ...] = tuple(refs)
        for ref in refs:
            if len(owners.get(ref, [])) > 1:
                which = " or ".join(f"parameter {p!r} of fit {f!r}" for f, p in owners[ref])
                raise ValueError(f"{ref!r} is ambiguous: {which}; rename one of the fits")
        #: reference -> (fit, parameter), when ``known`` was a mapping
        self.parts: dict[str, tuple[str, str]] = {r: owners[r][0] for r in refs if r in owners}
        self._placeholders = [f"{prefix}{i}" for i in range(len(refs))]
        self._check_leftovers(substituted)
        tree = self._checked_tree(substituted)
        self._constants: dict[str, np.float64] = {}
        # numbers become numpy float64 (as in user formulas), so that 9**9**9 or 1/0
        # give inf/nan instead of hanging or raising in Python arithmetic
        tree = ast.fix_missing_locations(_ConstantsToNames(self._constants).visit(tree))
        self._code = compile(tree, "<derived>", "eval")

    def __repr__(self) -> str:
        return f"DerivedExpression({self.expression!r}, references={list(self.references)})"

    # ------------------------------------------------------------------ parsing

    def _substitute(self, expression: str, allowed: Sequence[str]) -> tuple[str, list[str]]:
        refs: list[str] = []
        if not allowed:
            return expression, refs
        alternatives = "|".join(re.escape(r) for r in sorted(set(allowed), key=len, reverse=True))
        pattern = re.compile(rf"(?<![\w.])(?:{alternatives})(?![\w.])")

        def replace(match: re.Match[str]) -> str:
            ref = match.group(0)
            if ref not in refs:
                refs.append(ref)
            return f"{self._prefix}{refs.index(ref)}"

        return pattern.sub(replace, expression), refs

    def _restore(self, text: str) -> str:
        """Placeholders back to the references they stand for."""
        pattern = re.compile(re.escape(self._prefix) + r"(\d+)")
        return pattern.sub(lambda m: self.references[int(m.group(1))]
                           if int(m.group(1)) < len(self.references) else m.group(0), text)

    def _example(self) -> str:
        return self._allowed[0] if self._allowed else "FIT.E0"

    def _check_leftovers(self, substituted: str) -> None:
        """Name an unknown fit, an unknown parameter or a bare name precisely."""
        if self._fits is not None:
            for fit in sorted(self._fits, key=len, reverse=True):
                m = re.search(rf"(?<![\w.]){re.escape(fit)}\.([A-Za-z_][\w.]*)", substituted)
                if m:
                    param = m.group(1).rstrip(".")
                    names = self._fits[fit]
                    raise ValueError(f"fit {fit!r} has no parameter {param!r}; its parameters "
                                     f"are {', '.join(names) or 'none'}{_suggest(param, names)}")
        try:
            tree = ast.parse(substituted.strip(), mode="eval")
        except SyntaxError as exc:
            raise ValueError(f"{self.expression!r} is not a valid expression ({exc.msg}); write "
                             f"arithmetic on FIT.PARAM references, e.g. {self._example()!r}"
                             ) from None
        placeholders = set(self._placeholders)
        fits = list(self._fits) if self._fits is not None else []
        # a called name is left to check_formula, which names the allowed functions
        called = {id(n.func) for n in ast.walk(tree) if isinstance(n, ast.Call)}
        for node in ast.walk(tree):       # breadth first: the outermost a.b.c comes first
            if isinstance(node, ast.Attribute) and _dotted_name(node):
                text = self._restore(ast.get_source_segment(substituted.strip(), node) or "")
                first = text.split(".")[0]
                if self._fits is None:
                    raise ValueError(f"no input for {text!r}; the inputs are "
                                     f"{', '.join(self._allowed) or 'none'}")
                if first in self._fits:
                    names = self._fits[first]
                    raise ValueError(f"{text!r} is not a parameter of fit {first!r}; its "
                                     f"parameters are {', '.join(names) or 'none'}")
                raise ValueError(f"unknown fit {first!r} in {text!r}; the fits are "
                                 f"{', '.join(fits) or 'none'}{_suggest(first, fits)}")
            if isinstance(node, ast.Name) and id(node) not in called \
                    and node.id not in placeholders and node.id not in FORMULA_FUNCTIONS \
                    and node.id not in _CONSTANTS:
                self._bare_name(node.id)

    def _bare_name(self, name: str) -> None:
        if name in ("t", "T"):
            raise ValueError(f"{name!r} has no meaning here: a derived quantity is a number, "
                             f"not a function of time; use FIT.PARAM references, e.g. "
                             f"{self._example()!r}")
        if self._fits is not None and name in self._fits:
            params = self._fits[name]
            example = f"{name}.{params[0]}" if params else f"{name}.E0"
            raise ValueError(f"{name!r} is a fit; name one of its parameters, e.g. {example!r} "
                             f"(its parameters are {', '.join(params) or 'none'})")
        if self._fits is not None:
            owners = [f for f, ps in self._fits.items() if name in ps]
            if owners:
                raise ValueError(f"{name!r} needs its fit: write FIT.{name}, e.g. "
                                 f"'{owners[0]}.{name}'")
        raise ValueError(f"unknown name {name!r}; refer to a fit parameter as FIT.PARAM, "
                         f"e.g. {self._example()!r}")

    def _checked_tree(self, substituted: str) -> ast.Expression:
        try:
            tree = check_formula(substituted, self._placeholders)
        except ValueError as exc:
            # the formula checker's wording, with the references put back and without
            # the time variables a derived quantity does not have
            message = self._restore(str(exc)).replace(", t, T, pi,", ", pi,")
            raise ValueError(message.replace("in a formula", "in a derived quantity")) from None
        if not self.references:
            raise ValueError(f"{self.expression!r} uses no fit parameter; write it over "
                             f"FIT.PARAM references, e.g. {self._example()!r}")
        return tree

    # ------------------------------------------------------------------ evaluation

    def __call__(self, values: Mapping[str, np.ndarray | float]) -> np.ndarray:
        """Evaluate element-wise on arrays of the inputs.

        Parameters
        ----------
        values : mapping
            Reference -> value or array; the arrays broadcast together.

        Returns
        -------
        numpy.ndarray
            ``f`` of the inputs, of their broadcast shape (NaN or inf where
            ``f`` is undefined).
        """
        missing = [r for r in self.references if r not in values]
        if missing:
            raise ValueError(f"no value given for {', '.join(missing)}")
        arrays = [np.asarray(values[r], dtype=float) for r in self.references]
        local: dict[str, object] = dict(zip(self._placeholders, arrays))
        local.update(self._constants)
        with np.errstate(all="ignore"):
            out = eval(self._code, dict(_GLOBALS), local)  # noqa: S307 - checked by check_formula
        shape = np.broadcast_shapes(*(a.shape for a in arrays))
        return np.broadcast_to(np.asarray(out, dtype=float), shape).copy()


def _gradient(expr: DerivedExpression, central: dict[str, float],
              which: Sequence[str]) -> np.ndarray:
    """Central-difference gradient of ``expr`` at ``central`` along ``which``."""
    k = len(which)
    steps = {}
    points = {r: np.full(2 * k, central[r]) for r in expr.references}
    for i, ref in enumerate(which):
        x = central[ref]
        h = np.cbrt(np.finfo(float).eps) * max(abs(x), 1e-8)
        steps[ref] = h
        points[ref][2 * i] = x + h
        points[ref][2 * i + 1] = x - h
    f = expr(points)
    return np.array([(f[2 * i] - f[2 * i + 1]) / (2.0 * steps[r]) for i, r in enumerate(which)])


def evaluate_derived(expression: str | DerivedExpression,
                     inputs: Mapping[str, DerivedInput | tuple[float, np.ndarray, float]]
                     ) -> DerivedResult:
    """Value, jackknife error and propagated systematic error of a derived quantity.

    Parameters
    ----------
    expression : str or DerivedExpression
        The expression over ``FIT.PARAM`` references (see the module docstring),
        e.g. ``"vector.E0 / pion.E0"``.
    inputs : mapping
        Reference -> ``(central value, jackknife samples (S,), sys error)``
        (a :class:`DerivedInput` or a plain tuple). Every input's samples must
        come from the same binned data, so that sample ``k`` of every input
        leaves out the same bin.

    Returns
    -------
    DerivedResult
        ``value = f(central values)``; ``stat_error`` the jackknife error of
        ``f`` on each jackknife sample, which keeps the correlations between
        the inputs; ``sys_error`` the linear propagation of the inputs'
        systematic errors, in quadrature (assuming independent systematic
        shifts); ``error = hypot(stat_error, sys_error)``.

    Raises
    ------
    FitError
        (``where`` empty) For an expression that does not check, an input
        missing or malformed, inputs with different numbers of jackknife
        samples, fewer than 2 usable samples, or an ``f`` that is not finite at
        the central values or on a jackknife sample.

    Notes
    -----
    A jackknife sample where some input is not finite (a failed refit) is
    left out of the error, as the fit itself leaves it out of its own error;
    the count is ``n_dropped``. The jackknife error then uses the remaining
    ``S'`` samples with ``(S'-1)/S'`` -- an approximation when ``S'`` < ``S``.

    References
    ----------
    M. H. Quenouille, "Notes on bias in estimation", Biometrika 43 (1956) 353.
    B. Efron, "The Jackknife, the Bootstrap and Other Resampling Plans", SIAM
    (1982).
    """
    if isinstance(expression, DerivedExpression):
        expr = expression
    else:
        try:
            expr = DerivedExpression(expression, list(inputs))
        except ValueError as exc:
            raise FitError("", str(exc)) from None
    central: dict[str, float] = {}
    samples: dict[str, np.ndarray] = {}
    sys_err: dict[str, float] = {}
    for ref in expr.references:
        if ref not in inputs:
            raise FitError("", f"no input given for {ref!r} of {expr.expression!r}")
        entry = inputs[ref]
        if len(entry) == 2:
            value, s = entry
            sys_ = 0.0
        elif len(entry) == 3:
            value, s, sys_ = entry
        else:
            raise FitError("", f"input {ref!r} must be (value, samples, sys_error)")
        s = np.asarray(s, dtype=float)
        if s.ndim != 1:
            raise FitError("", f"the jackknife samples of {ref!r} must be one-dimensional (S,), "
                               f"got shape {s.shape}")
        sys_ = float(sys_)
        if not (np.isfinite(sys_) and sys_ >= 0.0):
            raise FitError("", f"the systematic error of {ref!r} must be finite and >= 0, "
                               f"got {sys_!r}")
        central[ref], samples[ref], sys_err[ref] = float(value), s, sys_
    lengths = {ref: s.shape[0] for ref, s in samples.items()}
    if len(set(lengths.values())) > 1:
        listed = ", ".join(f"{r}: {n}" for r, n in lengths.items())
        raise FitError("", f"the inputs of {expr.expression!r} have different numbers of "
                           f"jackknife samples ({listed}); they must come from fits to the "
                           "same binned data")
    n_samples = next(iter(lengths.values()))

    value = float(expr(central))
    if not np.isfinite(value):
        at = ", ".join(f"{r} = {central[r]:.6g}" for r in expr.references)
        raise FitError("", f"{expr.expression!r} is not finite at the central values ({at}); "
                           "check the expression (a division by zero, a log or sqrt of a "
                           "negative number?)")
    good = np.ones(n_samples, dtype=bool)
    for s in samples.values():
        good &= np.isfinite(s)
    n_dropped = int(n_samples - good.sum())
    f_samples = np.full(n_samples, np.nan)
    f_samples[good] = expr({r: s[good] for r, s in samples.items()})
    bad = good & ~np.isfinite(f_samples)
    if bad.any():
        raise FitError("", f"{expr.expression!r} is not finite on {int(bad.sum())} of "
                           f"{n_samples} jackknife samples; the quantity is not defined within "
                           "the errors of its inputs (a division by zero, a log or sqrt of a "
                           "negative number?)")
    if good.sum() < 2:
        raise FitError("", f"only {int(good.sum())} of {n_samples} jackknife samples have "
                           f"finite inputs for {expr.expression!r}; a jackknife error needs at "
                           "least 2 (the refits of its fits failed)")
    stat = float(jackknife_error(f_samples[good]))

    with_sys = [r for r in expr.references if sys_err[r] > 0.0]
    sys_total = 0.0
    if with_sys:
        grad = _gradient(expr, central, with_sys)
        if not np.all(np.isfinite(grad)):
            raise FitError("", f"the gradient of {expr.expression!r} is not finite at the "
                               "central values; its systematic error cannot be propagated")
        sys_total = float(np.sqrt(np.sum((grad * np.array([sys_err[r] for r in with_sys])) ** 2)))
    return DerivedResult(expression=expr.expression, references=expr.references, value=value,
                         stat_error=stat, sys_error=sys_total,
                         error=float(np.hypot(stat, sys_total)), samples=f_samples,
                         n_dropped=n_dropped)
