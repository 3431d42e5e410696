"""examples/api_walkthrough.py runs, uses only the public API, and recovers its invented truth."""

from __future__ import annotations

import re
import runpy
import sys
from pathlib import Path

import numpy as np
import pytest

import plateaufit as pf

SCRIPT = Path(__file__).resolve().parents[1] / "examples" / "api_walkthrough.py"


@pytest.fixture(scope="module")
def walkthrough(tmp_path_factory):
    """Run the script once, as `python api_walkthrough.py PLOT_DIR`; (globals, stdout, dir)."""
    plot_dir = tmp_path_factory.mktemp("walkthrough")
    capture = pytest.MonkeyPatch()
    capture.setattr(sys, "argv", [str(SCRIPT), str(plot_dir)])
    import contextlib
    import io

    out = io.StringIO()
    try:
        with contextlib.redirect_stdout(out):
            namespace = runpy.run_path(str(SCRIPT), run_name="__main__")
    finally:
        capture.undo()
    return namespace, out.getvalue(), plot_dir


def test_the_script_uses_only_the_top_level_api():
    source = SCRIPT.read_text(encoding="utf-8")
    assert "import plateaufit as pf" in source
    assert not re.search(r"from plateaufit|import plateaufit\.", source)
    used = set(re.findall(r"\bpf\.([A-Za-z_]\w*)", source))
    assert used and used <= set(pf.__all__), used - set(pf.__all__)
    # it is a notebook-as-script: cells marked for editors
    assert source.count("# %%") >= 10


def test_the_fit_recovers_the_invented_energies(walkthrough):
    namespace, stdout, _ = walkthrough
    s = namespace["SUMMARY"]
    truth, fit = s["truth"], s["fit"]
    assert fit["converged"]
    assert abs(fit["E0"] - truth["E0"]) < 3 * fit["E0_error"], fit
    assert abs(fit["E1"] - truth["E1"]) < 3 * fit["E1_error"], fit
    assert fit["p_value"] > 0.01
    # what is printed is what was computed: E0 with its error beside the truth
    m = re.search(r"E0 = (\d\.\d+) \+- (\d\.\d+)\s+\(truth 0\.36", stdout)
    assert m, stdout
    assert float(m.group(1)) == pytest.approx(fit["E0"], abs=1e-5)
    assert float(m.group(2)) == pytest.approx(fit["E0_error"], abs=1e-5)


def test_the_model_average_recovers_e0_and_weights_sum_to_one(walkthrough):
    namespace, stdout, _ = walkthrough
    s = namespace["SUMMARY"]
    avg = s["average"]
    assert abs(avg["E0"] - s["truth"]["E0"]) < 3 * avg["E0_error"], avg
    w = np.array(avg["weights"])
    assert w.sum() == pytest.approx(1.0, abs=1e-12)
    # the scan lists one state first: from tmin = 3 and 5 it misses the excited state
    # (E1 - E0 = 0.59), its chi2 is huge and its AIC weight negligible
    assert w[:2].max() < 1e-6
    assert "model average: E0 = " in stdout


def test_tau_int_and_binning_match_the_exact_ar1_values(walkthrough):
    namespace, stdout, _ = walkthrough
    s = namespace["SUMMARY"]
    # exact result: AR(1) with phi = 0.6 has rho(t) = phi^t, so
    # tau_int = 1/2 + phi/(1 - phi) = 2.0 (1/2 + sum rho convention)
    assert s["tau_int_exact"] == pytest.approx(2.0)
    tau = s["tau_int"]
    assert abs(tau["value"] - 2.0) < 3 * tau["error"], tau
    # the binned error levels off at sqrt(2 tau_int) = 2 times the naive one (Flyvbjerg &
    # Petersen 1989, J. Chem. Phys. 91, 461); with ~25-45 bins an error estimate is itself
    # uncertain by ~1/sqrt(2 (n_bins - 1)) ~ 12 % (common practice), hence 25 %
    assert s["binning_plateau"] == pytest.approx(2.0, rel=0.25)
    assert "tau_int (1/2 + sum rho convention)" in stdout
    # bins never cross the stream boundary (streams of 400 and 360)
    b = s["bin_size"]
    assert s["n_bins"] == 400 // b + 360 // b
    assert 0.0 <= s["shrinkage"] <= 1.0


def test_the_plot_is_written_where_asked(walkthrough):
    namespace, stdout, plot_dir = walkthrough
    path = Path(namespace["SUMMARY"]["plot"])
    assert path.parent == plot_dir
    assert path.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert f"plot written to {path}" in stdout


def test_the_summarised_scan_is_the_same_average_and_its_plots_are_written(walkthrough):
    namespace, stdout, plot_dir = walkthrough
    s = namespace["SUMMARY"]
    summary, avg = s["summarised"], s["average"]
    assert summary["method"] == "average"
    # pf.summarise_scan averages with the same weights as pf.model_average by hand
    assert summary["E0"] == pytest.approx(avg["E0"], rel=1e-12)
    assert summary["E0_error"] == pytest.approx(avg["E0_error"], rel=1e-10)
    names = [Path(p).name for p in summary["plots"]]
    assert names == ["kestrel_stability.png", "kestrel_weights.png", "kestrel_effmass.png"]
    for p in summary["plots"]:
        assert Path(p).parent == plot_dir
        assert Path(p).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert "report plots written: kestrel_stability.png" in stdout
