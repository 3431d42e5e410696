"""value(error) formatting, the scan CSV, the LaTeX results table and write_tables."""

from __future__ import annotations

import csv
import io
import math
import re
from decimal import Decimal

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from plateaufit.report.tables import (
    file_stem,
    format_value_error,
    format_value_errors,
    latex_escape,
    latex_results_table,
    scan_table_csv,
    write_tables,
)
from pipeline_results import make_results

# value(error) with the error rounded to two significant digits (common practice);
# the conventions for errors >= 1, scientific notation and special values are the
# ones documented in plateaufit.report.tables.
EXAMPLES = [
    (0.24531, 0.00183, "0.2453(18)"),
    (1.2345, 0.1123, "1.23(11)"),
    (-0.2453, 0.0018, "-0.2453(18)"),
    (0.5, 0.05, "0.500(50)"),
    # the error rounds up to the next decade: two digits again, one place left
    (1.2345, 0.0995, "1.23(10)"),
    (0.4, 0.00996, "0.400(10)"),
    # the value rounds across a power of ten
    (0.99996, 0.0012, "1.0000(12)"),
    (0.99996, 0.00005, "0.999960(50)"),
    (9.99996, 0.0012, "10.0000(12)"),
    # errors of 1 or more while the value has decimals: the error keeps its point
    (12.345, 1.123, "12.3(1.1)"),
    (130.24, 1.23, "130.2(1.2)"),
    # errors of 10 or more: no decimals, the error in full
    (12.345, 9.96, "12(10)"),
    (1234.5, 112.0, "1230(110)"),
    (3.0, 250.0, "0(250)"),
    # a value much smaller than its error; no negative zero
    (0.001, 0.5, "0.00(50)"),
    (-0.001, 0.5, "0.00(50)"),
    # scientific notation below 1e-3 and from 1e5, exponent chosen after rounding
    (1.2341e-05, 5.6e-07, "1.234(56)e-05"),
    (0.00012345, 0.0000123, "1.23(12)e-04"),
    (0.0012345, 0.0000123, "0.001235(12)"),
    (9.99996e-05, 1.2e-07, "1.0000(12)e-04"),
    (-3.0e7, 2.2e5, "-3.000(22)e+07"),
    (123456.0, 12.0, "1.23456(12)e+05"),
    (1.5e6, 2.3e6, "1.5(2.3)e+06"),
    (0.0, 1.2e6, "0.0(1.2)e+06"),
    # half-up rounding on the decimal the float prints as
    (0.12345, 0.00125, "0.1235(13)"),
    # special values
    (0.2453, 0.0, "0.2453(0)"),
    (0.2453, math.nan, "0.2453(nan)"),
    (0.2453, math.inf, "0.2453(inf)"),
    (math.nan, 0.1, "nan"),
    (math.inf, 0.1, "inf"),
    (-math.inf, 1.0, "-inf"),
]


@pytest.mark.parametrize(("value", "error", "expected"), EXAMPLES)
def test_format_value_error_examples(value: float, error: float, expected: str) -> None:
    assert format_value_error(value, error) == expected


@pytest.mark.parametrize(("value", "error", "digits", "expected"), [
    (0.24531, 0.00183, 1, "0.245(2)"),
    (0.24531, 0.00183, 3, "0.24531(183)"),
    (12.345, 1.123, 3, "12.35(1.12)"),
    (0.2, 0.0096, 1, "0.20(1)"),
])
def test_format_value_error_digits(value: float, error: float, digits: int, expected: str) -> None:
    assert format_value_error(value, error, digits=digits) == expected


def test_several_errors_share_the_largest_errors_place() -> None:
    assert format_value_errors(0.24531, [0.00183, 0.00071]) == "0.2453(18)(7)"
    assert format_value_errors(0.24531, [0.00071, 0.00183]) == "0.2453(7)(18)"
    assert format_value_errors(12.345, [1.1, 0.05]) == "12.3(1.1)(1)"
    assert format_value_errors(0.2453, [0.0018, 0.0]) == "0.2453(18)(0)"
    assert format_value_errors(1.2341e-05, [5.6e-07, 2.1e-07]) == "1.234(56)(21)e-05"


def test_bad_arguments_raise() -> None:
    with pytest.raises(ValueError, match="non-negative"):
        format_value_error(1.0, -0.1)
    with pytest.raises(ValueError, match="digits"):
        format_value_error(1.0, 0.1, digits=0)
    with pytest.raises(ValueError, match="at least one"):
        format_value_errors(1.0, [])


_PARSE = re.compile(r"^(-?\d+(?:\.(\d+))?)\((\d+(?:\.\d+)?)\)(?:e([+-]\d+))?$")


def _parse(text: str) -> tuple[Decimal, Decimal, Decimal]:
    """value, error and the unit of the last digit shown, from value(error)[eX]."""
    m = _PARSE.match(text)
    assert m, text
    value = Decimal(m.group(1))
    decimals = len(m.group(2) or "")
    err_text = m.group(3)
    if "." in err_text:
        error = Decimal(err_text)
        unit = Decimal(1).scaleb(-decimals)
    elif decimals:
        unit = Decimal(1).scaleb(-decimals)
        error = int(err_text) * unit
    else:  # no decimals: the error is written in full, its two leading digits kept
        error = Decimal(err_text)
        unit = Decimal(1).scaleb(len(err_text) - 2)
    scale = Decimal(1).scaleb(int(m.group(4) or 0))
    return value * scale, error * scale, unit * scale


@settings(max_examples=300, deadline=None)
@given(st.floats(-1e9, 1e9, allow_nan=False), st.floats(1e-12, 1e9))
def test_round_trip_keeps_two_digits_and_rounds_to_the_last_digit(value: float,
                                                                  error: float) -> None:
    text = format_value_error(value, error)
    v, e, unit = _parse(text)
    # the error keeps two significant digits at the place of the value's last digit
    assert Decimal(10) <= e / unit <= Decimal(99), text
    # both are rounded to that place (half a unit at most)
    assert abs(v - Decimal(repr(value))) <= unit / 2, text
    assert abs(e - Decimal(repr(error))) <= unit / 2, text


# --------------------------------------------------------------------- scan CSV

def test_scan_csv_has_every_point_and_column() -> None:
    results = make_results()
    fit = results["fits"]["pion"]
    rows = list(csv.reader(io.StringIO(scan_table_csv(fit))))
    header, body = rows[0], rows[1:]
    assert header[:12] == ["tmin", "tmax", "model", "states", "chi2", "dof", "chi2_dof",
                           "p_value", "p_value_hotelling", "aic", "weight", "converged"]
    assert header[12:16] == ["E0", "E0_error", "E1", "E1_error"]
    assert {"A0.pion_ll", "A0.pion_ll_error", "A1.pion_ls", "A1.pion_ls_error"} <= set(header)
    assert len(body) == len(fit["scan"]) == 42
    col = {name: i for i, name in enumerate(header)}
    for row, point in zip(body, fit["scan"]):
        assert int(row[col["tmin"]]) == point["tmin"]
        assert int(row[col["states"]]) == point["states"]
        assert float(row[col["chi2"]]) == point["chi2"]          # full precision
        assert float(row[col["chi2_dof"]]) == pytest.approx(point["chi2"] / point["dof"])
        assert float(row[col["weight"]]) == point["weight"]
        assert row[col["converged"]] == ("true" if point["converged"] else "false")
        assert float(row[col["E0"]]) == point["params"]["E0"]["value"]
        assert float(row[col["E0_error"]]) == point["params"]["E0"]["error"]
        if point["states"] == 1:
            assert row[col["E1"]] == "" and row[col["E1_error"]] == ""
    assert sum(r[col["converged"]] == "false" for r in body) == 1


def test_scan_csv_leaves_missing_numbers_empty() -> None:
    fit = {"scan": [{"tmin": 3, "tmax": 9, "model": "exp", "states": 1, "chi2": 4.0, "dof": 0,
                     "p_value": None, "aic": 10.0, "weight": 1.0, "converged": True,
                     "params": {"E0": {"value": 0.5, "error": None}}}]}
    header, row = list(csv.reader(io.StringIO(scan_table_csv(fit))))
    col = {name: i for i, name in enumerate(header)}
    assert row[col["chi2_dof"]] == ""         # dof 0: no chi2/dof
    assert row[col["p_value"]] == "" and row[col["p_value_hotelling"]] == ""
    assert row[col["E0_error"]] == ""


# --------------------------------------------------------------------- LaTeX

@pytest.mark.parametrize(("text", "expected"), [
    ("pion_ll", r"pion\_ll"),
    ("50% & more", r"50\% \& more"),
    ("x^2~y", r"x\textasciicircum{}2\textasciitilde{}y"),
    ("a\\b", r"a\textbackslash{}b"),
    ("{$#}", r"\{\$\#\}"),
    ("<b>", r"\textless{}b\textgreater{}"),
])
def test_latex_escape(text: str, expected: str) -> None:
    assert latex_escape(text) == expected


def test_latex_table_holds_the_chosen_values() -> None:
    results = make_results()
    tex = latex_results_table(results)
    assert tex.count(r"\toprule") == 1 and tex.count(r"\bottomrule") == 1
    assert r"\begin{tabular}" in tex and r"\end{tabular}" in tex
    assert "booktabs" in tex
    for fit_name, fit in results["fits"].items():
        for pname, entry in fit["chosen"]["params"].items():
            both = format_value_errors(entry["value"], [entry["stat_error"], entry["sys_error"]])
            total = format_value_error(entry["value"], entry["error"])
            line = next(ln for ln in tex.splitlines() if f"& {latex_escape(pname)} &" in ln
                        and (both in ln))
            assert total in line
    # the pion E0 row names the fit, the method and the averaged ranges
    e0 = next(ln for ln in tex.splitlines() if ln.startswith("pion & E0 &"))
    used = [p["tmin"] for p in results["fits"]["pion"]["scan"]
            if p["converged"] and p["weight"] > 0]
    assert "average" in e0 and f"tmin {min(used)}-{max(used)}" in e0
    kaon = next(ln for ln in tex.splitlines() if ln.startswith("kaon & E0 &"))
    assert "single" in kaon and "[6, 20], 2 states" in kaon
    # every row has six cells
    for ln in tex.splitlines():
        if ln.endswith(r"\\"):
            assert ln.count(" & ") == 5, ln


def test_latex_table_escapes_names_and_typesets_exponents() -> None:
    results = make_results(hostile=True)
    tex = latex_results_table(results)
    assert "<script>" not in tex and "<b>" not in tex
    assert r"\textless{}script\textgreater{}" in tex
    assert r"kaon \& \textless{}b\textgreater{}co" in tex
    tiny = {"fits": {"w_1": {"chosen": {"method": "single", "tmin": 3, "tmax": 8, "states": 1,
                                        "params": {"E0": {"value": -1.2341e-5, "error": 5.6e-7,
                                                          "stat_error": 5.6e-7,
                                                          "sys_error": 0.0}}}}}}
    tex = latex_results_table(tiny)
    assert r"$-1.234(56)(0)\times 10^{-5}$" in tex
    assert r"$-1.234(56)\times 10^{-5}$" in tex
    assert r"w\_1" in tex


# --------------------------------------------------------------------- files

def test_write_tables_writes_csv_per_fit_and_tex(tmp_path) -> None:
    results = make_results(hostile=True)
    paths = write_tables(results, tmp_path)
    names = sorted(p.name for p in paths)
    assert names == sorted(["scan_pion.csv", f"scan_{file_stem('kaon & <b>co</b>')}.csv",
                            "results.tex"])
    for p in paths:
        assert p.is_file() and p.stat().st_size > 0
    assert (tmp_path / "scan_pion.csv").read_text() == scan_table_csv(results["fits"]["pion"])
    assert not list(tmp_path.glob(".*.tmp"))   # atomic writes leave no temporary files


def test_write_tables_keeps_clashing_fit_names_apart(tmp_path) -> None:
    fit = make_results()["fits"]["kaon"]
    paths = write_tables({"fits": {"a b": fit, "a_b": fit}}, tmp_path)
    assert [p.name for p in paths] == ["scan_a_b.csv", "scan_a_b-2.csv", "results.tex"]
