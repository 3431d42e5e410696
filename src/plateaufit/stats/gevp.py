"""The generalised eigenvalue problem (GEVP) of a correlator matrix.

For ``r`` interpolating operators ``O_1 .. O_r`` the matrix correlator
``C_ij(t) = <O_i(t) O_j(0)^dagger>`` is solved, at a fixed ``t0``, as

    C(t) v_n(t, t0) = lambda_n(t, t0) C(t0) v_n(t, t0),

for every timeslice ``t`` and every jackknife sample. The principal
correlators ``lambda_n(t, t0)`` each contain one energy level ``E_n`` at
leading order, ``lambda_n ~ exp(-E_n (t - t0))``, with corrections of order
``exp(-(E_r - E_n) t)`` when ``t0 >= t/2`` ([3]_); the effective energies and
the overlaps ``<0|O_i|n>`` built on them are in :mod:`plateaufit.stats.principal`.

How it is solved
----------------
The matrices are first symmetrised, ``(C + C^T)/2`` (:func:`symmetrise`):
a real basis measured with sources and sinks exchanged gives a symmetric matrix
up to noise, and the GEVP of a symmetric pencil has real eigenvalues.
``C(t0) = L L^T`` is factorised once per sample (Cholesky), the symmetric
matrices ``L^{-1} C(t) L^{-T}`` of all timeslices and all samples are
diagonalised in one batched ``numpy.linalg.eigh`` call, and the eigenvectors
are transformed back, ``v = L^{-T} u``, so that ``v_m^T C(t0) v_n = delta_mn``
-- the reduction LAPACK's ``sygv`` uses, so the result equals
``scipy.linalg.eigh(C(t), C(t0))`` to rounding.

Which eigenvalue is which level
-------------------------------
``eigh`` returns eigenpairs sorted by eigenvalue, which swaps two levels
wherever their principal correlators cross (or noise makes them cross).
Levels are therefore *named* once, at ``t_ref = t0 + 1``, by descending
eigenvalue there (level 0 has the largest principal correlator, the lowest
energy), and *followed* across ``t`` by their eigenvectors: at every ``t`` the
permutation of the eigenvectors that maximises the total overlap
``sum_n |cos(v_pi(n)(t), v_n(t_ref))|`` in the ``C(t0)`` metric is chosen
(an assignment problem; [4]_). Each jackknife sample's eigenvectors are
assigned in the same way to the central eigenvectors of the same ``t``, so a
sample's level ``n`` is the central's level ``n``. Signs: at ``t_ref`` the
component of largest magnitude of ``C(t0) v_n`` (the operator with the largest
overlap onto the state) is made positive; every other eigenvector (other ``t``,
every sample) gets the sign that makes its overlap with its reference positive.
At ``t = t0`` every vector is an eigenvector (all ``lambda_n(t0, t0) = 1``), so
the vectors of ``t0 + 1`` are stored there.

A *crossing* is a jackknife sample whose assigned levels, at some ``t``, are
not in the central's eigenvalue order (descending after ``t0``; ascending
before it, where ``lambda_n(t, t0) = exp(E_n (t0 - t))`` grows with the
energy): ``crossings[n, t]`` counts the samples in which level ``n`` has
another eigenvalue rank than in the central. Crossings mean the assignment of
that level at that ``t`` is not stable under the jackknife, and the principal
correlator should not be fitted there. Their absence proves little: the
samples share most of their data with the central matrix, so even two
degenerate levels rarely swap in them; ``level_separation`` (the gap between
neighbouring levels in jackknife errors) is the measure of whether the data
tell two levels apart.

This module is a little over 500 lines because the solver, the level
assignment and the input checks are one algorithm whose pieces are shared
with :mod:`plateaufit.stats.principal` (which solves the ``t0 = ceil(t/2)``
variant with them); most of its length is documentation.

References
----------
.. [1] C. Michael, "Adjoint sources in lattice gauge theory", Nucl. Phys. B 259
   (1985) 58.
.. [2] M. Lüscher, U. Wolff, "How to calculate the elastic scattering matrix in
   two-dimensional quantum field theories by numerical simulation",
   Nucl. Phys. B 339 (1990) 222.
.. [3] B. Blossier, M. Della Morte, G. von Hippel, T. Mendes, R. Sommer, "On the
   generalized eigenvalue method for energies and matrix elements in lattice
   field theory", JHEP 04 (2009) 094.
.. [4] H. W. Kuhn, "The Hungarian method for the assignment problem",
   Naval Res. Logist. Q. 2 (1955) 83 (``scipy.optimize.linear_sum_assignment``
   for bases larger than six operators).
.. [5] B. Efron, "The Jackknife, the Bootstrap and Other Resampling Plans",
   SIAM (1982).
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass

import numpy as np
from scipy.optimize import linear_sum_assignment

from plateaufit.errors import DataError, SpecError
from plateaufit.stats.resample import jackknife_error

__all__ = ["symmetrise", "asymmetry_significance", "GevpResult", "solve_gevp"]

# Up to this many operators the best permutation is found by enumerating all
# r! permutations in one vectorised step (720 for r = 6); above it, one
# linear_sum_assignment call per matrix.
_ENUMERATE_MAX = 6


def symmetrise(matrix: np.ndarray) -> np.ndarray:
    """Symmetrise correlator matrices over their two operator axes.

    Parameters
    ----------
    matrix : ndarray, shape (..., r, r, n_t)
        ``matrix[..., i, j, t] = C_ij(t)``; leading axes (jackknife samples)
        are kept.

    Returns
    -------
    ndarray, same shape
        ``(C_ij(t) + C_ji(t)) / 2``.
    """
    c = np.asarray(matrix, dtype=float)
    if c.ndim < 3:
        raise DataError("matrix", f"a correlator matrix has shape (..., r, r, n_t), got {c.shape}")
    return 0.5 * (c + np.swapaxes(c, -3, -2))


def asymmetry_significance(matrix: np.ndarray, matrix_samples: np.ndarray) -> np.ndarray:
    """How far each off-diagonal pair is from symmetric, in jackknife errors.

    Parameters
    ----------
    matrix : ndarray, shape (r, r, n_t)
        Central correlator matrix (before symmetrisation).
    matrix_samples : ndarray, shape (S, r, r, n_t)
        Its jackknife samples.

    Returns
    -------
    ndarray, shape (r, r)
        ``max_t |C_ij(t) - C_ji(t)| / sigma(C_ij(t) - C_ji(t))``, ``sigma``
        the jackknife error of the difference; 0 where the difference is
        exactly zero in the central value and every sample (data measured
        symmetric), ``inf`` where only its error is zero. A value well above a
        few (say 5) suggests a grid with two entries in the wrong place rather
        than noise.
    """
    c = np.asarray(matrix, dtype=float)
    cs = np.asarray(matrix_samples, dtype=float)
    diff = c - np.swapaxes(c, 0, 1)
    err = jackknife_error(cs - np.swapaxes(cs, 1, 2))
    with np.errstate(divide="ignore", invalid="ignore"):
        z = np.where(diff == 0.0, 0.0, np.abs(diff) / err)
    return np.max(z, axis=-1)


@dataclass(frozen=True, eq=False)
class GevpResult:
    """The GEVP at a fixed ``t0`` on every timeslice and every jackknife sample.

    Levels are numbered by descending principal correlator at ``t0 + 1``
    (ascending energy) and followed across ``t`` by their eigenvectors (see the
    module docstring).

    Attributes
    ----------
    t0 : int
        The timeslice of the metric, ``C(t0)``.
    t : ndarray of int, shape (n_t,)
        ``0 .. n_t - 1``, the folded time index.
    eigenvalues : ndarray, shape (n_levels, n_t)
        Principal correlators ``lambda_n(t, t0)`` of the central matrix;
        exactly 1 at ``t = t0``.
    eigenvalue_samples : ndarray, shape (S, n_levels, n_t)
        The same on every jackknife sample, assigned to the central's levels.
    eigenvalue_errors : ndarray, shape (n_levels, n_t)
        Jackknife errors of the principal correlators.
    eigenvectors : ndarray, shape (n_t, r, n_levels)
        ``eigenvectors[t, :, n] = v_n(t, t0)``, normalised
        ``v_n^T C(t0) v_n = 1``, signs as in the module docstring.
    eigenvector_samples : ndarray, shape (S, n_t, r, n_levels)
        The same per sample (normalised with the sample's ``C(t0)``).
    crossings : ndarray of int, shape (n_levels, n_t)
        Number of jackknife samples in which level ``n`` at ``t`` has another
        eigenvalue rank than in the central (0 at ``t0``).
    sample_swapped : ndarray of bool, shape (S, n_levels, n_t)
        The individual flags summed in ``crossings``.
    central_swapped : ndarray of bool, shape (n_levels, n_t)
        True where the central's level ``n`` is not the ``n``-th largest
        eigenvalue at ``t`` (the ``n``-th smallest for ``t < t0``, where
        ``lambda_n = exp(E_n (t0 - t))`` grows with the energy): the levels
        have crossed since ``t0 + 1``, or the eigenvectors no longer tell them
        apart.
    level_separation : ndarray, shape (n_levels - 1, n_t)
        ``(lambda_n - lambda_{n+1}) / sigma(lambda_n - lambda_{n+1})`` for
        neighbouring levels, ``sigma`` the jackknife error of the difference
        (NaN at ``t0``, where all are 1; the sign is flipped before ``t0``,
        where the order is reversed): how many errors apart two levels are.
        Below about 2 the data do not tell the two apart at that ``t``, however
        few crossings the jackknife shows (the samples share most of their data
        with the central matrix, so they rarely reorder even two degenerate
        levels); negative where the central's levels have crossed.
    condition_number_t0 : float
        Condition number of the central ``C(t0)`` (ratio of its extreme
        eigenvalues). Above about ``1e12`` the reduction loses most digits.
    matrix : ndarray, shape (r, r, n_t)
        The symmetrised central matrix the GEVP was solved on.
    matrix_samples : ndarray, shape (S, r, r, n_t)
        The symmetrised jackknife samples.
    asymmetry : ndarray, shape (r, r)
        :func:`asymmetry_significance` of the input before symmetrisation.
    """

    t0: int
    t: np.ndarray
    eigenvalues: np.ndarray
    eigenvalue_samples: np.ndarray
    eigenvalue_errors: np.ndarray
    eigenvectors: np.ndarray
    eigenvector_samples: np.ndarray
    crossings: np.ndarray
    sample_swapped: np.ndarray
    central_swapped: np.ndarray
    level_separation: np.ndarray
    condition_number_t0: float
    matrix: np.ndarray
    matrix_samples: np.ndarray
    asymmetry: np.ndarray

    @property
    def n_levels(self) -> int:
        """Number of levels (the size ``r`` of the operator basis)."""
        return int(self.eigenvalues.shape[0])

    @property
    def n_samples(self) -> int:
        """Number of jackknife samples ``S``."""
        return int(self.eigenvalue_samples.shape[0])


# ---------------------------------------------------------------------------
# input checks
# ---------------------------------------------------------------------------

def _check_matrices(matrix: np.ndarray,
                    matrix_samples: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Validate a central correlator matrix and its jackknife samples.

    Returns both as float arrays; raises :class:`DataError` naming the argument.
    """
    c = np.asarray(matrix, dtype=float)
    cs = np.asarray(matrix_samples, dtype=float)
    if c.ndim != 3 or c.shape[0] != c.shape[1]:
        raise DataError("matrix", f"a correlator matrix must have shape (r, r, n_t) with the "
                        f"same number of sources and sinks, got {c.shape}; give a square grid")
    r, _, n_t = c.shape
    if r < 2:
        raise DataError("matrix", "a GEVP needs at least two operators (a 2 x 2 matrix); "
                        "fit a single correlator directly instead")
    if n_t < 3:
        raise DataError("matrix", f"a GEVP needs at least three timeslices, got {n_t}")
    if cs.ndim != 4 or cs.shape[1:] != c.shape:
        raise DataError("matrix_samples", f"jackknife samples must have shape (S, {r}, {r}, "
                        f"{n_t}) to match the central matrix, got {cs.shape}")
    if cs.shape[0] < 2:
        raise DataError("matrix_samples", f"the jackknife needs at least 2 samples, got "
                        f"{cs.shape[0]}; use more bins")
    if not np.all(np.isfinite(c)):
        raise DataError("matrix", "the correlator matrix holds NaN or inf; check the data of "
                        "every entry of the grid")
    if not np.all(np.isfinite(cs)):
        bad = np.flatnonzero(~np.isfinite(cs).all(axis=(1, 2, 3)))
        raise DataError("matrix_samples", f"jackknife samples {_some(bad)} hold NaN or inf; "
                        "check the data of every entry of the grid")
    return c, cs


def _check_t0(t0: object, n_t: int) -> int:
    """``t0`` as an int in ``0 .. n_t - 2`` (a level is named at ``t0 + 1``)."""
    if isinstance(t0, (bool, np.bool_)) or not isinstance(t0, (int, np.integer)):
        raise SpecError("t0", f"t0 must be an integer timeslice, got {t0!r}")
    t0 = int(t0)
    if not 0 <= t0 <= n_t - 2:
        raise SpecError("t0", f"t0 = {t0} is outside 0 .. {n_t - 2}: the levels are ordered at "
                        f"t0 + 1, which must be one of the {n_t} timeslices; choose a smaller t0")
    return t0


def _some(indices: np.ndarray, limit: int = 8) -> str:
    shown = ", ".join(str(int(i)) for i in indices[:limit])
    return shown + (f", ... ({len(indices)} in all)" if len(indices) > limit else "")


# ---------------------------------------------------------------------------
# numerical pieces (shared with plateaufit.stats.principal)
# ---------------------------------------------------------------------------

def cholesky_where_possible(metric: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Lower Cholesky factors of a stack ``(..., r, r)``; identity where not PD.

    Returns ``(L, ok)`` with ``ok`` (...,) False where the matrix is not
    positive definite (its factor is replaced by the identity, so a batched
    solve can go on; the caller masks those results).
    """
    g = np.asarray(metric, dtype=float)
    try:
        return np.linalg.cholesky(g), np.ones(g.shape[:-2], dtype=bool)
    except np.linalg.LinAlgError:
        pass
    flat = g.reshape((-1,) + g.shape[-2:])
    chol = np.empty_like(flat)
    ok = np.ones(flat.shape[0], dtype=bool)
    eye = np.eye(g.shape[-1])
    for k in range(flat.shape[0]):
        try:
            chol[k] = np.linalg.cholesky(flat[k])
        except np.linalg.LinAlgError:
            chol[k], ok[k] = eye, False
    return chol.reshape(g.shape), ok.reshape(g.shape[:-2])


def reduced_eigh(c_t: np.ndarray, chol: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Solve ``C(t) v = lambda L L^T v`` for stacks, by the Cholesky reduction.

    Parameters
    ----------
    c_t : ndarray, shape (..., r, r)
        Symmetric matrices ``C(t)``.
    chol : ndarray, broadcastable to (..., r, r)
        Lower Cholesky factors ``L`` of the metric ``C(t0)``.

    Returns
    -------
    eigenvalues : ndarray, shape (..., r)
        Descending.
    eigenvectors : ndarray, shape (..., r, r)
        Columns ``v_n`` with ``v_m^T C(t0) v_n = delta_mn``.
    """
    l_inv = np.linalg.inv(chol)
    reduced = l_inv @ c_t @ np.swapaxes(l_inv, -1, -2)
    reduced = 0.5 * (reduced + np.swapaxes(reduced, -1, -2))
    w, u = np.linalg.eigh(reduced)
    v = np.swapaxes(l_inv, -1, -2) @ u[..., ::-1]
    return w[..., ::-1], v


def _permutation_table(r: int) -> np.ndarray:
    return np.array(list(itertools.permutations(range(r))), dtype=np.intp)


def best_permutations(score: np.ndarray) -> np.ndarray:
    """Assignments maximising the total score, for a stack of square matrices.

    Parameters
    ----------
    score : ndarray, shape (..., r, r)
        ``score[..., m, n]``: how well candidate ``m`` matches level ``n``.

    Returns
    -------
    ndarray of int, shape (..., r)
        ``perm[..., n] = m``: the candidate given to level ``n``, a permutation
        maximising ``sum_n score[..., perm[n], n]`` (ties: the first one in
        lexicographic order for ``r <= 6``).
    """
    s = np.asarray(score, dtype=float)
    r = s.shape[-1]
    if r <= _ENUMERATE_MAX:
        table = _permutation_table(r)                      # (P, r)
        total = s[..., table, np.arange(r)].sum(axis=-1)   # (..., P)
        return table[np.argmax(total, axis=-1)]
    flat = s.reshape((-1, r, r))
    perm = np.empty((flat.shape[0], r), dtype=np.intp)
    for k in range(flat.shape[0]):
        rows, cols = linear_sum_assignment(flat[k], maximize=True)
        perm[k, cols] = rows
    return perm.reshape(s.shape[:-1])


def metric_cosines(vectors: np.ndarray, reference: np.ndarray, metric: np.ndarray) -> np.ndarray:
    """``cos(v_m, w_n)`` in the metric ``G``: ``v_m^T G w_n / (|v_m|_G |w_n|_G)``.

    ``vectors``, ``reference`` and ``metric`` are (..., r, r) stacks (columns
    are vectors) that broadcast against each other; returns (..., m, n).
    """
    gw = metric @ reference
    gv = metric @ vectors
    cross = np.swapaxes(vectors, -1, -2) @ gw
    norm_v = np.sqrt(np.abs(np.einsum("...im,...im->...m", vectors, gv)))
    norm_w = np.sqrt(np.abs(np.einsum("...in,...in->...n", reference, gw)))
    with np.errstate(divide="ignore", invalid="ignore"):
        cos = cross / (norm_v[..., :, None] * norm_w[..., None, :])
    return np.nan_to_num(cos, nan=0.0, posinf=0.0, neginf=0.0)


def assign_levels(eigenvalues: np.ndarray, eigenvectors: np.ndarray, reference: np.ndarray,
                  metric: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Reorder eigenpairs to the levels of ``reference`` and align their signs.

    Parameters
    ----------
    eigenvalues : ndarray, shape (..., r)
    eigenvectors : ndarray, shape (..., r, r)
        Columns in the solver's order.
    reference : ndarray, broadcastable to (..., r, r)
        The levels' vectors (column ``n`` is level ``n``).
    metric : ndarray, broadcastable to (..., r, r)
        The metric of the overlap, ``C(t0)``.

    Returns
    -------
    eigenvalues, eigenvectors
        Column ``n`` is the eigenpair assigned to level ``n`` (maximal total
        ``|cos|``), its sign chosen so its overlap with reference ``n`` is
        non-negative.
    """
    cos = metric_cosines(eigenvectors, reference, metric)
    perm = best_permutations(np.abs(cos))
    lam = np.take_along_axis(eigenvalues, perm, axis=-1)
    vec = np.take_along_axis(eigenvectors, perm[..., None, :], axis=-1)
    picked = np.take_along_axis(cos, perm[..., None, :], axis=-2)[..., 0, :]
    sign = np.where(picked < 0, -1.0, 1.0)
    return lam, vec * sign[..., None, :]


def descending_ranks(eigenvalues: np.ndarray) -> np.ndarray:
    """Rank of each entry along the last axis by descending value (0 = largest)."""
    order = np.argsort(-eigenvalues, axis=-1, kind="stable")
    return np.argsort(order, axis=-1, kind="stable")


def _reference_signs(vectors: np.ndarray, metric: np.ndarray) -> np.ndarray:
    """Flip each column so that its largest component of ``C(t0) v`` is positive."""
    gv = metric @ vectors
    top = np.argmax(np.abs(gv), axis=0)
    sign = np.where(gv[top, np.arange(gv.shape[1])] < 0, -1.0, 1.0)
    return vectors * sign


# ---------------------------------------------------------------------------
# the solver
# ---------------------------------------------------------------------------

def solve_gevp(matrix: np.ndarray, matrix_samples: np.ndarray, t0: int) -> GevpResult:
    """Solve the GEVP at fixed ``t0`` on all timeslices and jackknife samples.

    Parameters
    ----------
    matrix : ndarray, shape (r, r, n_t)
        Central correlator matrix ``C_ij(t)`` (mean of the binned data) on the
        folded timeslices ``0 .. n_t - 1``; symmetrised here.
    matrix_samples : ndarray, shape (S, r, r, n_t)
        Its jackknife samples (delete-one means of the binned data);
        symmetrised here.
    t0 : int
        Timeslice of the metric ``C(t0)``, ``0 <= t0 <= n_t - 2``.

    Returns
    -------
    GevpResult
        Principal correlators, eigenvectors, jackknife samples and errors,
        crossing counts (levels named at ``t0 + 1`` and followed by their
        eigenvectors; see the module docstring).

    Raises
    ------
    DataError
        ``where="matrix"``/``"matrix_samples"``: wrong shapes, ``r < 2``,
        NaN or inf. ``where="t0"``: ``C(t0)`` is not positive definite in the
        central matrix or in any jackknife sample.
    SpecError
        ``where="t0"``: ``t0`` not an integer in ``0 .. n_t - 2``.

    Notes
    -----
    A ``C(t0)`` that is not positive definite in even one jackknife sample is
    an error, not a reported gap: the jackknife error is a sum over *all*
    delete-one samples, and one left out would make every error of the GEVP
    (and of the fits built on it) too small by an unknown amount; a sample
    that fails also shows that the central ``C(t0)`` is close to singular, so
    its eigenvectors would be dominated by noise. The remedies are the same for
    both: a smaller ``t0`` (where the signal is larger) or a smaller basis
    (drop an operator that is nearly a combination of the others).

    References
    ----------
    .. [1] B. Blossier et al., JHEP 04 (2009) 094.
    .. [2] M. Lüscher, U. Wolff, Nucl. Phys. B 339 (1990) 222.
    .. [3] C. Michael, Nucl. Phys. B 259 (1985) 58.
    """
    c_raw, cs_raw = _check_matrices(matrix, matrix_samples)
    r, _, n_t = c_raw.shape
    t0 = _check_t0(t0, n_t)
    asym = asymmetry_significance(c_raw, cs_raw)
    c, cs = symmetrise(c_raw), symmetrise(cs_raw)

    # (S + 1, n_t, r, r): the central matrix first, then the samples
    stack = np.moveaxis(np.concatenate([c[None], cs]), -1, 1)
    metric = stack[:, t0]
    chol, ok = cholesky_where_possible(metric)
    _require_positive_definite(ok, metric, t0)

    lam, vec = reduced_eigh(stack, chol[:, None])
    t_ref = t0 + 1

    # central: name the levels at t0 + 1, follow them by overlap
    reference = _reference_signs(vec[0, t_ref], metric[0])
    lam_c, vec_c = assign_levels(lam[0], vec[0], reference, metric[0])
    lam_c[t0], vec_c[t0] = 1.0, reference

    # samples: assigned to the central's levels at the same t
    lam_s, vec_s = assign_levels(lam[1:], vec[1:], vec_c[None], metric[1:, None])
    lam_s[:, t0] = 1.0
    vec_s[:, t0] = vec_s[:, t_ref]

    # before t0 the order is reversed: lambda_n(t, t0) = exp(E_n (t0 - t)) grows with E_n
    before = (np.arange(n_t) < t0)[:, None]
    rank_c = descending_ranks(np.where(before, -lam_c, lam_c))          # (n_t, r)
    rank_s = descending_ranks(np.where(before, -lam_s, lam_s))          # (S, n_t, r)
    swapped = rank_s != rank_c[None]
    swapped[:, t0] = False
    central_swapped = rank_c != np.arange(r)
    central_swapped[t0] = False

    g = np.linalg.eigvalsh(metric[0])
    eig_s = np.moveaxis(lam_s, -1, 1)
    order_sign = np.where(np.arange(n_t) < t0, -1.0, 1.0)      # reversed before t0
    gap = (lam_c.T[:-1] - lam_c.T[1:]) * order_sign
    gap_err = jackknife_error(eig_s[:, :-1] - eig_s[:, 1:])
    with np.errstate(divide="ignore", invalid="ignore"):
        separation = gap / gap_err
    separation[:, t0] = np.nan
    return GevpResult(
        t0=t0,
        t=np.arange(n_t),
        eigenvalues=lam_c.T.copy(),
        eigenvalue_samples=eig_s,
        eigenvalue_errors=jackknife_error(eig_s),
        eigenvectors=vec_c,
        eigenvector_samples=vec_s,
        crossings=swapped.sum(axis=0).T.astype(int),
        sample_swapped=np.moveaxis(swapped, -1, 1),
        central_swapped=central_swapped.T.copy(),
        level_separation=separation,
        condition_number_t0=float(g[-1] / g[0]),
        matrix=c,
        matrix_samples=cs,
        asymmetry=asym,
    )


def _require_positive_definite(ok: np.ndarray, metric: np.ndarray, t0: int) -> None:
    if np.all(ok):
        return
    remedy = ("choose a smaller t0, where the signal is stronger, or a smaller operator basis "
              "(two nearly linearly dependent operators make C(t0) singular)")
    if not ok[0]:
        smallest = float(np.linalg.eigvalsh(metric[0])[0])
        raise DataError("t0", f"the correlator matrix at t0 = {t0} is not positive definite "
                        f"(smallest eigenvalue {smallest:.3g}), so the GEVP has no solution "
                        f"there; {remedy}")
    bad = np.flatnonzero(~ok[1:])
    raise DataError("t0", f"the correlator matrix at t0 = {t0} is not positive definite in "
                    f"{len(bad)} of {len(ok) - 1} jackknife samples (samples {_some(bad)}); the "
                    f"jackknife error needs the GEVP on every sample; {remedy}")
