"""load_spec: a good spec validates; every bad key is a SpecError naming its key path."""

from __future__ import annotations

import copy

import pytest
import yaml

from plateaufit.errors import SpecError
from plateaufit.pipeline.rules import load_spec
from plateaufit.specfile import ChooseSpec, Spec, scan_values

BASE = {
    "ensemble": {"name": "toy", "time_extent": 16, "streams": [10, 10]},
    "observables": {
        "pion": {"file": "pion.txt", "source": "g5", "sink": "g5"},
        "pionA": {"file": "pa.csv", "source": "g5", "sink": "g4g5"},
        "nuc": {"file": "n.txt", "boundary": "open"},
    },
    "binning": {"size": "auto"},
    "covariance": {"shrinkage": "ledoit-wolf", "target": "diagonal"},
    "fits": [
        {"name": "pi", "observables": ["pion"], "model": "cosh", "states": [1, 2],
         "tmin": [2, 5], "tmax": 8, "priors": {"E1": [1.0, 0.5]},
         "choose": {"tmin": 3, "tmax": 8, "states": 1}},
        {"name": "pi2", "observables": ["pion", "pionA"], "model": "cosh", "states": 1,
         "tmin": 3, "tmax": 8, "factorised": True, "bounds": {"Z0.g4g5": [-5, 5]}},
    ],
    "output": {"dir": "out"},
}


def write(tmp_path, data, name="spec.yaml"):
    path = tmp_path / name
    path.write_text(yaml.safe_dump(data, sort_keys=False))
    return path


def error_of(tmp_path, change) -> SpecError:
    data = copy.deepcopy(BASE)
    change(data)
    with pytest.raises(SpecError) as err:
        load_spec(write(tmp_path, data))
    return err.value


def test_good_spec_loads_with_defaults(tmp_path):
    spec = load_spec(write(tmp_path, BASE))
    assert isinstance(spec, Spec)
    assert spec.path == tmp_path / "spec.yaml"
    assert spec.base_dir == tmp_path.resolve()
    assert spec.observable_path("pion") == tmp_path.resolve() / "pion.txt"
    assert spec.output_dir == tmp_path.resolve() / "out"
    fit = spec.fits[0]
    assert fit.tmin == [2, 5] and fit.tmin_values == [2, 3, 4, 5] and fit.tmax_values == [8]
    assert fit.states_values == [1, 2] and fit.is_scan
    assert fit.choose == ChooseSpec(tmin=3, tmax=8, states=1)
    assert spec.observables["pion"].folds and not spec.observables["nuc"].folds
    assert spec.observables["pion"].part == "real"
    assert spec.covariance.per_sample == "auto" and spec.output.plots is True
    assert spec.binning.correction is True
    assert spec.fits[1].choose == "average" and spec.fits[1].oscillating == 0


def test_minimal_spec(tmp_path):
    spec = load_spec(write(tmp_path, {"ensemble": {"name": "e", "time_extent": 8},
                                      "observables": {"c": {"file": "c.npy"}}}))
    assert spec.fits == [] and spec.binning.size == "auto"
    assert spec.covariance.shrinkage == "ledoit-wolf" and spec.output.dir == "results"


def test_scan_values_with_step():
    assert scan_values([2, 9, 3]) == [2, 5, 8]
    assert scan_values(4) == [4]


def test_choose_states_default_when_the_fit_has_one(tmp_path):
    data = copy.deepcopy(BASE)
    data["fits"][1]["tmin"] = [2, 4]
    data["fits"][1]["choose"] = {"tmin": 3, "tmax": 8}
    fit = load_spec(write(tmp_path, data)).fits[1]
    assert fit.chosen_point() == (3, 8, 1)
    assert fit.choose.states is None        # the validated spec is not changed


# --------------------------------------------------------------------------- file-level errors


def test_missing_spec_file(tmp_path):
    with pytest.raises(SpecError, match="not found") as err:
        load_spec(tmp_path / "none.yaml")
    assert err.value.where == str(tmp_path / "none.yaml")


def test_yaml_syntax_error_names_file_and_line(tmp_path):
    path = tmp_path / "bad.yaml"
    path.write_text("ensemble:\n  name: toy\n  time_extent: [16\nobservables: {}\n")
    with pytest.raises(SpecError) as err:
        load_spec(path)
    assert err.value.where == str(path)
    assert "YAML syntax error at line 4" in err.value.message


def test_duplicate_key_is_an_error_with_lines(tmp_path):
    path = tmp_path / "dup.yaml"
    path.write_text("ensemble: {name: a, time_extent: 8}\nobservables:\n  c: {file: c.npy}\n"
                    "ensemble: {name: b, time_extent: 8}\n")
    with pytest.raises(SpecError, match=r"line 4.*duplicate key 'ensemble' \(first given at "
                                        r"line 1\)"):
        load_spec(path)


def test_not_a_mapping(tmp_path):
    path = tmp_path / "list.yaml"
    path.write_text("- 1\n- 2\n")
    with pytest.raises(SpecError, match="must be a mapping"):
        load_spec(path)
    path.write_text("")
    with pytest.raises(SpecError, match="empty"):
        load_spec(path)


# --------------------------------------------------------------------------- pydantic-level errors


@pytest.mark.parametrize(
    ("change", "where", "needle"),
    [
        (lambda d: d["fits"][0].update(tmn=3), "fits[0].tmn",
         "allowed keys here are name, observables, model"),
        (lambda d: d["fits"][0].pop("tmax"), "fits[0].tmax", "required key is missing"),
        (lambda d: d.pop("ensemble"), "ensemble", "required key is missing"),
        (lambda d: d.update(extra=1), "extra", "allowed keys here are ensemble, observables"),
        (lambda d: d["observables"]["pion"].update(fle="x"), "observables.pion.fle",
         "did you mean 'file'"),
        (lambda d: d["fits"][0].update(model="gauss"), "fits[0].model",
         "'exp', 'cosh', 'sinh' or 'formula'"),
        (lambda d: d["ensemble"].update(time_extent="16"), "ensemble.time_extent",
         "whole number"),
        (lambda d: d["ensemble"].update(time_extent=1), "ensemble.time_extent",
         "greater than or equal to 2"),
        (lambda d: d["ensemble"].update(streams=[10, 0]), "ensemble.streams",
         "at least one configuration"),
        (lambda d: d["covariance"].update(shrinkage=1.5), "covariance.shrinkage",
         "outside [0, 1]"),
        (lambda d: d["covariance"].update(shrinkage="strong"), "covariance.shrinkage",
         "none, ledoit-wolf, oas or a number"),
        (lambda d: d["covariance"].update(target="unit"), "covariance.target",
         "'diagonal' or 'identity'"),
        (lambda d: d["binning"].update(size=0), "binning.size", "at least 1"),
        (lambda d: d["binning"].update(size="big"), "binning.size", "auto or a whole number"),
        (lambda d: d["fits"][0].update(states=0), "fits[0].states", "at least 1"),
        (lambda d: d["fits"][0].update(states=[]), "fits[0].states", "empty"),
        (lambda d: d["fits"][0].update(tmin=-1), "fits[0].tmin", "negative"),
        (lambda d: d["fits"][0].update(tmin=[6, 3]), "fits[0].tmin", "lo = 6 > hi = 3"),
        (lambda d: d["fits"][0].update(tmax=[8, 9, 0]), "fits[0].tmax", "step"),
        (lambda d: d["fits"][0].update(priors={"E0": [0.5]}), "fits[0].priors.E0",
         "[mean, width]"),
        (lambda d: d["observables"]["pion"].update(boundary="twisted"),
         "observables.pion.boundary", "'periodic', 'antiperiodic' or 'open'"),
        (lambda d: d["observables"]["pion"].update(fold="yes"), "observables.pion.fold",
         "true or false"),
        (lambda d: d.update(fits={"name": "x"}), "fits", "expected a list"),
    ],
)
def test_type_and_value_errors_name_the_key(tmp_path, change, where, needle):
    err = error_of(tmp_path, change)
    assert err.where == where
    assert needle in err.message


def test_error_message_gives_the_spec_line(tmp_path):
    err = error_of(tmp_path, lambda d: d["fits"][1].update(tmin="three"))
    assert err.where == "fits[1].tmin"
    # the line of fits[1].tmin in the written file
    path_lines = (tmp_path / "spec.yaml").read_text().splitlines()
    line = next(i for i, s in enumerate(path_lines, 1) if "tmin: three" in s)
    assert f"[spec.yaml line {line}]" in err.message


# --------------------------------------------------------------------------- cross checks


@pytest.mark.parametrize(
    ("change", "where", "needle"),
    [
        (lambda d: d["fits"][1].update(observables=["pion", "kaon"]), "fits[1].observables[1]",
         "unknown observable 'kaon'; the observables are pion, pionA, nuc"),
        (lambda d: d["fits"][1].update(observables=["pion", "pion"]), "fits[1].observables[1]",
         "listed twice"),
        (lambda d: d["fits"][1].update(tmin=8, tmax=8), "fits[1].tmin",
         "tmin = 8 must be smaller than tmax = 8"),
        (lambda d: d["fits"][0].update(tmin=[8, 9], tmax=[5, 8]), "fits[0].tmin",
         "needs tmin < tmax"),
        (lambda d: d["fits"][1].update(tmax=9), "fits[1].tmax", "largest allowed tmax is 8"),
        (lambda d: d["fits"].append({"name": "n", "observables": ["nuc"], "model": "exp",
                                     "tmin": 2, "tmax": 16}),
         "fits[2].tmax", "largest allowed tmax is 15"),
        (lambda d: d["fits"][0]["priors"].update(E3=[1, 1]), "fits[0].priors.E3",
         "parameters are E0, E1, A0.pion, A1.pion"),
        (lambda d: d["fits"][1]["bounds"].update({"A0.pion": [0, 1]}), "fits[1].bounds.A0.pion",
         "Z0.g5, Z0.g4g5"),
        (lambda d: d["fits"][0].update(start={"E2": 1.0}), "fits[0].start.E2", "no parameter"),
        (lambda d: d["fits"][0]["priors"].update(E0=[0.5, 0.0]), "fits[0].priors.E0",
         "must be positive"),
        (lambda d: d["fits"][1]["bounds"].update({"E0": [2, 1]}), "fits[1].bounds.E0",
         "lo < hi"),
        (lambda d: d["fits"][1].update(start={"E0": 3.0}, bounds={"E0": [0, 1]}),
         "fits[1].start.E0", "outside the bounds"),
        (lambda d: d["fits"][0].update(states=[3], tmin=[5, 6], tmax=[7, 8], priors={},
                                       choose="average"),
         "fits[0].tmin", "widest range t = 5..8 gives 4 data points"),
        (lambda d: d["fits"][0].update(choose={"tmin": 6, "tmax": 8, "states": 1}),
         "fits[0].choose", "tmin = 6 is not among [2, 3, 4, 5]"),
        (lambda d: d["fits"][0].update(choose={"tmin": 3, "tmax": 8}), "fits[0].choose",
         "scans states [1, 2]"),
        (lambda d: d["fits"][1].update(name="pi"), "fits[1].name", "already used by fits[0]"),
        (lambda d: d["fits"][1].update(name="a b"), "fits[1].name", "must start with"),
        (lambda d: d["observables"]["pionA"].pop("sink"), "observables.pionA.sink",
         "fits[1] (pi2) is factorised"),
        (lambda d: d["observables"].update({"bad.name": {"file": "x.txt"}}),
         "observables.bad.name", "must start with a letter"),
        (lambda d: d["observables"]["pion"].update(file="pion.xls"), "observables.pion.file",
         "cannot tell the format"),
        (lambda d: d["observables"]["pion"].update(dataset="/c"), "observables.pion.dataset",
         "hdf5 files only"),
        (lambda d: d["observables"]["pion"].update(part="imag"), "observables.pion.part",
         "text files hold real numbers"),
        (lambda d: d["observables"]["nuc"].update(fold=True), "observables.nuc.fold",
         "periodic or antiperiodic"),
        (lambda d: d.update(observables={}), "observables", "no observables"),
        (lambda d: d["output"].update(dir=""), "output.dir", "empty"),
        (lambda d: d.update(truth={"nofit": {"E0": 0.5}}), "truth.nofit", "no fit named"),
        (lambda d: d["fits"][1].update(model="formula", factorised=False,
                                       bounds={}), "fits[1].formula", "needs formula"),
        (lambda d: d["fits"][0].update(formula={"expression": "a*t", "params": {"a": 1}}),
         "fits[0].formula", "model: formula only"),
    ],
)
def test_cross_checks_name_the_key(tmp_path, change, where, needle):
    err = error_of(tmp_path, change)
    assert err.where == where
    assert needle in err.message


def test_formula_with_forbidden_syntax(tmp_path):
    def change(d):
        d["fits"][1] = {"name": "f", "observables": ["pion"], "model": "formula",
                        "formula": {"expression": "__import__('os').system('x')",
                                    "params": {"a": 1.0}},
                        "tmin": 2, "tmax": 8}
    err = error_of(tmp_path, change)
    assert err.where == "fits[1].formula.expression"
    assert "not allowed" in err.message


def test_formula_fit_counts_its_own_parameters(tmp_path):
    data = copy.deepcopy(BASE)
    data["fits"][1] = {"name": "f", "observables": ["pion"], "model": "formula",
                       "formula": {"expression": "a * exp(-m * t) + a * exp(-m * (T - t))",
                                   "params": {"a": 1.0, "m": 0.5}},
                       "tmin": 6, "tmax": 8, "priors": {"m": [0.5, 0.2]}}
    spec = load_spec(write(tmp_path, data))
    assert spec.fits[1].formula.params == {"a": 1.0, "m": 0.5}
    data["fits"][1]["priors"] = {"E0": [0.5, 0.2]}
    with pytest.raises(SpecError, match="parameters are a, m") as err:
        load_spec(write(tmp_path, data))
    assert err.value.where == "fits[1].priors.E0"


def test_output_dir_that_is_a_file(tmp_path):
    (tmp_path / "out").write_text("not a directory")
    err = error_of(tmp_path, lambda d: None)
    assert err.where == "output.dir" and "not a directory" in err.message
