"""Bad-input catalogue, the spec: every bad spec is exit 2 at its key, in the user's words.

Three parts: named cases through ``plateaufit check`` and ``plateaufit fit``
(status 2, the key path in the one error line, no traceback, nothing written,
no fitting); every key of a full spec given every kind of wrong value, whose
messages must be free of the validation library's words and class names; and
hypothesis fuzzing of the loader with arbitrary text, random structures and
random edits of a valid spec: exit 0 or exit 2, never a traceback or a hang.
YAML merge keys (``<<: *base`` with an override) are valid and work.
"""

from __future__ import annotations

import copy
import datetime
import os
import re
from pathlib import Path
from typing import Any

import pytest
import yaml
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from bad_input import (error_line, fit_args, no_fitting_happened, one_fit_spec, run_cli, snapshot,
                       time_limit)
from plateaufit.cli import main
from plateaufit.errors import SpecError
from plateaufit.pipeline.rules import load_spec, validate_spec
from test_runner_end_to_end import invented_spec, write_invented_data, write_spec

FUZZ = settings(max_examples=120, deadline=None, derandomize=True, database=None,
                suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])

#: words of the validation library, and its class names, that must never reach a user
JARGON = re.compile(
    r"Input should|valid dictionary|pydantic|validation error|literal_error|\[key\]|"
    r"[Uu]nion\b|typing\.|NoneType|model_type|dict_type|function-(after|plain|before)|"
    r"<class|Traceback|\b(Spec|FitSpec|EnsembleSpec|ObservableSpec|BinningSpec|CovarianceSpec|"
    r"FormulaSpec|ChooseSpec|OutputSpec)\b")

def _fit(**changes: Any):
    return lambda spec: spec["fits"][0].update(changes)


def _spec(key: str, value: Any):
    def change(spec: dict) -> None:
        node = spec
        parts = key.split(".")
        for part in parts[:-1]:
            node = node[part]
        node[parts[-1]] = value
    return change


_FORMULA = {"expression": "a * (exp(-m * t) + exp(-m * (T - t)))", "params": {"a": 1.0, "m": 0.6}}

# name -> (change of the one-fit spec, regexes the error line must match)
CASES: dict[str, tuple[Any, list[str]]] = {
    "prior-of-infinite-width": (_fit(priors={"E0": [0.6, float("inf")]}),
                                [r"fits\[0\]\.priors\.E0:", r"finite"]),
    "prior-with-nan-mean": (_fit(priors={"E0": [float("nan"), 0.1]}),
                            [r"fits\[0\]\.priors\.E0:", r"mean", r"finite"]),
    "prior-of-zero-width": (_fit(priors={"E0": [0.6, 0.0]}),
                            [r"fits\[0\]\.priors\.E0:", r"positive"]),
    "start-nan": (_fit(start={"E0": float("nan")}), [r"fits\[0\]\.start\.E0:", r"finite"]),
    "bound-nan": (_fit(bounds={"E0": [float("nan"), 1.0]}), [r"fits\[0\]\.bounds\.E0:"]),
    "formula-parameter-unused": (
        _fit(model="formula", formula={**_FORMULA, "params": {"a": 1.0, "m": 0.6, "b": 3.0}}),
        [r"fits\[0\]\.formula\.params\.b:", r"does not use", r"\bb\b"]),
    "formula-start-infinite": (
        _fit(model="formula", formula={**_FORMULA, "params": {"a": float("inf"), "m": 0.6}}),
        [r"fits\[0\]\.formula\.params\.a:", r"finite"]),
    "truth-of-an-unknown-fit": (_spec("truth", {"etta": {"E0": 0.65}}),
                                [r"truth\.etta:", r"did you mean 'eta'"]),
    "truth-of-an-unknown-parameter": (_spec("truth", {"eta": {"E7": 0.65}}),
                                      [r"truth\.eta\.E7:", r"E0, A0\.eta"]),
    "truth-with-a-case-slip": (_spec("truth", {"eta": {"e0": 0.65}}),
                               [r"truth\.eta\.e0:", r"did you mean 'E0'"]),
    "truth-infinite": (_spec("truth", {"eta": {"E0": float("inf")}}),
                       [r"truth\.eta\.E0:", r"finite"]),
    "unknown-observable-misspelt": (_fit(observables=["etaa"]),
                                    [r"fits\[0\]\.observables\[0\]:", r"did you mean 'eta'"]),
    "prior-on-a-misspelt-parameter": (_fit(priors={"A0.etaa": [1.0, 0.5]}),
                                      [r"fits\[0\]\.priors\.A0\.etaa:", r"did you mean"]),
    "bound-on-a-misspelt-parameter": (_fit(bounds={"e0": [0.1, 2.0]}),
                                      [r"fits\[0\]\.bounds\.e0:", r"did you mean 'E0'"]),
    "start-of-a-misspelt-parameter": (_fit(start={"E00": 0.5}),
                                      [r"fits\[0\]\.start\.E00:", r"did you mean 'E0'"]),
    "a-million-states": (_fit(states=10**6), [r"fits\[0\]\.states:", r"at most"]),
    "a-billion-timeslices": (_fit(tmin=[0, 10**9]), [r"fits\[0\]\.tmin:", r"beyond"]),
    "time-extent-absurd": (_spec("ensemble.time_extent", 10**12),
                           [r"ensemble\.time_extent:"]),
    "shrinkage-beyond-floats": (_spec("covariance.shrinkage", 10**400),
                                [r"covariance\.shrinkage:", r"outside \[0, 1\]"]),
    "choose-a-number": (_fit(choose=3), [r"fits\[0\]\.choose:", r"average"]),
    "choose-without-tmax": (_fit(choose={"tmin": 4}),
                            [r"fits\[0\]\.choose\.tmax:", r"missing"]),
    "choose-misspelt-key": (_fit(choose={"tmn": 4, "tmax": 11}),
                            [r"fits\[0\]\.choose\.tmn:", r"did you mean 'tmin'"]),
    "output-dir-empty": (_spec("output.dir", " "), [r"output\.dir:"]),
    "derived-over-a-misspelt-fit": (_spec("derived", {"twice": "etaa.E0 * 2"}),
                                    [r"derived\.twice:", r"did you mean 'eta'"]),
}


@pytest.fixture(scope="module")
def data_dir(tmp_path_factory) -> Path:
    directory = tmp_path_factory.mktemp("spec_cases")
    write_invented_data(directory)
    return directory


@pytest.mark.parametrize("case", list(CASES))
@pytest.mark.parametrize("command", ["check", "fit"])
def test_bad_spec_is_exit_2_at_its_key_and_nothing_is_written(case, command, data_dir, capsys):
    change, patterns = CASES[case]
    spec = one_fit_spec()
    change(spec)
    spec_path = write_spec(data_dir, spec, f"{case}.yaml")
    before = snapshot(data_dir)
    args = [command, spec_path] if command == "check" else fit_args(spec_path)
    status, out, err = run_cli(capsys, *args)
    assert status == 2, out[-500:] + err
    line = error_line(err, *patterns)
    assert not JARGON.search(line), line
    assert no_fitting_happened(err)
    assert snapshot(data_dir) == before


# --------------------------------------------------------------------------- the YAML text


_BOMB = "".join(f"a{i}: &a{i} [{', '.join([f'*a{i - 1}'] * 10)}]\n" for i in range(1, 9))

# name -> (the spec file's bytes, or a callable making the path; regexes for the error line)
TEXT_CASES: dict[str, tuple[Any, list[str]]] = {
    "alias-that-contains-itself": (b"ensemble: &e {name: x, time_extent: [*e]}\n",
                                   [r"contains itself", r"line 1"]),
    "alias-expansion-bomb": (("a0: &a0 [x, x, x, x, x, x, x, x, x, x]\n" + _BOMB).encode(),
                             [r"anchors and aliases"]),
    "brackets-nested-too-deep": (b"ensemble: " + b"[" * 5000 + b"]" * 5000 + b"\n",
                                 [r"nested"]),
    "blocks-nested-too-deep": (("a:\n" + "".join(" " * i + "b:\n" for i in range(1, 1200))
                                ).encode(), [r"nested"]),
    "nul-bytes": (b"ensemble: {name: x,\x00 time_extent: 8}\n", [r"NUL"]),
    "latin-1-text": (b"ensemble: {name: caf\xe9, time_extent: 8}\n",
                     [r"UTF-8", r"line 1"]),
    "duplicate-key-beside-a-merge": (
        b"base: &b {name: x, time_extent: 8}\nensemble:\n  <<: *b\n  name: y\n  name: z\n",
        [r"duplicate key 'name'", r"line 5"]),
    "merge-of-a-number": (b"ensemble:\n  <<: 3\n  name: x\n", [r"(?i)merg", r"line"]),
    "python-object-tag": (b"ensemble: !!python/object/apply:os.system ['echo hi']\n",
                          [r"YAML"]),
    "tabs-for-indentation": (b"ensemble:\n\tname: x\n", [r"line 2"]),
}


@pytest.mark.parametrize("case", list(TEXT_CASES))
def test_bad_yaml_text_is_exit_2_naming_the_file(case, tmp_path, capsys):
    payload, patterns = TEXT_CASES[case]
    path = tmp_path / "spec.yaml"
    path.write_bytes(payload)
    with time_limit(30):
        status, _, err = run_cli(capsys, "check", path)
    assert status == 2
    error_line(err, re.escape(str(path)), *patterns)
    assert snapshot(tmp_path) == {"spec.yaml": payload}


@pytest.mark.parametrize("kind", ["fifo", "device", "directory", "huge"])
def test_a_spec_path_that_is_no_spec_file_never_blocks(kind, tmp_path, capsys):
    if kind == "fifo":
        path = tmp_path / "spec.yaml"
        os.mkfifo(path)            # opening it for reading would wait for a writer forever
    elif kind == "device":
        path = Path("/dev/zero")   # never ends
    elif kind == "directory":
        path = tmp_path
    else:
        path = tmp_path / "spec.yaml"
        path.write_bytes(b"# " + b"x" * (2 * 1024**2) + b"\n")
    with time_limit(30):
        status, _, err = run_cli(capsys, "check", path)
    assert status == 2
    error_line(err, re.escape(str(path)))


# --------------------------------------------------------------------------- merge keys


_MERGED = """\
ensemble: {name: heron-a24, time_extent: 24, streams: [170, 150]}
observables:
  kaon: {file: kaon.txt}
  eta: {file: eta.npy}
fits:
  - &base {name: kaon, observables: [kaon], model: cosh, tmin: [7, 9], tmax: 12}
  - <<: *base
    name: eta
    observables: [eta]
    tmin: 4
output: {dir: results, plots: false}
"""


def test_yaml_merge_keys_with_overrides_are_valid(data_dir, capsys):
    path = data_dir / "merged.yaml"
    path.write_text(_MERGED, encoding="utf-8")
    spec = load_spec(path)
    eta = spec.fits[1]
    assert (eta.name, eta.observables, eta.tmin, eta.tmax, eta.model) == \
        ("eta", ["eta"], 4, 12, "cosh")
    status, out, err = run_cli(capsys, "check", path)
    assert status == 0, err
    assert "fit eta (fits[1])" in out


def test_an_error_under_a_merge_names_the_overriding_line(data_dir):
    path = data_dir / "merged_bad.yaml"
    path.write_text(_MERGED.replace("    tmin: 4\n", "    tmin: 4\n    tmax: 30\n"),
                    encoding="utf-8")
    with pytest.raises(SpecError) as err:
        load_spec(path)
    assert err.value.where == "fits[1].tmax"
    assert "merged_bad.yaml line 11" in err.value.message


# --------------------------------------------------------------------------- every key, wrong kinds


_FULL: dict[str, Any] = {
    "ensemble": {"name": "a", "time_extent": 8, "streams": [4, 4]},
    "observables": {"c": {"file": "c.txt", "format": "text", "boundary": "periodic",
                          "fold": True, "part": "real", "source": "S", "sink": "S"}},
    "binning": {"size": "auto"},
    "covariance": {"shrinkage": "ledoit-wolf", "target": "diagonal", "per_sample": False,
                   "eigenvalue_floor": 0.01},
    "fits": [{"name": "f", "observables": ["c"], "model": "cosh", "states": 1,
              "oscillating": 0, "constant": False, "factorised": False, "tmin": 1, "tmax": 4,
              "priors": {"E0": [0.5, 0.1]}, "bounds": {"E0": [0, 2]}, "start": {"E0": 0.5},
              "choose": {"tmin": 1, "tmax": 4}},
             {"name": "g", "observables": ["c"], "model": "formula",
              "formula": {"expression": "a*exp(-m*t)", "params": {"a": 1, "m": 0.5}},
              "tmin": 1, "tmax": 4}],
    "output": {"dir": "out", "plots": False},
    "truth": {"f": {"E0": 0.5}},
    "derived": {"r": "f.E0 * 2"},
}
_WRONG = [None, 3, -1, 1.5, "x", "", [], {}, [1, 2], {"a": 1}, True, float("nan"),
          float("inf"), datetime.date(2020, 1, 1), b"x", 10**400, [[1]], {1: 2}, ["c", "c"]]


def _key_paths(node: Any, path: tuple = ()):
    yield path
    if isinstance(node, dict):
        for k, v in node.items():
            yield from _key_paths(v, path + (k,))
    elif isinstance(node, list):
        for i, v in enumerate(node):
            yield from _key_paths(v, path + (i,))


def _variants():
    for path in list(_key_paths(_FULL))[1:]:
        for wrong in [*_WRONG, "<deleted>", "<extra key>"]:
            yield path, wrong


def test_every_key_given_every_wrong_value_speaks_the_users_words():
    validate_spec(copy.deepcopy(_FULL))    # the base is valid
    n_refused = 0
    for path, wrong in _variants():
        spec = copy.deepcopy(_FULL)
        node = spec
        for part in path[:-1]:
            node = node[part]
        if wrong == "<deleted>":
            if not isinstance(node, dict):
                continue
            del node[path[-1]]
        elif wrong == "<extra key>":
            if not isinstance(node[path[-1]], dict):
                continue
            node[path[-1]]["zzz"] = 1
        else:
            node[path[-1]] = wrong
        try:
            validate_spec(spec)
        except SpecError as err:
            n_refused += 1
            text = str(err)
            assert not JARGON.search(text), (path, wrong, text)
            assert err.where, (path, wrong, text)
            # the error is at the changed key or above it, never somewhere unrelated
            top = str(path[0])
            assert err.where.startswith(top) or err.where.startswith(("fits", "truth",
                                                                        "derived")), \
                (path, wrong, text)
    assert n_refused > 1000


# --------------------------------------------------------------------------- fuzzing the loader


def _outcome(path: Path) -> None:
    """load_spec: a Spec, or a SpecError in the user's words; nothing else, no hang."""
    with time_limit(20):
        try:
            load_spec(path)
        except SpecError as err:
            assert not JARGON.search(str(err)), str(err)
            assert err.where


_YAMLISH = st.lists(st.sampled_from(list(
    "abcdefghijklmnopqrstuvwxyz_0123456789 .-+:,[]{}&*!|>'\"#%@`?<=\n\t\\")
    + ["ensemble", "observables", "fits", "time_extent", "name", "tmin", "tmax", "<<", ".nan",
       ".inf", "~", "null", "true", "\u00e9", "\x00", "\r", "\n  ", "\n- ", ": "]),
    max_size=120).map("".join)


@FUZZ
@given(text=_YAMLISH)
def test_fuzz_any_text_is_a_spec_or_a_spec_error(text, tmp_path_factory):
    path = tmp_path_factory.mktemp("fuzz_text") / "spec.yaml"
    path.write_bytes(text.encode("utf-8", "surrogatepass"))
    _outcome(path)


_KEYS = ["ensemble", "observables", "fits", "name", "time_extent", "streams", "file", "format",
         "boundary", "fold", "model", "states", "tmin", "tmax", "priors", "bounds", "start",
         "choose", "formula", "expression", "params", "E0", "A0.eta", "output", "dir", "truth",
         "derived", "binning", "size", "covariance", "shrinkage", "eta", "kaon", "x"]
_LEAVES = (st.none() | st.booleans() | st.integers(-10**6, 10**6)
           | st.floats(allow_nan=True, allow_infinity=True) | st.sampled_from(_KEYS)
           | st.sampled_from(["auto", "average", "cosh", "exp", "formula", "ledoit-wolf", "1e3",
                              "t * E0", "eta.E0 / kaon.E0", "periodic", "text"]))
_TREES = st.recursive(_LEAVES, lambda kids: st.lists(kids, max_size=4)
                      | st.dictionaries(st.sampled_from(_KEYS), kids, max_size=4), max_leaves=20)


@FUZZ
@given(where=st.lists(st.sampled_from(_KEYS + [0, 1]), min_size=1, max_size=3), value=_TREES)
def test_fuzz_random_structures_in_a_valid_spec(where, value, tmp_path_factory):
    spec = invented_spec()
    node: Any = spec
    for part in where[:-1]:       # walk as far as the spec goes, then graft the value
        nxt = node.get(part) if isinstance(node, dict) else (
            node[part] if isinstance(node, list) and isinstance(part, int)
            and part < len(node) else None)
        if not isinstance(nxt, (dict, list)):
            break
        node = nxt
    last = where[-1]
    if isinstance(node, dict):
        node[last] = value
    elif isinstance(node, list) and isinstance(last, int) and last < len(node):
        node[last] = value
    else:
        spec["fits"] = value
    path = tmp_path_factory.mktemp("fuzz_tree") / "spec.yaml"
    path.write_text(yaml.safe_dump(spec, sort_keys=False, allow_unicode=True), encoding="utf-8")
    _outcome(path)


@pytest.fixture(scope="module")
def valid_text(data_dir) -> str:
    spec = invented_spec()
    spec["truth"] = {"kaon": {"E0": 0.42}, "eta": {"E0": 0.65}}
    spec["derived"] = {"ratio": "eta.E0 / kaon.E0"}
    return yaml.safe_dump(spec, sort_keys=False)


@settings(max_examples=60, deadline=None, derandomize=True, database=None,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])
@given(edits=st.lists(st.tuples(st.floats(0, 1), st.integers(0, 3), st.sampled_from(
    list(" :-[]{},\n#&*0123456789.") + ["tmin", "E0", ".nan", "<<: *a", "&a ", "~"])),
    min_size=1, max_size=4))
def test_fuzz_edits_of_a_valid_spec_through_check_exit_0_or_2(edits, valid_text, data_dir,
                                                             capsys):
    text = valid_text
    for where, delete, insert in edits:
        i = int(where * len(text))
        text = text[:i] + insert + text[i + delete:]
    path = data_dir / "edited.yaml"
    path.write_text(text, encoding="utf-8")
    with time_limit(60):
        status = main(["check", str(path)])
    err = capsys.readouterr().err
    assert status in (0, 2), err
    assert "Traceback" not in err
    if status == 2:
        line = error_line(err)
        assert not JARGON.search(line), line
