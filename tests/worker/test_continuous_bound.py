"""The unrestricted search of a ``next_of`` continuous choice by branch and bound (worker.continuous.bound_search).

Checked against the scan it replaces (the same kernels with the bound switched off: never a lower value
than rounding) and against brute force: a dense evaluation of the objective in plain numpy, with the
continuation read by ``np.interp`` (linear) or scipy's ``PchipInterpolator`` (the monotone cubic, whose
slopes equal fixq's: tests/worker/test_continuous.py checks that).  The models are invented: a household
saving out of an income chain (one state; two states with a skill level whose law does not move with the
choice), and a two-peaked objective whose higher peak lies between two grid points, where the scan misses
it.
"""

from __future__ import annotations

import copy
from typing import Any

import numpy as np
import pytest
from scipy.interpolate import PchipInterpolator

from tests._thread_spy import spy_run_blocks
from worker import environment, threadpool
from worker.continuous.problem import ContinuousProblem
from worker.solve import compile_document, solve

BETA = 0.95
INCOME = {"values": [0.7, 1.0, 1.4], "matrix": [[0.7, 0.2, 0.1], [0.2, 0.6, 0.2], [0.1, 0.3, 0.6]]}
"""An invented three-state income chain."""
DENSE = 20_001
"""Choices of the brute-force evaluation per point (count)."""


def _household(points: int, how: str, skill: bool = False) -> dict[str, Any]:
    """Invented household: assets on [0, 20] (power spacing), CRRA utility of consumption; with ``skill``, a
    second state scaling income whose next value ``0.6·skill + 0.4·income`` falls between its grid points (the law
    of tests/worker/test_continuous_savings.py's skill: the same kernels)."""
    states: dict[str, Any] = {"assets": {"min": 0.0, "max": 20.0, "points": points, "spacing": "power",
                                         "exponent": 2.0}}
    cash = "(1 + r) * assets + income"
    nexts = {}
    if skill:
        states["skill"] = {"min": 0.5, "max": 1.5, "points": 5}
        cash = "(1 + r) * assets + skill * income"
        nexts = {"skill": "0.6 * skill + 0.4 * income"}
    model: dict[str, Any] = {
        "kind": "grid",
        "params": {"r": 0.03, "gamma": 2.0},
        "states": states,
        "shocks": {"income": {"markov": copy.deepcopy(INCOME), "transform": "none"}},
        "choices": {"saving": {"next_of": "assets", "continuous": True}},
        "define": {"c": f"{cash} - saving"},
        "reward": "c**(1 - gamma) / (1 - gamma)",
        "feasible": ["c > 0"],
        "interpolation": how,
    }
    if nexts:
        model["next"] = nexts
    return {"version": 1, "discount": BETA, "model": model, "solver": {"method": "howard", "tolerance": 1e-9}}


def _both(problem: Any, v: np.ndarray, guess: np.ndarray | None = None) -> tuple[tuple, tuple]:
    """``(values, choices)`` of the unrestricted step with the bound, then with the scan it replaces."""
    assert problem.bound_search
    bound = problem.bellman_step(v, restricted=False, policy_guess=guess)
    problem.bound_search = False
    try:
        scan = problem.bellman_step(v, restricted=False, policy_guess=guess)
    finally:
        problem.bound_search = True
    return bound, scan


def _wavy_values(problem: Any, scale: float) -> np.ndarray:
    """A value function rising in assets with waves of size ``scale`` (several peaks in the objective)."""
    env = problem.state_values()
    a = env["assets"]
    v = -4.0 / (1.0 + 0.5 * a) + scale * np.sin(1.7 * a) + 0.2 * env["income"]
    if "skill" in env:
        v = v + 0.5 * env["skill"]
    return np.ascontiguousarray(v)


def _brute_force(problem: Any, v: np.ndarray, cubic: bool) -> tuple[np.ndarray, Any]:
    """Plain numpy: the best of ``DENSE`` evenly spread choices and every grid point, at every point; and the
    objective as a function ``objective(i, choice)`` to check a found choice's value."""
    data = problem.model_data
    grid = data.state_grids[0]
    n_z = data.n_shocks
    EVt = data.transition @ np.asarray(v).reshape(data.n_grid, n_z).T  # (shocks, grid states)
    env = problem.state_values()
    r, gamma = 0.03, 2.0
    skill_grid = data.state_grids[1] if len(data.state_grids) > 1 else None
    lines = EVt.reshape(n_z, grid.size, -1)

    def continuation(i: int, x: np.ndarray) -> np.ndarray:
        z = i % n_z
        if skill_grid is None:
            rows, weights = [0], [1.0]
        else:  # tomorrow's skill between two grid points: multilinear weights (np.interp of the unit vectors)
            s_next = 0.6 * env["skill"][i] + 0.4 * env["income"][i]
            weights_all = [np.interp(s_next, skill_grid, np.eye(skill_grid.size)[k]) for k in range(skill_grid.size)]
            rows = [k for k in range(skill_grid.size) if weights_all[k] > 0]
            weights = [weights_all[k] for k in rows]
        total = np.zeros_like(x)
        for k, w in zip(rows, weights):
            line = lines[z, :, k]
            total += w * (PchipInterpolator(grid, line)(x) if cubic else np.interp(x, grid, line))
        return total

    def objective(i: int, x: np.ndarray) -> np.ndarray:
        income = env["income"][i] * (env["skill"][i] if skill_grid is not None else 1.0)
        c = (1 + r) * env["assets"][i] + income - x
        with np.errstate(all="ignore"):
            reward = np.where(c > 0, c ** (1 - gamma) / (1 - gamma), -np.inf)
        return reward + BETA * continuation(i, x)

    choices = np.unique(np.concatenate([np.linspace(grid[0], grid[-1], DENSE), grid]))
    best = np.array([objective(i, choices).max() for i in range(problem.n)])
    return best, objective


@pytest.mark.parametrize(("how", "skill"), [("linear", False), ("monotone_cubic", False), ("linear", True)],
                         ids=["linear", "monotone_cubic", "two_states_linear"])
def test_the_bound_equals_or_beats_the_scan_and_brute_force(how: str, skill: bool) -> None:
    _, problem = compile_document(_household(24 if skill else 60, how, skill))
    cubic = how == "monotone_cubic"
    for scale in (0.0, 0.4):  # a concave-looking objective, then one with several peaks
        v = _wavy_values(problem, scale)
        (bound_v, bound_a), (scan_v, _) = _both(problem, v)
        size = float(np.abs(scan_v).max())
        assert np.all(bound_v >= scan_v - 1e-13 * size), float((scan_v - bound_v).max())
        dense, objective = _brute_force(problem, v, cubic)
        # No choice of the dense set (nor any grid point) is better than what the search found, beyond the
        # rounding of the two evaluations (numpy's and the kernel's).
        assert np.all(bound_v >= dense - 1e-11 * size), float((dense - bound_v).max())
        found = np.array([objective(i, np.array([bound_a[i]]))[0] for i in range(problem.n)])
        np.testing.assert_allclose(found, bound_v, rtol=0, atol=1e-11 * size)
        # With the previous policy as the incumbent the answer is the same (to the local search's tolerance).
        guessed, _ = problem.bellman_step(v, restricted=False, policy_guess=bound_a)
        np.testing.assert_allclose(guessed, bound_v, rtol=0, atol=1e-11 * size)


def _two_peaks(points: int) -> dict[str, Any]:
    """Invented: a broad peak of the reward at 0.25 + 0.05·k + z and a narrow, higher one at 0.725, between the grid
    points 0.70 and 0.75 of ``k`` on [0, 1] (21 points); the value of tomorrow is read linearly."""
    model = {
        "kind": "grid",
        "params": {"bonus": 0.5, "peak": 0.725, "spread": 0.02},
        "states": {"k": {"min": 0.0, "max": 1.0, "points": points}},
        "shocks": {"z": {"markov": {"values": [0.0, 0.03], "matrix": [[0.9, 0.1], [0.1, 0.9]]},
                         "transform": "none"}},
        "choices": {"k_next": {"next_of": "k", "continuous": True}},
        "reward": "-(k_next - 0.25 - 0.05 * k - z)**2 + bonus * exp(-((k_next - peak) / spread)**2)",
        "interpolation": "linear",
    }
    return {"version": 1, "discount": 0.5, "model": model, "solver": {"method": "value_iteration",
                                                                      "tolerance": 1e-9}}


def test_a_higher_peak_between_grid_points_is_found_where_the_scan_misses_it() -> None:
    _, problem = compile_document(_two_peaks(21))
    v = np.zeros(problem.n)  # the reward alone: its maxima are known
    (bound_v, bound_a), (scan_v, scan_a) = _both(problem, v)
    env = problem.state_values()
    broad = 0.5 * np.exp(-((0.25 + 0.05 * env["k"] + env["z"] - 0.725) / 0.02) ** 2)  # the bump at the broad peak
    # The scan sees the bump only at 0.70 and 0.75 (0.21 of its height) and keeps the broad peak: value = its bump.
    np.testing.assert_allclose(scan_v, broad, atol=1e-12)
    assert np.all(np.abs(scan_a - 0.725) > 0.1)
    # The bound does not skip the interval [0.70, 0.75]: the narrow peak, 0.5 − (0.725 − 0.25 − 0.05 k − z)², is
    # found (to Brent's tolerance on the choice, and the value to rounding), at every point.
    exact = 0.5 - (0.725 - 0.25 - 0.05 * env["k"] - env["z"]) ** 2
    assert np.all(exact > broad + 0.05)
    np.testing.assert_allclose(bound_a, 0.725, atol=2e-3)
    assert np.all(bound_v >= exact - 1e-6)
    objective = -(bound_a - 0.25 - 0.05 * env["k"] - env["z"]) ** 2 + 0.5 * np.exp(-((bound_a - 0.725) / 0.02) ** 2)
    np.testing.assert_allclose(bound_v, objective, atol=1e-12)
    # An unhinted solve searches this way at every iteration.
    result = solve(_two_peaks(21))
    assert result["status"] == "converged"
    assert np.all(np.abs(np.array(result["policy"]["k_next"]) - 0.725) < 0.01)


def test_the_bound_is_used_only_where_it_holds(monkeypatch: pytest.MonkeyPatch) -> None:
    # The generated module's flag (BOUNDED), read without compiling the kernels: nothing here calls them, and the
    # first two structures are no other test's (their compile cost 5-7 s each).
    monkeypatch.setattr(ContinuousProblem, "warm_up", lambda self: None)
    cubic_two = _household(12, "monotone_cubic", skill=True)
    moving = _household(12, "linear", skill=True)
    moving["model"]["next"] = {"skill": "0.6 * skill + 0.4 * income + 0.001 * saving"}
    for document in (cubic_two, moving):
        _, problem = compile_document(document)
        assert not problem.bound_search
    _, problem = compile_document(_household(12, "linear", skill=True))
    assert problem.bound_search


def _bits(result: dict[str, Any]) -> tuple:
    return (result["status"], result["iterations"], np.array(result["value"]).tobytes(),
            np.array(result["policy"]["saving"]).tobytes())


def test_two_threads_give_the_bits_of_one(monkeypatch: pytest.MonkeyPatch) -> None:
    calls = spy_run_blocks(monkeypatch)
    monkeypatch.setattr(threadpool, "THREAD_MIN_PAIRS", 0)
    document = _household(20, "linear", skill=True)  # no hints: every step is the unrestricted search
    monkeypatch.setenv(environment.SOLVE_THREADS, "1")
    one = solve(copy.deepcopy(document))
    assert calls and all(threads == 1 for threads, _ in calls)
    calls.clear()
    monkeypatch.setenv(environment.SOLVE_THREADS, "2")
    two = solve(copy.deepcopy(document))
    assert any(threads == 2 and blocks >= 2 for threads, blocks in calls), calls
    assert one["status"] == "converged"
    assert _bits(one) == _bits(two)


def test_beside_a_discrete_choice_that_sets_another_state() -> None:
    """A second state ``shop`` (closed 0 / open 1) set by a discrete choice ``open`` (next_of it), searched for
    each of its values: tomorrow's shop is a grid point, read with weight one; brute force over both values."""
    document = _household(30, "linear")
    model = document["model"]
    model["states"]["shop"] = {"min": 0.0, "max": 1.0, "points": 2}
    model["choices"]["open"] = {"next_of": "shop"}
    model["define"] = {"c": "(1 + r) * assets + income * (1 + 0.3 * shop) - saving - 0.2 * open"}
    _, problem = compile_document(document)
    assert problem.bound_search
    data = problem.model_data
    grid, n_z = data.state_grids[0], data.n_shocks
    env = problem.state_values()
    choices = np.unique(np.concatenate([np.linspace(grid[0], grid[-1], DENSE), grid]))
    for scale in (0.0, 0.4):
        v = _wavy_values(problem, scale) + 0.3 * env["shop"]
        (bound_v, _), (scan_v, _) = _both(problem, v)
        size = float(np.abs(scan_v).max())
        assert np.all(bound_v >= scan_v - 1e-13 * size), float((scan_v - bound_v).max())
        lines = (data.transition @ v.reshape(data.n_grid, n_z).T).reshape(n_z, grid.size, 2)
        for i in range(problem.n):
            best = -np.inf
            for shop_next in (0, 1):
                c = (1.03 * env["assets"][i] + env["income"][i] * (1 + 0.3 * env["shop"][i]) - choices
                     - 0.2 * shop_next)
                with np.errstate(all="ignore"):
                    reward = np.where(c > 0, -1.0 / c, -np.inf)  # c**(1 - 2) / (1 - 2)
                ev = np.interp(choices, grid, lines[i % n_z, :, shop_next])
                best = max(best, float((reward + BETA * ev).max()))
            assert bound_v[i] >= best - 1e-11 * size, (i, best - bound_v[i])
