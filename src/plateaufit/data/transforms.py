"""Time-reflection folding of two-point correlators.

On a lattice of time extent ``T`` with periodic (or antiperiodic) boundary
conditions in time, a two-point correlator satisfies ``C(T - t) = +C(t)``
(or ``-C(t)``) up to noise. Averaging the two halves keeps the information and
halves the number of timeslices to fit: ``t = 0..T//2``.
"""

from __future__ import annotations

import numpy as np

from plateaufit.errors import DataError

__all__ = ["BOUNDARIES", "fold", "folded_extent"]

#: The accepted boundary conditions in time.
BOUNDARIES: tuple[str, ...] = ("periodic", "antiperiodic", "open")


def _check_boundary(boundary: str) -> None:
    if boundary not in BOUNDARIES:
        raise DataError("", f"unknown boundary {boundary!r}; use one of {', '.join(BOUNDARIES)}")


def fold(values: np.ndarray, boundary: str) -> np.ndarray:
    """Average a correlator with its time reflection.

    For ``t = 1..ceil(T/2)-1``::

        periodic:      (C(t) + C(T - t)) / 2
        antiperiodic:  (C(t) - C(T - t)) / 2

    ``C(0)`` is kept as it is, and for even ``T`` so is ``C(T/2)``, which is its
    own mirror image. ``open`` returns the data unchanged (there is no
    reflection symmetry to use).

    Parameters
    ----------
    values : numpy.ndarray
        ``(..., T)``: timeslices on the last axis (usually ``(n_cfg, T)``).
    boundary : {'periodic', 'antiperiodic', 'open'}

    Returns
    -------
    numpy.ndarray
        ``(..., T // 2 + 1)`` for periodic and antiperiodic, a copy of the
        input for open.

    Notes
    -----
    Common practice in lattice spectroscopy: with a single state,
    ``C(t) = A (exp(-E t) + exp(-E (T - t)))`` is symmetric under
    ``t -> T - t``, so the average is the same function with half the noise
    from the two mirror images.
    """
    _check_boundary(boundary)
    arr = np.asarray(values, dtype=np.float64)
    if arr.ndim == 0 or arr.shape[-1] == 0:
        raise DataError("", f"fold needs timeslices on the last axis, got shape {arr.shape}")
    if boundary == "open":
        return arr.copy()
    T = arr.shape[-1]
    half = T // 2
    out = np.empty(arr.shape[:-1] + (half + 1,), dtype=np.float64)
    out[..., 0] = arr[..., 0]
    t = np.arange(1, half + 1)
    mirror = arr[..., T - t]
    sign = 1.0 if boundary == "periodic" else -1.0
    out[..., 1:] = 0.5 * (arr[..., t] + sign * mirror)
    if T % 2 == 0 and half >= 1:
        out[..., half] = arr[..., half]  # its own mirror image
    return out


def folded_extent(time_extent: int, boundary: str, fold: bool) -> int:
    """Number of timeslices after the (optional) fold.

    Parameters
    ----------
    time_extent : int
        ``T``, the number of timeslices in the data.
    boundary : {'periodic', 'antiperiodic', 'open'}
    fold : bool
        Whether the data are folded; ignored for open boundaries, which are
        never folded.

    Returns
    -------
    int
        ``T // 2 + 1`` when folded, else ``T``. The largest usable time index
        is one less.
    """
    _check_boundary(boundary)
    if fold and boundary != "open":
        return int(time_extent) // 2 + 1
    return int(time_extent)
