"""One fit range set up for fitting: model, data vector, covariance and options.

:func:`prepare_range` turns binned data and the options of a fit into a
:class:`RangeProblem`, which the central fit (:mod:`plateaufit.fit.range_stack`)
and the jackknife refits (:mod:`plateaufit.fit.correlator_fit`) work on.

References
----------
O. Ledoit, M. Wolf, J. Multivar. Anal. 88 (2004) 365 -- the shrunk covariance
of the mean (via :mod:`plateaufit.stats.covariance`).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np

from plateaufit.errors import FitError
from plateaufit.fit.central import DEFAULT_TOL
from plateaufit.fit.models import EFFECTIVE_MASS_KIND, CorrelatorModel, make_model
from plateaufit.fit.whitening import cholesky_factor
from plateaufit.stats import covariance as covmod
from plateaufit.stats.effmass import effective_mass_jackknife

#: With ``per_sample="auto"``, ranges with fewer bins than this many per data point
#: refit every jackknife sample with its own covariance. Measured on invented
#: replicas (single-state cosh, tau_int 4.5): with 32 bins for 11 points a frozen
#: covariance left the errors 28% too small (1 sigma coverage 0.57), per-sample
#: covariances restored 0.66-0.69; with 300 bins for 11 points the frozen
#: covariance costs about 3%, and per-sample refits three times the time.
PER_SAMPLE_BINS_PER_POINT = 10

__all__ = ["RangeProblem", "prepare_range", "PER_SAMPLE_BINS_PER_POINT", "range_block",
           "as_observables"]


@dataclass
class RangeProblem:
    """One fit range set up for fitting: model, data vector, covariance, options.

    Built by :func:`prepare_range`; what :func:`central_of_range` and
    :func:`refit_range` need.
    """

    model: CorrelatorModel
    observables: tuple[str, ...]
    tmin: int
    tmax: int
    states: int
    form: str
    x: np.ndarray                   # (n_bins, n_points) binned data in the range
    y: np.ndarray                   # (n_points,) their mean
    covariance: Any                 # CovarianceResult
    chol: np.ndarray                # its lower Cholesky factor
    n_total_points: int
    covariance_options: dict
    priors: Mapping[str, Any] | None = None
    bounds: Mapping[str, Any] | None = None
    start: Mapping[str, float] | None = None
    per_sample: bool = False
    engine: str = "auto"
    tol: float = DEFAULT_TOL
    effective_masses: tuple = ()    # ((value, error) over the range, per observable)
    model_options: dict = field(default_factory=dict)
    data: dict = field(default_factory=dict, repr=False)

    @property
    def n_bins(self) -> int:
        return int(self.x.shape[0])

    def y_by_observable(self) -> tuple[dict[str, np.ndarray], dict[str, np.ndarray]]:
        slices = self.model.point_slices()
        return ({n: self.y[slices[n]] for n in self.observables},
                {n: self.model.t_ranges[n] for n in self.observables})

    def with_states(self, states: int) -> RangeProblem:
        """The same range and data with another number of states (options restricted
        to the parameters that model has)."""
        t = np.arange(self.tmin, self.tmax + 1)
        model = make_model(self.form, states, self.observables,
                           {n: t for n in self.observables}, self.model.time_extent,
                           **self.model_options)
        keep = set(model.reported_names)

        def restrict(d):
            if not d:
                return None
            out = {k: v for k, v in d.items() if k in keep}
            return out or None
        return replace(self, model=model, states=int(states), priors=restrict(self.priors),
                       bounds=restrict(self.bounds), start=restrict(self.start))


def as_observables(binned) -> dict[str, np.ndarray]:
    if isinstance(binned, Mapping):
        data = {str(k): np.asarray(v, dtype=float) for k, v in binned.items()}
    else:
        data = {"corr": np.asarray(binned, dtype=float)}
    if not data:
        raise FitError("observables", "a fit needs at least one observable")
    n_bins = None
    for name, arr in data.items():
        if arr.ndim != 2:
            raise FitError(f"observables.{name}", f"binned data must have shape "
                           f"(n_bins, n_t), got {arr.shape}")
        if n_bins is not None and arr.shape[0] != n_bins:
            raise FitError(f"observables.{name}", f"has {arr.shape[0]} bins but the other "
                           f"observables of the fit have {n_bins}; bin them alike")
        n_bins = arr.shape[0]
    return data


def range_block(full: Any, data: Mapping[str, np.ndarray], tmin: int, tmax: int,
                n_bins: int, target: str = "diagonal") -> covmod.CovarianceResult:
    """The block of a covariance over all timeslices that one fit range uses.

    Parameters
    ----------
    full : ndarray (P, P) or a covariance result with ``.matrix``
        Over every timeslice of every observable of ``data``, concatenated in
        its order (``P = sum n_t``).
    data : mapping
        Observable -> binned data ``(n_bins, n_t)`` (for the layout only).
    tmin, tmax : int
        The range, both included.
    n_bins : int
        Recorded as the covariance's ``n_samples`` (the refits' samples).
    target : str
        Recorded when ``full`` does not say.

    Returns
    -------
    CovarianceResult
        The block (and the raw block when ``full`` has one), with the shrinkage
        ``full`` reports (0 for a plain array).

    Raises
    ------
    FitError
        ``where="covariance_matrix"``: wrong shape, or a non-finite entry in
        the block.
    """
    matrix = np.asarray(getattr(full, "matrix", full), dtype=float)
    raw = getattr(full, "raw_matrix", None)
    raw = matrix if raw is None else np.asarray(raw, dtype=float)
    sizes = [int(arr.shape[1]) for arr in data.values()]
    total = sum(sizes)
    if matrix.shape != (total, total) or raw.shape != matrix.shape:
        raise FitError("covariance_matrix", f"the covariance matrix has shape {matrix.shape} "
                       f"but the fit's observables have {total} timeslices in all ({sizes}); "
                       "give one row and column per timeslice of every observable")
    offsets = np.cumsum([0] + sizes[:-1])
    index = np.concatenate([o + np.arange(tmin, tmax + 1) for o in offsets])
    block = matrix[np.ix_(index, index)]
    raw_block = raw[np.ix_(index, index)]
    if not (np.all(np.isfinite(block)) and np.all(np.isfinite(raw_block))):
        raise FitError("covariance_matrix", f"the covariance matrix has non-finite entries "
                       f"in the range {tmin}..{tmax}; estimate it over every timeslice fitted")
    block = 0.5 * (block + block.T)
    raw_block = 0.5 * (raw_block + raw_block.T)
    with np.errstate(all="ignore"):
        eig = np.linalg.eigvalsh(covmod._correlation(block))[::-1]
        eig_raw = np.linalg.eigvalsh(covmod._correlation(raw_block))[::-1]
    return covmod.CovarianceResult(
        matrix=block, raw_matrix=raw_block, shrinkage=float(getattr(full, "shrinkage", 0.0)),
        target=str(getattr(full, "target", target)),
        condition_number=covmod._condition(block),
        condition_number_raw=covmod._condition(raw_block),
        eigenvalues=eig, eigenvalues_raw=eig_raw, n_samples=int(n_bins))


def prepare_range(binned, *, form: str, states: int, tmin: int, tmax: int,
                  time_extent: int, priors: Mapping[str, Any] | None = None,
                  bounds: Mapping[str, Any] | None = None,
                  shrinkage: str | float = "ledoit-wolf", target: str = "diagonal",
                  per_sample: bool | str = "auto", oscillating: int = 0,
                  constant: bool = False,
                  operators: Mapping[str, tuple[str, str]] | None = None,
                  formula: Mapping | None = None, start: Mapping[str, float] | None = None,
                  engine: str = "auto", n_total_points: int | None = None,
                  eigenvalue_floor: float | None = None,
                  tol: float = DEFAULT_TOL,
                  effective_masses: Mapping[str, Any] | None = None,
                  central: Mapping[str, np.ndarray] | np.ndarray | None = None,
                  covariance_matrix: Any = None
                  ) -> RangeProblem:
    """Set up one fit range (arguments as for :func:`fit_correlator`).

    ``effective_masses``, observable -> :class:`plateaufit.stats.effmass.EffectiveMass`
    of all its timeslices, saves computing them for every range of a scan (they
    serve the plateau test of the diagnostics).

    ``central``, observable -> all its timeslices (or one array for a single
    observable), is the data vector of the central fit when it is not the
    mean of the bins: for an estimate known through jackknife samples (a
    principal correlator of the GEVP), the bins are their pseudo-values
    (:func:`plateaufit.stats.resample.pseudo_values`) and ``central`` the
    estimate on the full data.

    Raises
    ------
    plateaufit.errors.FitError
        As :func:`fit_correlator`.
    """
    data = as_observables(binned)
    names = list(data)
    tmin, tmax = int(tmin), int(tmax)
    for name, arr in data.items():
        n_t = arr.shape[1]
        if tmin < 0 or tmin >= n_t:
            raise FitError("tmin", f"tmin={tmin} is outside the data of '{name}' "
                           f"(timeslices 0..{n_t - 1})")
        if tmax < tmin or tmax >= n_t:
            raise FitError("tmax", f"tmax={tmax} must lie in {tmin}..{n_t - 1} for '{name}' "
                           f"(tmin={tmin}, {n_t} timeslices)")
    t = np.arange(tmin, tmax + 1)
    model_options = {"oscillating": oscillating, "constant": constant,
                     "operators": operators, "formula": formula}
    model = make_model(form, states, names, {n: t for n in names}, time_extent,
                       **model_options)
    if model.n_points < model.n_params and not priors:
        raise FitError("tmax", f"the range {tmin}..{tmax} gives {model.n_points} points for "
                       f"{model.n_params} parameters; widen the range, use fewer states or "
                       "add priors")
    x = np.concatenate([data[n][:, tmin:tmax + 1] for n in names], axis=1)
    n_bins = x.shape[0]
    if n_bins < 2:
        raise FitError("", f"a jackknife needs at least 2 bins, got {n_bins}")
    if not np.all(np.isfinite(x)):
        raise FitError("", "the binned data in the fit range hold non-finite values")
    if n_total_points is None:
        n_total_points = int(sum(arr.shape[1] for arr in data.values()))
    cov_kw: dict[str, Any] = {"shrinkage": shrinkage, "target": target}
    if eigenvalue_floor is not None:
        cov_kw["eigenvalue_floor"] = eigenvalue_floor
    if per_sample == "auto":
        # (a delete-one covariance needs at least 2 bins left)
        per_sample = (covariance_matrix is None and n_bins >= 3
                      and n_bins < PER_SAMPLE_BINS_PER_POINT * x.shape[1])
    elif not isinstance(per_sample, (bool, np.bool_)):
        raise FitError("per_sample", f"per_sample must be True, False or 'auto', got "
                       f"{per_sample!r}")
    if covariance_matrix is None:
        cov_result = covmod.covariance_of_mean(x, **cov_kw)
    else:
        if per_sample:
            raise FitError("per_sample", "per-sample covariances come from the bins; with a "
                           "given covariance_matrix every refit uses its block, so set "
                           "per_sample to False")
        cov_result = range_block(covariance_matrix, data, tmin, tmax, n_bins, target)
    chol = cholesky_factor(cov_result.matrix, n_bins)
    effective = ()
    kind = EFFECTIVE_MASS_KIND.get(form)
    if kind is not None and not oscillating and tmax > tmin:
        masses = []
        for name in names:
            # on all timeslices (the cosh/sinh masses depend on t itself),
            # then the pairs (t, t + 1) inside the range
            m = (effective_masses or {}).get(name)
            if m is None:
                with np.errstate(all="ignore"):
                    m = effective_mass_jackknife(data[name][:, :tmax + 1], kind=kind,
                                                 time_extent=time_extent)
            masses.append((m.value[tmin:tmax], m.error[tmin:tmax]))
        effective = tuple(masses)
    y = x.mean(axis=0)
    if central is not None:
        central_map = central if isinstance(central, Mapping) else {names[0]: central}
        missing = [n for n in names if n not in central_map]
        if missing:
            raise FitError("central", f"no central values for {missing}")
        y = np.concatenate([np.asarray(central_map[n], dtype=float).ravel()[tmin:tmax + 1]
                            for n in names])
        if y.size != x.shape[1] or not np.all(np.isfinite(y)):
            raise FitError("central", "the central values must be finite and cover every "
                           "timeslice of the data")
    return RangeProblem(
        model=model, observables=tuple(names), tmin=tmin, tmax=tmax, states=int(states),
        form=form, x=x, y=y, covariance=cov_result, chol=chol,
        n_total_points=int(n_total_points), covariance_options=cov_kw, priors=priors,
        bounds=bounds, start=start, per_sample=bool(per_sample), engine=engine, tol=tol,
        effective_masses=effective, model_options=model_options)


