"""Fit-range and model-size scans.

A scan fits the same data over every combination of ``tmin``, ``tmax`` and
number of states the user asks for, keeping the points with at least one
degree of freedom. Each point is an independent
:func:`~plateaufit.fit.correlator_fit.fit_correlator` call (central fit plus
jackknife refits, started from its own automatic starting values), so the
results do not depend on the order of evaluation, the executor or the number
of workers: a serial run and a run on a process pool give the same numbers,
bit for bit. The points are returned in a fixed order: by number of states,
then ``tmin``, then ``tmax``.

References
----------
W. I. Jay, E. T. Neil, "Bayesian model averaging for analysis of lattice field
theory results", Phys. Rev. D 103 (2021) 114502 -- averaging over fit ranges
and models instead of choosing one.
"""

from __future__ import annotations

import numbers
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any, Protocol

import numpy as np

from plateaufit.errors import FitError, PlateaufitError
from plateaufit.fit.central import CentralFit
from plateaufit.fit.correlator_fit import CorrelatorFit, refit_range, with_warnings
from plateaufit.fit.models import EFFECTIVE_MASS_KIND, reported_parameter_names
from plateaufit.fit.numerics import CaughtWarnings, merge_messages
from plateaufit.fit.range_stack import central_fits
from plateaufit.fit.ranges import RangeProblem, prepare_range
from plateaufit.stats.effmass import effective_mass_jackknife

RangeSpec = int | Sequence[int]


@dataclass(frozen=True)
class ScanPoint:
    """One fit of a scan.

    Attributes
    ----------
    tmin, tmax : int
        Fit range, both included.
    states : int
        Number of ordinary states.
    n_points : int
        Data points in the fit, ``n_obs * (tmax - tmin + 1)``.
    n_params : int
        Fitted parameters.
    """

    tmin: int
    tmax: int
    states: int
    n_points: int
    n_params: int

    @property
    def dof(self) -> int:
        """Degrees of freedom, ``n_points - n_params``."""
        return self.n_points - self.n_params


def _is_int(x: Any) -> bool:
    return isinstance(x, numbers.Integral) and not isinstance(x, bool)


def expand_range(spec: RangeSpec, where: str) -> list[int]:
    """The values of ``tmin:`` / ``tmax:``: an int, ``[lo, hi]`` or ``[lo, hi, step]``.

    Both ends are included.

    Parameters
    ----------
    spec : int or sequence of int
    where : str
        Key named in errors (``tmin``, ``tmax``).

    Returns
    -------
    list of int
        Ascending values.

    Raises
    ------
    FitError
        For anything else, a negative value, ``lo > hi`` or ``step < 1``.
    """
    what = "an integer, [lo, hi] or [lo, hi, step] (both ends included)"
    if _is_int(spec):
        values = [int(spec)]
    elif isinstance(spec, (list, tuple)) and len(spec) in (2, 3) and all(_is_int(v) for v in spec):
        lo, hi = int(spec[0]), int(spec[1])
        step = int(spec[2]) if len(spec) == 3 else 1
        if lo > hi:
            raise FitError(where, f"the range {list(spec)} has lo > hi; write [lo, hi] with "
                                   "lo <= hi")
        if step < 1:
            raise FitError(where, f"the step in {list(spec)} must be at least 1")
        values = list(range(lo, hi + 1, step))
    else:
        raise FitError(where, f"expected {what}, got {spec!r}")
    if values[0] < 0:
        raise FitError(where, f"timeslices start at 0; got {values[0]}")
    return values


def _expand_states(states: int | Sequence[int]) -> list[int]:
    values = [states] if _is_int(states) else list(states) if isinstance(states, (list, tuple)) \
        else None
    if not values or not all(_is_int(s) and s >= 1 for s in values):
        raise FitError("states", f"expected a number of states >= 1 or a list of them, "
                                  f"got {states!r}")
    return sorted(set(int(s) for s in values))


def _parameter_counter(n_obs: int | None, n_params_fn: Callable[[int], int] | None,
                       observables: Sequence[str] | None, oscillating: int, constant: bool,
                       operators: Mapping[str, tuple[str, str]] | None,
                       formula: Mapping[str, Any] | None) -> tuple[int, Callable[[int], int]]:
    if observables is not None:
        observables = list(observables)
        if n_obs is not None and n_obs != len(observables):
            raise ValueError(f"n_obs={n_obs} but {len(observables)} observables were named")
        n_obs = len(observables)
    if n_obs is None or n_obs < 1:
        raise ValueError("give the number of observables (n_obs) or their names (observables)")
    if n_params_fn is not None:
        return n_obs, n_params_fn
    if formula is not None:
        n_formula = len(dict(formula.get("params", {})))
        return n_obs, lambda states: n_formula
    names = observables if observables is not None else [f"obs{i}" for i in range(n_obs)]

    def count(states: int) -> int:
        return len(reported_parameter_names(names, states, oscillating=oscillating,
                                            constant=constant, operators=operators))
    return n_obs, count


def scan_points(tmins: RangeSpec, tmaxs: RangeSpec, states: int | Sequence[int],
                n_obs: int | None = None, n_params_fn: Callable[[int], int] | None = None, *,
                observables: Sequence[str] | None = None, oscillating: int = 0,
                constant: bool = False, operators: Mapping[str, tuple[str, str]] | None = None,
                formula: Mapping[str, Any] | None = None) -> list[ScanPoint]:
    """Every (tmin, tmax, states) of a scan with at least one degree of freedom.

    Parameters
    ----------
    tmins, tmaxs : int or [lo, hi] or [lo, hi, step]
        Ranges of ``tmin`` and ``tmax`` (both ends included).
    states : int or sequence of int
        Numbers of states to try.
    n_obs : int, optional
        Number of observables fitted simultaneously (each contributes
        ``tmax - tmin + 1`` points). Not needed when ``observables`` is given.
    n_params_fn : callable, optional
        ``states -> number of fitted parameters``. By default counted with
        :func:`plateaufit.fit.models.reported_parameter_names` from
        ``observables`` (or ``n_obs``), ``oscillating``, ``constant`` and
        ``operators``; for a ``formula`` model, the number of its parameters.
    observables : sequence of str, optional
        The fit's observables (needed for factorised ``operators``).
    oscillating, constant, operators, formula
        Model options deciding the parameter count, as for
        :func:`plateaufit.fit.models.make_model` (``operators`` is its
        ``operators``).

    Returns
    -------
    list of ScanPoint
        Ordered by states, then tmin, then tmax; only ``tmin <= tmax`` and
        ``dof >= 1``.

    Raises
    ------
    FitError
        A malformed range (``where`` = ``tmin``, ``tmax`` or ``states``), or
        no point with a degree of freedom left.
    """
    lows = expand_range(tmins, "tmin")
    highs = expand_range(tmaxs, "tmax")
    state_list = _expand_states(states)
    n_obs, count = _parameter_counter(n_obs, n_params_fn, observables, oscillating, constant,
                                      operators, formula)
    points = []
    for n_states in state_list:
        n_params = int(count(n_states))
        for lo in lows:
            for hi in highs:
                n_points = n_obs * (hi - lo + 1)
                if hi >= lo and n_points - n_params >= 1:
                    points.append(ScanPoint(lo, hi, n_states, n_points, n_params))
    if not points:
        raise FitError("", f"no fit range of tmin {tmins!r}, tmax {tmaxs!r} with states "
                            f"{state_list} leaves a degree of freedom (points must exceed "
                            "parameters); widen the ranges or use fewer states")
    return points


#: fit_correlator options keyed by reported parameter name.
_BY_PARAMETER = ("priors", "bounds", "start")


def _per_states_kwargs(fit_kwargs: dict[str, Any], names_of: Callable[[int], list[str]] | None,
                       state_list: list[int]) -> dict[int, dict[str, Any]]:
    """fit_correlator keywords for each number of states.

    In a scan over the number of states, ``priors``, ``bounds`` and ``start``
    may name parameters of the larger models only (``E1`` in a scan over 1
    and 2 states); each point gets the entries its model has. A name no model
    of the scan has is an error (a typo, most likely).
    """
    if names_of is None:   # formula models: the parameters do not depend on states
        return {s: dict(fit_kwargs) for s in state_list}
    names = {s: set(names_of(s)) for s in state_list}
    every = set().union(*names.values())
    for key in _BY_PARAMETER:
        for name in fit_kwargs.get(key) or {}:
            if name not in every:
                raise FitError(f"{key}.{name}", f"there is no parameter '{name}' in any fit of "
                               f"this scan; the parameters are {sorted(every)}")
    out = {}
    for s in state_list:
        kw = dict(fit_kwargs)
        for key in _BY_PARAMETER:
            if kw.get(key):
                kept = {k: v for k, v in kw[key].items() if k in names[s]}
                kw[key] = kept or None
        out[s] = kw
    return out


def _prepare_point(data: Any, kwargs_by_states: dict[int, dict[str, Any]],
                   effective: dict[str, Any] | None, point: tuple[int, int, int]
                   ) -> RangeProblem:
    tmin, tmax, states = point
    try:
        return prepare_range(data, tmin=tmin, tmax=tmax, states=states,
                             effective_masses=effective, **kwargs_by_states[states])
    except PlateaufitError as err:
        raise type(err)(err.where, f"fit range tmin={tmin}, tmax={tmax}, states={states}: "
                                   f"{err.message}") from None


def _refit_point(shared: tuple[Any, dict[int, dict[str, Any]], dict[str, Any] | None],
                 item: tuple[tuple[int, int, int], CentralFit]) -> CorrelatorFit:
    """Refit one scan point on every jackknife sample (module level, so it runs in
    worker processes)."""
    data, kwargs_by_states, effective = shared
    point, central = item
    with CaughtWarnings() as caught:
        problem = _prepare_point(data, kwargs_by_states, effective, point)
        fit = refit_range(problem, central)
    return with_warnings(fit, caught)


def _effective_masses(data: Any, fit_kwargs: dict[str, Any]) -> dict[str, Any] | None:
    """Jackknife effective masses of every observable on all timeslices, once per scan."""
    kind = EFFECTIVE_MASS_KIND.get(fit_kwargs.get("form"))
    if kind is None or fit_kwargs.get("oscillating"):
        return None
    series = data if isinstance(data, Mapping) else {"corr": data}
    with np.errstate(all="ignore"):
        return {name: effective_mass_jackknife(values, kind=kind,
                                               time_extent=fit_kwargs.get("time_extent"))
                for name, values in series.items()}


def _central_phase(problems: dict[tuple[int, int, int], RangeProblem],
                   state_list: list[int],
                   known: Mapping[tuple[int, int, int], CentralFit] | None = None
                   ) -> dict[tuple[int, int, int], CentralFit]:
    """Central fits of every point: one stacked engine call per number of states.

    States go upward so that a fit of ``n`` states starts, among others, from
    the fit of ``n - 1`` states on the same range (made here when the scan does
    not include it, taken from ``known`` -- the central fits of points found in
    the fit cache -- when there).
    """
    centrals: dict[tuple[int, int, int], CentralFit] = dict(known or {})
    formula = any(p.form == "formula" for p in problems.values())
    for states in state_list:
        keys = [k for k in problems if k[2] == states]
        lowers: list[Any] = [None] * len(keys)
        if states >= 2 and not formula:
            missing = [k for k in keys if (k[0], k[1], states - 1) not in centrals]
            if missing:
                extra = _lower_centrals([problems[k].with_states(states - 1) for k in missing])
                for k, fit in zip(missing, extra):
                    centrals.setdefault((k[0], k[1], states - 1), fit)
            lowers = []
            for k in keys:
                below = centrals[(k[0], k[1], states - 1)]
                lowers.append(below.reported if below.converged else None)
        for k, fit in zip(keys, central_fits([problems[k] for k in keys], lowers)):
            centrals[k] = fit
    return centrals


def _lower_centrals(problems: list[RangeProblem]) -> list[CentralFit]:
    """Central fits with one state fewer, for points whose scan lacks them."""
    states = problems[0].states
    lowers: list[Any] = [None] * len(problems)
    if states >= 2:
        below = _lower_centrals([p.with_states(states - 1) for p in problems])
        lowers = [b.reported if b.converged else None for b in below]
    return central_fits(problems, lowers)


def _n_timeslices(binned: np.ndarray | Mapping[str, np.ndarray]) -> tuple[list[str] | None, int]:
    if isinstance(binned, Mapping):
        if not binned:
            raise FitError("observables", "a scan needs at least one observable")
        return list(binned), min(np.shape(v)[-1] for v in binned.values())
    return None, np.shape(binned)[-1]


def _setup(binned: np.ndarray | Mapping[str, np.ndarray], tmin: RangeSpec, tmax: RangeSpec,
           states: int | Sequence[int], fit_kwargs: dict[str, Any]):
    """The points of a scan and what every point needs:
    ``(keys, (data, kwargs per number of states, fit_kwargs))``."""
    names, n_t = _n_timeslices(binned)
    options = {"oscillating": fit_kwargs.get("oscillating", 0) or 0,
               "constant": bool(fit_kwargs.get("constant", False)),
               "operators": fit_kwargs.get("operators")}
    points = scan_points(tmin, tmax, states, n_obs=1 if names is None else len(names),
                         observables=names, formula=fit_kwargs.get("formula"), **options)
    last = max(p.tmax for p in points)
    if last > n_t - 1:
        raise FitError("tmax", f"tmax = {last} is beyond the data, whose last timeslice is "
                                f"{n_t - 1} (after folding); lower tmax")
    if isinstance(binned, Mapping):
        data: Any = {name: np.asarray(v, dtype=np.float64) for name, v in binned.items()}
    else:
        data = np.asarray(binned, dtype=np.float64)
    names_of = None
    if fit_kwargs.get("form") != "formula" and fit_kwargs.get("formula") is None:
        observables = names if names is not None else ["corr"]   # fit_correlator's default name

        def names_of(n_states: int) -> list[str]:
            return reported_parameter_names(observables, n_states, **options)
    state_list = sorted({p.states for p in points})
    keys = [(p.tmin, p.tmax, p.states) for p in points]
    kwargs_by_states = _per_states_kwargs(dict(fit_kwargs), names_of, state_list)
    return keys, (data, kwargs_by_states, fit_kwargs)


def _with_effective_masses(setup: tuple[Any, dict[int, dict[str, Any]], dict[str, Any]]
                           ) -> tuple[Any, dict[int, dict[str, Any]], dict[str, Any] | None]:
    """The task data of the points to fit: the effective masses (starting values) added,
    computed only when some point is fitted (not for a scan served by the cache)."""
    data, kwargs_by_states, fit_kwargs = setup
    return data, kwargs_by_states, _effective_masses(data, fit_kwargs)


def _problems(shared: tuple[Any, dict[int, dict[str, Any]], dict[str, Any] | None],
              keys: Sequence[tuple[int, int, int]]) -> dict[tuple[int, int, int], RangeProblem]:
    data, kwargs_by_states, effective = shared
    with CaughtWarnings():
        return {k: _prepare_point(data, kwargs_by_states, effective, k) for k in keys}


def prepare_scan(binned: np.ndarray | Mapping[str, np.ndarray], *, tmin: RangeSpec,
                 tmax: RangeSpec, states: int | Sequence[int], **fit_kwargs: Any
                 ) -> dict[tuple[int, int, int], RangeProblem]:
    """Set up every point of a scan without fitting: the check of a scan.

    Builds each point's model, data vector and covariance of the mean
    exactly as :func:`scan` does, so a point whose covariance cannot be used
    (singular, not positive definite) or whose model cannot be set up raises
    here, naming the point, before any fit runs.

    Returns
    -------
    dict
        ``(tmin, tmax, states)`` -> :class:`~plateaufit.fit.ranges.RangeProblem`,
        in the scan's order.

    Raises
    ------
    FitError
        As :func:`scan` would, for the first point that cannot be set up.
    """
    keys, setup = _setup(binned, tmin, tmax, states, fit_kwargs)
    return _problems(_with_effective_masses(setup), keys)


class PointCache(Protocol):
    """Where :func:`scan` finds and keeps finished points (a fit cache).

    :class:`plateaufit.pipeline.cache.CacheSession` is one: keys over
    everything that decides a point, entries on disk.
    """

    def keys(self, data: Any, kwargs_by_states: Mapping[int, Mapping[str, Any]],
             points: Sequence[tuple[int, int, int]]) -> list[str]: ...

    def get(self, key: str, point: tuple[int, int, int]) -> CorrelatorFit | None: ...

    def put(self, key: str, fit: CorrelatorFit) -> None: ...


def scan(binned: np.ndarray | Mapping[str, np.ndarray], *, tmin: RangeSpec, tmax: RangeSpec,
         states: int | Sequence[int], executor: Any = None, progress: Any = False,
         label: str | None = None, cache: PointCache | None = None,
         **fit_kwargs: Any) -> list[CorrelatorFit]:
    """Fit every point of a fit-range / model-size scan.

    Parameters
    ----------
    binned : ndarray (n_bins, n_t) or dict NAME -> ndarray (n_bins, n_t)
        Binned, folded data, as for
        :func:`~plateaufit.fit.correlator_fit.fit_correlator`.
    tmin, tmax : int or [lo, hi] or [lo, hi, step]
        Ranges scanned (both ends included).
    states : int or sequence of int
        Numbers of states scanned.
    executor : plateaufit.parallel.Executor, optional
        Where to run the points (default: serially in this process). The data
        are shipped with each chunk of points, not with every point.
    progress : bool or progress bar, optional
        Progress bar (on a terminal only), or an open bar to advance by one
        per point (points from the cache included).
    label : str, optional
        Label of the progress bar (the fit's name).
    cache : PointCache, optional
        A fit cache: points found there are not fitted again (neither their
        central fit nor their refits), the others are fitted and stored.
        Results are the same, bit for bit, as without it.
    **fit_kwargs
        Passed to every ``fit_correlator`` call (``form``, ``time_extent``,
        ``priors``, ``operators``, ...). ``priors``, ``bounds`` and ``start``
        may name parameters that only the larger models of the scan have
        (``E1`` when scanning 1 and 2 states): each point gets the entries its
        model has.

    Returns
    -------
    list of CorrelatorFit
        In the order of :func:`scan_points`; the same bit for bit for any
        executor.

    Raises
    ------
    FitError
        A malformed range, a ``tmax`` beyond the data, or no usable point
        (``where`` is the argument: ``tmin``, ``tmax``, ``states``); a point
        that cannot be set up (the message names the point).

    References
    ----------
    W. I. Jay, E. T. Neil, Phys. Rev. D 103 (2021) 114502.
    """
    keys, setup = _setup(binned, tmin, tmax, states, fit_kwargs)
    found: dict[tuple[int, int, int], CorrelatorFit] = {}
    cache_keys: dict[tuple[int, int, int], str] = {}
    if cache is not None:
        cache_keys = dict(zip(keys, cache.keys(setup[0], setup[1], keys)))
        for k in keys:
            fit = cache.get(cache_keys[k], k)
            if fit is not None:
                found[k] = fit
    todo = [k for k in keys if k not in found]
    if hasattr(progress, "update") and found:
        progress.update(len(found))
    if not todo:
        return [found[k] for k in keys]
    shared = _with_effective_masses(setup)
    problems = _problems(shared, todo)
    state_list = sorted({k[2] for k in todo})
    # 1. every range's central fit, here (one stacked engine call per number
    #    of states: deterministic, whatever the executor)
    with CaughtWarnings() as caught:
        centrals = _central_phase(problems, state_list,
                                  {k: fit.central for k, fit in found.items()})
    if caught.count:      # set-up warnings (rare): counted with the first point fitted
        first = centrals[todo[0]]
        first.n_numerical_warnings += caught.count
        first.numerical_warnings = merge_messages(first.numerical_warnings, caught.messages)
    # 2. the jackknife refits of every point, on the executor
    items = [(k, centrals[k]) for k in todo]
    if executor is None:
        from plateaufit.parallel import SerialExecutor

        executor = SerialExecutor()
    fitted = dict(zip(todo, executor.map(_refit_point, items, shared=shared,
                                         progress=progress, desc=label)))
    if cache is not None:
        for k in todo:
            cache.put(cache_keys[k], fitted[k])
    return [found[k] if k in found else fitted[k] for k in keys]
