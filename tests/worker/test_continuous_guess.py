"""The concave search of a continuous choice started from a guess (:mod:`worker.continuous.search`).

Its first step is sized by the move of the choice at the point searched just before; that decides the cost
only.  Checked here: from guesses that have not moved, that moved smoothly, that jump back and forth, and
from a corner, the hinted Bellman step finds the maximum written here in closed form (growth with log
utility on an invented two-state chain, a concave value read by linear interpolation: a log plus a straight
line between grid points); and the same bits on one and two threads.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest

from tests._documents import log_growth
from worker import environment, threadpool
from worker.solve import compile_document

ALPHA = 0.3
BETA = 0.95
K_MIN, K_MAX, POINTS = 0.05, 0.4, 30


def _document(hints: dict[str, bool]) -> dict[str, Any]:
    model = log_growth(alpha=ALPHA, k_min=K_MIN, k_max=K_MAX, points=POINTS, interpolation="linear")
    model["choices"] = {"k_next": {"next_of": "k", "continuous": True}}
    model["hints"] = hints
    return {"version": 1, "discount": BETA, "model": model, "solver": {"method": "howard", "tolerance": 1e-10}}


def _values(problem: Any) -> np.ndarray:
    """A concave value on the grid (flat point ``i = k · shocks + z``), higher in the better shock."""
    k = np.linspace(K_MIN, K_MAX, POINTS)
    return (1.5 * np.log(k)[:, None] + np.array([0.0, 0.2])[None, :]).reshape(problem.n)


def _exact_maxima(problem: Any, v: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``(values, choices)`` at every grid point, in closed form.

    Between two grid points the objective ``log(z k^α − k') + β EV(k')`` is a log plus a straight line
    ``a + b k'``, so its maximum on a piece is at an end or where ``1/(z k^α − k') = β b``
    (``k' = z k^α − 1/(β b)``); the best of those candidates over all pieces is the maximum.
    """
    data = problem.model_data
    grid = data.state_grids[0]
    z_values = data.shock_values[0]
    later = v.reshape(POINTS, z_values.size) @ data.transition.T  # later[j, z] = Σ P[z, z'] v(grid_j, z')
    slopes = np.diff(later, axis=0) / np.diff(grid)[:, None]
    values, choices = np.empty(problem.n), np.empty(problem.n)
    for x in range(POINTS):
        for z in range(z_values.size):
            wealth = z_values[z] * grid[x] ** ALPHA
            with np.errstate(divide="ignore"):
                inner = wealth - 1.0 / (BETA * slopes[:, z])
            inside = (slopes[:, z] > 0) & (inner > grid[:-1]) & (inner < grid[1:])
            candidates = np.concatenate([grid, inner[inside]])
            candidates = candidates[candidates < wealth]
            objective = np.log(wealth - candidates) + BETA * np.interp(candidates, grid, later[:, z])
            best = int(np.argmax(objective))
            values[x * z_values.size + z], choices[x * z_values.size + z] = objective[best], candidates[best]
    return values, choices


def _guesses(exact: np.ndarray) -> dict[str, np.ndarray]:
    """Guesses around the answer: unmoved, moved smoothly along the line, jumping back and forth, at a corner."""
    rows = np.arange(exact.size)
    return {
        "unmoved": exact.copy(),
        "smooth": np.clip(exact - 2e-4 * (1.0 + rows / exact.size), K_MIN, K_MAX),
        "jagged": np.clip(exact + 0.02 * (-1.0) ** rows, K_MIN, K_MAX),
        "corner": np.full(exact.size, K_MIN),
    }


def test_any_guess_finds_the_exact_maximum() -> None:
    _, problem = compile_document(_document({"concave": True}))
    v = _values(problem)
    expected_v, expected_a = _exact_maxima(problem, v)
    first_v, first_a = problem.bellman_step(v, restricted=True)  # no guess: the coarse scan starts each search
    np.testing.assert_allclose(first_v, expected_v, rtol=0, atol=1e-11)
    np.testing.assert_allclose(first_a, expected_a, rtol=0, atol=1e-7)
    for name, guess in _guesses(first_a).items():
        found_v, found_a = problem.bellman_step(v, restricted=True, policy_guess=guess)
        np.testing.assert_allclose(found_v, expected_v, rtol=0, atol=1e-11, err_msg=name)
        np.testing.assert_allclose(found_a, expected_a, rtol=0, atol=1e-7, err_msg=name)
        assert np.all(found_v >= first_v - 1e-12), name


def test_a_sized_step_gives_the_bits_of_one_thread(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(threadpool, "THREAD_MIN_PAIRS", 0)
    monkeypatch.setenv(environment.SOLVE_THREADS, "2")
    _, problem = compile_document(_document({"concave": True, "monotone": True}))
    assert problem.threads == 2
    v = _values(problem)
    _, exact = problem.bellman_step(v, restricted=True)
    for name, guess in _guesses(exact).items():
        problem.threads = 1
        single = problem.bellman_step(v, restricted=True, policy_guess=guess)
        problem.threads = 2
        threaded = problem.bellman_step(v, restricted=True, policy_guess=guess)
        assert np.array_equal(single[0].view(np.int64), threaded[0].view(np.int64)), name
        assert np.array_equal(single[1].view(np.int64), threaded[1].view(np.int64)), name
