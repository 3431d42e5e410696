"""Bad-input catalogue, fits that are not fits: never published as clean values.

A chosen single fit pinned at a bound, collapsed from a bad start, or whose
central fit failed reports no values (null in results.json, listed in
``chosen.withheld``, weight 0, a ``chosen-withheld`` warning, "not a result" in
the tables); a derived quantity over it is null too; a scan point whose central
fit failed never shows its start values; an average with no usable point is
exit 2 saying why. The data are the invented ``heron-a24`` ensemble (eta: one
state, E0 = 0.65, A0 = 0.9).
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import pytest

from bad_input import error_line, fit_args, one_fit_spec, run_cli, write_run
from test_runner_end_to_end import invented_spec


def _fit(tmp_path: Path, spec: dict[str, Any], capsys) -> tuple[int, str, dict | None, Path]:
    spec_path = write_run(tmp_path, spec)
    out = tmp_path / "out"
    status, _, err = run_cli(capsys, *fit_args(spec_path, out))
    path = out / "results.json"
    results = json.loads(path.read_text(encoding="utf-8")) if path.exists() else None
    return status, err, results, out


def _assert_withheld(results: dict, fit: str, *codes: str) -> dict:
    chosen = results["fits"][fit]["chosen"]
    assert chosen["method"] == "single"
    assert set(chosen["withheld"]) == set(chosen["params"])
    for name, entry in chosen["params"].items():
        assert entry["value"] is None and entry["error"] is None, name
    point = results["fits"][fit]["scan"][0]
    assert point["weight"] == 0.0
    for code in codes:
        assert any(flag.split(":")[0] == code for flag in point["flags"]), point["flags"]
    table = {w["code"] for w in results["warning_table"] if w["fit"] == fit}
    assert "chosen-withheld" in table
    return chosen


def test_a_chosen_fit_pinned_at_a_bound_is_not_a_result(tmp_path, capsys):
    # the data say E0 = 0.65; the bounds force E0 >= 0.7
    spec = one_fit_spec(bounds={"E0": [0.7, 1.0]})
    spec["derived"] = {"double": "eta.E0 * 2"}
    status, err, results, out = _fit(tmp_path, spec, capsys)
    assert status == 0, err
    chosen = _assert_withheld(results, "eta", "at-bound")
    assert any("bound" in r for r in chosen["withheld_reasons"])
    assert "not a result" in err and "Traceback" not in err
    assert results["derived"]["double"]["value"] is None
    assert any(w["code"] == "derived-withheld" for w in results["warning_table"])
    assert "not a result" in (out / "results.tex").read_text(encoding="utf-8")
    # the scan table still shows where the constrained minimum was, flagged
    assert results["fits"]["eta"]["scan"][0]["params"]["E0"]["value"] == pytest.approx(0.7)


def test_a_chosen_fit_collapsed_from_a_bad_start_is_not_a_result(tmp_path, capsys):
    status, err, results, _ = _fit(tmp_path, one_fit_spec(start={"E0": -5.0}), capsys)
    assert status == 0, err
    _assert_withheld(results, "eta", "ground-collapsed")
    assert "E0 = -" not in err.split("warning:")[0]   # no value line for the fit


def test_a_formula_whose_central_fit_fails_never_reports_its_start_values(tmp_path, capsys):
    formula = {"expression": "a * exp(-m * t) * exp(-m * m * t)", "params": {"a": -1.0,
                                                                           "m": -3.0}}
    spec = one_fit_spec(model="formula", formula=formula)
    status, err, results, _ = _fit(tmp_path, spec, capsys)
    assert status == 0, err
    _assert_withheld(results, "eta", "central-failed")
    point = results["fits"]["eta"]["scan"][0]
    assert point["converged"] is False
    assert all(v["value"] is None for v in point["params"].values())   # not -1.0 and -3.0


def test_an_unresolved_excited_state_of_a_chosen_fit_is_withheld_alone(tmp_path, capsys):
    # eta has one state: a second one is not resolved; E0 and A0 stay results
    spec = one_fit_spec(states=2, tmin=1, tmax=11, priors={"E1": [1.4, 0.5]})
    status, err, results, _ = _fit(tmp_path, spec, capsys)
    assert status == 0, err
    chosen = results["fits"]["eta"]["chosen"]
    assert set(chosen["withheld"]) == {"E1", "A1.eta"}
    assert chosen["params"]["E1"]["value"] is None
    assert chosen["params"]["E0"]["value"] == pytest.approx(0.65, abs=0.01)
    assert chosen["params"]["A0.eta"]["value"] == pytest.approx(0.9, rel=0.05)


def test_an_average_with_no_usable_point_is_exit_2_saying_why(tmp_path, capsys):
    spec = invented_spec()
    spec["fits"] = [dict(spec["fits"][0], bounds={"E0": [0.5, 1.0]})]   # kaon: E0 = 0.42
    status, err, results, out = _fit(tmp_path, spec, capsys)
    assert status == 2
    error_line(err, r"fits\[0\]", r"at-bound 3", r"bounds")
    # no output at all; only the fit cache keeps the points fitted, so that the
    # rerun after the fix of the spec is quick
    assert results is None
    assert [p.name for p in out.iterdir()] == [".plateaufit-cache"]


def test_a_scan_point_whose_model_vanishes_is_not_averaged(tmp_path, capsys):
    spec = invented_spec()
    spec["fits"] = [dict(spec["fits"][0], start={"E0": -5.0})]
    status, err, results, _ = _fit(tmp_path, spec, capsys)
    if status == 2:
        return      # no usable point: refused, which is right
    e0 = results["fits"]["kaon"]["chosen"]["params"]["E0"]["value"]
    assert e0 is None or abs(e0 - 0.42) < 0.01, e0


def test_a_formula_fit_whose_model_vanishes_is_not_a_result(tmp_path, capsys):
    formula = {"expression": "a * (exp(-m * t) + exp(-m * (T - t)))",
               "params": {"a": 1.0, "m": 40.0}}
    status, err, results, _ = _fit(tmp_path, one_fit_spec(model="formula", formula=formula),
                                   capsys)
    assert status == 0, err
    chosen = results["fits"]["eta"]["chosen"]
    m = chosen["params"]["m"]["value"]
    assert chosen["withheld"] or abs(m - 0.65) < 0.01, m


@pytest.mark.slow   # draws every plot of the run
def test_the_report_of_a_withheld_fit_draws_and_says_not_a_result(tmp_path, capsys):
    spec = one_fit_spec(bounds={"E0": [0.7, 1.0]})
    spec["output"]["plots"] = True
    status, err, results, out = _fit(tmp_path, spec, capsys)
    assert status == 0, err
    page = (out / "report.html").read_text(encoding="utf-8")
    assert "not a result" in page and "chosen-withheld" not in page   # the words, not codes
    assert (out / "plots" / "eta.effmass.eta.png").is_file()
