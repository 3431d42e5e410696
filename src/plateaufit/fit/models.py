"""Correlator models: multi-state exponential, cosh and sinh forms, and user formulas.

A model maps an internal parameter vector ``theta`` to the predicted correlator
values at the timeslices of a fit (all observables concatenated, in the fit's
order). Every method is batched: ``theta`` may carry leading batch axes.

Parameter names
---------------
The *reported* names (what users write in ``priors:`` and read in results) are
given by :func:`reported_parameter_names`. Internally the energies of higher
states are positive log-gaps, ``E_n = E_{n-1} + exp(lgap_n)``, so the order of
the states is kept during a fit.

One module of about 900 lines on purpose: the built-in model's batched
evaluation (basis, amplitudes, Jacobian in one pass), its parameter layout and
the reported/internal maps are one piece that must change together; the user
formula model shares its point set-up and the checked expression language its
names.

References
----------
G. P. Lepage, B. Clark, C. T. H. Davies, K. Hornbostel, P. B. Mackenzie,
C. Morningstar, H. Trottier, "Constrained curve fitting", Nucl. Phys. B (Proc.
Suppl.) 106 (2002) 12 -- multi-state fits with ordered energies.
"""

from __future__ import annotations

import ast
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from plateaufit.errors import FitError

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


def reported_parameter_names(observables: Sequence[str], states: int, *,
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


# ---------------------------------------------------------------------------
# models
# ---------------------------------------------------------------------------

FORMS: tuple[str, ...] = ("exp", "cosh", "sinh", "formula")
#: the effective mass (plateaufit.stats.effmass kind) that shows each form's plateau
EFFECTIVE_MASS_KIND: dict[str, str] = {"cosh": "cosh", "sinh": "sinh", "exp": "log",
                                       "formula": "log"}

# |E| T below which exp(-E T) and exp(-E t), 0 <= t <= T, are normal floats.
_QUOTIENT_LIMIT = 700.0


@dataclass(frozen=True)
class ParameterLayout:
    """Where each family of parameters sits in the internal and reported vectors.

    Internal vector: ``E0, lgap1, ..`` (ordinary energies), ``Eosc0, lgaposc1, ..``
    (oscillating energies), amplitudes, oscillating amplitudes, constants.
    Reported vector: energies, amplitudes, oscillating energies, oscillating
    amplitudes, constants (see :func:`reported_parameter_names`). Energy
    families are ``E0`` then log-gaps internally and absolute energies when
    reported; every other family is the same numbers in both vectors.

    Attributes
    ----------
    states, oscillating : int
        Number of ordinary and oscillating states.
    internal, reported : dict
        Family name (``energies``, ``oscillating_energies``, ``amplitudes``,
        ``oscillating_amplitudes``, ``constants``) -> slice into the vector.
    """

    states: int
    oscillating: int
    internal: dict
    reported: dict

    #: families that are the same numbers internally and reported
    LINEAR_FAMILIES = ("amplitudes", "oscillating_amplitudes", "constants")
    #: energy families: (family, number of states attribute)
    ENERGY_FAMILIES = ("energies", "oscillating_energies")


def _energies(first: np.ndarray, lgaps: np.ndarray) -> np.ndarray:
    """Absolute energies ``E_n = E_{n-1} + exp(lgap_n)`` from ``E0`` and log-gaps."""
    if lgaps.shape[-1] == 0:
        return first[..., None]
    with np.errstate(over="ignore"):
        gaps = np.exp(lgaps)
    return np.concatenate([first[..., None], first[..., None] + np.cumsum(gaps, axis=-1)],
                          axis=-1)


def _energy_jacobian(lgaps: np.ndarray) -> np.ndarray:
    """d E_n / d (E0, lgap_1, ...): lower-triangular (..., s, s)."""
    s = lgaps.shape[-1] + 1
    jac = np.zeros(lgaps.shape[:-1] + (s, s))
    jac[..., :, 0] = 1.0
    if s > 1:
        with np.errstate(over="ignore"):
            gaps = np.exp(lgaps)
        rows, cols = np.tril_indices(s - 1)
        jac[..., rows + 1, cols + 1] = gaps[..., cols]
    return jac


def _log_gaps(energies: np.ndarray, what: str) -> np.ndarray:
    gaps = np.diff(energies, axis=-1)
    if np.any(~(gaps > 0)):
        raise ValueError(f"{what} energies must be strictly increasing (E0 < E1 < ...); "
                         f"got {np.asarray(energies).tolist()}")
    return np.log(gaps)


class CorrelatorModel:
    """A multi-state correlator model on fixed timeslices (exp, cosh or sinh form).

    For observable ``o`` at timeslice ``t``::

        C_o(t) = sum_n A_n.o g(E_n, t)
               + sum_m Aosc_m.o (-1)^t g(Eosc_m, t)
               + c.o

    with ``g = exp(-E t)`` (exp), ``exp(-E t) + exp(-E (T - t))`` (cosh) or
    ``exp(-E t) - exp(-E (T - t))`` (sinh). The energies are shared by the
    observables of the fit; the amplitudes are per observable or factorised,
    ``A_n.o = Z_n.source(o) * Z_n.sink(o)``.

    Build instances with :func:`make_model`.

    Attributes
    ----------
    form : str
        ``exp``, ``cosh``, ``sinh`` (or ``formula`` for :class:`FormulaModel`).
    observables : tuple of str
    t_ranges : dict
        Observable name -> timeslices of the fit.
    t : ndarray
        All timeslices, concatenated in observable order (n_points,).
    obs_index : ndarray
        Index of the observable of each point (n_points,).
    time_extent : int
        The time extent ``T`` of the lattice.
    param_names : tuple of str
        Internal parameter names (``E0, lgap1, ..., Eosc0, lgaposc1, ...,``
        amplitudes, constants).
    reported_names : tuple of str
        Reported parameter names, see :func:`reported_parameter_names`.
    n_params, n_points : int
    has_analytic_jacobian : bool
        True: :meth:`jacobian` is analytic.

    References
    ----------
    G. P. Lepage et al., "Constrained curve fitting", Nucl. Phys. B (Proc.
    Suppl.) 106 (2002) 12.
    """

    has_analytic_jacobian: bool = True

    def __init__(self, form: str, states: int, observables: Sequence[str],
                 t_ranges: Mapping[str, np.ndarray], time_extent: int, *,
                 oscillating: int = 0, constant: bool = False,
                 operators: Mapping[str, tuple[str, str]] | None = None) -> None:
        if form not in ("exp", "cosh", "sinh"):
            raise ValueError(f"unknown model form '{form}'; use exp, cosh, sinh or formula")
        self.form = form
        self.states = int(states)
        self.oscillating = int(oscillating)
        self.constant = bool(constant)
        self.operators = None if operators is None else {
            k: (str(v[0]), str(v[1])) for k, v in operators.items()}
        self._setup_points(observables, t_ranges, time_extent)
        self.reported_names = tuple(reported_parameter_names(
            self.observables, self.states, oscillating=self.oscillating,
            constant=self.constant, operators=self.operators))
        if self.operators is not None:
            self.amplitude_labels = tuple(operator_labels(self.operators, self.observables))
        else:
            self.amplitude_labels = self.observables
        s, so, k = self.states, self.oscillating, len(self.amplitude_labels)
        n_obs = len(self.observables)
        zsym = "Z" if self.operators is not None else "A"
        internal = ["E0"] + [f"lgap{n}" for n in range(1, s)]
        if so:
            internal += ["Eosc0"] + [f"lgaposc{n}" for n in range(1, so)]
        internal += [f"{zsym}{n}.{lab}" for n in range(s) for lab in self.amplitude_labels]
        internal += [f"{zsym}osc{n}.{lab}" for n in range(so) for lab in self.amplitude_labels]
        if self.constant:
            internal += [f"c.{obs}" for obs in self.observables]
        self.param_names = tuple(internal)
        self.n_params = len(internal)
        # index slices into the internal vector
        self._sl_E = slice(0, s)
        self._sl_Eo = slice(s, s + so)
        self._sl_A = slice(s + so, s + so + s * k)
        self._sl_Ao = slice(s + so + s * k, s + so + s * k + so * k)
        self._sl_c = slice(s + so + (s + so) * k, self.n_params)
        # the same slices in the reported vector
        self._ph_E = slice(0, s)
        self._ph_A = slice(s, s + s * k)
        self._ph_Eo = slice(s + s * k, s + s * k + so)
        self._ph_Ao = slice(s + s * k + so, s + (s + so) * k + so)
        self._ph_c = slice(s + so + (s + so) * k, self.n_params)
        # precomputed point data
        self._t_back = self.time_extent - self.t
        self._neg_t = -self.t
        self._neg_t_back = -self._t_back
        self._half_minus_t = 0.5 * self.time_extent - self.t
        self._neg_t2 = self._neg_t[:, None]
        self._neg_t_back2 = self._neg_t_back[:, None]
        self._half_minus_t2 = self._half_minus_t[:, None]
        # both exponentials from one needs 0 <= t <= T (see _basis)
        self._quotient_ok = bool(self.time_extent > 0 and np.all(self.t >= 0)
                                 and np.all(self.t <= self.time_extent))
        self._sign = np.where(self.t.astype(np.int64) % 2 == 0, 1.0, -1.0)
        self._onehot_obs = np.zeros((self.n_points, n_obs))
        self._onehot_obs[np.arange(self.n_points), self.obs_index] = 1.0
        if self.operators is not None:
            lab = {name: i for i, name in enumerate(self.amplitude_labels)}
            self._src_index = np.array([lab[self.operators[self.observables[o]][0]]
                                        for o in self.obs_index], dtype=np.intp)
            self._snk_index = np.array([lab[self.operators[self.observables[o]][1]]
                                        for o in self.obs_index], dtype=np.intp)
            self._onehot_src = np.zeros((self.n_points, k))
            self._onehot_src[np.arange(self.n_points), self._src_index] = 1.0
            self._onehot_snk = np.zeros((self.n_points, k))
            self._onehot_snk[np.arange(self.n_points), self._snk_index] = 1.0

    # -- set-up shared with FormulaModel -------------------------------------
    def _setup_points(self, observables: Sequence[str], t_ranges: Mapping[str, np.ndarray],
                      time_extent: int) -> None:
        self.observables = tuple(observables)
        if not self.observables:
            raise ValueError("a fit needs at least one observable")
        missing = [o for o in self.observables if o not in t_ranges]
        if missing:
            raise ValueError(f"no fit range given for observable(s) {missing}")
        self.time_extent = int(time_extent)
        self.t_ranges = {o: np.asarray(t_ranges[o], dtype=float).ravel()
                         for o in self.observables}
        for o, tt in self.t_ranges.items():
            if tt.size == 0:
                raise ValueError(f"the fit range of observable '{o}' is empty; "
                                 "choose tmin <= tmax")
        self.t = np.concatenate([self.t_ranges[o] for o in self.observables])
        self.obs_index = np.concatenate([np.full(self.t_ranges[o].size, i, dtype=np.intp)
                                         for i, o in enumerate(self.observables)])
        self.n_points = int(self.t.size)

    def __repr__(self) -> str:
        return (f"{type(self).__name__}(form={self.form!r}, states={self.states}, "
                f"oscillating={self.oscillating}, constant={self.constant}, "
                f"observables={list(self.observables)}, n_points={self.n_points})")

    @property
    def n_observables(self) -> int:
        return len(self.observables)

    @property
    def layout(self) -> ParameterLayout:
        """The parameter families' positions in the internal and reported vectors."""
        return ParameterLayout(
            states=self.states, oscillating=self.oscillating,
            internal={"energies": self._sl_E, "oscillating_energies": self._sl_Eo,
                      "amplitudes": self._sl_A, "oscillating_amplitudes": self._sl_Ao,
                      "constants": self._sl_c},
            reported={"energies": self._ph_E, "oscillating_energies": self._ph_Eo,
                      "amplitudes": self._ph_A, "oscillating_amplitudes": self._ph_Ao,
                      "constants": self._ph_c})

    @property
    def factorised(self) -> bool:
        return self.operators is not None

    def point_slices(self) -> dict[str, slice]:
        """Slice of each observable's points in the concatenated data vector."""
        out, start = {}, 0
        for o in self.observables:
            n = self.t_ranges[o].size
            out[o] = slice(start, start + n)
            start += n
        return out

    # -- building blocks ------------------------------------------------------
    # The evaluation works batch-last: parameters (n_params, B), values
    # (n_points, B), Jacobian (n_params, n_points, B), state bases
    # (states, n_points, B), so that every array operation runs along the
    # long batch axis instead of the short point or state axes (several times
    # faster for a stack of jackknife samples). The public methods return
    # transposed views in the documented shapes.
    def _basis(self, energies: np.ndarray, derivative: bool = True
               ) -> tuple[np.ndarray, np.ndarray | None]:
        """g(E_n, t) and dg/dE for energies (m, B) -> (m, n_points, B) each.

        For cosh and sinh both exponentials come from one: with
        ``h = exp(-E T/2)`` and ``u = exp(E (T/2 - t))``, ``exp(-E t) = h u``
        and ``exp(-E (T - t)) = h / u``. This is as accurate as two
        exponentials (each carries the rounding of an argument of size
        ``|E| T/2`` or less) and exact in the symmetry ``t -> T - t`` (a sinh
        vanishes at ``t = T/2``), as long as ``h`` and ``u`` are normal
        numbers, which ``|E| T < 700`` guarantees for ``0 <= t <= T``. Energies
        of larger ``|E|`` are computed with two exponentials, so every column
        has the same value whatever batch it is evaluated in.
        """
        e = energies[:, None, :]
        neg_t = self._neg_t2
        if self.form == "exp":
            fwd = e * neg_t
            np.exp(fwd, out=fwd)
            return fwd, (neg_t * fwd if derivative else None)
        neg_t_back = self._neg_t_back2
        if self._quotient_ok:
            u = e * self._half_minus_t2
            np.exp(u, out=u)
            h = np.exp(e * (-0.5 * self.time_extent))
            fwd = u * h
            bwd = np.divide(h, u, out=u)
            if not np.abs(energies).max() < _QUOTIENT_LIMIT / self.time_extent:   # NaN too
                large = ~(np.abs(e) < _QUOTIENT_LIMIT / self.time_extent)
                fwd = np.where(large, np.exp(e * neg_t), fwd)
                bwd = np.where(large, np.exp(e * neg_t_back), bwd)
        else:
            fwd = np.exp(e * neg_t)
            bwd = np.exp(e * neg_t_back)
        g = fwd + bwd if self.form == "cosh" else fwd - bwd
        if not derivative:
            return g, None
        fwd *= neg_t
        bwd *= neg_t_back
        if self.form == "cosh":
            fwd += bwd
        else:
            fwd -= bwd
        return g, fwd

    def _amplitudes_at_points(self, amp: np.ndarray, m: int) -> tuple[np.ndarray, ...]:
        """Amplitude of each state at each point, (m, n_points, B); plus Z factors.

        ``amp`` is (m * n_labels, B). With one observable (and plain
        amplitudes) the result is (m, 1, B) and broadcasts over the points.
        """
        mat = amp.reshape((m, len(self.amplitude_labels)) + amp.shape[1:])
        if self.operators is None:
            if len(self.observables) == 1:
                return (mat,)
            return (mat[:, self.obs_index],)
        zsrc = mat[:, self._src_index]
        zsnk = mat[:, self._snk_index]
        return zsrc * zsnk, zsrc, zsnk

    def _block(self, theta: np.ndarray, first: int, m: int, sl_amp: slice,
               sign: np.ndarray | None, jt: np.ndarray | None) -> np.ndarray:
        """One family of states (ordinary or oscillating): its contribution to
        the prediction, (n_points, B), and, when ``jt`` is given, its rows of
        the Jacobian written into ``jt`` (n_params, n_points, B)."""
        e0 = theta[first]
        if m > 1:
            gaps = np.exp(theta[first + 1:first + m])            # (m-1, B)
            e = np.empty((m,) + e0.shape)
            e[0] = e0
            np.add(e0, np.cumsum(gaps, axis=0), out=e[1:])
        else:
            e = e0[None]
        basis, dbasis = self._basis(e, derivative=jt is not None)   # (m, n, B)
        if sign is not None:
            sign = sign[None, :, None]
            basis = basis * sign
            if dbasis is not None:
                dbasis *= sign
        amps = self._amplitudes_at_points(theta[sl_amp], m)
        if amps[0].shape[1] == 1:
            out = np.einsum("mnb,mb->nb", basis, amps[0][:, 0])
        else:
            out = np.einsum("mnb,mnb->nb", basis, amps[0])
        if jt is None:
            return out
        df_de = dbasis
        df_de *= amps[0]                                            # (m, n, B)
        # E_n = E0 + sum_{k<=n} exp(lgap_k): d/dE0 sums all, d/dlgap_k sums n >= k
        # (accumulated from the top state down)
        acc = df_de[m - 1]
        for n in range(m - 1, 0, -1):
            np.multiply(acc, gaps[n - 1], out=jt[first + n])
            acc = acc + df_de[n - 1]
        jt[first] = acc
        k = len(self.amplitude_labels)
        rows = jt[sl_amp]                                           # (m k, n, B)
        if self.operators is None:
            if len(self.observables) == 1:
                rows[...] = basis
            else:
                rows.reshape((m, k) + rows.shape[1:])[...] = (
                    basis[:, None] * self._onehot_obs.T[None, :, :, None])
        else:
            _, zsrc, zsnk = amps
            rows.reshape((m, k) + rows.shape[1:])[...] = basis[:, None] * (
                zsnk[:, None] * self._onehot_src.T[None, :, :, None]
                + zsrc[:, None] * self._onehot_snk.T[None, :, :, None])
        return out

    def _evaluate(self, theta: np.ndarray, jacobian: bool
                  ) -> tuple[np.ndarray, np.ndarray | None]:
        """Prediction (..., n_points) and Jacobian (..., n_points, n_params),
        both views of batch-last arrays."""
        theta = np.asarray(theta, dtype=float)
        lead = theta.shape[:-1]
        if theta.shape[-1] != self.n_params:
            raise ValueError(f"expected {self.n_params} parameters "
                             f"{list(self.param_names)}, got {theta.shape[-1]}")
        th = np.ascontiguousarray(theta.reshape(-1, self.n_params).T)   # (p, B)
        n_batch = th.shape[1]
        s, so = self.states, self.oscillating
        # every row of the Jacobian is written by the blocks below
        jt = np.empty((self.n_params, self.n_points, n_batch)) if jacobian else None
        with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
            out = self._block(th, 0, s, self._sl_A, None, jt)
            if so:
                out += self._block(th, s, so, self._sl_Ao, self._sign, jt)
        if self.constant:
            out += th[self._sl_c][self.obs_index]
            if jt is not None:
                jt[self._sl_c] = self._onehot_obs.T[:, :, None]
        f = out.T.reshape(lead + (self.n_points,))
        if jt is None:
            return f, None
        return f, jt.transpose(2, 1, 0).reshape(lead + (self.n_points, self.n_params))

    # -- public API -------------------------------------------------------------
    def energies(self, theta: np.ndarray) -> np.ndarray:
        """Absolute energies E_0.. of the ordinary states, (..., states)."""
        theta = np.asarray(theta, dtype=float)
        return _energies(theta[..., 0], theta[..., 1:self.states])

    def predict(self, theta: np.ndarray) -> np.ndarray:
        """Model values at the fit's points.

        Parameters
        ----------
        theta : ndarray, (..., n_params)
            Internal parameters.

        Returns
        -------
        ndarray, (..., n_points)
        """
        return self._evaluate(theta, False)[0]

    def jacobian(self, theta: np.ndarray) -> np.ndarray:
        """Analytic derivative of :meth:`predict` with respect to the internal parameters.

        Parameters
        ----------
        theta : ndarray, (..., n_params)

        Returns
        -------
        ndarray, (..., n_points, n_params)
            A view of an array laid out batch-last, (n_params, n_points, ...).
        """
        return self._evaluate(theta, True)[1]

    def predict_and_jacobian(self, theta: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """:meth:`predict` and :meth:`jacobian` in one pass (the exponentials once).

        Parameters
        ----------
        theta : ndarray, (..., n_params)

        Returns
        -------
        prediction : ndarray, (..., n_points)
        jacobian : ndarray, (..., n_points, n_params)
            As :meth:`jacobian` (a view of a batch-last array).

        Notes
        -----
        A subclass that overrides :meth:`predict` or :meth:`jacobian` gets the
        two calls of its own methods instead.
        """
        cls = type(self)
        if cls.predict is not CorrelatorModel.predict or \
                cls.jacobian is not CorrelatorModel.jacobian:
            return self.predict(theta), self.jacobian(theta)
        return self._evaluate(theta, True)

    def to_reported(self, theta: np.ndarray) -> np.ndarray:
        """Internal parameters -> reported parameters (absolute energies), same shape."""
        theta = np.asarray(theta, dtype=float)
        s, so = self.states, self.oscillating
        parts = [_energies(theta[..., 0], theta[..., 1:s]), theta[..., self._sl_A]]
        if so:
            parts.append(_energies(theta[..., s], theta[..., s + 1:s + so]))
            parts.append(theta[..., self._sl_Ao])
        parts.append(theta[..., self._sl_c])
        return np.concatenate(parts, axis=-1)

    def from_reported(self, values: np.ndarray) -> np.ndarray:
        """Reported parameters -> internal parameters (inverse of :meth:`to_reported`).

        Raises
        ------
        ValueError
            When the energies are not strictly increasing.
        """
        values = np.asarray(values, dtype=float)
        if values.shape[-1] != self.n_params:
            raise ValueError(f"expected {self.n_params} parameters "
                             f"{list(self.reported_names)}, got {values.shape[-1]}")
        so = self.oscillating
        e = values[..., self._ph_E]
        parts = [e[..., :1], _log_gaps(e, "state")]
        if so:
            eo = values[..., self._ph_Eo]
            parts += [eo[..., :1], _log_gaps(eo, "oscillating-state")]
        parts += [values[..., self._ph_A], values[..., self._ph_Ao], values[..., self._ph_c]]
        return np.concatenate(parts, axis=-1)

    def reported_jacobian(self, theta: np.ndarray) -> np.ndarray:
        """d (reported parameters) / d (internal parameters), (..., n_params, n_params)."""
        theta = np.asarray(theta, dtype=float)
        s, so = self.states, self.oscillating
        jac = np.zeros(theta.shape[:-1] + (self.n_params, self.n_params))
        jac[..., self._ph_E, self._sl_E] = _energy_jacobian(theta[..., 1:s])
        if so:
            jac[..., self._ph_Eo, self._sl_Eo] = _energy_jacobian(theta[..., s + 1:s + so])
        for ph, sl in ((self._ph_A, self._sl_A), (self._ph_Ao, self._sl_Ao),
                       (self._ph_c, self._sl_c)):
            idx_p = np.arange(self.n_params)[ph]
            idx_i = np.arange(self.n_params)[sl]
            jac[..., idx_p, idx_i] = 1.0
        return jac


class _ConstantsToNames(ast.NodeTransformer):
    """Replace number literals by names bound to numpy float64 values."""

    def __init__(self, table: dict[str, np.float64]) -> None:
        self.table = table

    def visit_Constant(self, node: ast.Constant) -> ast.AST:
        name = f"_const{len(self.table)}"
        self.table[name] = np.float64(node.value)
        return ast.copy_location(ast.Name(id=name, ctx=ast.Load()), node)


class FormulaModel(CorrelatorModel):
    """A user formula ``C(t)`` evaluated at each observable's timeslices.

    The expression is checked by :func:`check_formula` (arithmetic on the
    parameters, ``t``, ``T`` and whitelisted numpy functions only) and then
    compiled and evaluated with those numpy functions as the only globals, so
    no import, attribute access or other call is possible. The parameters are
    shared by all observables of the fit; internal and reported parameters are
    the same. The jacobian is numerical (central differences).
    """

    has_analytic_jacobian = False

    def __init__(self, expression: str, params: Mapping[str, float],
                 observables: Sequence[str], t_ranges: Mapping[str, np.ndarray],
                 time_extent: int) -> None:
        if not params:
            raise ValueError("a formula needs at least one parameter under params, "
                             "e.g. {a: 1.0, m: 0.5}")
        self.form = "formula"
        self.states = 0
        self.oscillating = 0
        self.constant = False
        self.operators = None
        self.expression = str(expression)
        self.start = {str(k): float(v) for k, v in params.items()}
        self._compile()
        self._setup_points(observables, t_ranges, time_extent)
        self.amplitude_labels = ()
        self.param_names = tuple(self.start)
        self.reported_names = self.param_names
        self.n_params = len(self.param_names)

    def _compile(self) -> None:
        tree = check_formula(self.expression, list(self.start))
        # every number becomes a numpy float64 looked up by name, so that no
        # sub-expression is evaluated in Python integers or floats: 9**9**9 or
        # 1/0 then give inf/nan (as numpy does) instead of hanging or raising
        self._constants: dict[str, np.float64] = {}
        tree = ast.fix_missing_locations(_ConstantsToNames(self._constants).visit(tree))
        self._code = compile(tree, "<formula>", "eval")
        self._globals = {"__builtins__": {}, "exp": np.exp, "log": np.log,
                         "cosh": np.cosh, "sinh": np.sinh, "tanh": np.tanh,
                         "sqrt": np.sqrt, "abs": np.abs, "cos": np.cos, "sin": np.sin,
                         "where": np.where, "pi": np.pi}

    def __getstate__(self) -> dict[str, Any]:
        # code objects do not pickle: ship the expression and compile it again
        # on arrival (worker processes, the fit cache)
        return {k: v for k, v in self.__dict__.items()
                if k not in ("_code", "_globals", "_constants")}

    def __setstate__(self, state: dict[str, Any]) -> None:
        self.__dict__.update(state)
        self._compile()

    def __repr__(self) -> str:
        return (f"FormulaModel({self.expression!r}, params={list(self.param_names)}, "
                f"observables={list(self.observables)}, n_points={self.n_points})")

    @property
    def layout(self) -> ParameterLayout:
        """No built-in families: internal and reported parameters are the formula's."""
        empty = {name: slice(0, 0) for name in ("energies", "oscillating_energies",
                                                 "amplitudes", "oscillating_amplitudes",
                                                 "constants")}
        return ParameterLayout(states=0, oscillating=0, internal=dict(empty),
                               reported=dict(empty))

    def energies(self, theta: np.ndarray) -> np.ndarray:
        raise ValueError("a formula model has no built-in energies")

    def predict(self, theta: np.ndarray) -> np.ndarray:
        theta = np.asarray(theta, dtype=float)
        local = {name: theta[..., i, None] for i, name in enumerate(self.param_names)}
        local.update(self._constants)
        local["t"] = self.t
        local["T"] = np.float64(self.time_extent)
        with np.errstate(all="ignore"):
            out = eval(self._code, self._globals, local)  # noqa: S307 - checked by check_formula
        out = np.asarray(out, dtype=float)
        return np.broadcast_to(out, theta.shape[:-1] + (self.n_points,)).copy()

    def jacobian(self, theta: np.ndarray) -> np.ndarray:
        """Central-difference jacobian, (..., n_points, n_params)."""
        theta = np.asarray(theta, dtype=float)
        p = self.n_params
        h = np.cbrt(np.finfo(float).eps) * np.maximum(np.abs(theta), 1e-3)   # (..., p)
        step = h[..., :, None] * np.eye(p)                                  # (..., p, p)
        up = self.predict(theta[..., None, :] + step)                       # (..., p, n)
        down = self.predict(theta[..., None, :] - step)
        return np.swapaxes((up - down) / (2.0 * h[..., :, None]), -1, -2)

    def to_reported(self, theta: np.ndarray) -> np.ndarray:
        return np.array(theta, dtype=float, copy=True)

    def from_reported(self, values: np.ndarray) -> np.ndarray:
        values = np.asarray(values, dtype=float)
        if values.shape[-1] != self.n_params:
            raise ValueError(f"expected {self.n_params} parameters "
                             f"{list(self.reported_names)}, got {values.shape[-1]}")
        return values.copy()

    def reported_jacobian(self, theta: np.ndarray) -> np.ndarray:
        theta = np.asarray(theta, dtype=float)
        return np.broadcast_to(np.eye(self.n_params),
                               theta.shape[:-1] + (self.n_params, self.n_params)).copy()


def make_model(form: str, states: int, observables: Sequence[str],
               t_ranges: Mapping[str, np.ndarray], time_extent: int, *,
               oscillating: int = 0, constant: bool = False,
               operators: Mapping[str, tuple[str, str]] | None = None,
               formula: Mapping | None = None) -> CorrelatorModel:
    """Build the correlator model of one fit.

    Parameters
    ----------
    form : {"exp", "cosh", "sinh", "formula"}
        Functional form; ``formula`` uses ``formula``.
    states : int
        Number of ordinary states (ignored for formulas).
    observables : sequence of str
        The fit's observables, in order (the data vector's order).
    t_ranges : mapping
        Observable name -> timeslices in the fit.
    time_extent : int
        Lattice time extent ``T`` (used by cosh/sinh and available as ``T`` in
        formulas).
    oscillating : int, optional
        Number of oscillating partner states, ``(-1)^t`` terms with their own
        energies ``Eosc_n`` (staggered fermions).
    constant : bool, optional
        Add a constant ``c.NAME`` per observable (e.g. thermal wrap-around).
    operators : mapping, optional
        Observable name -> ``(source, sink)`` operator labels; amplitudes are
        then ``A_n = Z_n.source * Z_n.sink``.
    formula : mapping, optional
        ``{"expression": str, "params": {NAME: start}}`` for ``form="formula"``.

    Returns
    -------
    CorrelatorModel

    Raises
    ------
    plateaufit.errors.FitError
        When the model cannot be set up; ``where`` is the spec key of the fit
        entry at fault (``model``, ``states``, ``formula.expression`` ...),
        relative to the fit.

    References
    ----------
    G. P. Lepage et al., "Constrained curve fitting", Nucl. Phys. B (Proc.
    Suppl.) 106 (2002) 12.
    """
    if form not in FORMS:
        raise FitError("model", f"unknown model '{form}'; use one of {list(FORMS)}")
    if form == "formula":
        if not formula or "expression" not in formula:
            raise FitError("formula", "model 'formula' needs formula: {expression: ..., "
                           "params: {NAME: start}}")
        if oscillating or constant or operators:
            raise FitError("model", "oscillating, constant and factorised apply to the "
                           "exp/cosh/sinh models only; write them into the formula instead")
        try:
            return FormulaModel(formula["expression"], formula.get("params") or {},
                                observables, t_ranges, time_extent)
        except ValueError as exc:
            raise FitError("formula.expression", str(exc)) from None
    if formula:
        raise FitError("formula", f"a formula is given but the model is '{form}'; "
                       "set model: formula to use it, or remove the formula")
    if int(states) != states or states < 1:
        raise FitError("states", f"states must be a whole number >= 1, got {states}")
    if int(oscillating) != oscillating or oscillating < 0:
        raise FitError("oscillating", f"oscillating must be a whole number >= 0, "
                       f"got {oscillating}")
    if form != "exp" and (time_extent is None or time_extent <= 0):
        raise FitError("ensemble.time_extent", f"the {form} model needs the time extent T > 0")
    for o in observables:
        if o in t_ranges:
            tt = np.asarray(t_ranges[o], dtype=float)
            if tt.size and (np.any(tt < 0) or (form != "exp" and np.any(tt > time_extent))):
                raise FitError("tmin", f"timeslices of '{o}' must lie in 0..{time_extent}, "
                               f"got {tt.min():g}..{tt.max():g}")
    try:
        return CorrelatorModel(form, int(states), observables, t_ranges, time_extent,
                               oscillating=int(oscillating), constant=constant,
                               operators=operators)
    except ValueError as exc:
        raise FitError("observables" if "observ" in str(exc) else "operators"
                       if "operator" in str(exc) else "", str(exc)) from None
