"""Correlator matrices of a spec: the GEVP on the binned data, level fits, matrix results.

The data flow of ``matrices:`` (see DEVELOPERS.md, "Correlator matrices"):

1. :class:`GevpSolutions` stacks the binned data of a matrix's grid
   (aligned, folded and binned like every observable, with the same bins) into
   ``(n_bins, r, r, n_t)``, takes the mean and the jackknife samples, and
   solves the GEVP (:func:`plateaufit.stats.gevp.solve_gevp`: symmetrised,
   ``v^T C(t0) v = 1``, levels named at ``t0 + 1`` and followed by their
   eigenvectors, every sample assigned to the central's levels) once per
   ``(matrix, t0)`` it is asked for.
2. :func:`run_level_fit` fits one level through the ordinary fit machinery:
   the principal correlator's jackknife samples become bins with
   :func:`plateaufit.stats.resample.pseudo_values` (their jackknife samples
   are exactly the GEVP's, their covariance the jackknife covariance of
   ``lambda_n``, shrunk as ``covariance:`` says), the central fit is made to
   ``lambda_n`` of the mean matrix (``central=``), and the scan, the refits on
   every sample, the flags, ``choose`` and the model average are those of any
   fit. The fit's ``E0`` is the level's energy.
3. :func:`summarise_matrices` gives each matrix's :class:`MatrixResult`:
   effective energies of all principal correlators (``t0 = ceil(t/2)`` at
   every ``t`` for ``t0: half``), eigenvectors, crossings, level separations,
   the overlaps from the fitted energies, and for each level fit what the GEVP
   says inside its range (the warnings table reads those).

Errors of the numerical core are re-raised at the spec key: a ``C(t0)`` that
is not positive definite at ``matrices.NAME.t0``.

References
----------
.. [1] M. Lüscher, U. Wolff, Nucl. Phys. B 339 (1990) 222.
.. [2] B. Blossier, M. Della Morte, G. von Hippel, T. Mendes, R. Sommer, JHEP 04
   (2009) 094.
.. [3] J. W. Tukey, Ann. Math. Statist. 29 (1958) 614 -- pseudo-values.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass, replace
from typing import Any

import numpy as np

from plateaufit.errors import DataError, SpecError
from plateaufit.fit.models import EFFECTIVE_MASS_KIND
from plateaufit.fit.scan import scan
from plateaufit.pipeline.fits import covariance_kwargs, fit_kwargs
from plateaufit.pipeline.keys import located
from plateaufit.pipeline.matrix_results import (LevelCheck, MatrixResult, OverlapSummary,
                                                PrincipalEnergy)
from plateaufit.pipeline.prepare import Prepared, effective_mass_kind
from plateaufit.pipeline.results import EffectiveMassResult, FitResult
from plateaufit.pipeline.summary import summarise_scan
from plateaufit.report.tables import format_value_error
from plateaufit.specfile import Spec
from plateaufit.stats.covariance import covariance_of_mean
from plateaufit.stats.gevp import GevpResult, solve_gevp
from plateaufit.stats.principal import (half_t0_effective_energy, overlaps,
                                        principal_effective_energy)
from plateaufit.stats.resample import jackknife_error, jackknife_samples, pseudo_values

__all__ = ["BinnedMatrix", "GevpSolutions", "level_data", "run_level_fit", "solve_all",
           "summarise_matrices", "summarise_matrix", "reference_t0", "range_used",
           "log_matrices", "check_lines"]


@dataclass(frozen=True, eq=False)
class BinnedMatrix:
    """The binned data of one matrix of the spec.

    Attributes
    ----------
    name : str
    bins : ndarray (n_bins, r, r, n_t)
        ``bins[b, i, j] = `` the binned data of ``grid[i][j]``.
    central : ndarray (r, r, n_t)
        Mean of the bins.
    samples : ndarray (n_bins, r, r, n_t)
        Delete-one jackknife samples.
    """

    name: str
    bins: np.ndarray
    central: np.ndarray
    samples: np.ndarray


class GevpSolutions:
    """The GEVP of the matrices of a spec, solved once per ``(matrix, t0)`` asked for.

    Parameters
    ----------
    spec : Spec
    prepared : Prepared
        The binned data (:func:`plateaufit.pipeline.prepare.prepare`).

    Raises
    ------
    DataError
        From :meth:`at`: ``C(t0)`` not positive definite (``matrices.NAME.t0``).
    """

    def __init__(self, spec: Spec, prepared: Prepared) -> None:
        self.spec = spec
        self.prepared = prepared
        self._binned: dict[str, BinnedMatrix] = {}
        self._solved: dict[tuple[str, int], GevpResult] = {}

    def matrix(self, name: str) -> BinnedMatrix:
        """The binned matrix ``name`` (stacked from its grid once)."""
        if name not in self._binned:
            grid = self.spec.matrices[name].grid
            binned = self.prepared.binned
            bins = np.stack([np.stack([binned[entry] for entry in row], axis=1)
                             for row in grid], axis=1)
            self._binned[name] = BinnedMatrix(name=name, bins=bins, central=bins.mean(axis=0),
                                              samples=jackknife_samples(bins))
        return self._binned[name]

    def at(self, name: str, t0: int, *, fit_name: str | None = None) -> GevpResult:
        """The GEVP of matrix ``name`` at ``t0`` (``fit_name``: for whom, in messages)."""
        key = (name, int(t0))
        if key not in self._solved:
            m = self.matrix(name)
            matrix = self.spec.matrices[name]
            if not matrix.is_half:
                how = f"t0 = {t0}"
            elif fit_name:
                how = f"t0: half gives t0 = {t0} for fit {fit_name}"
            else:
                how = f"t0: half, reference t0 = {t0} (the smallest t0 of its fits)"
            try:
                self._solved[key] = solve_gevp(m.central, m.samples, int(t0))
            except (DataError, SpecError) as err:
                kind = type(err)
                where = f"matrices.{name}.t0" if err.where == "t0" else f"matrices.{name}.grid"
                raise kind(where, f"matrix {name} ({how}): {err.message}") from None
        return self._solved[key]


def reference_t0(spec: Spec, name: str) -> int:
    """The ``t0`` of a matrix's eigenvectors, crossings and overlaps in its results.

    The matrix's ``t0``; for ``t0: half`` the smallest ``t0`` of its fits (each
    fit's ``tmin`` lies above its own, so overlaps at the smallest chosen
    ``tmin`` lie after this one), or 1 when no fit uses the matrix.
    """
    matrix = spec.matrices[name]
    if not matrix.is_half:
        return int(matrix.t0)
    t0s = [spec.fit_t0(fit) for fit in spec.matrix_fits(name)]
    return min(t0s) if t0s else 1


def solve_all(spec: Spec, solutions: GevpSolutions) -> None:
    """Solve every GEVP the run will need, before any fit (a bad ``C(t0)`` stops it early)."""
    for name in spec.matrices:
        for fit in spec.matrix_fits(name):
            solutions.at(name, spec.fit_t0(fit), fit_name=fit.name)
        solutions.at(name, reference_t0(spec, name))


def level_data(result: GevpResult, level: int, name: str
               ) -> tuple[dict[str, np.ndarray], dict[str, np.ndarray]]:
    """Bins and central values of principal correlator ``level``, as a fit takes them.

    Returns ``({name: pseudo-values (S, n_t)}, {name: lambda_n of the mean matrix})``:
    the pseudo-values' jackknife samples are the GEVP's samples of ``lambda_n``
    (Tukey 1958), so the fit core's covariance and refits see exactly those.
    """
    bins = pseudo_values(result.eigenvalue_samples[:, level, :])
    return {name: bins}, {name: np.asarray(result.eigenvalues[level], dtype=float)}


def run_level_fit(spec: Spec, index: int, prepared: Prepared, *,
                  solutions: GevpSolutions | None = None, executor: Any = None,
                  progress: Any = False, cache: Any = None) -> FitResult:
    """Scan the fit ``fits[index]`` of one matrix level; choose or average.

    Parameters
    ----------
    spec : Spec
    index : int
        A fit with ``matrix:`` and ``level:``.
    prepared : Prepared
    solutions : GevpSolutions, optional
        Shared between the fits of a run (solved here when not given).
    executor, progress, cache
        As for :func:`plateaufit.pipeline.fits.run_fit`.

    Returns
    -------
    FitResult
        With ``matrix``, ``level`` and ``t0`` set; ``effective_mass[MATRIX]`` is
        the effective energy of the level's principal correlator at the fit's
        ``t0``; its ``E0`` is the level's energy.

    Raises
    ------
    SpecError, DataError, FitError
        At the spec key (``fits[i].tmin``, ``matrices.NAME.t0``, ...).
    """
    fit = spec.fits[index]
    if fit.matrix is None or fit.level is None:
        raise SpecError(f"fits[{index}]", "not a fit of a matrix level (it needs matrix: and "
                        "level:)")
    solutions = solutions if solutions is not None else GevpSolutions(spec, prepared)
    t0 = spec.fit_t0(fit)
    result = solutions.at(fit.matrix, t0, fit_name=fit.name)
    data, central = level_data(result, fit.level, fit.matrix)
    time_extent = spec.ensemble.time_extent
    with located(fit_index=index):
        fits = scan(data, tmin=fit.tmin, tmax=fit.tmax, states=fit.states_values,
                    executor=executor, progress=progress, label=fit.name, central=central,
                    cache=cache,
                    **fit_kwargs(spec, fit))
        summary = summarise_scan(fits, name=fit.name, choose=fit.chosen_point(),
                                 time_extent=time_extent)
    kind = EFFECTIVE_MASS_KIND[fit.form]
    eff = principal_effective_energy(result, kind, time_extent)
    em = EffectiveMassResult(t=eff.t, value=eff.value[fit.level], error=eff.error[fit.level],
                             kind=kind)
    return replace(summary, effective_mass={fit.matrix: em}, matrix=fit.matrix,
                   level=int(fit.level), t0=int(t0))


# --------------------------------------------------------------------------- summaries


def range_used(fit: FitResult) -> tuple[int, int]:
    """The timeslices a fit's result rests on: the chosen point's range, or for an
    average the span of the points with weight > 0 (the band when none has)."""
    if not fit.chosen.is_average:
        return fit.chosen.point.tmin, fit.chosen.point.tmax
    weighted = [p for p in fit.scan if p.weight > 0]
    if not weighted:
        return fit.chosen.band
    return min(p.tmin for p in weighted), max(p.tmax for p in weighted)


def _level_check(result: GevpResult, level: int, t0: int, lo: int, hi: int) -> LevelCheck:
    ts = np.arange(lo, hi + 1)
    crossings = result.crossings[level, lo:hi + 1]
    swapped = result.central_swapped[level, lo:hi + 1]
    crossing_t = tuple(int(t) for t, c, s in zip(ts, crossings, swapped) if c > 0 or s)
    parts = []
    if level > 0:
        parts.append(result.level_separation[level - 1, lo:hi + 1])
    if level < result.n_levels - 1:
        parts.append(result.level_separation[level, lo:hi + 1])
    sep = np.abs(np.stack(parts))
    sep_t = np.where(np.isnan(sep).all(axis=0), np.nan, np.nanmin(np.where(
        np.isnan(sep), np.inf, sep), axis=0))
    finite = np.isfinite(sep_t)
    if finite.any():
        k = int(np.argmin(np.where(finite, sep_t, np.inf)))
        smallest, at = float(sep_t[k]), int(ts[k])
    else:
        smallest, at = float("nan"), None
    return LevelCheck(level=level, t0=int(t0), tmin=int(lo), tmax=int(hi),
                      crossings=int(crossings.sum()), crossing_t=crossing_t,
                      separation_min=smallest, separation_t=at)


def _relative(z: np.ndarray) -> np.ndarray:
    """``|Z_in| / max_m |Z_im|`` over the levels (last axis), NaN levels left out."""
    a = np.abs(z)
    top = np.max(np.where(np.isnan(a), -np.inf, a), axis=-1, keepdims=True)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(np.isfinite(top) & (top > 0), a / top, np.nan)


def _overlap_summary(result: GevpResult, level_fits: list[str | None],
                     fits: Mapping[str, FitResult], time_extent: int) -> OverlapSummary | None:
    """Overlaps of each fitted level from its E0 (central and jackknife samples) and the
    eigenvectors at the start of its own chosen range, with the first level fit's model
    as every level's time dependence (one boundary for the whole matrix)."""
    fitted = [(n, fits[f]) for n, f in enumerate(level_fits) if f is not None]
    if not fitted:
        return None
    r, n_levels, s = result.matrix.shape[0], result.n_levels, result.n_samples
    energies = np.full(n_levels, np.nan)
    samples = np.full((s, n_levels), np.nan)
    for n, fr in fitted:
        energies[n] = fr.chosen.params["E0"].value
        inputs = fr.derived_inputs.get("E0")
        if inputs is not None:
            samples[:, n] = np.asarray(inputs.samples, dtype=float)
    form = fitted[0][1].form
    value = np.full((r, n_levels), np.nan)
    error = value.copy()
    z_samples = np.full((s, r, n_levels), np.nan)
    t = [None] * n_levels
    for n, fr in fitted:
        t[n] = int(fr.chosen.point.tmin)
        z = overlaps(result, energies, samples, t=t[n], form=form, time_extent=time_extent)
        value[:, n], error[:, n], z_samples[:, :, n] = z.value[:, n], z.error[:, n], \
            z.samples[:, :, n]
    relative = _relative(value)
    rel_err = jackknife_error(_relative(z_samples))
    return OverlapSummary(t=t, t0=int(result.t0), form=form, value=value, error=error,
                          relative=relative,
                          relative_error=np.where(np.isfinite(relative), rel_err, np.nan))


def _level_fits(spec: Spec, name: str, fits: Mapping[str, FitResult]) -> list[str | None]:
    """Per level, the first fit of the spec whose E0 is that level's energy (or None)."""
    out: list[str | None] = [None] * spec.matrices[name].size
    for fit in spec.matrix_fits(name):
        fr = fits.get(fit.name)
        if fr is not None and out[fit.level] is None and "E0" in fr.chosen.params:
            out[fit.level] = fit.name
    return out


def matrix_kind(spec: Spec, prepared: Prepared, name: str) -> str:
    """The effective energy of a matrix's principal correlators: that of its first level
    fit's model, else the one its elements' boundary implies."""
    fits = spec.matrix_fits(name)
    if fits:
        return EFFECTIVE_MASS_KIND[fits[0].form]
    return effective_mass_kind(spec, prepared.ensemble, spec.matrices[name].grid[0][0])


def summarise_matrix(spec: Spec, name: str, solutions: GevpSolutions,
                     fits: Mapping[str, FitResult]) -> MatrixResult:
    """The :class:`MatrixResult` of matrix ``name`` with the results of its level fits."""
    matrix = spec.matrices[name]
    time_extent = spec.ensemble.time_extent
    t0 = reference_t0(spec, name)
    result = solutions.at(name, t0)
    kind = matrix_kind(spec, solutions.prepared, name)
    if matrix.is_half:
        eff = half_t0_effective_energy(result, kind, time_extent)
    else:
        eff = principal_effective_energy(result, kind, time_extent)
    principal = [PrincipalEnergy(t=eff.t, t0=eff.t0, value=eff.value[n], error=eff.error[n],
                                 kind=kind, crossings=eff.crossings[n])
                 for n in range(result.n_levels)]
    level_fits = _level_fits(spec, name, fits)
    checks = {}
    for fit in spec.matrix_fits(name):
        fr = fits.get(fit.name)
        if fr is None:
            continue
        fit_t0 = spec.fit_t0(fit)
        lo, hi = range_used(fr)
        checks[fit.name] = _level_check(solutions.at(name, fit_t0, fit_name=fit.name),
                                        int(fit.level), fit_t0, lo, hi)
    return MatrixResult(
        name=name, grid=[list(row) for row in matrix.grid],
        operators=matrix.operator_labels(), t0=int(t0),
        t0_rule="half" if matrix.is_half else "fixed", t=np.asarray(result.t),
        principal=principal, crossings=np.asarray(result.crossings),
        central_swapped=np.asarray(result.central_swapped),
        separation=np.asarray(result.level_separation),
        eigenvectors=np.asarray(result.eigenvectors),
        eigenvector_errors=jackknife_error(result.eigenvector_samples),
        overlaps=_overlap_summary(result, level_fits, fits, time_extent),
        condition_number=float(result.condition_number_t0),
        asymmetry=np.asarray(result.asymmetry), fits=checks, levels=level_fits,
        n_samples=int(result.n_samples))


def summarise_matrices(spec: Spec, solutions: GevpSolutions,
                       fits: Mapping[str, FitResult]) -> dict[str, MatrixResult]:
    """Every matrix of the spec as a :class:`MatrixResult` (``{}`` without matrices)."""
    return {name: summarise_matrix(spec, name, solutions, fits) for name in spec.matrices}


def log_matrices(info: Callable[[str], None], matrices: Mapping[str, MatrixResult]) -> None:
    """One log line per matrix and one per level fit (crossings, separation)."""
    for name, m in matrices.items():
        rule = ", t0: half" if m.t0_rule == "half" else ""
        a = np.where(np.isfinite(m.asymmetry), m.asymmetry, 0.0)
        info(f"matrix {name}: {len(m.grid)} x {len(m.grid)}, t0 = {m.t0}{rule}, cond C(t0) = "
             f"{m.condition_number:.3g}, largest asymmetry {float(a.max()):.2g} sigma, "
             f"{int(m.crossings.sum())} level crossing(s) in jackknife samples over all t")
        for fit_name, c in m.fits.items():
            where = (f"crossings at t = {', '.join(map(str, c.crossing_t))}" if c.crossing_t
                     else "no crossings")
            info(f"matrix {name}: fit {fit_name} (level {c.level}, t0 = {c.t0}) rests on "
                 f"t = {c.tmin}..{c.tmax}: {where}; smallest separation from a neighbouring "
                 f"level {c.separation_min:.3g} sigma")


# --------------------------------------------------------------------------- check


def _largest_asymmetry(result: GevpResult, labels: list[str]) -> str:
    a = np.where(np.isfinite(result.asymmetry), result.asymmetry, np.inf)
    i, j = np.unravel_index(int(np.argmax(a)), a.shape)
    return f"{float(result.asymmetry[i, j]):.2g} sigma ({labels[i]}, {labels[j]})"


def check_lines(spec: Spec, prepared: Prepared) -> list[str]:
    """The matrices' part of ``plateaufit check``: the GEVP at every ``t0`` the fits use
    (a ``C(t0)`` that is not positive definite stops the check as it would the fit),
    and per level fit the conditioning of the covariance of its widest range.

    Raises
    ------
    DataError
        At ``matrices.NAME.t0``.
    """
    solutions = GevpSolutions(spec, prepared)
    solve_all(spec, solutions)
    lines: list[str] = []
    for name, matrix in spec.matrices.items():
        t0 = reference_t0(spec, name)
        res = solutions.at(name, t0)
        rule = " (t0: half; the smallest t0 of its fits)" if matrix.is_half else ""
        labels = matrix.operator_labels()
        crossed = int((res.crossings.sum(axis=1) > 0).sum())
        if lines:
            lines.append("")
        lines.append(f"matrix {name}: {matrix.size} x {matrix.size} ({', '.join(labels)}), "
                     f"t0 = {t0}{rule}; cond C(t0) = {res.condition_number_t0:.3g}; largest "
                     f"asymmetry {_largest_asymmetry(res, labels)}; {crossed} of "
                     f"{res.n_levels} level(s) cross somewhere in some jackknife sample")
        eff = principal_effective_energy(res, matrix_kind(spec, prepared, name),
                                         spec.ensemble.time_extent)
        for n in range(res.n_levels):
            shown = [t for t in (t0 + 1, t0 + 3, t0 + 5) if t < eff.t.size]
            pieces = ", ".join(
                f"t={t}: {format_value_error(float(eff.value[n, t]), float(eff.error[n, t]))}"
                if np.isfinite(eff.value[n, t]) and np.isfinite(eff.error[n, t])
                else f"t={t}: undefined" for t in shown)
            lines.append(f"  level {n} effective energy ({eff.kind}): {pieces}")
        for fit in spec.matrix_fits(name):
            fit_t0 = spec.fit_t0(fit)
            result = solutions.at(name, fit_t0, fit_name=fit.name)
            data, _ = level_data(result, int(fit.level), name)
            lo, hi = min(fit.tmin_values), max(fit.tmax_values)
            block = data[name][:, lo:hi + 1]
            with located(fit_index=spec.fit_index(fit.name)):
                cov = covariance_of_mean(block, **covariance_kwargs(spec))
            lines.append(f"  fit {fit.name}: level {fit.level}, t0 = {fit_t0}, {fit.form}; "
                         f"widest range t = {lo}..{hi}: covariance condition number "
                         f"{cov.condition_number:.3g} after shrinkage (intensity "
                         f"{cov.shrinkage:.3f})")
    return lines
