"""`plateaufit fit` on the scan a new user runs first: two states, no priors, an
excited state the data cannot resolve at large tmin. It must finish, say on
the terminal at most one line per fit about caught numerical warnings (none
of numpy's, scipy's or lmfit's own ``Warning:`` lines), flag every degenerate
scan point and give it weight 0."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

from hard_ensembles import precise_two_state, write_text

PLATEAUFIT = Path(sys.executable).with_name("plateaufit")

SPEC = """\
ensemble: {name: invented-precise-t48, time_extent: 48}
observables:
  corr: {file: corr.txt, boundary: periodic}
binning: {size: 5}
covariance: {shrinkage: none}
fits:
  - name: corr
    observables: [corr]
    model: cosh
    states: [1, 2]
    tmin: [4, 13]
    tmax: [18, 23]
output: {dir: out}
"""


@pytest.mark.slow
def test_a_hard_scan_without_priors_finishes_quietly_and_flags_its_degenerate_points(tmp_path):
    write_text(tmp_path / "corr.txt", precise_two_state(2))
    (tmp_path / "spec.yaml").write_text(SPEC)
    proc = subprocess.run([str(PLATEAUFIT), "fit", "spec.yaml", "--no-plots", "--jobs", "1",
                           "--quiet"], cwd=tmp_path, capture_output=True, text=True,
                          timeout=300)
    assert proc.returncode == 0, proc.stderr
    terminal = proc.stdout + proc.stderr
    assert "Warning:" not in terminal and "Traceback" not in terminal, terminal
    results = json.loads((tmp_path / "out" / "results.json").read_text())
    scan = results["fits"]["corr"]["scan"]
    assert len(scan) == 120
    degenerate = {"central-failed", "refits-failed", "at-bound", "ground-collapsed",
                  "energies-merged", "refits-wide", "refits-narrow"}
    flagged = [p for p in scan if {f.split(":")[0] for f in p["flags"]} & degenerate]
    assert flagged, "this ensemble has collapsed two-state fits at tmin >= 11"
    assert all(p["weight"] == 0.0 for p in flagged)
    log = (tmp_path / "out" / "run.log").read_text()
    for p in flagged:
        state = "state" if p["states"] == 1 else "states"
        assert f"flagged [{p['tmin']}, {p['tmax']}], {p['states']} {state}" in log
