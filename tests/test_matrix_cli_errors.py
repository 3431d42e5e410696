"""Bad correlator-matrix input through the command line: exit 2, the key named, nothing written.

Each case starts from the invented 3 x 3 axial matrix (tests/matrix_cases.py:
known truth, fixed seed) and breaks one thing; ``plateaufit fit`` and
``plateaufit check`` must stop with status 2 and one line naming the spec key
and what to do, before any output exists.
"""

from __future__ import annotations

import copy
from pathlib import Path

import numpy as np
import pytest

from matrix_cases import LEVEL_FITS, matrix_spec, write_matrix_data, write_spec
from plateaufit.cli import main

ERROR = "plateaufit: error:"


@pytest.fixture(scope="module")
def data_file(tmp_path_factory) -> Path:
    return write_matrix_data(tmp_path_factory.mktemp("matrix_data"))


def _grid(spec: dict, grid: list) -> None:
    spec["matrices"]["axial"]["grid"] = grid


def _non_square(spec):
    _grid(spec, [["axial_LL", "axial_LS", "axial_LW"], ["axial_SL", "axial_SS", "axial_SW"]])


def _ragged(spec):
    _grid(spec, [["axial_LL", "axial_LS"], ["axial_SL"]])


def _unknown(spec):
    spec["matrices"]["axial"]["grid"][1][2] = "axial_SX"


def _mixed_boundary(spec):
    spec["observables"]["axial_WW"]["boundary"] = "antiperiodic"


def _mixed_folding(spec):
    spec["observables"]["axial_LS"]["fold"] = False


def _level_too_high(spec):
    spec["fits"][2]["level"] = 3


def _t0_at_tmin(spec):
    spec["matrices"]["axial"]["t0"] = 3       # the fits start at tmin = 3


def _half_t0_at_tmin(spec):
    spec["matrices"]["axial"]["t0"] = "half"  # axial_0: t0 = ceil(18 / 2) = 9 > tmin 3


def _observables_too(spec):
    spec["fits"][0]["observables"] = ["axial_LL"]


def _unknown_matrix(spec):
    spec["fits"][1]["matrix"] = "axail"


def _no_level(spec):
    del spec["fits"][1]["level"]


def _level_without_matrix(spec):
    del spec["fits"][1]["matrix"]


def _formula(spec):
    spec["fits"][0].update(model="formula", states=1, priors={},
                           formula={"expression": "A*exp(-E*t)", "params": {"A": 1, "E": 0.4}})


def _t0_beyond_data(spec):
    spec["matrices"]["axial"]["t0"] = 24      # folded: t = 0..24, levels named at t0 + 1


def _single_operator(spec):
    _grid(spec, [["axial_LL"]])


def _bad_labels(spec):
    spec["matrices"]["axial"]["operators"] = ["L", "S"]


CASES = [
    (_non_square, "matrices.axial.grid", "not square"),
    (_ragged, "matrices.axial.grid", "not square"),
    (_unknown, "matrices.axial.grid[1][2]", "unknown observable 'axial_SX'"),
    (_mixed_boundary, "matrices.axial.grid", "mixed boundaries"),
    (_mixed_folding, "matrices.axial.grid", "mixed folding"),
    (_level_too_high, "fits[2].level", "levels 0..2"),
    (_t0_at_tmin, "fits[0].tmin", "tmin >= 4"),
    (_half_t0_at_tmin, "fits[0].tmin", "t0 = ceil(max tmax / 2) = 9"),
    (_observables_too, "fits[0].observables", "takes no observables"),
    (_unknown_matrix, "fits[1].matrix", "did you mean 'axial'"),
    (_no_level, "fits[1].level", "add level: n"),
    (_level_without_matrix, "fits[1].level", "add matrix: NAME"),
    (_formula, "fits[0].model", "exp, cosh or sinh"),
    (_t0_beyond_data, "matrices.axial.t0", "choose t0 <= 23"),
    (_single_operator, "matrices.axial.grid", "at least two operators"),
    (_bad_labels, "matrices.axial.operators", "one per row"),
]


def _run(argv: list[str], capsys) -> tuple[int, str]:
    code = main(argv)
    captured = capsys.readouterr()
    return code, captured.err


def _assert_refused(code: int, err: str, where: str, needle: str, out: Path) -> None:
    # the run's progress lines may come first (fit echoes its log); one error line, last
    lines = err.strip().splitlines()
    errors = [line for line in lines if line.startswith(ERROR)]
    assert code == 2
    assert errors == [lines[-1]] and lines[-1].startswith(f"{ERROR} {where}: "), err
    assert needle in lines[-1], lines[-1]
    assert "Traceback" not in err
    assert not out.exists() or not any(out.iterdir()), "output written despite the error"


@pytest.mark.parametrize("change, where, needle", CASES, ids=[c[0].__name__ for c in CASES])
def test_fit_refuses_bad_matrix_input(tmp_path, data_file, capsys, change, where, needle):
    spec = matrix_spec(data_file)
    change(spec)
    spec_path = write_spec(tmp_path, spec)
    out = tmp_path / "out"
    code, err = _run(["fit", str(spec_path), "--out", str(out), "--jobs", "1", "--quiet"],
                     capsys)
    _assert_refused(code, err, where, needle, out)


@pytest.mark.parametrize("change, where, needle", CASES[:4], ids=[c[0].__name__ for c in CASES[:4]])
def test_check_refuses_them_too(tmp_path, data_file, capsys, change, where, needle):
    spec = matrix_spec(data_file)
    change(spec)
    code, err = _run(["check", str(write_spec(tmp_path, spec))], capsys)
    assert code == 2 and f"{ERROR} {where}: " in err and needle in err


def _not_positive_definite(directory: Path) -> Path:
    """A 2 x 2 grid whose off-diagonal entry is twice the diagonal: C(t0) has the
    eigenvalues C_LL (1 +- 2), one negative, in the central matrix and every sample."""
    values_file = write_matrix_data(directory)
    archive = dict(np.load(values_file))
    archive["LS"] = 2.0 * archive["LL"]
    archive["SL"] = 2.0 * archive["LL"]
    archive["SS"] = archive["LL"].copy()
    np.savez(values_file, **archive)
    spec = matrix_spec(values_file, fits=[dict(LEVEL_FITS[0], tmin=[3, 5])])
    spec["matrices"]["axial"].update(grid=[["axial_LL", "axial_LS"], ["axial_SL", "axial_SS"]],
                                     operators=["L", "S"])
    return write_spec(directory, spec)


def test_a_c_t0_that_is_not_positive_definite_names_the_matrix_and_t0(tmp_path, capsys):
    spec_path = _not_positive_definite(tmp_path)
    out = tmp_path / "out"
    code, err = _run(["fit", str(spec_path), "--out", str(out), "--jobs", "1", "--quiet"],
                     capsys)
    _assert_refused(code, err, "matrices.axial.t0", "matrix axial (t0 = 2)", out)
    assert "not positive definite" in err
    assert "smaller operator basis" in err and "smaller t0" in err
    code, err = _run(["check", str(spec_path)], capsys)
    assert code == 2 and "matrices.axial.t0: matrix axial (t0 = 2)" in err


def test_half_t0_names_the_fit_whose_t0_fails(tmp_path, capsys):
    spec_path = _not_positive_definite(tmp_path)
    spec = __import__("yaml").safe_load(spec_path.read_text())
    spec["matrices"]["axial"]["t0"] = "half"
    spec["fits"][0].update(tmin=[10, 12], tmax=[16, 18, 2])
    out = tmp_path / "out"
    code, err = _run(["fit", str(write_spec(tmp_path, spec)), "--out", str(out), "--jobs", "1",
                      "--quiet"], capsys)
    _assert_refused(code, err, "matrices.axial.t0",
                    "t0: half gives t0 = 9 for fit axial_0", out)


def test_the_unchanged_spec_runs(tmp_path, data_file, capsys):
    # the cases above fail for their one change, not for the base spec
    spec = copy.deepcopy(matrix_spec(data_file, fits=[LEVEL_FITS[1]]))
    out = tmp_path / "out"
    code, err = _run(["fit", str(write_spec(tmp_path, spec)), "--out", str(out), "--jobs", "1",
                      "--quiet", "--no-plots"], capsys)
    assert code == 0, err
    assert (out / "results.json").is_file()
