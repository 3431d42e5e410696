"""The pipeline's own seams: spec keys of core errors, typed results of a scan, the
warnings table (flags and numerical warnings of the fit core included), run_spec's
inputs, and the layering of specfile/."""

from __future__ import annotations

import ast
import json
from dataclasses import dataclass
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pytest

import plateaufit as pf
from plateaufit.errors import DataError, FitError
from plateaufit.pipeline.keys import located, spec_key
from plateaufit.pipeline.results import EnsembleResult, FitResult, Results
from plateaufit.pipeline.run import RunLog, _log_fit, run_spec
from plateaufit.pipeline.rules import load_spec, validate_spec
from plateaufit.pipeline.summary import summarise_scan
from plateaufit.pipeline.warnings import collect_warnings, with_warnings
from test_runner_end_to_end import T, folded_binned, invented_spec, write_invented_run

SPECFILE = Path(__file__).resolve().parents[1] / "src" / "plateaufit" / "specfile"


# --------------------------------------------------------------------------- keys


@pytest.mark.parametrize("where, index, expected", [
    ("size", None, "binning.size"),
    ("streams", None, "ensemble.streams"),
    ("stream_counts", None, "ensemble.streams"),
    ("shrinkage", 0, "covariance.shrinkage"),
    ("eigenvalue_floor", 2, "covariance.eigenvalue_floor"),
    ("time_extent", 1, "ensemble.time_extent"),
    ("tmin", 1, "fits[1].tmin"),
    ("priors.E1", 0, "fits[0].priors.E1"),
    ("form", 3, "fits[3].model"),
    ("observables.kaon", 0, "fits[0].observables"),
    ("", 2, "fits[2]"),
    ("observables.kaon.file", None, "observables.kaon.file"),   # a spec key already
    ("/data/kaon.txt", 0, "/data/kaon.txt"),                     # a file
])
def test_core_arguments_map_to_spec_keys(where, index, expected):
    assert spec_key(where, index) == expected


def test_located_reraises_at_the_spec_key_keeping_class_and_message():
    with pytest.raises(DataError) as err:
        with located():
            pf.bin_samples(np.ones(10), 0)
    assert err.value.where == "binning.size" and "at least 1" in err.value.message
    with pytest.raises(FitError) as err:
        with located(fit_index=4):
            raise FitError("tmax", "beyond the data")
    assert (err.value.where, err.value.message) == ("fits[4].tmax", "beyond the data")


# --------------------------------------------------------------------------- specfile


def test_specfile_imports_nothing_above_data():
    for path in SPECFILE.glob("*.py"):
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            if isinstance(node, ast.ImportFrom) and node.module and \
                    node.module.startswith("plateaufit"):
                assert node.module.split(".")[1] in ("data", "errors", "specfile"), \
                    (path.name, node.module)


def test_validation_does_not_change_the_spec(tmp_path):
    spec = invented_spec()
    spec["fits"][0]["choose"] = {"tmin": 7, "tmax": 12}
    checked = validate_spec(spec, base_dir=tmp_path)
    fit = checked.fits[0]
    assert fit.choose.states is None and fit.chosen_point() == (7, 12, 1)
    assert checked.model_dump() == validate_spec(checked.model_dump(), base_dir=tmp_path
                                                 ).model_dump()


# --------------------------------------------------------------------------- run_spec inputs


@pytest.fixture(scope="module")
def heron(tmp_path_factory):
    directory = tmp_path_factory.mktemp("heron-pipeline")
    spec = invented_spec()
    spec["fits"] = spec["fits"][1:]          # the single eta fit: quick
    path = write_invented_run(directory, spec)
    results = run_spec(path, directory / "out-path", plots=False, jobs=1, progress=False)
    return directory, path, spec, results


def test_run_spec_takes_a_spec_or_a_dict_as_well_as_a_path(heron):
    directory, path, spec, by_path = heron
    by_spec = run_spec(load_spec(path), directory / "out-spec", plots=False, jobs=1,
                       progress=False)
    by_dict = run_spec(spec, directory / "out-dict", plots=False, jobs=1, progress=False,
                       base_dir=directory)
    for other in (by_spec, by_dict):
        assert other["fits"]["eta"]["chosen"]["params"] == by_path["fits"]["eta"]["chosen"]["params"]
        assert other["ensemble"]["bin_size"] == by_path["ensemble"]["bin_size"]
    assert by_dict["provenance"]["spec_sha256"] is None        # no file to hash
    assert by_spec["provenance"]["spec_sha256"] == by_path["provenance"]["spec_sha256"]


def test_results_round_trip_through_the_typed_classes(heron):
    _, _, _, results = heron
    again = Results.from_dict(json.loads(json.dumps(results))).to_dict()
    assert again == results


# --------------------------------------------------------------------------- flags, warnings


@dataclass(frozen=True)
class _Flag:
    """What the fit core's diagnostic flags offer (str() is the short code)."""

    code: str
    message: str
    parameters: tuple[str, ...] = ()
    degenerate: bool = False

    def __str__(self) -> str:
        return self.code


def _scan(directory: Path, bin_size: int):
    binned = folded_binned(directory, "kaon", bin_size)
    fits = pf.scan({"kaon": binned}, tmin=[6, 9], tmax=12, states=1, form="cosh",
                   time_extent=T)
    return binned, fits


def _results_of(fit: FitResult) -> Results:
    return Results(version="", output_dir="", ensemble=EnsembleResult.from_dict({}),
                   fits={fit.name: fit})


def _flagged(fit, flags, n_numerical=0, texts=()):
    """The fit with the fit core's (coming) diagnostic attributes."""
    return SimpleNamespace(**{**vars(fit), "flags": tuple(flags),
                              "flag_codes": [str(f) for f in flags],
                              "n_numerical_warnings": n_numerical,
                              "numerical_warnings": tuple(texts)})


def test_flags_and_numerical_warnings_reach_results_warnings_and_the_log(heron):
    directory, _, _, results = heron
    binned, fits = _scan(directory, results["ensemble"]["bin_size"])
    flag = _Flag("state-unresolved:E1,A1.kaon", "E1 is not resolved by the data",
                 ("E1", "A1.kaon"))
    fits = [_flagged(fits[0], [flag], 2, ("overflow in exp", "invalid value in log"))] + \
        [_flagged(f, []) for f in fits[1:]]
    result = summarise_scan(fits, name="kaon", binned={"kaon": binned}, time_extent=T)
    assert result.scan[0].flags == ("state-unresolved:E1,A1.kaon",)
    assert result.scan[0].flag_messages == ("E1 is not resolved by the data",)
    assert all(p.flags == () for p in result.scan[1:])
    typed = with_warnings(_results_of(result))
    codes = [w.code for w in typed.warnings]
    # a flagged point that is not the chosen one is no warning (run.log lists it);
    # caught numerical warnings are no warning either (one log line per fit)
    shown = result.chosen_point()
    assert codes.count("chosen-flagged") == (1 if shown.flags else 0)
    assert "numerical-warnings" not in codes
    chosen = summarise_scan(fits, name="kaon", choose=(6, 12))   # the flagged point
    warned = with_warnings(_results_of(chosen))
    flagged = next(w for w in warned.warnings if w.code == "chosen-flagged")
    assert flagged.fit == "kaon" and "[6, 12], 1 state" in flagged.message
    assert "E1 is not resolved by the data" in flagged.message
    assert typed.fits["kaon"].warnings == [w.message for w in typed.warnings]
    # the JSON keeps the flags; run.log lists the flagged point and the warnings' texts
    point = typed.to_dict()["fits"]["kaon"]["scan"][0]
    assert point["flags"] == ["state-unresolved:E1,A1.kaon"]
    log = RunLog()
    _log_fit(log, result)
    text = "\n".join(log.lines)
    assert "flagged [6, 12], 1 state [state-unresolved:E1,A1.kaon]: E1 is not resolved" in text
    assert "numerical warning: overflow in exp" in text
    assert "fit kaon: 2 numerical warning(s)" in text
    # only the one summary line reaches the terminal
    echoed = RunLog(echo=False)
    _log_fit(echoed, result)
    assert sum("numerical warning" in line for line in echoed.lines) == 3


def test_clean_points_have_empty_flags_in_results(heron):
    _, _, _, results = heron
    assert all(p["flags"] == [] for p in results["fits"]["eta"]["scan"])


def test_an_average_reports_convergence_of_its_contributing_fits(heron):
    directory, _, _, results = heron
    binned, fits = _scan(directory, results["ensemble"]["bin_size"])
    failed = SimpleNamespace(**{**vars(fits[0]), "converged": False})
    result = summarise_scan([failed] + list(fits[1:]), name="kaon")
    assert result.chosen.method == "average" and result.chosen.n_excluded == 1
    assert result.scan[0].weight == 0.0
    assert result.chosen.converged is True        # every point with weight > 0 converged
    found = {w.code for w in collect_warnings(_results_of(result))}
    # one point of many left out is the average working: no warning, a log line
    assert "points-excluded" not in found and "chosen-not-converged" not in found
    log = RunLog()
    _log_fit(log, result)
    assert any("1 of" in line and "given weight 0 (not converged 1)" in line
               for line in log.lines)
    # choosing the failed point: a single result that did not converge, and says so
    single = summarise_scan([failed] + list(fits[1:]), name="kaon", choose=(6, 12))
    assert single.chosen.method == "single" and single.chosen.converged is False
    found = {w.code for w in collect_warnings(_results_of(single))}
    assert {"chosen-not-converged", "points-not-converged"} <= found


def test_summarise_scan_refuses_a_choice_outside_the_scan(heron):
    directory, _, _, results = heron
    _, fits = _scan(directory, results["ensemble"]["bin_size"])
    with pytest.raises(FitError) as err:
        summarise_scan(fits, choose=(5, 12))
    assert err.value.where == "choose"
