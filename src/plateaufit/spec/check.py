"""``plateaufit check SPEC``: validate a spec and its data, and summarise the data.

The summary tells an analyst, before any fit, whether the data can support
the analysis the spec asks for: how many configurations and streams, the
integrated autocorrelation time at a few timeslices, the bin size and the
number of bins it leaves, the effective mass with jackknife errors, and for
every fit how well conditioned the covariance of its widest range is, with and
without shrinkage.

The bin size is chosen exactly as ``plateaufit fit`` chooses it:
:func:`plateaufit.stats.autocorr.choose_bin_size` on the tau_int of every
timeslice of every observable, with the per-stream configuration counts.
"""

from __future__ import annotations

import os
import warnings
from dataclasses import dataclass, field

import numpy as np

from plateaufit.data.ensemble import Ensemble
from plateaufit.errors import FitError, PlateaufitError
from plateaufit.fit.models import EFFECTIVE_MASS_KIND
from plateaufit.spec.inputs import check_bin_size, load_ensemble, minimum_bins
from plateaufit.spec.schema import FitSpec, Spec, fit_n_params, load_spec

__all__ = ["check_spec", "summarise"]

TAU_CONVENTION = "tau_int (1/2 + sum rho convention)"
_N_SHOWN = 4  # timeslices shown for tau_int and the effective mass


@dataclass
class _Notes:
    """Warnings collected while summarising; printed at the end."""

    items: list[str] = field(default_factory=list)

    def add(self, text: str) -> None:
        if text not in self.items:
            self.items.append(text)


def _fmt(value: float, error: float) -> str:
    from plateaufit.report.tables import format_value_error

    if not (np.isfinite(value) and np.isfinite(error)):
        return "undefined"
    return format_value_error(float(value), float(error))


def _shown_timeslices(n_t: int, n: int = _N_SHOWN, last: int | None = None) -> list[int]:
    """A few timeslices spread over 1..last (t = 0 is often a contact term)."""
    last = n_t - 1 if last is None else last
    if last < 1:
        return [0]
    picks = np.unique(np.round(np.linspace(1, last, n)).astype(int))
    return [int(t) for t in picks]


def _stream_text(counts: dict[int, int]) -> str:
    if len(counts) == 1:
        return "1 stream"
    sizes = ", ".join(f"stream {label}: {n}" for label, n in counts.items())
    return f"{len(counts)} streams ({sizes})"


def _all_taus(series: np.ndarray, streams: np.ndarray):
    from plateaufit.stats.autocorr import ShortChainWarning, tau_int

    results = []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ShortChainWarning)
        for t in range(series.shape[1]):
            results.append(tau_int(series[:, t], streams=streams))
    return results


def _bin_size(taus: np.ndarray, counts: list[int], notes: _Notes, label: str,
              min_bins: int) -> int:
    from plateaufit.stats.autocorr import BinningWarning, choose_bin_size

    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", BinningWarning)
        size = int(choose_bin_size(taus, counts, min_bins=min_bins))
    for w in caught:
        if issubclass(w.category, BinningWarning):
            notes.add(f"{label}: {w.message}")
    return size


def _effmass_kind(spec: Spec, ens: Ensemble, name: str) -> str:
    """The model of the first fit using the observable; else from the boundary."""
    for fit in spec.fits:
        if name in fit.observables:
            return EFFECTIVE_MASS_KIND[fit.model]
    if ens.boundaries[name] == "periodic":
        return "cosh"
    if ens.boundaries[name] == "antiperiodic" and ens.folded[name]:
        return "sinh"
    return "log"


def _observable_lines(spec: Spec, ens: Ensemble, name: str, tau_results, own_size: int,
                      bin_size: int, binned: np.ndarray, notes: _Notes) -> list[str]:
    from plateaufit.stats.effmass import effective_mass_jackknife

    obs = spec.observables[name]
    data = ens.correlators[name]
    n_t = data.shape[1]
    fmt = obs.resolved_format
    lines = [f"observable {name}: {obs.file} ({fmt})"]
    lines.append(f"  configurations: {ens.n_configs} in {_stream_text(ens.stream_counts())}")
    if ens.folded[name]:
        extent = f"folded to t = 0..{n_t - 1} ({n_t} timeslices)"
    else:
        extent = f"not folded, t = 0..{n_t - 1}"
    lines.append(f"  time extent: T = {ens.time_extent}, {ens.boundaries[name]} boundary, "
                 f"{extent}")

    taus = np.array([r.tau for r in tau_results])
    shown = []
    for t in _shown_timeslices(n_t):
        r = tau_results[t]
        mark = "" if r.reliable else " (lower bound)"
        shown.append(f"t={t}: {_fmt(r.tau, r.error)}{mark}")
    lines.append(f"  {TAU_CONVENTION}: " + ", ".join(shown))
    worst = int(np.nanargmax(taus))
    r = tau_results[worst]
    lines.append(f"  largest tau_int: {_fmt(r.tau, r.error)} at t = {worst} "
                 f"(window W = {r.window}){'' if r.reliable else ', unreliable'}")
    unreliable = [t for t, res in enumerate(tau_results) if not res.reliable]
    if unreliable:
        listed = ", ".join(str(t) for t in unreliable[:8]) + (", ..." if len(unreliable) > 8
                                                             else "")
        lines.append(f"  UNRELIABLE tau_int at t = {listed}: the chain is too short for its "
                     "autocorrelation; the value is a lower bound")
        notes.add(f"{name}: tau_int is unreliable (a lower bound) at {len(unreliable)} of {n_t} "
                  "timeslices; more configurations are needed for a trustworthy error")
    lines.append(f"  bin size this observable alone would need: {own_size} "
                 f"(binning uses {bin_size})")

    kind = _effmass_kind(spec, ens, name)
    em = effective_mass_jackknife(binned, kind=kind, time_extent=ens.time_extent)
    pieces = [f"t={t}: {_fmt(em.value[t], em.error[t])}"
              for t in _shown_timeslices(n_t, _N_SHOWN + 2, last=n_t - 2)]
    lines.append(f"  effective mass ({kind}), jackknife over {binned.shape[0]} bins: "
                 + ", ".join(pieces))
    return lines


def _fit_lines(spec: Spec, index: int, fit: FitSpec, binned: dict[str, np.ndarray],
               notes: _Notes) -> list[str]:
    from plateaufit.stats.covariance import covariance_of_mean

    tmins, tmaxs, states = fit.tmin_values, fit.tmax_values, fit.states_values
    n_obs = len(fit.observables)
    n_par = {s: fit_n_params(spec, fit, s) for s in states}
    points = [(a, b, s) for a in tmins for b in tmaxs for s in states
              if a < b and n_obs * (b - a + 1) - n_par[s] >= 1]
    lo, hi = min(tmins), max(tmaxs)
    states_text = (f"states {states[0]}" if len(states) == 1
                   else f"states {', '.join(map(str, states))}")
    model = fit.model if fit.model != "formula" else f"formula {fit.formula.expression!r}"
    lines = [f"fit {fit.name} (fits[{index}]): {model}, {states_text}, observables "
             f"{', '.join(fit.observables)}"]
    lines.append(f"  scan: tmin {_range_text(tmins)}, tmax {_range_text(tmaxs)} -> "
                 f"{len(points)} fit(s) with dof >= 1")
    block = np.concatenate([binned[n][:, lo:hi + 1] for n in fit.observables], axis=1)
    n_bins, n_points = block.shape
    c = spec.covariance
    head = f"  covariance of the widest range t = {lo}..{hi} ({n_points} points, {n_bins} bins):"
    try:
        cov = covariance_of_mean(block, shrinkage=c.shrinkage, target=c.target,
                                 eigenvalue_floor=c.eigenvalue_floor)
    except PlateaufitError as err:
        # the fit itself would stop here, so the check must not pass
        raise FitError(f"fits[{index}]", f"fit {fit.name}, range t = {lo}..{hi}: "
                       f"{err.message}") from None
    raw = ("singular" if n_bins <= n_points or not np.isfinite(cov.condition_number_raw)
           else f"{cov.condition_number_raw:.3g}")
    shrink = (c.shrinkage if isinstance(c.shrinkage, str) else "fixed")
    lines.append(f"{head} condition number {raw} raw, {cov.condition_number:.3g} after "
                 f"shrinkage ({shrink}, intensity {cov.shrinkage:.3f}, target {c.target})")
    if n_bins <= n_points:
        notes.add(f"fit {fit.name}: {n_bins} bins for {n_points} points in the widest range: "
                  "the unshrunk covariance is singular, so the fit relies on shrinkage")
    return lines


def _range_text(values: list[int]) -> str:
    if len(values) == 1:
        return str(values[0])
    step = values[1] - values[0]
    tail = f" step {step}" if step != 1 else ""
    return f"{values[0]}..{values[-1]}{tail}"


def summarise(spec: Spec, ensemble: Ensemble) -> str:
    """The data summary of ``plateaufit check`` for a loaded spec and ensemble.

    Parameters
    ----------
    spec : Spec
    ensemble : Ensemble
        ``load_ensemble(spec)``.

    Returns
    -------
    str
        Several lines of text, ending with the verdict and any warnings.

    Raises
    ------
    DataError
        When the data cannot be binned with ``binning.size``.
    """
    from plateaufit.stats.resample import bin_samples

    notes = _Notes()
    streams = ensemble.streams
    counts = [int(n) for n in ensemble.stream_counts().values()]
    taus = {n: _all_taus(c, streams) for n, c in ensemble.correlators.items()}
    tau_values = {n: np.array([r.tau for r in res]) for n, res in taus.items()}
    least = minimum_bins(spec)
    auto_size = _bin_size(np.concatenate(list(tau_values.values())), counts, notes, "binning",
                          least)
    if spec.binning.size == "auto":
        bin_size, how = auto_size, "binning.size: auto, from the largest tau_int"
    else:
        bin_size = int(spec.binning.size)
        how = f"binning.size: {bin_size}; auto would choose {auto_size}"
    check_bin_size(bin_size, counts)
    binned: dict[str, np.ndarray] = {}
    n_dropped = 0
    for name, series in ensemble.correlators.items():
        binned[name], n_dropped = bin_samples(series, bin_size, streams, return_dropped=True)
    n_bins = next(iter(binned.values())).shape[0]

    where = f"{spec.path}" if spec.path is not None else "spec"
    lines = [f"spec {where}: valid ({len(spec.observables)} observable(s), "
             f"{len(spec.fits)} fit(s))"]
    lines.append(f"ensemble {ensemble.name}: T = {ensemble.time_extent}, {ensemble.n_configs} "
                 f"configurations in {_stream_text(ensemble.stream_counts())}")
    lines.append(f"binning: bin size {bin_size} ({how}) -> {n_bins} bins, "
                 f"{n_dropped} configuration(s) dropped at stream ends")
    if bin_size < auto_size:
        notes.add(f"binning.size {bin_size} is below the {auto_size} the autocorrelation "
                  "suggests; errors may be underestimated")
    for name in ensemble.correlators:
        own = _bin_size(tau_values[name], counts, notes, "binning", least)
        lines.append("")
        lines += _observable_lines(spec, ensemble, name, taus[name], own, bin_size,
                                   binned[name], notes)
    for index, fit in enumerate(spec.fits):
        lines.append("")
        lines += _fit_lines(spec, index, fit, binned, notes)
    if spec.derived:
        lines.append("")
        lines.append("derived quantities (jackknife over the same bins as the fits):")
        lines += [f"  {name} = {expression}" for name, expression in spec.derived.items()]
    lines.append("")
    if notes.items:
        lines.append(f"check passed with {len(notes.items)} warning(s):")
        lines += [f"  warning: {text}" for text in notes.items]
    else:
        lines.append("check passed: the spec and its data are usable")
    return "\n".join(lines)


def check_spec(path: str | os.PathLike[str]) -> str:
    """Validate a spec and its data; return a readable data summary.

    Parameters
    ----------
    path : path-like
        The YAML spec file.

    Returns
    -------
    str
        The summary (see :func:`summarise`).

    Raises
    ------
    SpecError
        The spec is invalid (``where`` is the key path).
    DataError
        A data file is missing or unusable (``where`` is
        ``observables.NAME.file`` or ``ensemble.streams``), or the data cannot
        be binned (``binning.size``).

    References
    ----------
    U. Wolff, "Monte Carlo errors with less errors", Comput. Phys. Commun. 156
    (2004) 143 -- the tau_int convention and automatic window used here.
    """
    spec = load_spec(path)
    ensemble = load_ensemble(spec)
    return summarise(spec, ensemble)
