"""Derivative trees for the slope bound, checked against central differences, and the bound in the kernels."""

from __future__ import annotations

import pathlib

import numpy as np
import pytest

from tests._documents import GROWTH, random_values
from tests._documents import grid_document as document
from worker import _slopes, expressions
from worker.document import parse_document
from worker.gridmodel import compile_grid


def _expression(text: str) -> expressions.Expression:
    return expressions.parse(text, path="test")


def _derivative_values(text: str, x: np.ndarray, env: dict[str, float]) -> np.ndarray:
    tree = _slopes.derivative(_expression(text).tree, "x", {})
    return np.broadcast_to(expressions.evaluate(expressions.Expression.from_tree(tree), {**env, "x": x}), x.shape)


SMOOTH = [
    "x**2 - 3 * x + 1",
    "a * x**3 / (1 + x)",
    "(2 - x)**(1 - a) / (1 - a)",
    "log(2 + x) * exp(-x / 3)",
    "sqrt(1 + x * x) - x / (x + 3)",
    "x**a",
    "a**x",
    "x**x",
    "-(x - 1)**2 + 4 / x",
    "where(a > 0, x**2, -x)",
]
"""Smooth on the sample points (``x`` in [0.5, 1.9]; ``a`` = 0.4)."""


@pytest.mark.parametrize("text", SMOOTH)
def test_derivatives_match_central_differences(text: str) -> None:
    # Central differences have error O(h²) (any numerical analysis text, e.g. Burden & Faires,
    # Numerical Analysis, §4.1): with h = 1e-6 the two agree to about 1e-6 relative.
    x = np.linspace(0.5, 1.9, 57)
    env = {"a": 0.4}
    h = 1e-6
    f = lambda at: np.broadcast_to(expressions.evaluate(_expression(text), {**env, "x": at}), at.shape)  # noqa: E731
    numeric = (f(x + h) - f(x - h)) / (2 * h)
    exact = _derivative_values(text, x, env)
    np.testing.assert_allclose(exact, numeric, rtol=1e-5, atol=1e-6)


@pytest.mark.parametrize("text", ["abs(x - 1.2)", "min(x, 1.3) + max(2 * x, 3)", "clip(x, 0.8, 1.5)"])
def test_kinks_give_the_derivative_of_the_winning_branch(text: str) -> None:
    x = np.array([0.55, 0.7, 1.0, 1.25, 1.45, 1.7, 1.85])  # no sample sits on a kink
    h = 1e-7
    f = lambda at: np.broadcast_to(expressions.evaluate(_expression(text), {"x": at}), at.shape)  # noqa: E731
    numeric = (f(x + h) - f(x - h)) / (2 * h)
    np.testing.assert_allclose(_derivative_values(text, x, {}), numeric, rtol=1e-5, atol=1e-6)


def test_defines_chain_through_their_derivative_names() -> None:
    # d/dx of y * y with y = 3 x + 1 is 2 y · y' = 2 (3x + 1) · 3.
    tree = _slopes.derivative(_expression("y * y").tree, "x", {"y": True})
    value = expressions.evaluate(expressions.Expression.from_tree(tree), {"y": 4.0, _slopes.prime("y"): 3.0})
    assert float(value) == 24.0


@pytest.mark.parametrize("text", ["x > 1", "where(x > 1, x, 0)", "(x < 2) * x", "not x", "x > 0 and x < 1"])
def test_jumps_refuse_a_derivative(text: str) -> None:
    with pytest.raises(_slopes.NotSmooth):
        _slopes.derivative(_expression(text).tree, "x", {})


def test_constant_parts_have_no_derivative() -> None:
    tree = _slopes.derivative(_expression("a * 2 + log(a) + where(a > 0, 1, 2)").tree, "x", {})
    assert tree == expressions.Number(0.0)


def _source(model: dict, hints: dict | None = None) -> str:
    problem = compile_grid(parse_document(document(model, hints=hints)), reward_storage="on_the_fly")
    return pathlib.Path(problem._kernels.__file__).read_text()


def test_the_slope_bound_is_written_where_it_applies_and_only_there() -> None:
    assert "SLOPE = True" in _source(GROWTH)
    jumpy = {**GROWTH, "reward": "where(k_next > k, c**(1 - gamma) / (1 - gamma), log(c))"}
    assert "SLOPE = False" in _source(jumpy)


NONUNIFORM = {
    **GROWTH,
    "states": {"k": {"min": 2.7, "max": 8.2, "points": 90, "spacing": "log"}},
    "define": {"y": "z * k**alpha + (1 - delta) * k", "c": "y - k_next"},
    "reward": "sqrt(c) - 0.3 * abs(k_next - 5) + min(c, 1.5)",
    "feasible": ["c >= 0.01", "k_next <= y"],
}
"""A log-spaced grid, a kink in the reward, two constraints (one on the choice itself)."""

TWO_SAVINGS = {
    "params": {"r": 1.03, "w": 1.0},
    "states": {"a": {"min": 0.0, "max": 3.0, "points": 30}, "b": {"min": 0.0, "max": 2.0, "points": 12}},
    "shocks": {"e": {"markov": {"values": [0.7, 1.3], "matrix": [[0.8, 0.2], [0.3, 0.7]]}}},
    "choices": {"b_next": {"next_of": "b"}, "a_next": {"next_of": "a"}},
    "define": {"c": "w * e + r * a + 1.01 * b - a_next - b_next"},
    "reward": "log(c) - 0.1 * (a_next - b_next)**2",
    "feasible": ["c > 0"],
}
"""Two savings accounts, both next_of: the slope bound runs along the last one, within each outer choice."""


@pytest.mark.parametrize("model", [GROWTH, NONUNIFORM, TWO_SAVINGS], ids=["growth", "nonuniform", "two-savings"])
def test_block_search_with_slope_bounds_equals_exhaustive_search(model: dict) -> None:
    problem = compile_grid(parse_document(document(model)), reward_storage="on_the_fly")
    assert problem._kernels.SLOPE, "the search under test uses the slope bound"
    rng = np.random.default_rng(7)
    exact = compile_grid(parse_document(document(model)), reward_storage="on_the_fly")
    from worker import solve

    converged = np.array(solve(document(model))["value"]).reshape(-1)
    for trial, v in enumerate([converged, random_values(problem, seed=5), 0.01 * random_values(problem, seed=6)]):
        reference = exact.bellman_step(v, exhaustive=True)
        guesses = [reference[1], rng.integers(0, problem._data.n_choices, size=problem.n), None]
        for guess in guesses:
            blocked = problem.bellman_step(v, policy_guess=guess)
            assert np.array_equal(blocked[1], reference[1]), (trial, guess is None)
            assert np.array_equal(blocked[0], reference[0]), (trial, guess is None)
