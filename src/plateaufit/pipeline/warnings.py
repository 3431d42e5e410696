"""The warnings of a run: one table of rules over the typed results.

Each rule has a code and a function of the :class:`~plateaufit.pipeline.results.Results`
that yields the :class:`~plateaufit.pipeline.results.RunWarning` items it finds;
:func:`collect_warnings` runs the table in order. The pipeline stores the
result in ``Results.warnings`` (and each fit's messages in its own
``warnings``); the report only renders them. The thresholds are here and
nowhere else.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterator
from dataclasses import dataclass, replace

from plateaufit.pipeline.results import FitResult, Results, RunWarning

__all__ = ["LOW_P_VALUE", "STRONG_SHRINKAGE", "Rule", "RULES", "collect_warnings",
           "with_warnings"]

#: a chosen (or highest-weight) fit with a p-value below this is flagged
LOW_P_VALUE = 0.05
#: a covariance shrinkage intensity above this is flagged
STRONG_SHRINKAGE = 0.5


@dataclass(frozen=True)
class Rule:
    """One row of the table: a code, what it is about, and the check."""

    code: str
    about: str
    check: Callable[[Results], Iterator[RunWarning]]


def _fits(results: Results) -> Iterator[tuple[str, FitResult]]:
    yield from results.fits.items()


def _tau_unreliable(results: Results) -> Iterator[RunWarning]:
    for name, tau in results.ensemble.tau_int.items():
        if not tau.reliable:
            yield RunWarning("tau-unreliable", None,
                          f"{name}: no autocorrelation window was found at every timeslice; "
                          f"tau_int = {tau.value:.3g} is a lower bound there (the chains are "
                          "short for their autocorrelation)")


def _bin_size_capped(results: Results) -> Iterator[RunWarning]:
    for note in results.ensemble.bin_size_notes:
        yield RunWarning("bin-size-capped", None, f"binning.size: {note}")


def _chosen_not_converged(results: Results) -> Iterator[RunWarning]:
    for name, fit in _fits(results):
        if not fit.chosen.converged:
            what = ("a fit contributing to the average" if fit.chosen.is_average
                    else "the chosen fit")
            yield RunWarning("chosen-not-converged", name, f"fit {name}: {what} did not converge")


def _low_p_value(results: Results) -> Iterator[RunWarning]:
    for name, fit in _fits(results):
        p = fit.chosen.point.p_value
        if p < LOW_P_VALUE:
            which = "highest-weight" if fit.chosen.is_average else "chosen"
            yield RunWarning("low-p-value", name, f"fit {name}: the {which} fit has p-value "
                          f"{p:.3g} (below {LOW_P_VALUE})")


def _points_excluded(results: Results) -> Iterator[RunWarning]:
    for name, fit in _fits(results):
        if fit.chosen.is_average and fit.chosen.n_excluded:
            yield RunWarning("points-excluded", name,
                          f"fit {name}: {fit.chosen.n_excluded} of {len(fit.scan)} scan points "
                          "did not converge or ended with E0 <= 0, and were given weight 0")
        elif not fit.chosen.is_average:
            failed = sum(1 for p in fit.scan if not p.converged)
            if failed:
                yield RunWarning("points-not-converged", name, f"fit {name}: {failed} of "
                              f"{len(fit.scan)} scan points did not converge")


def _refits_failed(results: Results) -> Iterator[RunWarning]:
    for name, fit in _fits(results):
        n = sum(p.n_refit_failed for p in fit.scan)
        if n:
            yield RunWarning("refits-failed", name, f"fit {name}: {n} jackknife refit(s) failed: "
                          "they did not converge even with the fallback fitter")


def _strong_shrinkage(results: Results) -> Iterator[RunWarning]:
    for name, fit in _fits(results):
        lam = fit.covariance.shrinkage if fit.covariance is not None else math.nan
        if lam > STRONG_SHRINKAGE:
            yield RunWarning("strong-shrinkage", name, f"fit {name}: strong covariance shrinkage "
                          f"({lam:.2f}); more bins would help")


def _scan_point_flagged(results: Results) -> Iterator[RunWarning]:
    for name, fit in _fits(results):
        for p in fit.scan:
            if p.flags:
                reasons = "; ".join(p.flag_messages) if p.flag_messages else ", ".join(p.flags)
                yield RunWarning("scan-point-flagged", name,
                              f"fit {name}: scan point {p.label} flagged: {reasons}")


def _numerical_warnings(results: Results) -> Iterator[RunWarning]:
    for name, fit in _fits(results):
        n = sum(p.n_numerical_warnings for p in fit.scan)
        if n:
            yield RunWarning("numerical-warnings", name, f"fit {name}: {n} numerical warnings from "
                          "numpy/scipy caught, see run.log")


def _derived_dropped(results: Results) -> Iterator[RunWarning]:
    for name, d in results.derived.items():
        if d.n_dropped:
            yield RunWarning("derived-samples-dropped", None,
                          f"derived {name}: {d.n_dropped} jackknife sample(s) left out, where a "
                          "refit of an input failed")


#: the table, in the order the warnings are listed
RULES: tuple[Rule, ...] = (
    Rule("tau-unreliable", "tau_int whose summation window was not found", _tau_unreliable),
    Rule("bin-size-capped", "automatic bin size capped to keep enough bins", _bin_size_capped),
    Rule("chosen-not-converged", "the chosen fit (or one averaged over) did not converge",
         _chosen_not_converged),
    Rule("low-p-value", f"chosen or highest-weight fit with p < {LOW_P_VALUE}", _low_p_value),
    Rule("points-excluded", "scan points given weight 0, or not converged", _points_excluded),
    Rule("refits-failed", "jackknife refits that did not converge", _refits_failed),
    Rule("strong-shrinkage", f"shrinkage intensity above {STRONG_SHRINKAGE}", _strong_shrinkage),
    Rule("scan-point-flagged", "scan points the fit core flagged (one per point)",
         _scan_point_flagged),
    Rule("numerical-warnings", "numpy/scipy warnings caught in a fit (one line per fit)",
         _numerical_warnings),
    Rule("derived-samples-dropped", "derived quantities with jackknife samples left out",
         _derived_dropped),
)


def collect_warnings(results: Results, rules: tuple[Rule, ...] = RULES) -> list[RunWarning]:
    """Every warning the rules find in ``results``, in table order."""
    return [w for rule in rules for w in rule.check(results)]


def with_warnings(results: Results) -> Results:
    """``results`` with its warnings table and each fit's ``warnings`` filled in."""
    table = collect_warnings(results)
    fits = {name: replace(fit, warnings=[w.message for w in table if w.fit == name])
            for name, fit in results.fits.items()}
    return replace(results, fits=fits, warnings=table)
