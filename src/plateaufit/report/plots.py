"""The report's plots: the plan of every figure a run's results support, and writing them.

The figures themselves are drawn by :mod:`plateaufit.report.fit_plots` (effective
mass, stability, weights, correlation matrix, eigenvalues; each takes a
:class:`~plateaufit.pipeline.results.FitResult`) and
:mod:`plateaufit.report.ensemble_plots` (autocorrelation, binning study); they are
re-exported here. Every figure is built without pyplot, so no global figure
state is created; the style (:mod:`plateaufit.report.style`) is applied through
``matplotlib.rc_context`` and never changes the caller's settings. Nothing
here refits: every number drawn is read from the results.

In a notebook, draw the plots of your own scan from
``plateaufit.summarise_scan(pf.scan(...), binned=..., time_extent=...)``.
"""

from __future__ import annotations

import io
from collections.abc import Callable, Iterator, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import matplotlib
from matplotlib.figure import Figure

from plateaufit import __version__
from plateaufit.atomic import write_bytes
from plateaufit.pipeline.results import Results
from plateaufit.report.ensemble_plots import plot_autocorrelation, plot_binning
from plateaufit.report.fit_plots import (plot_correlation, plot_effective_mass, plot_eigenvalues,
                                         plot_stability, plot_weights)
from plateaufit.report.matrix_plots import (plot_eigenvectors, plot_overlap_map,
                                            plot_principal_energies)
from plateaufit.report.style import PNG_DPI, STYLE
from plateaufit.report.tables import file_stem

__all__ = [
    "PlotItem",
    "plot_effective_mass",
    "plot_stability",
    "plot_weights",
    "plot_autocorrelation",
    "plot_binning",
    "plot_correlation",
    "plot_eigenvalues",
    "plot_principal_energies",
    "plot_eigenvectors",
    "plot_overlap_map",
    "plot_plan",
    "as_results",
    "figure_png",
    "save_figure",
    "make_all_plots",
]


def figure_png(fig: Figure, dpi: int = PNG_DPI) -> bytes:
    """The figure as PNG bytes (in memory)."""
    buffer = io.BytesIO()
    with matplotlib.rc_context(STYLE):
        fig.savefig(buffer, format="png", dpi=dpi, metadata={"Software": f"plateaufit {__version__}"})
    return buffer.getvalue()


def save_figure(fig: Figure, stem: str | Path, dpi: int = PNG_DPI) -> list[Path]:
    """Write the figure as ``STEM.png`` and ``STEM.pdf``, each atomically.

    Parameters
    ----------
    fig : matplotlib.figure.Figure
        The figure.
    stem : str or Path
        Path without suffix; ``.png`` and ``.pdf`` are appended (so a stem may
        contain dots).
    dpi : int
        Resolution of the PNG.

    Returns
    -------
    list of Path
        ``[png, pdf]``.
    """
    stem = Path(stem)
    png = stem.with_name(stem.name + ".png")
    pdf = stem.with_name(stem.name + ".pdf")
    write_bytes(png, figure_png(fig, dpi))
    # The PNG draw has laid the figure out; keep those positions for the PDF
    # rather than running the layout engine a second time.
    if fig.get_layout_engine() is not None:
        fig.set_layout_engine("none")
    buffer = io.BytesIO()
    with matplotlib.rc_context(STYLE):
        fig.savefig(buffer, format="pdf", metadata={"Creator": f"plateaufit {__version__}"})
    write_bytes(pdf, buffer.getvalue())
    return [png, pdf]


@dataclass(frozen=True)
class PlotItem:
    """One plot of the report: where it belongs and how to draw it.

    Attributes
    ----------
    key : str
        Unique file stem (safe for file names), e.g. ``pion.effmass.pion_ll``.
    section : str
        ``"ensemble"`` or the fit's name.
    caption : str
        One line saying what the plot shows.
    draw : callable
        Builds the :class:`~matplotlib.figure.Figure`.
    """

    key: str
    section: str
    caption: str
    draw: Callable[[], Figure]


def as_results(results: Results | Mapping[str, Any]) -> Results:
    """Typed results from either typed results or a results.json dict."""
    return results if isinstance(results, Results) else Results.from_dict(results)


def plot_plan(results: Results | Mapping[str, Any]) -> list[PlotItem]:
    """Every plot the results support, in report order (ensemble first, then fits).

    Parts missing from the results (an ensemble without a binning study, a fit
    without a covariance summary) are skipped, not errors.

    Parameters
    ----------
    results : Results or mapping
        Typed results, or a results.json dict (converted with ``Results.from_dict``).
    """
    results = as_results(results)
    items: list[PlotItem] = []
    used: set[str] = set()

    def key(*parts: str) -> str:
        base = ".".join(file_stem(p) for p in parts)
        k, i = base, 2
        while k in used:
            k, i = f"{base}-{i}", i + 1
        used.add(k)
        return k

    ens = results.ensemble
    taus = ens.tau_int
    for name, ac in ens.autocorrelation.items():
        items.append(PlotItem(
            key("autocorr", name), "ensemble",
            f"{name}: normalised autocorrelation function and tau_int against the "
            "summation window (tau_int = 1/2 + sum rho convention)",
            lambda n=name, a=ac: plot_autocorrelation(n, a, taus.get(n))))
    for name, study in ens.binning_study.items():
        items.append(PlotItem(
            key("binning", name), "ensemble",
            f"{name}: error of the mean against bin size",
            lambda n=name, s=study: plot_binning(n, s, taus.get(n), ens.bin_size)))
    for fit_name, fit in results.fits.items():
        truth = results.truth.get(fit_name)
        for obs in fit.effective_mass:
            items.append(PlotItem(
                key(fit_name, "effmass", obs), fit_name,
                f"{fit_name}: effective mass of {obs} with the chosen E0",
                lambda d=fit, o=obs, tr=truth: plot_effective_mass(d, o, tr)))
        if fit.scan:
            items.append(PlotItem(
                key(fit_name, "stability"), fit_name,
                f"{fit_name}: fitted energies against tmin for every tmax and number of states",
                lambda d=fit, tr=truth: plot_stability(d, tr)))
            if fit.chosen.is_average and len(fit.scan) > 1:
                items.append(PlotItem(
                    key(fit_name, "weights"), fit_name,
                    f"{fit_name}: AIC weights of the fits in the model average",
                    lambda d=fit: plot_weights(d)))
        cov = fit.covariance
        if cov is not None and cov.correlation.size:
            items.append(PlotItem(
                key(fit_name, "correlation"), fit_name,
                f"{fit_name}: correlation matrix of the fitted data points",
                lambda d=fit: plot_correlation(d)))
        if cov is not None and (cov.eigenvalues.size or cov.eigenvalues_raw.size):
            items.append(PlotItem(
                key(fit_name, "eigenvalues"), fit_name,
                f"{fit_name}: correlation-matrix eigenvalues before and after shrinkage",
                lambda d=fit: plot_eigenvalues(d)))
    for name, matrix in results.matrices.items():
        section = f"matrix {name}"     # fit names have no spaces: no clash with a fit
        items.append(PlotItem(
            key(name, "principal"), section,
            f"matrix {name}: effective energies of the principal correlators with each "
            "level's chosen E0",
            lambda m=matrix: plot_principal_energies(m, results.fits, results.truth)))
        items.append(PlotItem(
            key(name, "eigenvectors"), section,
            f"matrix {name}: eigenvector components against t (normalised v^T C(t0) v = 1)",
            lambda m=matrix: plot_eigenvectors(m)))
        if matrix.overlaps is not None:
            items.append(PlotItem(
                key(name, "overlaps"), section,
                f"matrix {name}: overlaps |Z_in| relative to each operator's largest",
                lambda m=matrix: plot_overlap_map(m)))
    return items


def iter_figures(results: Results | Mapping[str, Any]) -> Iterator[tuple[PlotItem, Figure]]:
    """Draw the plan's plots one at a time (each figure can be dropped after use)."""
    for item in plot_plan(results):
        yield item, item.draw()


def make_all_plots(results: Results | Mapping[str, Any],
                   out_dir: str | Path) -> dict[str, list[Path]]:
    """Draw every plot of the results into ``OUT_DIR/plots/`` as PNG and PDF.

    Parameters
    ----------
    results : Results or mapping
        Typed results, or a results.json dict.
    out_dir : str or Path
        The run's output directory; the files go to its ``plots/`` subdirectory.

    Returns
    -------
    dict
        Plot key (the file stem, see :class:`PlotItem`) -> ``[png, pdf]`` paths,
        in report order.
    """
    plots_dir = Path(out_dir) / "plots"
    written: dict[str, list[Path]] = {}
    for item, fig in iter_figures(results):
        written[item.key] = save_figure(fig, plots_dir / item.key)
    return written
