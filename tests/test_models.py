"""Tests of the correlator models: parameter names, formula checking."""

from __future__ import annotations

import pytest

from plateaufit.fit.models import check_formula, reported_parameter_names


def test_names_plain_order():
    names = reported_parameter_names(["pion", "rho"], 2, oscillating=1, constant=True)
    assert names == ["E0", "E1", "A0.pion", "A0.rho", "A1.pion", "A1.rho",
                     "Eosc0", "Aosc0.pion", "Aosc0.rho", "c.pion", "c.rho"]


def test_names_factorised_distinct_operators():
    ops = {"ll": ("l", "l"), "ls": ("l", "s"), "ss": ("s", "s")}
    names = reported_parameter_names(["ll", "ls", "ss"], 2, operators=ops)
    assert names == ["E0", "E1", "Z0.l", "Z0.s", "Z1.l", "Z1.s"]


def test_names_bad_input():
    with pytest.raises(ValueError, match="states"):
        reported_parameter_names(["a"], 0)
    with pytest.raises(ValueError, match="operators"):
        reported_parameter_names(["a", "b"], 1, operators={"a": ("x", "x")})


def test_formula_accepts_arithmetic():
    text = "a * exp(-m * t) + a * exp(-m * (T - t)) + where(t > 3, c, 0) + pi"
    tree = check_formula(text, ["a", "m", "c"])
    # the accepted expression keeps its meaning: evaluated with numpy it is the formula
    t = np.arange(6.0)
    got = eval(compile(tree, "<formula>", "eval"),
               {"__builtins__": {}, "exp": np.exp, "where": np.where, "pi": np.pi},
               {"a": 2.0, "m": 0.5, "c": 0.1, "t": t, "T": 12})
    want = 2.0 * (np.exp(-0.5 * t) + np.exp(-0.5 * (12 - t))) + np.where(t > 3, 0.1, 0) + np.pi
    np.testing.assert_allclose(got, want, rtol=1e-15)
    # a plateau (constant) fit is a legitimate formula
    assert eval(compile(check_formula("a", ["a"]), "<formula>", "eval"), {}, {"a": 3.0}) == 3.0


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


# ---------------------------------------------------------------------------
# models
# ---------------------------------------------------------------------------
import numpy as np  # noqa: E402

from plateaufit.errors import FitError  # noqa: E402
from plateaufit.fit.models import CorrelatorModel, make_model  # noqa: E402

T = 24


def _two_obs_ranges():
    return {"pion": np.arange(3, 9), "kaon": np.arange(4, 11)}


@pytest.mark.parametrize("form", ["exp", "cosh", "sinh"])
def test_predict_matches_written_out_sum(form):
    tr = _two_obs_ranges()
    m = make_model(form, 2, ["pion", "kaon"], tr, T, oscillating=1, constant=True)
    phys = {"E0": 0.3, "E1": 0.8, "A0.pion": 2.0, "A0.kaon": 1.5, "A1.pion": -0.4,
            "A1.kaon": 0.7, "Eosc0": 0.6, "Aosc0.pion": 0.05, "Aosc0.kaon": -0.02,
            "c.pion": 1e-3, "c.kaon": 2e-3}
    theta = m.from_reported(np.array([phys[n] for n in m.reported_names]))

    def g(e, t):
        if form == "exp":
            return np.exp(-e * t)
        s = 1.0 if form == "cosh" else -1.0
        return np.exp(-e * t) + s * np.exp(-e * (T - t))

    expect = []
    for obs in ["pion", "kaon"]:
        t = tr[obs]
        expect.append(phys[f"A0.{obs}"] * g(0.3, t) + phys[f"A1.{obs}"] * g(0.8, t)
                      + (-1.0) ** t * phys[f"Aosc0.{obs}"] * g(0.6, t) + phys[f"c.{obs}"])
    np.testing.assert_allclose(m.predict(theta), np.concatenate(expect), rtol=1e-13)
    assert m.n_points == 13 and isinstance(m, CorrelatorModel)


def test_factorised_amplitudes_are_products():
    ops = {"ll": ("l", "l"), "ls": ("l", "s"), "ss": ("s", "s")}
    tr = {k: np.arange(2, 7) for k in ops}
    m = make_model("exp", 1, list(ops), tr, T, operators=ops)
    assert m.reported_names == ("E0", "Z0.l", "Z0.s")
    theta = np.array([0.5, 1.5, -0.5])
    y = m.predict(theta).reshape(3, 5)
    e = np.exp(-0.5 * np.arange(2, 7))
    np.testing.assert_allclose(y, [1.5 * 1.5 * e, 1.5 * -0.5 * e, 0.25 * e], rtol=1e-13)


def test_internal_energies_are_log_gaps_and_roundtrip():
    m = make_model("cosh", 3, ["a"], {"a": np.arange(2, 10)}, T)
    phys = np.array([0.2, 0.5, 1.4, 1.0, 0.3, 0.1])
    theta = m.from_reported(phys)
    np.testing.assert_allclose(theta[:3], [0.2, np.log(0.3), np.log(0.9)], rtol=1e-14)
    np.testing.assert_allclose(m.to_reported(theta), phys, rtol=1e-14)
    with pytest.raises(ValueError, match="increasing"):
        m.from_reported(np.array([0.5, 0.4, 1.4, 1.0, 0.3, 0.1]))


@pytest.mark.parametrize("form", ["exp", "sinh"])
def test_batched_evaluation_equals_loop(form):
    rng = np.random.default_rng(7)
    ops = {"a": ("x", "x"), "b": ("x", "y")}
    m = make_model(form, 2, ["a", "b"], {"a": np.arange(1, 6), "b": np.arange(2, 9)}, T,
                   oscillating=1, constant=True, operators=ops)
    theta = rng.normal(scale=0.3, size=(3, 4, m.n_params))
    pred, jac, phys = m.predict(theta), m.jacobian(theta), m.reported_jacobian(theta)
    assert pred.shape == (3, 4, m.n_points) and jac.shape == (3, 4, m.n_points, m.n_params)
    for i in range(3):
        for j in range(4):
            np.testing.assert_allclose(pred[i, j], m.predict(theta[i, j]), rtol=1e-14)
            np.testing.assert_allclose(jac[i, j], m.jacobian(theta[i, j]), rtol=1e-14)
            np.testing.assert_allclose(phys[i, j], m.reported_jacobian(theta[i, j]))


def test_formula_model_evaluates_expression():
    m = make_model("formula", 1, ["a", "b"], {"a": np.arange(2, 6), "b": np.arange(3, 5)}, T,
                   formula={"expression": "amp * (exp(-m * t) + exp(-m * (T - t)))",
                            "params": {"amp": 1.0, "m": 0.5}})
    assert not m.has_analytic_jacobian and m.reported_names == ("amp", "m")
    t = np.array([2, 3, 4, 5, 3, 4.0])
    np.testing.assert_allclose(m.predict([2.0, 0.4]),
                               2.0 * (np.exp(-0.4 * t) + np.exp(-0.4 * (T - t))), rtol=1e-14)
    assert m.predict(np.ones((5, 2))).shape == (5, 6)
    const = make_model("formula", 1, ["a"], {"a": np.arange(4)}, T,
                       formula={"expression": "c", "params": {"c": 0.0}})
    np.testing.assert_allclose(const.predict([0.7]), np.full(4, 0.7))
    np.testing.assert_allclose(const.jacobian([0.7]), np.ones((4, 1)), rtol=1e-8)


def test_make_model_errors_name_the_key():
    tr = {"a": np.arange(2, 6)}
    with pytest.raises(FitError, match="unknown model") as err:
        make_model("expo", 1, ["a"], tr, T)
    assert err.value.where == "model"
    with pytest.raises(FitError) as err:
        make_model("exp", 0, ["a"], tr, T)
    assert err.value.where == "states"
    with pytest.raises(FitError) as err:
        make_model("formula", 1, ["a"], tr, T,
                   formula={"expression": "a.__class__", "params": {"a": 1}})
    assert err.value.where == "formula.expression" and "Attribute" in err.value.message
    with pytest.raises(FitError, match="empty"):
        make_model("exp", 1, ["a"], {"a": np.arange(0)}, T)
    with pytest.raises(FitError, match="source and sink"):
        make_model("exp", 1, ["a"], tr, T, operators={"b": ("x", "y")})


def test_formula_numbers_are_numpy_floats():
    # a huge integer power must not hang the evaluation, a division by zero not raise
    for expr, check in [("a * t + 9 ** 9 ** 9", np.isposinf), ("a * t + 1 / 0", np.isposinf),
                        ("a * t % 0", np.isnan)]:
        m = make_model("formula", 1, ["x"], {"x": np.arange(3)}, T,
                       formula={"expression": expr, "params": {"a": 1.0}})
        assert np.all(check(m.predict(np.array([1.0]))))


@pytest.mark.parametrize("form", ["exp", "cosh", "sinh"])
@pytest.mark.parametrize("extras", [
    {},
    {"oscillating": 2, "constant": True},
    {"oscillating": 1, "operators": {"a": ("x", "x"), "b": ("x", "y")}},
])
def test_predict_and_jacobian_in_one_pass_equal_the_two_calls(form, extras):
    rng = np.random.default_rng(8)
    m = make_model(form, 3, ["a", "b"], {"a": np.arange(1, 7), "b": np.arange(2, 12)}, T,
                   **extras)
    theta = rng.normal(scale=0.3, size=(5, 2, m.n_params))
    theta[..., 0] = 0.4
    f, jac = m.predict_and_jacobian(theta)
    np.testing.assert_array_equal(f, m.predict(theta))
    np.testing.assert_array_equal(jac, m.jacobian(theta))
    f1, jac1 = m.predict_and_jacobian(theta[3, 1])          # a single point
    np.testing.assert_allclose(f1, f[3, 1], rtol=1e-14)
    np.testing.assert_allclose(jac1, jac[3, 1], rtol=1e-14)
    assert jac1.shape == (m.n_points, m.n_params)


def test_a_formula_model_answers_predict_and_jacobian_with_its_own_methods():
    m = make_model("formula", 1, ["a"], {"a": np.arange(2, 6)}, T,
                   formula={"expression": "amp * exp(-m * t)", "params": {"amp": 1.0, "m": 0.5}})
    theta = np.array([[2.0, 0.4], [1.0, 0.3]])
    f, jac = m.predict_and_jacobian(theta)
    np.testing.assert_array_equal(f, m.predict(theta))
    np.testing.assert_array_equal(jac, m.jacobian(theta))


@pytest.mark.parametrize("form", ["cosh", "sinh"])
def test_backward_exponential_of_large_energies_is_computed_directly(form):
    # exp(-E (T - t)) is formed as exp(-E T) / exp(-E t) only while |E| T < 700;
    # beyond, exp(-E t) may underflow and the quotient would be 0/0. Rows of
    # large |E| must give the written-out values, and every row the same
    # value whatever batch it is evaluated in.
    T48 = 48
    t = np.arange(0, 25)
    m = make_model(form, 1, ["a"], {"a": t}, T48)
    theta = np.array([[0.3, 1.5], [20.0, 1.5], [-14.6, 1.5], [14.0, 1.5], [-12.0, 1.5]])
    s = 1.0 if form == "cosh" else -1.0
    expect = np.array([a * (np.exp(-e * t) + s * np.exp(-e * (T48 - t))) for e, a in theta])
    f, jac = m.predict_and_jacobian(theta)
    assert np.all(np.isfinite(f)) and np.all(np.isfinite(jac))
    np.testing.assert_allclose(f, expect, rtol=1e-13)
    dexpect = np.array([a * (-t * np.exp(-e * t) - s * (T48 - t) * np.exp(-e * (T48 - t)))
                        for e, a in theta])
    np.testing.assert_allclose(jac[:, :, 0], dexpect, rtol=1e-13)
    for i in range(theta.shape[0]):
        np.testing.assert_array_equal(m.predict(theta[i]), f[i])
