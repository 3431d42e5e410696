"""Checks of the fitting core against sources outside the project.

Each assertion names its source: scipy (curve_fit, least_squares, chi2, f),
statsmodels (GLS), exact results (finite differences, noiseless data) or a
published formula.
"""

from __future__ import annotations

import numpy as np
import pytest

from plateaufit.fit.models import make_model

T = 32


def _finite_difference_jacobian(model, theta, h=1e-6):
    jac = np.zeros((model.n_points, model.n_params))
    for k in range(model.n_params):
        step = np.zeros(model.n_params)
        step[k] = h
        jac[:, k] = (model.predict(theta + step) - model.predict(theta - step)) / (2 * h)
    return jac


@pytest.mark.parametrize("form", ["exp", "cosh", "sinh"])
@pytest.mark.parametrize("extras", [
    {},
    {"oscillating": 2, "constant": True},
    {"oscillating": 1, "factorised": {"a": ("x", "x"), "b": ("x", "y"), "c": ("y", "y")}},
])
def test_analytic_jacobian_equals_finite_differences(form, extras):
    # exact: central finite differences, error O(h^2) ~ 1e-12 relative
    rng = np.random.default_rng(11)
    tr = {"a": np.arange(3, 10), "b": np.arange(2, 8), "c": np.arange(4, 14)}
    model = make_model(form, 3, ["a", "b", "c"], tr, T, **extras)
    theta = rng.normal(scale=0.3, size=model.n_params)
    theta[0] = 0.4
    jac = model.jacobian(theta)
    np.testing.assert_allclose(jac, _finite_difference_jacobian(model, theta),
                               atol=1e-8 * np.abs(jac).max())


@pytest.mark.parametrize("form", ["cosh", "exp"])
def test_physical_jacobian_equals_finite_differences(form):
    # exact: central finite differences of to_physical
    rng = np.random.default_rng(12)
    model = make_model(form, 3, ["a"], {"a": np.arange(2, 9)}, T, oscillating=2)
    theta = rng.normal(scale=0.5, size=model.n_params)
    num = np.zeros((model.n_params, model.n_params))
    for k in range(model.n_params):
        step = np.zeros(model.n_params)
        step[k] = 1e-6
        num[:, k] = (model.to_physical(theta + step) - model.to_physical(theta - step)) / 2e-6
    np.testing.assert_allclose(model.physical_jacobian(theta), num, atol=1e-8)


def test_formula_numerical_jacobian_equals_analytic_derivative():
    # exact: d/dm [a exp(-m t)] = -t a exp(-m t), d/da = exp(-m t)
    model = make_model("formula", 1, ["a"], {"a": np.arange(1, 12)}, T,
                       formula={"expression": "a * exp(-m * t)", "params": {"a": 1, "m": 1}})
    a, m = 1.7, 0.35
    t = np.arange(1, 12)
    expect = np.stack([np.exp(-m * t), -t * a * np.exp(-m * t)], axis=-1)
    np.testing.assert_allclose(model.jacobian([a, m]), expect, rtol=1e-8)
