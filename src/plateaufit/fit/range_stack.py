"""Central fits of many fit ranges in one call of the batched engine.

A scan fits one model to the same data over many ranges ``[tmin, tmax]``, each
from several starting points. Every (range, start) pair is a small
least-squares problem; solved one by one, each pays the fixed cost of a
minimiser's iteration (hundreds of small numpy calls) many times over. Here
they are stacked into the rows of one Levenberg-Marquardt run
(:func:`plateaufit.fit.batched.batched_refits`): the model is evaluated on the
union of the ranges, and each row's whitening matrix picks out and whitens
its own range's points (a rectangular matrix, zero outside the range, padded
with zero rows to the longest range). A row's chi2 is then exactly its
range's correlated chi2, and the rows iterate independently, each with its own
damping and stopping rule.

Per range the converged row with the lowest chi2 is kept
(:func:`plateaufit.fit.central.choose_start`); a range none of whose starts
converged inside its bounds continues in the bounded minimiser; every result
is finished, and checked for stationarity, by
:func:`plateaufit.fit.central.finish_central`.

References
----------
K. Levenberg, Quart. Appl. Math. 2 (1944) 164; D. W. Marquardt, J. Soc.
Indust. Appl. Math. 11 (1963) 431 -- the damped least-squares iteration.

G. P. Lepage et al., "Constrained curve fitting", Nucl. Phys. B (Proc.
Suppl.) 106 (2002) 12 -- priors as extra residuals.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import numpy as np

from plateaufit.fit.batched import batched_refits
from plateaufit.fit.central import (CENTRAL_MAX_ITER, CENTRAL_STAT_TOL, CentralFit,
                                    bounded_fallback, choose_start, finish_central,
                                    fit_with_factor, needs_bounded_minimiser)
from plateaufit.fit.constraints import internal_bounds, prior_terms
from plateaufit.fit.guesses import starting_points
from plateaufit.fit.minimise import LeastSquaresProblem
from plateaufit.fit.models import make_model
from plateaufit.fit.numerics import CaughtWarnings, merge_messages
from plateaufit.fit.ranges import RangeProblem
from plateaufit.fit.whitening import whitener

__all__ = ["central_fits"]


def _same_model(a: RangeProblem, b: RangeProblem) -> bool:
    return (a.form == b.form and a.states == b.states and a.observables == b.observables
            and a.model.time_extent == b.model.time_extent
            and a.model_options == b.model_options and a.priors == b.priors
            and a.bounds == b.bounds and a.start == b.start)


def central_fits(problems: Sequence[RangeProblem],
                 lowers: Sequence[Mapping[str, float] | None] | None = None
                 ) -> list[CentralFit]:
    """The central fit of every range, all ranges and starts in one engine call.

    Parameters
    ----------
    problems : sequence of RangeProblem
        Ranges of one model (same form, states, observables, model options,
        priors, bounds and start overrides); only the range differs.
    lowers : sequence of mapping or None, optional
        Per range, the reported parameters of the fit with one state fewer on
        the same range (extra starting points, see
        :func:`plateaufit.fit.guesses.starting_points`).

    Returns
    -------
    list of CentralFit
        In the order of ``problems``.

    Raises
    ------
    ValueError
        When the problems are not fits of one model.
    """
    problems = list(problems)
    if not problems:
        return []
    lowers = list(lowers) if lowers is not None else [None] * len(problems)
    first = problems[0]
    if any(not _same_model(first, p) for p in problems[1:]):
        raise ValueError("central_fits stacks fits of one model only (same form, states, "
                         "observables, options, priors and bounds)")
    if not first.model.has_analytic_jacobian:
        # user formulas: one lmfit minimisation per range and start
        out = []
        for p, lower in zip(problems, lowers):
            y_map, t_map = p.y_by_observable()
            starts = starting_points(p.model, y_map, t_map, overrides=p.start, lower=lower)
            out.append(fit_with_factor(p.y, p.chol, p.model, starts, priors=p.priors,
                                       bounds=p.bounds, n_bins=p.n_bins,
                                       n_total_points=p.n_total_points, tol=p.tol))
        return out

    # the union of the ranges, per observable
    t_lo = min(p.tmin for p in problems)
    t_hi = max(p.tmax for p in problems)
    n_tu = t_hi - t_lo + 1
    observables = first.observables
    t_union = np.arange(t_lo, t_hi + 1)
    union = make_model(first.form, first.states, observables,
                       {o: t_union for o in observables}, first.model.time_extent,
                       **first.model_options)
    n_union = union.n_points
    y_union = np.zeros(n_union)
    columns = []
    for p in problems:
        cols = np.concatenate([j * n_tu + np.arange(p.tmin - t_lo, p.tmax - t_lo + 1)
                               for j in range(len(observables))])
        columns.append(cols)
        y_union[cols] = p.y
    n_max = max(c.size for c in columns)

    # rows: every start of every range
    starts, owner = [], []
    for i, (p, lower) in enumerate(zip(problems, lowers)):
        y_map, t_map = p.y_by_observable()
        pts = starting_points(p.model, y_map, t_map, overrides=p.start, lower=lower)
        starts.append(pts)
        owner.extend([i] * pts.shape[0])
    starts = np.concatenate(starts, axis=0)
    owner = np.array(owner)
    m = starts.shape[0]
    whiteners = np.zeros((m, n_max, n_union))
    range_whiteners = [whitener(p.chol) for p in problems]
    for row in range(m):
        i = owner[row]
        cols = columns[i]
        whiteners[row][np.ix_(np.arange(cols.size), cols)] = range_whiteners[i]
    info: dict = {}
    with CaughtWarnings() as engine_warnings:
        theta, conv = batched_refits(np.broadcast_to(y_union, (m, n_union)), union, starts,
                                     whiteners=whiteners, priors=first.priors,
                                     bounds=first.bounds, max_iter=CENTRAL_MAX_ITER,
                                     stol=CENTRAL_STAT_TOL, info=info)
    iterations = info.get("iterations", np.zeros(m, dtype=np.int64))
    # chi2 of every row (data through its own whitener, plus priors)
    with np.errstate(all="ignore"):
        resid = np.einsum("mij,mj->mi", whiteners, union.predict(theta) - y_union)
        chi2 = np.einsum("mi,mi->m", resid, resid)
        idx, mean, width = prior_terms(union, first.priors)
        if idx.size:
            rp = (union.to_reported(theta)[:, idx] - mean) / width
            chi2 = chi2 + np.einsum("mk,mk->m", rp, rp)
    lo, hi = internal_bounds(union, first.bounds)
    prior = prior_terms(first.model, first.priors)
    out = []
    for i, p in enumerate(problems):
        rows = np.flatnonzero(owner == i)
        with CaughtWarnings() as caught:
            th, ok, message, best = choose_start(theta[rows], conv[rows], chi2[rows])
            nfev = int(iterations[rows].sum())
            problem = LeastSquaresProblem(p.model, p.y, range_whiteners[i], prior)
            if not ok and needs_bounded_minimiser(lo, hi):
                th, ok, message, n_more = bounded_fallback(problem, best, lo, hi, p.tol, None)
                nfev += n_more
            fit = finish_central(problem, np.array(th, dtype=float), ok, message, nfev,
                                 bounds=p.bounds, n_bins=p.n_bins,
                                 n_total_points=p.n_total_points)
        # the shared engine call's warnings (rare: it ignores floating-point
        # errors) are counted with the first range
        shared = engine_warnings if i == 0 else None
        fit.n_numerical_warnings = caught.count + (shared.count if shared else 0)
        fit.numerical_warnings = merge_messages(caught.messages,
                                                shared.messages if shared else ())
        out.append(fit)
    return out
