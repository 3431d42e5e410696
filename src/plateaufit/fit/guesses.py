"""Starting values for correlated fits, from the data themselves.

The ground-state energy comes from a robust effective energy: the effective
mass (log for the ``exp`` form, cosh/sinh for the periodic forms, from
:mod:`plateaufit.stats.effmass`) of each pair of neighbouring usable points in
the fit range, then the median over pairs and observables. Amplitudes follow from
``C(t) / g(E0, t)``; excited states get gaps of a fraction of ``E0`` and
amplitudes from the residual at the first timeslice. Noisy or negative points
are skipped; the result is always finite.

References
----------
G. P. Lepage et al., "Constrained curve fitting", Nucl. Phys. B (Proc.
Suppl.) 106 (2002) 12 -- effective energies as the natural starting point
and prior centre of multi-state fits.
"""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np

from plateaufit.errors import FitError
from plateaufit.fit.models import CorrelatorModel, FormulaModel
from plateaufit.stats.effmass import effective_mass

__all__ = ["starting_values", "starting_points", "pair_energies"]

#: Gap between successive states, as a fraction of E0 (common practice), and
#: its floor in lattice units.
GAP_FRACTION = 0.5
GAP_FLOOR = 0.2
#: Energy used when the data give no usable effective energy at all.
FALLBACK_ENERGY = 0.5
_E_MAX = 20.0


def _basis(form: str, energy: np.ndarray, t: np.ndarray, time_extent: float) -> np.ndarray:
    with np.errstate(over="ignore", invalid="ignore"):
        fwd = np.exp(-energy * t)
        if form == "exp":
            return fwd
        bwd = np.exp(-energy * (time_extent - t))
        return fwd + bwd if form == "cosh" else fwd - bwd


def pair_energies(y: np.ndarray, t: np.ndarray, form: str = "exp",
                  time_extent: float | None = None) -> np.ndarray:
    """Effective energy of each pair of neighbouring timeslices in a fit range.

    A thin adapter around :func:`plateaufit.stats.effmass.effective_mass`
    (``log`` for the exp form, ``cosh``/``sinh`` for the periodic forms) for
    values known only at the fit's timeslices ``t``: the values are placed at
    their timeslice index, and only pairs ``(t, t + 1)`` both present count.

    Parameters
    ----------
    y, t : ndarray, (n,)
        Correlator values and their (whole, non-negative) timeslices.
    form : {"exp", "cosh", "sinh"}
    time_extent : float, optional
        ``T``; needed for cosh and sinh.

    Returns
    -------
    ndarray, (n - 1,)
        Energy of each neighbouring pair in increasing ``t``; NaN where the
        pair is not adjacent, the effective mass is undefined, or not positive.
    """
    y = np.asarray(y, dtype=float).ravel()
    t = np.asarray(t, dtype=float).ravel()
    order = np.argsort(t, kind="stable")
    y, t = y[order], t[order]
    if y.size < 2:
        return np.empty(0)
    ti = np.rint(t).astype(np.int64)
    if np.any(ti < 0) or np.any(np.abs(ti - t) > 1e-9):
        return np.full(y.size - 1, np.nan)
    full = np.full(int(ti.max()) + 2, np.nan)
    full[ti] = y
    kind = {"exp": "log", "cosh": "cosh", "sinh": "sinh"}[form]
    with np.errstate(all="ignore"):
        meff = effective_mass(full, kind=kind,
                              time_extent=None if kind == "log" else int(time_extent))
    out = np.where(ti[1:] - ti[:-1] == 1, meff[ti[:-1]], np.nan)
    return np.where(out > 0, out, np.nan)


def _dominant_sign(y: np.ndarray) -> float:
    finite = y[np.isfinite(y)]
    if finite.size == 0:
        return 1.0
    head = finite[: max(3, finite.size // 3)]
    return -1.0 if np.median(head) < 0 else 1.0


def _observable_energy(y: np.ndarray, t: np.ndarray, form: str, T: float,
                       states: int) -> tuple[float, float]:
    """(ground-state estimate, earliest usable effective energy) of one observable."""
    sign = _dominant_sign(y)
    e = pair_energies(sign * y, t, form, T)
    good = e[np.isfinite(e)]
    if good.size == 0:
        return np.nan, np.nan
    # with excited states in the model the early points are contaminated:
    # take the ground state from the later half of the usable pairs.
    use = good[good.size // 2:] if states > 1 and good.size >= 4 else good
    return float(np.median(use)), float(good[0])


def _clamp_amplitude(value: float, scale: float, fallback: float) -> float:
    if not np.isfinite(value) or value == 0.0:
        return fallback
    mag = min(max(abs(value), 0.05 * scale), 2.0 * scale) if scale > 0 else abs(value)
    return float(np.copysign(mag, value))


def _ordinary_part(model: CorrelatorModel, y_by_obs, t_by_obs):
    """Per-observable energies, amplitudes for the ordinary states."""
    form, T = model.form, float(model.time_extent)
    s = model.states
    estimates, early = [], []
    for obs in model.observables:
        e0, e_early = _observable_energy(y_by_obs[obs], t_by_obs[obs], form, T, s)
        estimates.append(e0)
        early.append(e_early)
    est = np.array(estimates)
    est = est[np.isfinite(est)]
    if est.size:
        e0 = float(np.median(est))
    else:
        # nothing usable pairwise: try the first and last points of each observable
        spans = []
        for obs in model.observables:
            y, t = np.asarray(y_by_obs[obs], float), np.asarray(t_by_obs[obs], float)
            ok = np.isfinite(y) & (y * _dominant_sign(y) > 0)
            if ok.sum() >= 2:
                yy, tt = y[ok] * _dominant_sign(y), t[ok]
                lo, hi = np.argmin(tt), np.argmax(tt)
                if tt[hi] > tt[lo] and yy[lo] > yy[hi]:
                    spans.append(np.log(yy[lo] / yy[hi]) / (tt[hi] - tt[lo]))
        e0 = float(np.median(spans)) if spans else FALLBACK_ENERGY
    if not np.isfinite(e0) or e0 <= 0:
        e0 = FALLBACK_ENERGY
    e0 = min(e0, _E_MAX)
    gap = max(GAP_FRACTION * e0, GAP_FLOOR)
    # an early effective energy well above E0 says where the first excited state is
    early_arr = np.array([x for x in early if np.isfinite(x)])
    energies = [e0]
    for n in range(1, s):
        g = gap
        if n == 1 and early_arr.size and np.median(early_arr) > 1.1 * e0:
            g = min(max(2.0 * (np.median(early_arr) - e0), 0.5 * gap), 4.0 * gap)
        energies.append(energies[-1] + g)
    energies = np.array(energies)

    amps = np.zeros((s, len(model.observables)))
    for j, obs in enumerate(model.observables):
        y = np.asarray(y_by_obs[obs], dtype=float)
        t = np.asarray(t_by_obs[obs], dtype=float)
        ok = np.isfinite(y)
        y, t = y[ok], t[ok]
        sign = _dominant_sign(y)
        if y.size == 0:
            amps[:, j] = sign
            continue
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            ratio = y / _basis(form, e0, t, T)
        ratio = ratio[np.isfinite(ratio) & (ratio * sign > 0)]
        a0 = float(np.median(ratio[ratio.size // 2:] if s > 1 and ratio.size >= 4
                             else ratio)) if ratio.size else sign
        if not np.isfinite(a0) or a0 == 0:
            a0 = sign
        amps[0, j] = a0
        # excited amplitudes from the residual at the first timeslice
        first = np.argmin(t)
        resid = y[first] - a0 * _basis(form, e0, t[first], T)
        for n in range(1, s):
            with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
                an = resid / _basis(form, energies[n], t[first], T)
            an = _clamp_amplitude(float(an), abs(a0), 0.1 * a0)
            amps[n, j] = an
            resid = resid - an * _basis(form, energies[n], t[first], T)
            resid = 0.0 if not np.isfinite(resid) else resid
    return energies, amps, gap


def _oscillating_part(model: CorrelatorModel, y_by_obs, t_by_obs, energies, amps, gap):
    form, T = model.form, float(model.time_extent)
    so = model.oscillating
    eosc = energies[0] + 0.5 * gap + gap * np.arange(so)
    amps_o = np.zeros((so, len(model.observables)))
    for j, obs in enumerate(model.observables):
        y = np.asarray(y_by_obs[obs], dtype=float)
        t = np.asarray(t_by_obs[obs], dtype=float)
        order = np.argsort(t)
        y, t = y[order], t[order]
        a0 = amps[0, j]
        est = np.nan
        if y.size >= 3:
            # geometric mean of the neighbours removes a pure exponential; what is
            # left alternates in sign with about twice the oscillating term
            ym, y0, yp = y[:-2], y[1:-1], y[2:]
            cont = (t[2:] - t[1:-1] == 1) & (t[1:-1] - t[:-2] == 1)
            with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
                geo = np.sign(y0) * np.sqrt(ym * yp)
                d = (y0 - geo) * (-1.0) ** t[1:-1] / (2.0 * _basis(form, eosc[0], t[1:-1], T))
            d = d[cont & np.isfinite(d)]
            if d.size:
                est = float(np.median(d))
        a_first = _clamp_amplitude(est, abs(a0), 0.05 * a0)
        amps_o[:, j] = a_first * 0.5 ** np.arange(so)
    return eosc, amps_o


def _factorise(model: CorrelatorModel, amps: np.ndarray) -> np.ndarray:
    """Overlaps Z_n.op from per-observable amplitudes A_n.o = Z_n.src Z_n.snk."""
    labels = model.amplitude_labels
    lab = {name: i for i, name in enumerate(labels)}
    rows = np.zeros((len(model.observables), len(labels)))
    for j, obs in enumerate(model.observables):
        src, snk = model.operators[obs]
        rows[j, lab[src]] += 1.0
        rows[j, lab[snk]] += 1.0
    out = np.zeros((amps.shape[0], len(labels)))
    for n in range(amps.shape[0]):
        mag = np.log(np.maximum(np.abs(amps[n]), 1e-300))
        logz = np.linalg.lstsq(rows, mag, rcond=None)[0]
        z = np.exp(np.clip(logz, -700, 700))
        # signs: Z_n.src Z_n.snk must have the sign of A_n.o; fix the first
        # operator's sign to + and propagate through the off-diagonal correlators
        signs: dict[str, float] = {}
        while len(signs) < len(labels):
            signs.setdefault(next(x for x in labels if x not in signs), 1.0)
            changed = True
            while changed:
                changed = False
                for j, obs in enumerate(model.observables):
                    src, snk = model.operators[obs]
                    want = -1.0 if amps[n, j] < 0 else 1.0
                    if src != snk and (src in signs) != (snk in signs):
                        known, other = (src, snk) if src in signs else (snk, src)
                        signs[other] = want * signs[known]
                        changed = True
        z = z * np.array([signs.get(lab_, 1.0) for lab_ in labels])
        out[n] = z
    return out


def _as_mapping(model: CorrelatorModel, values, what: str) -> dict[str, np.ndarray]:
    if isinstance(values, Mapping):
        missing = [o for o in model.observables if o not in values]
        if missing:
            raise ValueError(f"{what} lacks observable(s) {missing}")
        return {o: np.asarray(values[o], dtype=float).ravel() for o in model.observables}
    if len(model.observables) != 1:
        raise ValueError(f"{what} must be a dict NAME -> array for a fit of "
                         f"{len(model.observables)} observables")
    return {model.observables[0]: np.asarray(values, dtype=float).ravel()}


def starting_values(model: CorrelatorModel, y_by_obs, t_by_obs,
                    overrides: Mapping[str, float] | None = None) -> np.ndarray:
    """Automatic starting point of a fit, in the model's internal parameters.

    Parameters
    ----------
    model : CorrelatorModel
        The model to start (built by :func:`~plateaufit.fit.models.make_model`).
    y_by_obs : mapping or ndarray
        Observable name -> correlator values (the central values, e.g. the
        mean over bins) at the timeslices ``t_by_obs``; a plain array for a
        fit of one observable.
    t_by_obs : mapping or ndarray
        Observable name -> timeslices of those values.
    overrides : mapping, optional
        Reported parameter name (``E0``, ``E1``, ``A0.pion`` ...) -> value,
        replacing the automatic value (the spec's ``start:``).

    Returns
    -------
    ndarray, (n_params,)
        Finite internal parameters (energies strictly increasing).

    Raises
    ------
    plateaufit.errors.FitError
        ``where="start.NAME"`` for an unknown parameter name or an override
        that makes the energies non-increasing.

    Notes
    -----
    Recipe (common practice): ``E0`` is the median effective energy over the
    usable neighbouring pairs of the fit range (the later half when the model
    has excited states), the median over observables; ``A0`` the median of
    ``C(t)/g(E0, t)``; gaps ``max(0.5 E0, 0.2)`` (or twice the excess of the
    earliest effective energy over ``E0`` for the first gap); excited
    amplitudes from the residual at the first timeslice, clamped to
    ``[0.05, 2] |A0|``; oscillating energies half a gap above ``E0``;
    constants 0. A formula model starts from its declared ``params``.

    References
    ----------
    G. P. Lepage et al., "Constrained curve fitting", Nucl. Phys. B (Proc.
    Suppl.) 106 (2002) 12.
    """
    if isinstance(model, FormulaModel):
        phys = np.array([model.start[n] for n in model.reported_names], dtype=float)
    else:
        y_map = _as_mapping(model, y_by_obs, "y_by_obs")
        t_map = _as_mapping(model, t_by_obs, "t_by_obs")
        for o in model.observables:
            if y_map[o].shape != t_map[o].shape:
                raise ValueError(f"observable '{o}': {y_map[o].size} values for "
                                 f"{t_map[o].size} timeslices")
        energies, amps, gap = _ordinary_part(model, y_map, t_map)
        parts = [energies]
        osc = None
        if model.oscillating:
            osc = _oscillating_part(model, y_map, t_map, energies, amps, gap)
        if model.operators is not None:
            amps = _factorise(model, amps)
        parts.append(amps.ravel())
        if osc is not None:
            eosc, amps_o = osc
            if model.operators is not None:
                amps_o = _factorise(model, amps_o)
            parts += [eosc, amps_o.ravel()]
        if model.constant:
            parts.append(np.zeros(len(model.observables)))
        phys = np.concatenate(parts)
    if overrides:
        index = {n: i for i, n in enumerate(model.reported_names)}
        for name, value in overrides.items():
            if name not in index:
                raise FitError(f"start.{name}", f"there is no parameter '{name}' in this fit; "
                               f"parameters are {list(model.reported_names)}")
            value = float(value)
            if not np.isfinite(value):
                raise FitError(f"start.{name}", f"the starting value must be a finite "
                               f"number, got {value}")
            phys[index[name]] = value
    try:
        theta = model.from_reported(phys)
    except ValueError as exc:
        raise FitError("start", f"{exc}; change the start values") from None
    if not np.all(np.isfinite(theta)):   # pragma: no cover - guarded by construction
        raise FitError("start", f"could not find finite starting values, got {phys.tolist()}; "
                       "give them under start:")
    return theta


#: Gaps tried for a state added on top of a fit with one state fewer, as
#: fractions of the lower fit's highest energy (floored at GAP_FLOOR / 2).
ADDED_STATE_GAPS = (0.25, 0.75, 2.0)


def starting_points(model: CorrelatorModel, y_by_obs, t_by_obs,
                    overrides: Mapping[str, float] | None = None,
                    lower: Mapping[str, float] | None = None) -> np.ndarray:
    """Several starting points of a fit, to be minimised side by side.

    A multi-state fit has more than one local minimum: the ground state can
    park at a tiny amplitude while an excited state takes its place, or two
    states can merge. Starting from several points and keeping the lowest
    chi2 finds the physical minimum where one start alone may not.

    Parameters
    ----------
    model : CorrelatorModel
    y_by_obs, t_by_obs, overrides
        As for :func:`starting_values`; ``overrides`` apply to every point.
    lower : mapping, optional
        Reported parameters of the fit with one state fewer on the same range
        (its central fit). Adds points made of that fit plus one state on top,
        at several gaps (:data:`ADDED_STATE_GAPS`), with the amplitude that
        makes up the lower fit's residual at the first timeslice.

    Returns
    -------
    ndarray, (k, n_params)
        Finite internal parameters, the effective-mass start
        (:func:`starting_values`) first. A formula model, or a one-state model
        without ``lower``, has the one start.

    References
    ----------
    G. P. Lepage et al., "Constrained curve fitting", Nucl. Phys. B (Proc.
    Suppl.) 106 (2002) 12 -- adding states one at a time, each fit starting
    from the one before (common practice).
    """
    first = starting_values(model, y_by_obs, t_by_obs, overrides=overrides)
    if isinstance(model, FormulaModel) or model.states < 2:
        return first[None, :]
    points = [first]
    base = model.to_reported(first)
    names = list(model.reported_names)
    index = {n: i for i, n in enumerate(names)}
    s = model.states
    top = s - 1
    # variations of the effective-mass start: the top state's gap halved and doubled
    for factor in (0.5, 2.0):
        phys = base.copy()
        gap = phys[top] - phys[top - 1]
        phys[top] = phys[top - 1] + factor * gap
        points.append(phys)
    if lower:
        y_map = _as_mapping(model, y_by_obs, "y_by_obs")
        t_map = _as_mapping(model, t_by_obs, "t_by_obs")
        e_low = np.array([float(lower[f"E{n}"]) for n in range(top)])
        for frac in ADDED_STATE_GAPS:
            phys = base.copy()
            for name, value in lower.items():
                if name in index and np.isfinite(value):
                    phys[index[name]] = float(value)
            gap = max(frac * e_low[-1], 0.5 * GAP_FLOOR) if e_low[-1] > 0 else GAP_FLOOR
            phys[top] = e_low[-1] + gap
            if model.operators is None:
                for obs in model.observables:
                    y, t = y_map[obs], t_map[obs]
                    j = int(np.argmin(t))
                    fitted = sum(phys[index[f"A{n}.{obs}"]]
                                 * _basis(model.form, phys[n], t[j], model.time_extent)
                                 for n in range(top))
                    with np.errstate(all="ignore"):
                        amp = (y[j] - fitted) / _basis(model.form, phys[top], t[j],
                                                       model.time_extent)
                    scale = abs(phys[index[f"A0.{obs}"]])
                    phys[index[f"A{top}.{obs}"]] = _clamp_amplitude(float(amp), scale,
                                                                    0.1 * scale or 0.1)
            points.append(phys)
    out = []
    for phys in points:
        if overrides:
            for name, value in overrides.items():
                phys[index[name]] = float(value)
        try:
            theta = model.from_reported(phys)
        except ValueError:
            continue
        if np.all(np.isfinite(theta)):
            out.append(theta)
    return np.array(out)
