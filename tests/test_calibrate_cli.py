"""``plateaufit calibrate`` end to end: coverage of an analysis that ignores the
autocorrelation, and of one that bins adequately.

The invented ensemble (tests/calibration_ensembles.py) has tau_int = 4.5 on
every timeslice (AR(1) in Monte Carlo time, phi = 0.8; exact). Bins of one
configuration make the jackknife errors too small by sqrt(2 tau_int) = 3
(Wolff 2004), so the coverage at 1 sigma is about 2 Phi(1/3) - 1 = 0.26
(exact for a Gaussian estimate, scipy.stats.norm); with bins of about
5 tau_int (binning.size: auto) it is near 0.68.

Statistics (why M = 80 replicas): the binomial standard error of a coverage
near 0.3 or 0.68 is at most 0.053 at M = 80, so the assertions below
(bad < 0.45; |good - 0.683| < 4 standard errors = 0.21) fail by chance with
probability below 1e-3 each, while 0.3 and 0.68 are 7 standard errors apart.
N: 1000 configurations for the bad case (its cost grows with the number of
jackknife samples, one per configuration; the coverage does not depend on N)
and 8000 for the good one (with fewer, few bins and a noisy tau_int estimate
leave the coverage of this pipeline near 0.55-0.6, which calibrate measures
too, see the report).
"""

from __future__ import annotations

import json
import math

import pytest
from calibration_ensembles import single_state, write_spec

from plateaufit.cli import main
from plateaufit.stats.coverage import coverage_band

M = 80
pytestmark = pytest.mark.slow   # draws the report's plots; ~30 s in all


def _calibrate(spec, out, *extra):
    status = main(["calibrate", str(spec), "--replicas", str(M), "--seed", "2024", "--jobs", "1",
                   "--out", str(out), "--quiet", *extra])
    assert status == 0
    return json.loads((out / "calibration.json").read_text())


def test_no_binning_undercovers_and_warns_with_the_remedy(tmp_path, capsys):
    spec = write_spec(tmp_path / "spec", single_state(41, 1000), tmin=6, tmax=11, bin_size=1)
    cal = _calibrate(spec, tmp_path / "out")
    e0 = cal["fits"]["meson"]["params"]["E0"]
    assert cal["n_replicas"] == M and cal["seed"] == 2024 and cal["n_failed"] == 0
    assert 0.1 < e0["coverage_1sigma"] < 0.45
    assert e0["coverage_1sigma_error"] == pytest.approx(
        math.sqrt(e0["coverage_1sigma"] * (1 - e0["coverage_1sigma"]) / M))
    assert e0["scatter_over_error"] > 2.0          # about sqrt(2 tau_int) = 3
    assert len(e0["pulls"]) == M
    warnings = cal["warnings"]
    assert all(isinstance(w, str) for w in warnings)
    lo, hi = coverage_band(math.erf(1 / math.sqrt(2)), M)
    said = [w for w in warnings if w.startswith("fit meson: E0 covers the truth")]
    assert said and f"{100 * e0['coverage_1sigma']:.0f}% of {M} replicas" in said[0]
    assert f"band {100 * lo:.0f}%-{100 * hi:.0f}%" in said[0] and "too small" in said[0]
    # the remedies ran on the same replicas; larger bins raise the coverage
    variants = {v["name"]: v for v in cal["variants"]}
    assert {"larger-bins", "per-sample", "gamma"} <= set(variants)
    bigger = variants["larger-bins"]
    assert bigger["changes"]["binning.size"] > 1
    assert bigger["fits"]["meson"]["params"]["E0"]["coverage_1sigma"] > e0["coverage_1sigma"] + 0.15
    assert any("binning.size 1 ->" in w for w in warnings)
    printed = capsys.readouterr().out
    assert "warning: fit meson: E0 covers the truth" in printed and "<- outside band" in printed
    page = (tmp_path / "out" / "report.html").read_text()
    assert 'id="calibration"' in page and "The same replicas with one change" in page
    assert (tmp_path / "out" / "plots" / "calibration.meson.pulls.png").is_file()
    assert (tmp_path / "out" / "results.json").is_file()


def test_adequate_binning_covers_near_68_percent(tmp_path):
    spec = write_spec(tmp_path / "spec", single_state(42, 8000), tmin=6, tmax=11)
    cal = _calibrate(spec, tmp_path / "out", "--no-plots")
    e0 = cal["fits"]["meson"]["params"]["E0"]
    nominal = math.erf(1 / math.sqrt(2))
    assert abs(e0["coverage_1sigma"] - nominal) < 4 * math.sqrt(nominal * (1 - nominal) / M)
    assert 0.7 < e0["scatter_over_error"] < 1.4
    assert abs(e0["bias_over_error"]) < 4 * e0["bias_over_error_error"]
    assert 0.0 <= cal["fits"]["meson"]["p_values"]["ks_p_value"] <= 1.0
    assert not (tmp_path / "out" / "report.html").exists()
