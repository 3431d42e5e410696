"""Effective energies and overlaps from the principal correlators of a GEVP.

Given a :class:`~plateaufit.stats.gevp.GevpResult`:

* :func:`principal_effective_energy` -- the effective energy of each
  principal correlator ``lambda_n(t, t0)`` at the GEVP's fixed ``t0``, in the
  ``log``, ``cosh`` or ``sinh`` form of :func:`plateaufit.stats.effmass.effective_mass`;
* :func:`half_t0_effective_energy` -- ``t0 = ceil(t/2)``: at every ``t`` a GEVP
  with that ``t0`` is solved at ``t`` and ``t + 1``, and
  ``E_eff,n(t) = log(lambda_n(t, t0) / lambda_n(t + 1, t0))`` (same ``t0`` for
  both); with ``t0 >= t/2`` the corrections are ``O(exp(-(E_r - E_n) t))``
  for a basis of ``r`` operators ([1]_);
* :func:`overlaps` -- ``Z_in = <0|O_i|n>`` from fitted energies and the
  eigenvectors, with the per-operator normalised ``|Z_in| / max_n |Z_in|``.

Every quantity is computed on the central matrix and on each jackknife sample;
errors are jackknife errors ([3]_), NaN wherever the central value or any
sample is undefined (an error from part of the samples would be too small).

References
----------
.. [1] B. Blossier, M. Della Morte, G. von Hippel, T. Mendes, R. Sommer, "On the
   generalized eigenvalue method for energies and matrix elements in lattice
   field theory", JHEP 04 (2009) 094.
.. [2] M. Lüscher, U. Wolff, Nucl. Phys. B 339 (1990) 222.
.. [3] B. Efron, "The Jackknife, the Bootstrap and Other Resampling Plans",
   SIAM (1982).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from plateaufit.errors import DataError, SpecError
from plateaufit.stats.effmass import effective_mass
from plateaufit.stats.gevp import (
    GevpResult,
    assign_levels,
    cholesky_where_possible,
    descending_ranks,
    reduced_eigh,
)
from plateaufit.stats.resample import jackknife_error

__all__ = [
    "PrincipalEffectiveEnergy",
    "principal_effective_energy",
    "half_t0_effective_energy",
    "Overlaps",
    "overlaps",
]

_FORMS = ("exp", "cosh", "sinh")


@dataclass(frozen=True, eq=False)
class PrincipalEffectiveEnergy:
    """Effective energies of the principal correlators, with jackknife errors.

    Attributes
    ----------
    t : ndarray of int, shape (n_t - 1,)
        Element ``t`` is from the pair ``t, t + 1``.
    t0 : ndarray of int, shape (n_t - 1,)
        The ``t0`` of the GEVP behind each element: constant for a fixed
        ``t0``, ``ceil(t/2)`` for the ``t0 = half`` variant.
    value : ndarray, shape (n_levels, n_t - 1)
        From the central matrix (NaN where undefined, e.g. a non-positive ratio).
    error : ndarray, shape (n_levels, n_t - 1)
        Jackknife error; NaN where the value or any sample is undefined.
    samples : ndarray, shape (S, n_levels, n_t - 1)
        Per jackknife sample.
    crossings : ndarray of int, shape (n_levels, n_t - 1)
        Samples in which level ``n`` is out of the central's eigenvalue order
        at ``t`` or ``t + 1``.
    kind : str
        ``log``, ``cosh`` or ``sinh``.
    skipped_t0 : tuple of int
        ``t0`` values whose ``C(t0)`` is not positive definite in the central
        matrix or some sample (only for ``t0 = half``; those elements are NaN).
    """

    t: np.ndarray
    t0: np.ndarray
    value: np.ndarray
    error: np.ndarray
    samples: np.ndarray
    crossings: np.ndarray
    kind: str
    skipped_t0: tuple[int, ...] = ()


def _error_where_defined(samples: np.ndarray, value: np.ndarray) -> np.ndarray:
    error = jackknife_error(samples)     # NaN wherever any sample is NaN
    return np.where(np.isfinite(value), error, np.nan)


def principal_effective_energy(result: GevpResult, kind: str = "log",
                               time_extent: int | None = None) -> PrincipalEffectiveEnergy:
    """Effective energies of the principal correlators at the GEVP's fixed ``t0``.

    Parameters
    ----------
    result : GevpResult
        From :func:`plateaufit.stats.gevp.solve_gevp`.
    kind : {"log", "cosh", "sinh"}
        Passed to :func:`plateaufit.stats.effmass.effective_mass`. ``cosh``
        (``sinh``) is exact for ``lambda_n ∝ e^{-E t} ± e^{-E (T - t)}``, which
        the principal correlators are when exactly ``r`` states, each with a
        backward-propagating partner, contribute.
    time_extent : int, optional
        ``T``; required for ``cosh`` and ``sinh``.

    Returns
    -------
    PrincipalEffectiveEnergy
        ``value[n, t]`` from ``lambda_n(t, t0)`` and ``lambda_n(t + 1, t0)``;
        for ``t < t0`` too (the GEVP is defined there, ``lambda_n > 1``).

    References
    ----------
    .. [1] B. Blossier et al., JHEP 04 (2009) 094.
    """
    value = effective_mass(result.eigenvalues, kind, time_extent)
    samples = effective_mass(result.eigenvalue_samples, kind, time_extent)
    swapped = result.sample_swapped
    n_t = result.eigenvalues.shape[1]
    return PrincipalEffectiveEnergy(
        t=np.arange(n_t - 1),
        t0=np.full(n_t - 1, result.t0),
        value=value,
        error=_error_where_defined(samples, value),
        samples=samples,
        crossings=(swapped[..., :-1] | swapped[..., 1:]).sum(axis=0),
        kind=kind,
    )


def half_t0_effective_energy(result: GevpResult, kind: str = "log",
                             time_extent: int | None = None) -> PrincipalEffectiveEnergy:
    """Effective energies with ``t0 = ceil(t/2)`` at every ``t`` (Blossier et al.).

    At each ``t = 0 .. n_t - 2`` the GEVP with ``t0 = ceil(t/2)`` is solved at
    ``t`` and ``t + 1`` on the central matrix and every jackknife sample, and
    ``E_eff,n(t)`` is the effective energy of the pair
    ``lambda_n(t, t0), lambda_n(t + 1, t0)`` (the same ``t0`` for both):
    ``t = 0, 1, 2, 3, 4, 5, ...`` use ``t0 = 0, 1, 1, 2, 2, 3, ...``; for
    ``t = 0`` and ``1`` (``t0 = t``) it is ``-log lambda_n(t + 1, t)``.

    Parameters
    ----------
    result : GevpResult
        A fixed-``t0`` solution of the same matrix. It supplies the data and
        the names of the levels: at every ``t`` the eigenvectors of
        ``t + 1`` are assigned to ``result``'s levels at ``t + 1`` by maximal
        overlap in ``result``'s ``C(t0)`` metric, those of ``t`` to the ones
        of ``t + 1`` in the metric of the ``t0`` in use; each sample's vectors
        to the central's of the same ``t``.
    kind : {"log", "cosh", "sinh"}
        As in :func:`principal_effective_energy`.
    time_extent : int, optional
        ``T``; required for ``cosh`` and ``sinh``.

    Returns
    -------
    PrincipalEffectiveEnergy
        With ``t0[t] = ceil(t/2)``. Elements whose ``C(t0)`` is not positive
        definite in the central matrix or some sample are NaN, and that ``t0``
        is listed in ``skipped_t0`` (unlike a fixed ``t0``, these ``t0`` come
        with the large ``t`` the user did not choose, where the signal is
        usually lost; the rest of the range stays usable).

    Notes
    -----
    With ``t0 >= t/2`` the leading correction to ``E_eff,n`` is
    ``O(exp(-(E_r - E_n) t))``, ``E_r`` the first level the basis does not
    resolve ([1]_); the fixed-``t0`` energies approach ``E_n`` only as
    ``exp(-(E_r - E_n) t0)`` for ``t`` beyond ``2 t0``.

    References
    ----------
    .. [1] B. Blossier et al., JHEP 04 (2009) 094, section 2.
    """
    if kind not in ("log", "cosh", "sinh"):
        raise SpecError("kind", f"unknown effective-energy kind {kind!r}; use log, cosh or sinh")
    stack = np.moveaxis(np.concatenate([result.matrix[None], result.matrix_samples]), -1, 1)
    n_all, n_t, r, _ = stack.shape
    t = np.arange(n_t - 1)
    t0 = (t + 1) // 2                                        # ceil(t/2)
    metric = stack[:, t0]                                    # (S+1, n_e, r, r)
    chol, ok = cholesky_where_possible(metric)
    pairs = np.stack([stack[:, t], stack[:, t + 1]], axis=2)  # (S+1, n_e, 2, r, r)
    lam, vec = reduced_eigh(pairs, chol[:, :, None])

    ref_metric = result.matrix[..., result.t0]
    ref_next = result.eigenvectors[t + 1]                    # (n_e, r, r)
    # central: t + 1 named by the fixed-t0 levels, t by t + 1
    lam_c1, vec_c1 = assign_levels(lam[0, :, 1], vec[0, :, 1], ref_next, ref_metric)
    lam_c0, vec_c0 = assign_levels(lam[0, :, 0], vec[0, :, 0], vec_c1, metric[0])
    # samples: to the central's of the same t
    lam_s1, _ = assign_levels(lam[1:, :, 1], vec[1:, :, 1], vec_c1[None], metric[1:])
    lam_s0, _ = assign_levels(lam[1:, :, 0], vec[1:, :, 0], vec_c0[None], metric[1:])
    trivial = t == t0                                        # lambda_n(t0, t0) = 1
    lam_c0[trivial] = 1.0
    lam_s0[:, trivial] = 1.0

    swapped = ((descending_ranks(lam_s1) != descending_ranks(lam_c1)[None])
               | ((descending_ranks(lam_s0) != descending_ranks(lam_c0)[None])
                  & ~trivial[None, :, None]))                # (S, n_e, r)

    first = np.concatenate([lam_c0[None], lam_s0])           # (S+1, n_e, r)
    second = np.concatenate([lam_c1[None], lam_s1])
    energy = np.full((n_all, r, n_t - 1), np.nan)
    for k in range(n_t - 1):
        # element k of effective_mass uses entries k and k + 1 only
        pair = np.full((n_all, r, k + 2), np.nan)
        pair[..., k], pair[..., k + 1] = first[:, k], second[:, k]
        energy[..., k] = effective_mass(pair, kind, time_extent)[..., k]
    usable = np.all(ok, axis=0)                              # (n_e,)
    energy[..., ~usable] = np.nan
    value, samples = energy[0], energy[1:]
    return PrincipalEffectiveEnergy(
        t=t,
        t0=t0,
        value=value,
        error=_error_where_defined(samples, value),
        samples=samples,
        crossings=np.moveaxis(swapped, -1, 1).sum(axis=0),
        kind=kind,
        skipped_t0=tuple(sorted({int(x) for x in t0[~usable]})),
    )


@dataclass(frozen=True, eq=False)
class Overlaps:
    """Overlaps ``Z_in = <0|O_i|n>`` of the operators onto the levels.

    Attributes
    ----------
    t, t0 : int
        The timeslice of ``C(t)`` and of the eigenvectors used, and the GEVP's ``t0``.
    form : str
        ``exp``, ``cosh`` or ``sinh``: the time dependence assumed for each state.
    value : ndarray, shape (r, n_levels)
        ``value[i, n] = Z_in`` from the central matrix and energies.
    error : ndarray, shape (r, n_levels)
        Jackknife error (NaN where the value or any sample is undefined).
    samples : ndarray, shape (S, r, n_levels)
        Per jackknife sample (sample matrix, eigenvectors and energy).
    relative : ndarray, shape (r, n_levels)
        ``|Z_in| / max_m |Z_im|``: for each operator, its overlaps relative to
        its largest one (1 for the level it couples to most; a heat map).
    relative_error : ndarray, shape (r, n_levels)
        Jackknife error of ``relative``.
    """

    t: int
    t0: int
    form: str
    value: np.ndarray
    error: np.ndarray
    samples: np.ndarray
    relative: np.ndarray
    relative_error: np.ndarray


def _state_time_dependence(energy: np.ndarray, t: int, form: str,
                           time_extent: int | None) -> np.ndarray:
    if form == "exp":
        return np.exp(-energy * t)
    sign = 1.0 if form == "cosh" else -1.0
    return np.exp(-energy * t) + sign * np.exp(-energy * (time_extent - t))


def _overlap_estimate(c_t: np.ndarray, v: np.ndarray, energy: np.ndarray, t: int, form: str,
                      time_extent: int | None) -> np.ndarray:
    cv = c_t @ v                                             # (..., r, n)
    vcv = np.einsum("...in,...in->...n", v, cv)
    g = _state_time_dependence(energy, t, form, time_extent)
    with np.errstate(invalid="ignore", divide="ignore"):
        norm = np.sqrt(np.where((vcv > 0) & (g > 0), vcv * g, np.nan))
        return cv / norm[..., None, :]


def _relative(z: np.ndarray) -> np.ndarray:
    a = np.abs(z)
    all_nan = np.all(np.isnan(a), axis=-1, keepdims=True)
    top = np.max(np.where(np.isnan(a), -np.inf, a), axis=-1, keepdims=True)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(all_nan, np.nan, a / top)


def overlaps(result: GevpResult, energies: np.ndarray, energy_samples: np.ndarray, *, t: int,
             form: str = "exp", time_extent: int | None = None) -> Overlaps:
    """Overlaps ``Z_in = <0|O_i|n>`` from fitted energies and GEVP eigenvectors.

    Normalisation: the amplitudes of the spectral decomposition
    ``C_ij(t) = sum_n Z_in Z_jn g(E_n, t)`` with ``g = exp(-E t)`` (``exp``),
    ``exp(-E t) + exp(-E (T - t))`` (``cosh``) or
    ``exp(-E t) - exp(-E (T - t))`` (``sinh``) -- the same amplitudes as a
    factorised fit ``A_n = Z_n.source Z_n.sink``. The estimator is

        Z_in = (C(t) v_n)_i / sqrt(v_n^T C(t) v_n  g(E_n, t)),

    i.e. ``(C(t) v_n)_i exp(E_n t / 2) / sqrt(v_n^T C(t) v_n)`` for ``exp``.
    It is exact when exactly the ``r`` levels of the basis contribute (then
    ``Z^T v_n`` has a single non-zero entry, so ``C(t) v_n ∝ Z_n``); its
    corrections otherwise are those of the eigenvectors ([1]_). The sign of
    ``Z_n`` is that of the eigenvector, i.e. its largest component is positive.

    Parameters
    ----------
    result : GevpResult
        From :func:`plateaufit.stats.gevp.solve_gevp`.
    energies : ndarray, shape (n_levels,)
        Fitted energies ``E_n`` (central fits); NaN for a level not fitted
        gives NaN overlaps for it.
    energy_samples : ndarray, shape (S, n_levels)
        The energies of the jackknife refits, on the same samples as ``result``.
    t : int
        Timeslice of ``C(t)`` and of the eigenvectors ``v_n(t, t0)``; take it
        beyond ``t0``, where the principal correlators have reached their
        plateau.
    form : {"exp", "cosh", "sinh"}
        Time dependence of each state; ``cosh``/``sinh`` where the backward
        term matters (the fit's model).
    time_extent : int, optional
        ``T``; required for ``cosh`` and ``sinh``.

    Returns
    -------
    Overlaps

    Raises
    ------
    SpecError
        Unknown ``form``, ``time_extent`` missing, ``t`` outside the timeslices.
    DataError
        Energies of the wrong shape.

    References
    ----------
    .. [1] B. Blossier et al., JHEP 04 (2009) 094, section 2 (eigenvectors and
       matrix elements).
    """
    if form not in _FORMS:
        raise SpecError("form", f"unknown form {form!r}; use exp, cosh or sinh")
    if form != "exp" and time_extent is None:
        raise SpecError("time_extent", f"the {form} form needs the time extent T of the lattice")
    n_t = result.eigenvalues.shape[1]
    if isinstance(t, (bool, np.bool_)) or not isinstance(t, (int, np.integer)) \
            or not 0 <= int(t) < n_t:
        raise SpecError("t", f"t must be an integer timeslice in 0 .. {n_t - 1}, got {t!r}")
    t = int(t)
    n = result.n_levels
    e = np.asarray(energies, dtype=float)
    es = np.asarray(energy_samples, dtype=float)
    if e.shape != (n,):
        raise DataError("energies", f"need one energy per level, shape ({n},), got {e.shape}")
    if es.shape != (result.n_samples, n):
        raise DataError("energy_samples", f"need shape ({result.n_samples}, {n}) (one energy "
                        f"per jackknife sample and level), got {es.shape}")
    value = _overlap_estimate(result.matrix[..., t], result.eigenvectors[t], e, t, form,
                              time_extent)
    samples = _overlap_estimate(result.matrix_samples[..., t], result.eigenvector_samples[:, t],
                                es, t, form, time_extent)
    relative = _relative(value)
    relative_samples = _relative(samples)
    return Overlaps(
        t=t, t0=result.t0, form=form,
        value=value,
        error=_error_where_defined(samples, value),
        samples=samples,
        relative=relative,
        relative_error=_error_where_defined(relative_samples, relative),
    )
