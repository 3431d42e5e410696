"""The report's plots: what each figure shows, its labels, and the files written.

The results are produced by the pipeline (``tests/pipeline_results.py``); the plot
functions take them typed (``Results.from_dict`` of the results.json dict).
"""

from __future__ import annotations

import copy
import math

import matplotlib
import matplotlib.image
import numpy as np
import pytest
from matplotlib.collections import PolyCollection
from matplotlib.figure import Figure

from plateaufit.report.plots import (
    figure_png,
    make_all_plots,
    plot_autocorrelation,
    plot_binning,
    plot_correlation,
    plot_effective_mass,
    plot_eigenvalues,
    plot_plan,
    plot_stability,
    plot_weights,
    save_figure,
)
from pipeline_results import make_results
from plateaufit.pipeline.results import BinningStudySummary, FitResult, Results


@pytest.fixture(scope="module")
def results() -> dict:
    return make_results()


def _kaon_only(results: dict) -> dict:
    """The fixture cut to the kaon fit and its observable (fewer plots to draw)."""
    small = copy.deepcopy(results)
    small["fits"] = {"kaon": small["fits"]["kaon"]}
    for part in ("tau_int", "autocorrelation", "binning_study"):
        small["ensemble"][part] = {"kaon_ll": small["ensemble"][part]["kaon_ll"]}
    return small


@pytest.fixture(scope="module")
def all_plots(results, tmp_path_factory):
    """make_all_plots on the kaon part (test_report_html draws the whole fixture)."""
    out = tmp_path_factory.mktemp("plots_run")
    before = dict(matplotlib.rcParams)
    written = make_all_plots(_kaon_only(results), out)
    return out, written, before


def _bands(ax) -> list[tuple[float, float, float, float]]:
    """(x0, x1, y0, y1) of every filled band on the axes."""
    out = []
    for coll in ax.collections:
        if isinstance(coll, PolyCollection):
            v = np.concatenate([p.vertices for p in coll.get_paths()])
            out.append((v[:, 0].min(), v[:, 0].max(), v[:, 1].min(), v[:, 1].max()))
    return out


def typed(results: dict, name: str) -> FitResult:
    """Fit ``name`` of a results dict, typed as the plot functions take it."""
    return Results.from_dict(results).fits[name]


def _labels(ax) -> tuple[str, str]:
    return ax.get_xlabel(), ax.get_ylabel()


def test_effective_mass_single_fit_band_spans_the_chosen_range(results) -> None:
    fit = results["fits"]["kaon"]
    fig = plot_effective_mass(typed(results, "kaon"), "kaon_ll", results["truth"]["kaon"])
    assert isinstance(fig, Figure)
    ax = fig.axes[0]
    assert _labels(ax) == ("t/a", "a m_eff")
    assert "kaon" in ax.get_title() and "kaon_ll" in ax.get_title()
    e0 = fit["chosen"]["params"]["E0"]
    (x0, x1, y0, y1), = _bands(ax)
    assert (x0, x1) == (6, 20)
    assert y0 == pytest.approx(e0["value"] - e0["error"])
    assert y1 == pytest.approx(e0["value"] + e0["error"])
    # the data points are the effective mass (the NaN point left out)
    em = fit["effective_mass"]["kaon_ll"]
    shown = ax.containers[0].lines[0].get_ydata()
    expected = [v for v in em["value"] if v is not None]
    np.testing.assert_allclose(shown, expected)
    # the truth line
    assert any(np.allclose(line.get_ydata(), results["truth"]["kaon"]["E0"])
               for line in ax.get_lines())


def test_effective_mass_average_shows_best_fit_and_average_bands(results) -> None:
    fit = results["fits"]["pion"]
    fig = plot_effective_mass(typed(results, "pion"), "pion_ll")
    bands = _bands(fig.axes[0])
    assert len(bands) == 2
    chosen = fit["chosen"]
    avg = chosen["params"]["E0"]
    # the averaged band across the scanned range
    assert any((b[0], b[1]) == (chosen["band"]["tmin"], chosen["band"]["tmax"])
               and b[2] == pytest.approx(avg["value"] - avg["error"]) for b in bands)
    # the highest-weight fit's band over its own range
    best = chosen["best"]
    point = next(p for p in fit["scan"] if (p["tmin"], p["tmax"], p["states"])
                 == (best["tmin"], best["tmax"], best["states"]))
    assert any((b[0], b[1]) == (best["tmin"], best["tmax"])
               and b[3] == pytest.approx(point["params"]["E0"]["value"]
                                         + point["params"]["E0"]["error"]) for b in bands)
    legend = " ".join(t.get_text() for t in fig.legends[0].get_texts())
    assert "average" in legend and "highest weight" in legend


def test_stability_marks_weights_and_low_p_values(results) -> None:
    fit = results["fits"]["pion"]
    fig = plot_stability(typed(results, "pion"), results["truth"]["pion"])
    axes = [ax for ax in fig.axes if ax.get_ylabel()]
    assert [ax.get_ylabel() for ax in axes] == ["E0 (lattice units)", "E1 (lattice units)"]
    assert axes[-1].get_xlabel() == "tmin (t/a)"
    assert "pion" in axes[0].get_title()
    ax = axes[0]
    converged = [p for p in fit["scan"] if p["converged"]]
    assert len(ax.containers) == len(converged)          # one errorbar per converged fit
    sizes = [c.lines[0].get_markersize() for c in ax.containers]
    biggest = ax.containers[int(np.argmax(sizes))].lines[0]
    top = max(converged, key=lambda p: p["weight"])
    assert biggest.get_ydata()[0] == pytest.approx(top["params"]["E0"]["value"])
    assert abs(biggest.get_xdata()[0] - top["tmin"]) < 0.5
    hollow = sum(c.lines[0].get_markerfacecolor() == "none" for c in ax.containers)
    assert hollow == sum(p["p_value"] < 0.05 for p in converged)
    # the non-converged fit is a cross
    assert sum(line.get_marker() == "x" for line in ax.get_lines()) == 1
    # the averaged value: a band and a line across
    avg = fit["chosen"]["params"]["E0"]
    assert any(np.allclose(line.get_ydata(), avg["value"]) for line in ax.get_lines())
    # E1 panel holds only the two-state fits
    assert len(axes[1].containers) == sum(1 for p in converged if "E1" in p["params"])


def test_weights_are_sorted_and_labelled_by_range_and_states(results) -> None:
    fit = results["fits"]["pion"]
    fig = plot_weights(typed(results, "pion"), top=12)
    ax = fig.axes[0]
    widths = [bar.get_width() for bar in ax.patches]
    expected = sorted((p["weight"] for p in fit["scan"]), reverse=True)[:12]
    np.testing.assert_allclose(widths, expected)
    labels = [t.get_text() for t in ax.get_yticklabels()]
    best = fit["chosen"]["best"]
    plural = "s" if best["states"] != 1 else ""
    assert labels[0] == f"[{best['tmin']}, {best['tmax']}], {best['states']} state{plural}"
    assert len(fit["scan"]) > 12
    assert "AIC weight" in ax.get_xlabel()
    assert f"12 largest of {len(fit['scan'])}" in ax.get_xlabel()
    assert ax.get_ylabel()


def test_autocorrelation_marks_the_window_and_states_the_convention(results) -> None:
    ens = results["ensemble"]
    ac, tau = ens["autocorrelation"]["pion_ll"], ens["tau_int"]["pion_ll"]
    typed_ens = Results.from_dict(results).ensemble
    fig = plot_autocorrelation("pion_ll", typed_ens.autocorrelation["pion_ll"],
                               typed_ens.tau_int["pion_ll"])
    ax1, ax2 = fig.axes
    assert "lag" in ax1.get_xlabel() and ax1.get_ylabel() == "ρ(t)"
    assert "window" in ax2.get_xlabel()
    assert "1/2" in ax2.get_ylabel() and "convention" in ax2.get_ylabel()
    assert f"C(t={ac['t']})" in ax1.get_title()
    for ax in (ax1, ax2):
        assert any(np.allclose(line.get_xdata(), ac["window"]) for line in ax.get_lines())
    curve = ax2.get_lines()[1]
    np.testing.assert_allclose(curve.get_ydata(), ac["tau_by_window"][:len(curve.get_ydata())])
    assert any(np.allclose(line.get_ydata(), tau["value"]) for line in ax2.get_lines())


def test_autocorrelation_says_when_the_window_was_not_found(results) -> None:
    ens = Results.from_dict(make_results(unreliable_tau=True)).ensemble
    fig = plot_autocorrelation("kaon_ll", ens.autocorrelation["kaon_ll"], ens.tau_int["kaon_ll"])
    assert "lower bound" in fig.axes[1].get_title()


def test_binning_study_shows_errors_and_the_naive_line(results) -> None:
    ens = results["ensemble"]
    study = ens["binning_study"]["pion_ll"]
    typed_ens = Results.from_dict(results).ensemble
    fig = plot_binning("pion_ll", typed_ens.binning_study["pion_ll"],
                       typed_ens.tau_int["pion_ll"], ens["bin_size"])
    ax = fig.axes[0]
    assert ax.get_xlabel() == "bin size (configurations)"
    assert "error" in ax.get_ylabel()
    assert ax.get_xscale() == "log"
    curve = ax.get_lines()[0]
    np.testing.assert_allclose(curve.get_xdata(), study["sizes"])
    np.testing.assert_allclose(curve.get_ydata(), study["errors"])
    ys = [line.get_ydata()[0] for line in ax.get_lines()[1:]]
    assert any(y == pytest.approx(study["naive_error"]) for y in ys)
    expected_plateau = study["naive_error"] * math.sqrt(2 * ens["tau_int"]["pion_ll"]["value"])
    assert any(y == pytest.approx(expected_plateau) for y in ys)
    assert any(np.allclose(line.get_xdata(), ens["bin_size"]) for line in ax.get_lines())


def test_binning_study_with_one_column_per_timeslice() -> None:
    study = {"sizes": [1, 2, 4], "errors": [[1.0, 2.0], [1.3, 2.4], [1.5, 2.9]],
             "naive_error": [1.0, 2.0]}
    fig = plot_binning("x", BinningStudySummary.from_dict(study))
    ax = fig.axes[0]
    assert ax.get_ylabel() == "error / naive error"
    np.testing.assert_allclose(ax.get_lines()[1].get_ydata(), [1.0, 1.2, 1.45])


def test_correlation_matrix_is_drawn_with_a_colorbar(results) -> None:
    fit = results["fits"]["pion"]
    fig = plot_correlation(typed(results, "pion"))
    ax = fig.axes[0]
    image = ax.get_images()[0]
    np.testing.assert_allclose(image.get_array(), fit["covariance"]["correlation"])
    assert image.get_clim() == (-1, 1)
    assert any(other.get_ylabel() == "correlation" for other in fig.axes[1:])   # colorbar
    assert ax.get_xlabel() == "t/a of each data point" and ax.get_ylabel()
    # block ticks name the timeslices of the chosen range
    assert ax.get_xticklabels()[0].get_text() == str(fit["covariance"]["tmin"])
    assert f"λ = {fit['covariance']['shrinkage']:.2f}" in ax.get_title()


def test_eigenvalues_before_and_after_shrinkage_on_log_axis(results) -> None:
    cov = results["fits"]["pion"]["covariance"]
    fig = plot_eigenvalues(typed(results, "pion"))
    ax = fig.axes[0]
    assert ax.get_yscale() == "log"
    assert ax.get_xlabel() == "eigenvalue index" and "eigenvalue" in ax.get_ylabel()
    raw, after = ax.get_lines()
    np.testing.assert_allclose(raw.get_ydata(), sorted(cov["eigenvalues_raw"], reverse=True))
    np.testing.assert_allclose(after.get_ydata(), sorted(cov["eigenvalues"], reverse=True))
    legend = [t.get_text() for t in ax.get_legend().get_texts()]
    assert legend[0].startswith("before shrinkage") and "after shrinkage" in legend[1]
    title = ax.get_legend().get_title().get_text()
    assert f"{cov['condition_number_raw']:.3g} before" in title
    assert f"{cov['condition_number']:.3g} after" in title


def test_eigenvalues_at_or_below_zero_are_counted_not_drawn() -> None:
    fit = {"covariance": {"eigenvalues_raw": [3.0, 1.0, 0.0, -1e-17],
                          "eigenvalues": [2.5, 1.0, 0.3, 0.2], "shrinkage": 0.3}}
    ax = plot_eigenvalues(FitResult.from_dict("f", fit)).axes[0]
    assert len(ax.get_lines()[0].get_xdata()) == 2
    assert any("2 eigenvalue(s)" in t.get_text() for t in ax.texts)


def test_names_with_dollar_signs_do_not_break_rendering(results) -> None:
    fit = copy.deepcopy(results["fits"]["kaon"])
    fit["effective_mass"] = {"a$b": fit["effective_mass"]["kaon_ll"]}
    png = figure_png(plot_effective_mass(FitResult.from_dict("cost $5 <fit>", fit), "a$b"))
    assert png[:8] == b"\x89PNG\r\n\x1a\n"


def test_save_figure_writes_png_and_pdf(results, tmp_path) -> None:
    fig = plot_binning("pion_ll", Results.from_dict(results).ensemble.binning_study["pion_ll"])
    png, pdf = save_figure(fig, tmp_path / "sub" / "binning.pion_ll")
    assert png.name == "binning.pion_ll.png" and pdf.name == "binning.pion_ll.pdf"
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert pdf.read_bytes()[:5] == b"%PDF-"
    pixels = matplotlib.image.imread(png)
    assert pixels.shape[1] == pytest.approx(3.4 * 150, abs=2)     # column width at 150 dpi
    assert not [p for p in png.parent.iterdir() if p.suffix == ".tmp"]


def test_plan_has_every_plot_for_every_fit_and_observable(results) -> None:
    keys = [item.key for item in plot_plan(results)]
    assert keys == [
        "autocorr.pion_ll", "autocorr.pion_ls", "autocorr.kaon_ll",
        "binning.pion_ll", "binning.pion_ls", "binning.kaon_ll",
        "pion.effmass.pion_ll", "pion.effmass.pion_ls", "pion.stability", "pion.weights",
        "pion.correlation", "pion.eigenvalues",
        "kaon.effmass.kaon_ll", "kaon.stability", "kaon.correlation", "kaon.eigenvalues",
    ]
    # every planned plot draws, with both axes labelled (panels stacked on a shared
    # x axis carry the x label once, on the bottom panel)
    for item in plot_plan(results):
        fig = item.draw()
        for ax in fig.axes:
            if ax.get_images() or ax.get_lines() or ax.containers or ax.patches:
                assert ax.get_ylabel(), (item.key, ax)
                siblings = ax.get_shared_x_axes().get_siblings(ax)
                assert any(other.get_xlabel() for other in siblings), (item.key, ax)


@pytest.mark.slow   # draws and writes every plot of the run
def test_make_all_plots_writes_every_plot(all_plots, results) -> None:
    out, written, _ = all_plots
    assert list(written) == ["autocorr.kaon_ll", "binning.kaon_ll", "kaon.effmass.kaon_ll",
                             "kaon.stability", "kaon.correlation", "kaon.eigenvalues"]
    for paths in written.values():
        png, pdf = paths
        assert png.parent == out / "plots"
        assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
        assert pdf.read_bytes()[:5] == b"%PDF-"
        image = matplotlib.image.imread(png)
        assert image[..., :3].std() > 0.01          # not a blank canvas


@pytest.mark.slow   # draws and writes every plot of the run
def test_make_all_plots_leaves_no_global_matplotlib_state(all_plots) -> None:
    import matplotlib.pyplot as plt

    _, _, before = all_plots
    assert plt.get_fignums() == []
    assert matplotlib.rcParams["font.size"] == before["font.size"]
    assert matplotlib.rcParams["axes.prop_cycle"] == before["axes.prop_cycle"]


def test_plan_skips_parts_the_results_lack(results) -> None:
    trimmed = copy.deepcopy(results)
    del trimmed["ensemble"]["binning_study"]
    del trimmed["fits"]["kaon"]["covariance"]
    keys = [item.key for item in plot_plan(trimmed)]
    assert not any(k.startswith("binning.") for k in keys)
    assert "kaon.correlation" not in keys and "kaon.eigenvalues" not in keys
    assert "kaon.stability" in keys
    # a single chosen fit has no weights plot
    assert "kaon.weights" not in keys


def test_sparse_results_still_plot() -> None:
    # a formula model without E0: the stability plot shows its first parameter; no
    # p-values, no weights, an effective mass of NaNs only
    fit = {
        "observables": ["c"],
        "chosen": {"method": "single", "tmin": 3, "tmax": 9, "states": 1,
                   "params": {"m": {"value": 0.4, "error": 0.01}}},
        "scan": [{"tmin": 3, "tmax": 9, "states": 1, "converged": True, "weight": None,
                  "p_value": None, "params": {"m": {"value": 0.41, "error": 0.02}}}],
        "effective_mass": {"c": {"t": [0, 1, 2], "value": [None, None, None],
                                 "error": [None, None, None], "kind": "log"}},
    }
    results = {"ensemble": {}, "fits": {"f": fit}}
    figures = {item.key: item.draw() for item in plot_plan(results)}
    assert set(figures) == {"f.effmass.c", "f.stability"}
    stability = figures["f.stability"]
    assert stability.axes[0].get_ylabel() == "m"
    assert len(stability.axes[0].containers) == 1
    for fig in figures.values():
        assert figure_png(fig)[:8] == b"\x89PNG\r\n\x1a\n"
