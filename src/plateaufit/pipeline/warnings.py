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

from plateaufit.fit.diagnostics import FLAG_CODES
from plateaufit.pipeline.matrix_results import LevelCheck
from plateaufit.pipeline.results import FitResult, Results, RunWarning

__all__ = ["LOW_P_VALUE", "STRONG_SHRINKAGE", "LEVEL_SEPARATION", "GRID_ASYMMETRY",
           "METRIC_CONDITION", "Rule", "RULES", "collect_warnings", "with_warnings"]

#: a chosen (or highest-weight) fit with a p-value below this is flagged
LOW_P_VALUE = 0.05
#: a covariance shrinkage intensity above this is flagged
STRONG_SHRINKAGE = 0.5
#: matrix levels closer than this many jackknife errors inside a fit range are flagged
#: (common practice: two levels within 2 sigma are not told apart)
LEVEL_SEPARATION = 2.0
#: a grid entry whose C_ij - C_ji is further than this many jackknife errors from 0 is
#: flagged (common practice: noise rarely reaches 5 sigma; a misplaced entry does)
GRID_ASYMMETRY = 5.0
#: a C(t0) with a condition number above this is flagged (the Cholesky reduction of the
#: GEVP loses about log10(cond) of the 16 digits)
METRIC_CONDITION = 1e10


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
        if not (math.isfinite(tau.value) and tau.value >= 0):
            yield RunWarning("tau-unreliable", None,
                             f"{name}: tau_int is not estimable at any timeslice (too few "
                             "configurations); the errors are not corrected for "
                             "autocorrelation")
        elif not tau.reliable:
            yield RunWarning("tau-unreliable", None,
                          f"{name}: no autocorrelation window was found at every timeslice; "
                          f"tau_int = {tau.value:.3g} is a lower bound there (the chains are "
                          "short for their autocorrelation)")


def _bin_size_capped(results: Results) -> Iterator[RunWarning]:
    for note in results.ensemble.bin_size_notes:
        yield RunWarning("bin-size-capped", None, f"binning.size: {note}")


def _withheld_entirely(fit: FitResult) -> bool:
    """The chosen single point is not a fit: every parameter withheld."""
    return bool(fit.chosen.withheld) and set(fit.chosen.withheld) >= set(fit.chosen.params)


def _chosen_withheld(results: Results) -> Iterator[RunWarning]:
    # a chosen point that is not a fit must never read as a clean value
    for name, fit in _fits(results):
        if not fit.chosen.withheld:
            continue
        p = fit.chosen.point
        label = f"[{p.tmin}, {p.tmax}], {p.states} state" + ("s" if p.states != 1 else "")
        reasons = "; ".join(fit.chosen.withheld_reasons) or "it is flagged"
        if _withheld_entirely(fit):
            yield RunWarning("chosen-withheld", name,
                             f"fit {name}: the chosen fit ({label}) is not a result, so no "
                             f"values are reported (null in results.json): {reasons}. Choose "
                             "another point, or fix the fit (bounds, priors, start values, "
                             "range)")
        else:
            listed = ", ".join(fit.chosen.withheld)
            yield RunWarning("chosen-withheld", name,
                             f"fit {name}: {listed} of the chosen fit ({label}) are not "
                             f"determined by the data and are not reported: {reasons}")


def _chosen_not_converged(results: Results) -> Iterator[RunWarning]:
    for name, fit in _fits(results):
        if not fit.chosen.converged:
            what = ("a fit contributing to the average" if fit.chosen.is_average
                    else "the chosen fit")
            yield RunWarning("chosen-not-converged", name, f"fit {name}: {what} did not converge")


def _low_p_value(results: Results) -> Iterator[RunWarning]:
    for name, fit in _fits(results):
        if _withheld_entirely(fit):
            continue
        p = fit.chosen.point.p_value
        if p < LOW_P_VALUE:
            which = "highest-weight" if fit.chosen.is_average else "chosen"
            yield RunWarning("low-p-value", name, f"fit {name}: the {which} fit has p-value "
                          f"{p:.3g} (below {LOW_P_VALUE})")


#: codes of the flags that give a scan point weight 0 (plateaufit.fit.diagnostics)
DEGENERATE_FLAGS = frozenset(code for code, (effect, _) in FLAG_CODES.items()
                             if effect == "degenerate")


def excluded_reasons(fit: FitResult) -> dict[str, int]:
    """Why scan points got weight 0: degenerate flag code (or 'not converged') -> count."""
    reasons: dict[str, int] = {}
    for p in fit.scan:
        codes = {f.split(":")[0] for f in p.flags} & DEGENERATE_FLAGS
        if not p.converged and not codes & {"central-failed", "refits-failed"}:
            codes.add("not converged")
        for code in codes:
            reasons[code] = reasons.get(code, 0) + 1
    return reasons


def _points_excluded(results: Results) -> Iterator[RunWarning]:
    # A few degenerate points left out is the average working as it should
    # (run.log and the report's scan table list each with its reason); a
    # warning when they are half of the scan or more.
    for name, fit in _fits(results):
        if fit.chosen.is_average and 2 * fit.chosen.n_excluded >= max(len(fit.scan), 1):
            shown = ", ".join(f"{code} {n}" for code, n in sorted(excluded_reasons(fit).items()))
            yield RunWarning("points-excluded", name,
                             f"fit {name}: {fit.chosen.n_excluded} of {len(fit.scan)} scan points "
                             f"were given weight 0 ({shown}); run.log lists each with its reason")
        elif not fit.chosen.is_average:
            failed = sum(1 for p in fit.scan if not p.converged)
            if failed:
                yield RunWarning("points-not-converged", name, f"fit {name}: {failed} of "
                              f"{len(fit.scan)} scan points did not converge")


def _refits_failed(results: Results) -> Iterator[RunWarning]:
    # only points that carry weight: a point with failed refits is degenerate
    # and left out of an average (counted by points-excluded)
    for name, fit in _fits(results):
        n = sum(p.n_refit_failed for p in fit.scan if p.weight > 0)
        if n:
            yield RunWarning("refits-failed", name, f"fit {name}: {n} jackknife refit(s) failed "
                             "in scan points that carry weight: they did not converge even "
                             "with the fallback fitter")


def _strong_shrinkage(results: Results) -> Iterator[RunWarning]:
    for name, fit in _fits(results):
        lam = fit.covariance.shrinkage if fit.covariance is not None else math.nan
        if lam > STRONG_SHRINKAGE:
            yield RunWarning("strong-shrinkage", name, f"fit {name}: strong covariance shrinkage "
                          f"({lam:.2f}); more bins would help")


def _chosen_flagged(results: Results) -> Iterator[RunWarning]:
    # the chosen fit, or the highest-weight point of an average, that a careful
    # analyst would question (every flagged point is listed in run.log)
    for name, fit in _fits(results):
        shown = fit.chosen_point()
        if _withheld_entirely(fit):
            continue
        if shown is not None and shown.flags:
            reasons = "; ".join(shown.flag_messages) or ", ".join(shown.flags)
            which = "highest-weight" if fit.chosen.is_average else "chosen"
            yield RunWarning("chosen-flagged", name,
                             f"fit {name}: the {which} fit ({shown.label}) is flagged: {reasons}")


def _matrix_level_checks(results: Results) -> Iterator[tuple[str, str, LevelCheck]]:
    for name, matrix in results.matrices.items():
        for fit_name, check in matrix.fits.items():
            yield name, fit_name, check


def _matrix_crossings(results: Results) -> Iterator[RunWarning]:
    for name, fit_name, c in _matrix_level_checks(results):
        if c.crossing_t:
            shown = ", ".join(str(t) for t in c.crossing_t)
            yield RunWarning("matrix-crossings", fit_name,
                             f"fit {fit_name}: level {c.level} of matrix {name} (t0 = {c.t0}) "
                             f"crosses another level at t = {shown} inside its fit range "
                             f"t = {c.tmin}..{c.tmax} ({c.crossings} crossing(s) in jackknife "
                             "samples): its assignment is not stable there; fit a range "
                             "without crossings or use another t0")


def _matrix_levels_close(results: Results) -> Iterator[RunWarning]:
    for name, fit_name, c in _matrix_level_checks(results):
        if c.separation_min < LEVEL_SEPARATION:
            yield RunWarning("matrix-levels-close", fit_name,
                             f"fit {fit_name}: level {c.level} of matrix {name} is only "
                             f"{c.separation_min:.2g} jackknife errors from a neighbouring "
                             f"level at t = {c.separation_t}, inside its fit range t = "
                             f"{c.tmin}..{c.tmax}: the data do not tell the two apart there")


def _matrix_asymmetric(results: Results) -> Iterator[RunWarning]:
    for name, matrix in results.matrices.items():
        a = matrix.asymmetry
        for i in range(a.shape[0]):
            for j in range(i + 1, a.shape[1] if a.ndim == 2 else 0):
                if a[i, j] > GRID_ASYMMETRY:
                    yield RunWarning("matrix-asymmetric", None,
                                     f"matrix {name}: grid entries {matrix.grid[i][j]} and "
                                     f"{matrix.grid[j][i]} differ by {a[i, j]:.3g} jackknife "
                                     f"errors (above {GRID_ASYMMETRY:g}): C_ij and C_ji should "
                                     "agree; check that the grid lists them in the right place")


def _matrix_ill_conditioned(results: Results) -> Iterator[RunWarning]:
    for name, matrix in results.matrices.items():
        if matrix.condition_number > METRIC_CONDITION:
            yield RunWarning("matrix-ill-conditioned", None,
                             f"matrix {name}: C(t0 = {matrix.t0}) has condition number "
                             f"{matrix.condition_number:.3g} (above {METRIC_CONDITION:.0e}): "
                             "two operators are nearly linearly dependent; drop one or choose "
                             "a smaller t0")


def _derived_withheld(results: Results) -> Iterator[RunWarning]:
    for name, d in results.derived.items():
        if d.withheld_inputs:
            yield RunWarning("derived-withheld", None,
                             f"derived {name}: not computed (null in results.json), because "
                             f"{', '.join(d.withheld_inputs)} "
                             f"{'is' if len(d.withheld_inputs) == 1 else 'are'} not a result "
                             "(see the fit's warning)")


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
    Rule("chosen-withheld", "a chosen single fit that is not a fit: its values withheld",
         _chosen_withheld),
    Rule("chosen-not-converged", "the chosen fit (or one averaged over) did not converge",
         _chosen_not_converged),
    Rule("low-p-value", f"chosen or highest-weight fit with p < {LOW_P_VALUE}", _low_p_value),
    Rule("points-excluded", "half of a scan or more given weight 0, or points not converged",
         _points_excluded),
    Rule("refits-failed", "jackknife refits that did not converge", _refits_failed),
    Rule("strong-shrinkage", f"shrinkage intensity above {STRONG_SHRINKAGE}", _strong_shrinkage),
    Rule("chosen-flagged", "the chosen (or highest-weight) fit carries diagnostic flags",
         _chosen_flagged),
    Rule("derived-withheld", "derived quantities of an input that is not a result",
         _derived_withheld),
    Rule("derived-samples-dropped", "derived quantities with jackknife samples left out",
         _derived_dropped),
    Rule("matrix-crossings", "a matrix level crosses another inside its fit range",
         _matrix_crossings),
    Rule("matrix-levels-close", f"matrix levels within {LEVEL_SEPARATION:g} sigma inside a fit "
         "range", _matrix_levels_close),
    Rule("matrix-asymmetric", f"C_ij and C_ji more than {GRID_ASYMMETRY:g} sigma apart",
         _matrix_asymmetric),
    Rule("matrix-ill-conditioned", f"C(t0) with condition number above {METRIC_CONDITION:.0e}",
         _matrix_ill_conditioned),
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
