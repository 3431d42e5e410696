"""Derived quantities: the expression, its errors, the spec key and the run end to end.

The end-to-end cases use the invented ensemble ``heron-a24`` of
``tests/test_runner_end_to_end.py`` (data from a known truth, fixed seed):
``kaon`` fitted as an average of three fit ranges, ``eta`` as one range,
E0(kaon) = 0.42 and E0(eta) = 0.65.
"""

from __future__ import annotations

import copy
import json
import math

import numpy as np
import pytest

from plateaufit.cli import main
from plateaufit.errors import FitError
from plateaufit.fit.derived import DerivedExpression, DerivedInput, evaluate_derived
from plateaufit.pipeline.rules import validate_spec
from test_runner_end_to_end import TRUTH_E0, invented_spec, write_invented_run

KNOWN = {"pion": ["E0", "E1", "A0.pion_ss"], "vector": ["E0"], "pion-2": ["E0"]}
ERROR_PREFIX = "plateaufit: error:"


# --------------------------------------------------------------------------- the expression


def test_references_are_found_longest_first_and_split_into_fit_and_parameter():
    expr = DerivedExpression("pion-2.E0 - pion.E0 + 2 * pion.A0.pion_ss / pion.E0", KNOWN)
    assert expr.references == ("pion-2.E0", "pion.E0", "pion.A0.pion_ss")
    assert expr.parts == {"pion-2.E0": ("pion-2", "E0"), "pion.E0": ("pion", "E0"),
                          "pion.A0.pion_ss": ("pion", "A0.pion_ss")}
    got = expr({"pion-2.E0": 0.5, "pion.E0": 0.2, "pion.A0.pion_ss": 1.5})
    assert float(got) == pytest.approx(0.5 - 0.2 + 2 * 1.5 / 0.2, rel=1e-15)


def test_expression_evaluates_elementwise_with_the_whitelisted_functions():
    expr = DerivedExpression("sqrt(pion.E0**2 + (2*pi/24)**2) - exp(log(vector.E0))", KNOWN)
    e0 = np.array([0.1, 0.2, 0.3])
    out = expr({"pion.E0": e0, "vector.E0": 0.44})
    np.testing.assert_allclose(out, np.sqrt(e0 ** 2 + (2 * np.pi / 24) ** 2) - 0.44, rtol=1e-14)


@pytest.mark.parametrize("expression, words", [
    ("", ["empty"]),
    ("   ", ["empty"]),
    ("kaon.E0 / pion.E0", ["unknown fit 'kaon'", "pion, vector, pion-2"]),
    ("pion.E7", ["no parameter 'E7'", "E0, E1, A0.pion_ss"]),
    ("E0", ["needs its fit", "pion.E0"]),
    ("pion", ["is a fit", "pion.E0"]),
    ("t * pion.E0", ["'t'", "not a function of time"]),
    ("__import__('os')", ["__import__", "not allowed"]),
    ("max(pion.E0, vector.E0)", ["max", "not allowed"]),
    ("pion.E0 .real", ["not a parameter of fit 'pion'"]),
    ("[pion.E0][0]", ["Subscript", "not allowed"]),
    ("pion.E0 +", ["not a valid expression"]),
    ("2 * pi", ["uses no fit parameter"]),
])
def test_bad_expressions_are_refused_naming_the_problem(expression, words):
    with pytest.raises(ValueError) as err:
        DerivedExpression(expression, KNOWN)
    for word in words:
        assert word in str(err.value)
    # the placeholders never leak into a message
    assert "_r0" not in str(err.value)


def test_a_reference_that_two_fits_could_mean_is_refused():
    with pytest.raises(ValueError, match="ambiguous"):
        DerivedExpression("a.b.c * 2", {"a": ["b.c"], "a.b": ["c"]})


# --------------------------------------------------------------------------- evaluate_derived


def _jackknife_inputs(seed: int = 3) -> dict[str, DerivedInput]:
    rng = np.random.default_rng(seed)
    data = rng.normal([0.2, 0.44], [0.01, 0.02], size=(60, 2))
    jk = (data.sum(axis=0) - data) / (data.shape[0] - 1)
    return {"pion.E0": DerivedInput(data[:, 0].mean(), jk[:, 0], 0.001),
            "vector.E0": DerivedInput(data[:, 1].mean(), jk[:, 1], 0.0)}


def test_identity_reproduces_its_input():
    inputs = _jackknife_inputs()
    result = evaluate_derived("pion.E0", inputs)
    x = inputs["pion.E0"]
    n = x.samples.shape[0]
    assert result.value == x.value
    assert result.stat_error == pytest.approx(
        math.sqrt((n - 1) / n * np.sum((x.samples - x.samples.mean()) ** 2)), rel=1e-13)
    assert result.sys_error == pytest.approx(0.001, rel=1e-9)
    np.testing.assert_array_equal(result.samples, x.samples)
    assert result.references == ("pion.E0",) and result.n_dropped == 0


def test_plain_tuples_are_accepted_and_samples_with_a_failed_refit_are_dropped():
    inputs = {k: (v.value, v.samples.copy(), v.sys_error) for k, v in _jackknife_inputs().items()}
    inputs["vector.E0"][1][[4, 9]] = np.nan            # two refits failed
    result = evaluate_derived("vector.E0 / pion.E0", inputs)
    keep = np.ones(60, dtype=bool)
    keep[[4, 9]] = False
    ratio = inputs["vector.E0"][1][keep] / inputs["pion.E0"][1][keep]
    n = keep.sum()
    assert result.n_dropped == 2 and np.isnan(result.samples[[4, 9]]).all()
    assert result.stat_error == pytest.approx(
        math.sqrt((n - 1) / n * np.sum((ratio - ratio.mean()) ** 2)), rel=1e-12)


def test_unusable_inputs_raise_fit_errors():
    inputs = _jackknife_inputs()
    short = dict(inputs, **{"vector.E0": DerivedInput(0.44, inputs["vector.E0"].samples[:50])})
    with pytest.raises(FitError, match="different numbers of jackknife samples"):
        evaluate_derived("vector.E0 / pion.E0", short)
    with pytest.raises(FitError, match="not finite at the central values"):
        evaluate_derived("vector.E0 / (pion.E0 - pion.E0)", inputs)
    # log of a quantity whose jackknife samples straddle zero
    around_zero = {"pion.E0": DerivedInput(0.001, np.linspace(-0.01, 0.01, 60))}
    with pytest.raises(FitError, match="not finite on 30 of 60"):
        evaluate_derived("log(pion.E0)", around_zero)
    with pytest.raises(FitError, match="no input for 'kaon.E0'"):
        evaluate_derived("kaon.E0 / pion.E0", inputs)
    bad_sys = {"pion.E0": DerivedInput(0.2, inputs["pion.E0"].samples, -1.0)}
    with pytest.raises(FitError, match="systematic error"):
        evaluate_derived("pion.E0", bad_sys)
    all_failed = {"pion.E0": DerivedInput(0.2, np.full(60, np.nan))}
    with pytest.raises(FitError, match="at least 2"):
        evaluate_derived("2 * pion.E0", all_failed)


# --------------------------------------------------------------------------- the spec key


def _spec_with(change) -> dict:
    spec = invented_spec()
    spec["derived"] = {"ratio": "eta.E0 / kaon.E0"}
    change(spec)
    return spec


def _set_derived(name, expression):
    return lambda spec: spec["derived"].__setitem__(name, expression)


# id -> (change of the spec, key path named, words of the message)
SPEC_CASES = {
    "unknown-fit": (_set_derived("ratio", "pion.E0 / kaon.E0"), "derived.ratio",
                    ["unknown fit 'pion'", "kaon, eta"]),
    "unknown-parameter": (_set_derived("gap", "kaon.E1 - kaon.E0"), "derived.gap",
                          ["no parameter 'E1'", "E0, A0.kaon"]),
    "forbidden-syntax": (_set_derived("ratio", "kaon.E0.__class__"), "derived.ratio",
                         ["__class__"]),
    "forbidden-call": (_set_derived("ratio", "__import__('os').system('true')"),
                       "derived.ratio", ["not allowed"]),
    "empty-expression": (_set_derived("ratio", ""), "derived.ratio", ["empty"]),
    "not-text": (_set_derived("ratio", 1.5), "derived.ratio", ["expected text"]),
    "name-of-a-fit": (_set_derived("kaon", "eta.E0"), "derived.kaon",
                      ["already the name of fits[0]"]),
    "bad-name": (_set_derived("2x", "eta.E0"), "derived.2x", ["must start with a letter"]),
    "unknown-truth": (lambda s: s.__setitem__("truth", {"derived": {"ratoi": 1.5}}),
                      "truth.derived.ratoi", ["no derived quantity", "did you mean 'ratio'"]),
    "fit-named-derived": (lambda s: s["fits"][1].__setitem__("name", "derived"),
                          "fits[1].name", ["cannot have a fit named 'derived'",
                                           "truth.derived"]),
    # choose: names a one-state point, so the chosen result has no E1
    "parameter-not-in-the-chosen-fit": (
        lambda s: (s["fits"][1].update(states=[1, 2], tmin=[3, 4], tmax=11,
                                       choose={"tmin": 4, "tmax": 11, "states": 1}),
                   s["derived"].__setitem__("gap", "eta.E1 - eta.E0")),
        "derived.gap", ["no parameter 'E1'"]),
}


@pytest.mark.parametrize("case", list(SPEC_CASES))
def test_spec_errors_exit_2_through_the_cli_naming_the_key(case, tmp_path, capsys):
    change, key, words = SPEC_CASES[case]
    spec_path = write_invented_run(tmp_path, _spec_with(change))
    out = tmp_path / "out"
    status = main(["fit", str(spec_path), "--out", str(out), "--jobs", "1", "--quiet"])
    err = capsys.readouterr().err
    assert status == 2, err
    assert "Traceback" not in err
    lines = [line for line in err.strip().splitlines() if line.startswith(ERROR_PREFIX)]
    assert len(lines) == 1, err
    assert lines[0].startswith(f"{ERROR_PREFIX} {key}: "), lines[0]
    for word in words:
        assert word in lines[0], lines[0]
    assert not out.exists()


def test_a_spec_without_derived_quantities_keeps_truth_by_fit_name():
    # backward compatible: without derived:, a fit may be called "derived"
    spec = invented_spec()
    spec["fits"][1]["name"] = "derived"
    spec["truth"] = {"derived": {"E0": 0.65}}
    checked = validate_spec(spec)
    assert checked.derived == {} and checked.truth == {"derived": {"E0": 0.65}}


def test_a_parameter_without_result_is_a_fit_error_naming_the_derived_key():
    from types import SimpleNamespace

    from plateaufit.pipeline.derived import derive

    spec = validate_spec(_spec_with(lambda s: None))
    jk = np.linspace(0.41, 0.43, 20)
    fits = {"kaon": SimpleNamespace(derived_inputs={"E0": DerivedInput(0.42, jk)}),
            "eta": SimpleNamespace(derived_inputs={})}
    with pytest.raises(FitError) as err:
        derive(spec, fits)
    assert err.value.where == "derived.ratio" and "eta.E0 has no result" in err.value.message


# --------------------------------------------------------------------------- end to end


@pytest.fixture(scope="module")
def derived_run(tmp_path_factory):
    from plateaufit.pipeline.run import run_spec

    directory = tmp_path_factory.mktemp("derived_run")
    spec = invented_spec()
    # a second fit of the same correlator, one of the ranges the kaon average has
    spec["fits"].append({"name": "kaon_single", "observables": ["kaon"], "model": "cosh",
                         "states": 1, "tmin": 8, "tmax": 12})
    spec["derived"] = {
        "ratio_eta_kaon": "eta.E0 / kaon.E0",   # a single fit over an average
        "kaon_E0": "kaon.E0",                   # the averaged parameter itself
        "eta_E0": "eta.E0",                     # the single fit's parameter itself
        "gap": "eta.E0 - kaon.E0",
        "kaon_shift": "kaon.E0 - kaon_single.E0",
    }
    spec["truth"] = {"kaon": {"E0": TRUTH_E0["kaon"]},
                     "derived": {"ratio_eta_kaon": TRUTH_E0["eta"] / TRUTH_E0["kaon"],
                                 "gap": TRUTH_E0["eta"] - TRUTH_E0["kaon"]}}
    results = run_spec(write_invented_run(directory, spec), jobs=1, progress=False, plots=False)
    return directory / "results", results


def test_results_json_holds_the_derived_quantities(derived_run):
    out, results = derived_run
    on_disk = json.loads((out / "results.json").read_text(encoding="utf-8"))
    assert on_disk["derived"] == results["derived"]
    entry = results["derived"]["ratio_eta_kaon"]
    assert set(entry) == {"expression", "references", "value", "error", "stat_error",
                          "sys_error"}
    assert entry["expression"] == "eta.E0 / kaon.E0"
    assert entry["references"] == ["eta.E0", "kaon.E0"]
    assert entry["error"] == pytest.approx(math.hypot(entry["stat_error"], entry["sys_error"]),
                                           rel=1e-15)
    assert results["truth"]["derived"]["gap"] == pytest.approx(0.23)


@pytest.mark.parametrize("name", ["ratio_eta_kaon", "gap"])
def test_derived_values_agree_with_the_truth_within_3_sigma(derived_run, name):
    _, results = derived_run
    entry = results["derived"][name]
    truth = results["truth"]["derived"][name]
    assert abs(entry["value"] - truth) < 3 * entry["error"], (entry, truth)


def test_the_samples_reproduce_the_fits_own_errors(derived_run):
    # the jackknife samples handed to a derived quantity are exactly those whose
    # jackknife error the fit reports: sum_f w_f samples_f for the average (kaon),
    # the chosen fit's samples for a single range (eta)
    _, results = derived_run
    for fit, name in (("kaon", "kaon_E0"), ("eta", "eta_E0")):
        param = results["fits"][fit]["chosen"]["params"]["E0"]
        derived = results["derived"][name]
        assert derived["value"] == param["value"]
        assert derived["stat_error"] == pytest.approx(param["stat_error"], rel=1e-12)
        assert derived["sys_error"] == pytest.approx(param["sys_error"], rel=1e-8, abs=1e-15)
    assert results["fits"]["kaon"]["chosen"]["method"] == "average"
    assert results["fits"]["kaon"]["chosen"]["params"]["E0"]["sys_error"] > 0


def test_the_difference_of_two_fits_of_one_correlator_keeps_their_correlation(derived_run):
    # kaon (average over tmin 7..9) and kaon_single (tmin 8) fit the same data on the
    # same bins: their E0s move together from sample to sample, so the difference has
    # a far smaller jackknife error than independent errors would give
    _, results = derived_run
    k = results["fits"]["kaon"]["chosen"]["params"]["E0"]
    s = results["fits"]["kaon_single"]["chosen"]["params"]["E0"]
    shift = results["derived"]["kaon_shift"]
    uncorrelated = math.hypot(k["stat_error"], s["stat_error"])
    assert 0 < shift["stat_error"] < 0.5 * uncorrelated
    assert shift["value"] == pytest.approx(k["value"] - s["value"], rel=1e-14, abs=1e-16)


def test_tables_and_page_show_the_derived_quantities(derived_run, tmp_path):
    from plateaufit.report.html import write_report
    from plateaufit.report.tables import format_value_error, format_value_errors

    out, results = derived_run
    tex = (out / "results.tex").read_text(encoding="utf-8")
    entry = results["derived"]["ratio_eta_kaon"]
    row = next(line for line in tex.splitlines() if "ratio\\_eta\\_kaon" in line)
    assert format_value_errors(entry["value"], [entry["stat_error"], entry["sys_error"]]) in row
    assert format_value_error(entry["value"], entry["error"]) in row
    assert "\\texttt{eta.E0 / kaon.E0}" in row and row.count(" & ") == 5
    page = write_report(copy.deepcopy(results), tmp_path, figures={}).read_text(encoding="utf-8")
    section = page.split('<section id="derived">')[1].split("</section>")[0]
    assert "<h2>Derived quantities</h2>" in section and '<a href="#derived">' in page
    assert format_value_error(entry["value"], entry["error"]) in section
    assert "<code>eta.E0 / kaon.E0</code>" in section
    truth = results["truth"]["derived"]["ratio_eta_kaon"]
    assert f"{truth:.6g}" in section
    assert f"{(entry['value'] - truth) / entry['error']:+.2f}" in section


def test_a_page_without_derived_quantities_has_no_such_section(derived_run, tmp_path):
    from plateaufit.report.html import write_report

    _, results = derived_run
    bare = copy.deepcopy(results)
    del bare["derived"]
    page = write_report(bare, tmp_path, figures={}).read_text(encoding="utf-8")
    assert 'id="derived"' not in page and "Derived quantities" not in page
