"""``plateaufit check SPEC``: validate a spec and its data, and summarise the data.

The summary tells an analyst, before any fit, whether the data can support
the analysis the spec asks for: how many configurations and streams, the
integrated autocorrelation time at a few timeslices, the bin size and the
number of bins it leaves, the effective mass with jackknife errors, and for
every fit how well conditioned the covariance of its widest range is, with and
without shrinkage.

The data are prepared by the same code as ``plateaufit fit``
(:func:`plateaufit.pipeline.prepare.prepare`: tau_int at every timeslice, the
bin size, the binned data), and the covariance has the same options
(:func:`plateaufit.pipeline.fits.covariance_kwargs`).
"""

from __future__ import annotations

import os
from collections.abc import Mapping
from dataclasses import dataclass, field

import numpy as np

from plateaufit.errors import FitError, PlateaufitError
from plateaufit.data.loaders import RawCorrelator
from plateaufit.fit.scan import prepare_scan
from plateaufit.pipeline.fits import covariance_kwargs, fit_kwargs
from plateaufit.pipeline.inputs import load_inputs
from plateaufit.pipeline.keys import located
from plateaufit.pipeline.output import output_folder, output_names
from plateaufit.pipeline.prepare import (Prepared, choose_bins, effective_mass_kind, minimum_bins,
                                         prepare, tau_estimable)
from plateaufit.pipeline.rules import load_spec
from plateaufit.pipeline.summary import effective_mass_results
from plateaufit.report.tables import format_value_error
from plateaufit.specfile import FitSpec, Spec
from plateaufit.stats.autocorr import TauIntResult
from plateaufit.stats.covariance import covariance_of_mean

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


def _stream_text(counts: dict[int, int], names: dict[int, str] | None = None) -> str:
    """``2 streams (stream a: 600, stream b: 400)``, with the files' stream names."""
    names = names or {}
    if len(counts) == 1:
        label = next(iter(counts))
        return f"1 stream ({names[label]})" if label in names else "1 stream"
    sizes = ", ".join(f"stream {names.get(label, label)}: {n}" for label, n in counts.items())
    return f"{len(counts)} streams ({sizes})"


def _tau_cell(r: TauIntResult) -> str:
    if not tau_estimable(r):
        return "not estimable"
    return _fmt(r.tau, r.error) + ("" if r.reliable else " (lower bound)")


def _observable_lines(spec: Spec, prepared: Prepared, name: str, own_size: int | None,
                      notes: _Notes, raws: Mapping[str, RawCorrelator] | None = None
                      ) -> list[str]:
    ens = prepared.ensemble
    tau_results = prepared.taus[name]
    obs = spec.observables[name]
    n_t = ens.correlators[name].shape[1]
    lines = [f"observable {name}: {obs.file} ({obs.resolved_format})"]
    lines.append(f"  configurations: {ens.n_configs} in "
                 f"{_stream_text(ens.stream_sizes(), ens.stream_names)}")
    raw = (raws or {}).get(name)
    if name in ens.reordered:
        moved = f"{raw.n_moved} of {ens.n_configs} configurations" if raw is not None \
            else "configurations"
        lines.append(f"  reordered: the file stores its configurations out of order; {moved} "
                     "were put in Monte Carlo order (by stream, then configuration id)")
    if ens.folded[name]:
        extent = f"folded to t = 0..{n_t - 1} ({n_t} timeslices)"
    else:
        extent = f"not folded, t = 0..{n_t - 1}"
    lines.append(f"  time extent: T = {ens.time_extent}, {ens.boundaries[name]} boundary, "
                 f"{extent}")
    shown = [f"t={t}: {_tau_cell(tau_results[t])}" for t in _shown_timeslices(n_t)]
    lines.append(f"  {TAU_CONVENTION}: " + ", ".join(shown))
    worst, r = prepared.largest_tau(name)
    if tau_estimable(r):
        lines.append(f"  largest tau_int: {_fmt(r.tau, r.error)} at t = {worst} "
                     f"(window W = {r.window}){'' if r.reliable else ', unreliable'}")
    else:
        lines.append("  largest tau_int: not estimable at any timeslice (too few "
                     "configurations for an autocorrelation)")
    missing = [t for t, res in enumerate(tau_results) if not tau_estimable(res)]
    if missing:
        notes.add(f"{name}: tau_int is not estimable at {len(missing)} of {n_t} timeslices "
                  f"({ens.n_configs} configurations are too few); the errors cannot be "
                  "corrected for autocorrelation there")
    unreliable = [t for t, res in enumerate(tau_results)
                  if not res.reliable and tau_estimable(res)]
    if unreliable:
        listed = ", ".join(str(t) for t in unreliable[:8]) + (", ..." if len(unreliable) > 8
                                                             else "")
        lines.append(f"  UNRELIABLE tau_int at t = {listed}: the chain is too short for its "
                     "autocorrelation; the value is a lower bound")
        notes.add(f"{name}: tau_int is unreliable (a lower bound) at {len(unreliable)} of {n_t} "
                  "timeslices; more configurations are needed for a trustworthy error")
    own = own_size if own_size is not None else "not estimable"
    lines.append(f"  bin size this observable alone would need: {own} "
                 f"(binning uses {prepared.bin_size})")

    kind = effective_mass_kind(spec, ens, name)
    em = effective_mass_results({name: prepared.binned[name]}, kind, ens.time_extent)[name]
    pieces = [f"t={t}: {_fmt(em.value[t], em.error[t])}"
              for t in _shown_timeslices(n_t, _N_SHOWN + 2, last=n_t - 2)]
    lines.append(f"  effective mass ({kind}), jackknife over {prepared.n_bins} bins: "
                 + ", ".join(pieces))
    return lines


def _fit_lines(spec: Spec, index: int, fit: FitSpec, prepared: Prepared,
               notes: _Notes) -> list[str]:
    tmins, tmaxs, states = fit.tmin_values, fit.tmax_values, fit.states_values
    n_obs = len(fit.observables)
    n_par = {s: spec.n_params(fit, s) for s in states}
    points = [(a, b, s) for a in tmins for b in tmaxs for s in states
              if a < b and n_obs * (b - a + 1) - n_par[s] >= 1]
    lo, hi = min(tmins), max(tmaxs)
    states_text = (f"states {states[0]}" if len(states) == 1
                   else f"states {', '.join(map(str, states))}")
    model = fit.form if fit.form != "formula" else f"formula {fit.formula.expression!r}"
    lines = [f"fit {fit.name} (fits[{index}]): {model}, {states_text}, observables "
             f"{', '.join(fit.observables)}"]
    lines.append(f"  scan: tmin {_range_text(tmins)}, tmax {_range_text(tmaxs)} -> "
                 f"{len(points)} fit(s) with dof >= 1")
    every_point = _every_point_line(spec, index, fit, prepared)   # fails where fit would
    block = np.concatenate([prepared.binned[n][:, lo:hi + 1] for n in fit.observables], axis=1)
    n_bins, n_points = block.shape
    c = spec.covariance
    head = f"  covariance of the widest range t = {lo}..{hi} ({n_points} points, {n_bins} bins):"
    try:
        cov = covariance_of_mean(block, **covariance_kwargs(spec))
    except PlateaufitError as err:
        # the fit itself would stop here, so the check must not pass
        raise FitError(f"fits[{index}]", f"fit {fit.name}, range t = {lo}..{hi}: "
                       f"{err.message}") from None
    raw = ("singular" if n_bins <= n_points or not np.isfinite(cov.condition_number_raw)
           else f"{cov.condition_number_raw:.3g}")
    shrink = (c.shrinkage if isinstance(c.shrinkage, str) else "fixed")
    floor = (f", eigenvalue floor {c.eigenvalue_floor:g}" if c.eigenvalue_floor is not None
             else "")
    lines.append(f"{head} condition number {raw} raw, {cov.condition_number:.3g} after "
                 f"shrinkage ({shrink}, intensity {cov.shrinkage:.3f}, target {c.target}{floor})")
    if n_bins <= n_points:
        notes.add(f"fit {fit.name}: {n_bins} bins for {n_points} points in the widest range: "
                  "the unshrunk covariance is singular, so the fit relies on shrinkage")
    lines.append(every_point)
    return lines


def _every_point_line(spec: Spec, index: int, fit: FitSpec, prepared: Prepared) -> str:
    """Set up every scan point as ``fit`` will (each covariance, each model): the check
    fails exactly where the fit would, and names the point."""
    data = {name: prepared.binned[name] for name in fit.observables}
    with located(fit_index=index):
        problems = prepare_scan(data, tmin=fit.tmin, tmax=fit.tmax, states=fit.states_values,
                                **fit_kwargs(spec, fit))
    worst_key, worst = max(((k, p.covariance.condition_number) for k, p in problems.items()),
                           key=lambda kv: kv[1])
    return (f"  every scan point's covariance can be used ({len(problems)} point(s)); the "
            f"worst condition number is {worst:.3g}, at tmin {worst_key[0]}, tmax "
            f"{worst_key[1]}, {worst_key[2]} state(s)")


def _range_text(values: list[int]) -> str:
    if len(values) == 1:
        return str(values[0])
    step = values[1] - values[0]
    tail = f" step {step}" if step != 1 else ""
    return f"{values[0]}..{values[-1]}{tail}"


def summarise(spec: Spec, prepared: Prepared,
              raws: Mapping[str, RawCorrelator] | None = None) -> str:
    """The data summary of ``plateaufit check`` for a spec and its prepared data.

    Parameters
    ----------
    spec, prepared
        The spec and :func:`~plateaufit.pipeline.prepare.prepare`'s result.
    raws : mapping, optional
        The files as read (:func:`~plateaufit.pipeline.inputs.load_inputs`): how
        many configurations a loader reordered.

    Returns
    -------
    str
        Several lines of text, ending with the verdict and any warnings.
    """
    notes = _Notes()
    ensemble = prepared.ensemble
    least = minimum_bins(spec)
    for note in prepared.bin_size_notes:
        notes.add(f"binning: {note}")
    if spec.binning.size == "auto":
        how = "binning.size: auto, from the largest tau_int"
    elif prepared.auto_bin_size is None:
        how = (f"binning.size: {prepared.bin_size}; auto could not choose one, tau_int being "
               "estimable nowhere")
    else:
        how = f"binning.size: {prepared.bin_size}; auto would choose {prepared.auto_bin_size}"
    where = f"{spec.path}" if spec.path is not None else "spec"
    lines = [f"spec {where}: valid ({len(spec.observables)} observable(s), "
             f"{len(spec.fits)} fit(s))"]
    lines.append(f"ensemble {ensemble.name}: T = {ensemble.time_extent}, {ensemble.n_configs} "
                 f"configurations in "
                 f"{_stream_text(ensemble.stream_sizes(), ensemble.stream_names)}")
    if ensemble.reordered:
        listed = ", ".join(ensemble.reordered)
        if ensemble.aligned_by == "rows":
            notes.add(f"the files of {listed} were reordered into Monte Carlo order, but not "
                      "every file has configuration ids, so the observables are matched row "
                      "by row: files without ids must list their configurations in Monte "
                      "Carlo order (or give every file ids)")
        else:
            lines.append(f"reordered: {listed} stored configurations out of order; all files "
                         "are matched by configuration id")
    lines.append(f"binning: bin size {prepared.bin_size} ({how}) -> {prepared.n_bins} bins, "
                 f"{prepared.n_dropped} configuration(s) dropped at stream ends")
    if prepared.auto_bin_size is not None and prepared.bin_size < prepared.auto_bin_size:
        notes.add(f"binning.size {prepared.bin_size} is below the {prepared.auto_bin_size} the "
                  "autocorrelation suggests; errors may be underestimated")
    for name in ensemble.correlators:
        taus = np.array([r.tau for r in prepared.taus[name]], dtype=float)
        own: int | None = None
        if np.isfinite(taus).any():
            own, own_notes = choose_bins(taus, prepared.stream_sizes, least)
            for note in own_notes:
                notes.add(f"binning: {note}")
        lines.append("")
        lines += _observable_lines(spec, prepared, name, own, notes, raws)
    for index, fit in enumerate(spec.fits):
        if fit.matrix is not None:
            continue                      # with its matrix, below
        lines.append("")
        lines += _fit_lines(spec, index, fit, prepared, notes)
    if spec.matrices:
        from plateaufit.pipeline.matrices import check_lines

        lines.append("")
        lines += check_lines(spec, prepared)
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

    Raises
    ------
    SpecError
        The spec is invalid (``where`` is the key path).
    DataError
        A data file is missing or unusable (``where`` is
        ``observables.NAME.file`` or ``ensemble.streams``), or the data cannot
        be binned (``binning.size``), or an output of ``plateaufit fit`` would
        replace an input (``where`` is ``output.dir``).

    References
    ----------
    U. Wolff, "Monte Carlo errors with less errors", Comput. Phys. Commun. 156
    (2004) 143 -- the tau_int convention and automatic window used here.
    """
    spec = load_spec(path)
    output_folder(spec).check_outputs(output_names(spec, plots=spec.output.plots),
                                      plots=spec.output.plots)
    ensemble, raws = load_inputs(spec)
    return summarise(spec, prepare(spec, ensemble), raws)
