"""Tests of the correlator models: parameter names, formula checking."""

from __future__ import annotations

import pytest

from plateaufit.fit.models import check_formula, physical_parameter_names


def test_names_plain_order():
    names = physical_parameter_names(["pion", "rho"], 2, oscillating=1, constant=True)
    assert names == ["E0", "E1", "A0.pion", "A0.rho", "A1.pion", "A1.rho",
                     "Eosc0", "Aosc0.pion", "Aosc0.rho", "c.pion", "c.rho"]


def test_names_factorised_distinct_operators():
    ops = {"ll": ("l", "l"), "ls": ("l", "s"), "ss": ("s", "s")}
    names = physical_parameter_names(["ll", "ls", "ss"], 2, operators=ops)
    assert names == ["E0", "E1", "Z0.l", "Z0.s", "Z1.l", "Z1.s"]


def test_names_bad_input():
    with pytest.raises(ValueError, match="states"):
        physical_parameter_names(["a"], 0)
    with pytest.raises(ValueError, match="operators"):
        physical_parameter_names(["a", "b"], 1, operators={"a": ("x", "x")})


def test_formula_accepts_arithmetic():
    check_formula("a * exp(-m * t) + a * exp(-m * (T - t)) + where(t > 3, c, 0) + pi",
                  ["a", "m", "c"])
    check_formula("a", ["a"])   # a plateau (constant) fit is a legitimate formula


@pytest.mark.parametrize("expr, match", [
    ("__import__('os').system('ls')", "not allowed"),
    ("a.real * t", "Attribute"),
    ("t[0] * a", "Subscript"),
    ("(lambda x: x)(t)", "computed expression"),
    ("exp(-m * t, 2)", "argument"),
    ("exp(x=t)", "keyword"),
    ("'x' * t", "constant"),
    ("b * exp(-m * t)", "unknown name 'b'"),
    ("a * exp(-m * t", "not a valid expression"),
    ("open('f')", "'open'"),
    ("a if t else m", "IfExp"),
    ("[a for a in t]", "ListComp"),
    ("exp * t", "must be called"),
    ("", "empty"),
])
def test_formula_refuses(expr, match):
    with pytest.raises(ValueError, match=match):
        check_formula(expr, ["a", "m"])


def test_formula_refuses_reserved_param_names():
    with pytest.raises(ValueError, match="reserved"):
        check_formula("t * exp(-t)", ["exp"])
    with pytest.raises(ValueError, match="identifier"):
        check_formula("a * t", ["a.b"])
