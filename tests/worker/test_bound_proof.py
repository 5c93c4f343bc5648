"""The proof at the incumbent before the branch and bound of a ``next_of`` continuous choice
(worker.continuous.bound_proof).

Checked against the same step with the proof switched off (``problem.bound_proof``: the branch and bound alone)
and against an independent check, a dense evaluation of the objective in plain numpy (the continuation read
by ``np.interp``, as linear interpolation reads it).  Models: the accuracy benchmark's household
(bench/bench_accuracy.py, invented calibration) and invented ones: a fishery, a saver with a pole in its
reward and no constraint, a saver with a kinked (``abs``) and a capped (``min``) reward, a two-peaked reward.
Comparison rule: the values of the step with and without the proof agree to 1e-12 of the largest value (the
proof's slack is 2**-40 of the terms); the choices agree to 1e-5 of the grid's width (both are the optimum to
Brent's tolerance where the objective is flat; the proof returns the hinted one).
"""

from __future__ import annotations

import copy
import json
import sys
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from tests._documents import two_peaks
from tests._thread_spy import spy_run_blocks
from worker import environment, threadpool
from worker.continuous.problem import ContinuousProblem
from worker.solve import compile_document, solve

sys.path.insert(0, str(Path(__file__).resolve().parents[2] / "bench"))
import bench_accuracy  # noqa: E402

DENSE = 40_001
"""Choices of the independent dense evaluation per point (count)."""


def _on_off(problem: Any, v: np.ndarray, guess: np.ndarray) -> tuple[tuple, tuple, np.ndarray]:
    """The unrestricted step with the proof, then without it; and where the proof held (per point).

    The proof runs only where the guess is the last step's choices at ``v`` (as in the verification, after the
    hinted step): ``last_step`` declares it so here, for any guess the test wants to try."""
    assert problem.bound_search and problem.bound_proof
    problem.last_step = (np.array(v, dtype=np.float64), np.array(guess, dtype=np.float64))
    on = problem.bellman_step(v, restricted=False, policy_guess=guess)
    proven = problem.proven.copy()
    assert proven.shape == (problem.n,)
    problem.bound_proof = False
    try:
        off = problem.bellman_step(v, restricted=False, policy_guess=guess)
        assert problem.proven.size == 0
    finally:
        problem.bound_proof = True
    return on, off, proven


def _fishery(points: int) -> dict[str, Any]:
    """Invented fishery: the stock grows as ``stock + 0.8·stock·(1 − stock/10)`` times a weather factor; the
    escapement (tomorrow's stock) is chosen, the catch is the rest, and the reward is ``sqrt(catch)`` less a
    small cost of a low stock."""
    model = {
        "kind": "grid",
        "params": {"growth": 0.8, "capacity": 10.0, "cost": 0.02},
        "states": {"stock": {"min": 0.5, "max": 12.0, "points": points}},
        "shocks": {"weather": {"markov": {"values": [0.85, 1.0, 1.15],
                                          "matrix": [[0.6, 0.3, 0.1], [0.2, 0.6, 0.2], [0.1, 0.3, 0.6]]},
                               "transform": "none"}},
        "choices": {"escapement": {"next_of": "stock", "continuous": True}},
        "define": {"catch": "weather * (stock + growth * stock * (1 - stock / capacity)) - escapement"},
        "reward": "sqrt(catch) - cost / escapement",
        "feasible": ["catch > 0"],
        "interpolation": "linear",
        "hints": {"concave": True, "monotone": True},
    }
    return {"version": 1, "discount": 0.93, "model": model, "solver": {"method": "howard", "tolerance": 1e-8}}


def _saver(points: int, reward: str, feasible: bool = True) -> dict[str, Any]:
    """Invented saver on assets [0, 10], income 0.8 / 1.2, consumption ``c = 1.02·assets + income − saving``."""
    model: dict[str, Any] = {
        "kind": "grid",
        "params": {"gamma": 2.0},
        "states": {"assets": {"min": 0.0, "max": 10.0, "points": points}},
        "shocks": {"income": {"markov": {"values": [0.8, 1.2], "matrix": [[0.8, 0.2], [0.2, 0.8]]},
                              "transform": "none"}},
        "choices": {"saving": {"next_of": "assets", "continuous": True}},
        "define": {"c": "1.02 * assets + income - saving"},
        "reward": reward,
        "interpolation": "linear",
    }
    if feasible:
        model["feasible"] = ["c > 0"]
    return {"version": 1, "discount": 0.9, "model": model, "solver": {"method": "value_iteration",
                                                                      "tolerance": 1e-8}}


def _dense(problem: Any, v: np.ndarray, reward: Any, cash: np.ndarray) -> tuple[np.ndarray, Any]:
    """Independent check: the best of ``DENSE`` evenly spread choices and every grid point at every point, and
    the objective ``objective(i, choices)``; ``reward(c)`` in numpy, ``c = cash[i] − choice``."""
    data = problem.model_data
    grid = data.state_grids[0]
    n_z = data.n_shocks
    EVt = data.transition @ np.asarray(v).reshape(data.n_grid, n_z).T  # (shocks, grid states)

    def objective(i: int, x: np.ndarray) -> np.ndarray:
        with np.errstate(all="ignore"):
            return reward(cash[i] - x) + problem.discount * np.interp(x, grid, EVt[i % n_z])

    choices = np.unique(np.concatenate([np.linspace(grid[0], grid[-1], DENSE), grid]))
    return np.array([np.nanmax(objective(i, choices)) for i in range(problem.n)]), objective


def _crra(c: np.ndarray) -> np.ndarray:
    return np.where(c > 0, -1.0 / c, -np.inf)  # c**(1 - 2) / (1 - 2)


def _solved(document: dict[str, Any], choice: str) -> tuple[Any, np.ndarray, np.ndarray]:
    result = solve(json.loads(json.dumps(document)))
    assert result["status"] == "converged"
    _, problem = compile_document(document)
    return problem, np.asarray(result["value"], dtype=np.float64).reshape(-1), \
        np.asarray(result["policy"][choice], dtype=np.float64).reshape(-1)


@pytest.mark.parametrize("interpolation", ["linear", "monotone_cubic"])
@pytest.mark.parametrize("which", ["household", "fishery"])
def test_the_proof_gives_the_branch_and_bounds_answer_at_most_points(which: str, interpolation: str) -> None:
    cubic = interpolation == "monotone_cubic"
    if which == "household":
        document, choice = bench_accuracy.document(150, "(c)" if cubic else "(b)"), bench_accuracy.CHOICE
    else:
        document, choice = (_cubic(_fishery(120)) if cubic else _fishery(120)), "escapement"
    problem, v, policy = _solved(document, choice)
    (on_v, on_a), (off_v, off_a), proven = _on_off(problem, v, policy)
    size = float(np.abs(off_v).max())
    np.testing.assert_allclose(on_v, off_v, rtol=0, atol=1e-12 * size)
    width = float(np.ptp(problem.model_data.state_grids[0]))
    np.testing.assert_allclose(on_a, off_a, rtol=0, atol=1e-5 * width)
    # Seen: 99.7% (household, 150 points) and 100% (fishery), with either interpolation.
    assert np.count_nonzero(proven) >= 0.9 * problem.n, (np.count_nonzero(proven), problem.n)


@pytest.mark.parametrize("interpolation", ["linear", "monotone_cubic"])
def test_a_false_concave_hint_is_not_proven_where_a_better_choice_exists(interpolation: str) -> None:
    """A continuation with waves: the hinted (concave) search stops on the peak nearest its guess.  The
    independent check is a dense evaluation of the objective (numpy's linear reading, or scipy's PCHIP)."""
    cubic = interpolation == "monotone_cubic"
    # -1/c is c**(1 - gamma) / (1 - gamma) at gamma = 2 (_crra), written as the pole test's constrained saver writes
    # it, so that the two tests compile the same kernels (the hint is not part of them).
    document = _saver(60, "-1 / c")
    document = _cubic(document) if cubic else document
    document["model"]["hints"] = {"concave": True}
    _, problem = compile_document(document)
    env = problem.state_values()
    v = np.ascontiguousarray(-4.0 / (1.0 + 0.5 * env["assets"]) + 0.4 * np.sin(1.7 * env["assets"]))
    local_v, local_a = problem.bellman_step(v, restricted=True, policy_guess=np.full(problem.n, 0.2))
    (on_v, _), (off_v, _), proven = _on_off(problem, v, local_a)
    best, objective = (_dense_cubic if cubic else _dense)(problem, v, _crra, 1.02 * env["assets"] + env["income"])
    size = float(np.abs(best).max())
    at_guess = np.array([objective(i, np.array([local_a[i]]))[0] for i in range(problem.n)])
    better = best > at_guess + 1e-9 * size  # a better choice exists (independent check)
    assert better.sum() >= 5 and np.count_nonzero(proven) >= 5  # both cases occur
    assert not np.any(proven[better])
    assert np.all(on_v >= best - 1e-11 * size), float((best - on_v).max())
    np.testing.assert_allclose(on_v, off_v, rtol=0, atol=1e-12 * size)
    assert np.all(on_v >= local_v - 1e-12 * size)


def test_a_two_peaked_reward_is_not_proven_at_the_lower_peak() -> None:
    """Invented (tests/_documents.two_peaks): a broad peak of the reward and a narrow, higher one between two grid
    points (v = 0)."""
    _, problem = compile_document(two_peaks(0.5, None))
    env = problem.state_values()
    broad = 0.25 + 0.05 * env["k"] + env["z"]  # the broad peak (the bump is negligible there)
    (on_v, on_a), _, proven = _on_off(problem, np.zeros(problem.n), np.ascontiguousarray(broad))
    assert not np.any(proven)
    exact = 0.5 - (0.725 - broad) ** 2  # the narrow peak's value, to the bump's own curvature
    assert np.all(on_v >= exact - 1e-6)
    np.testing.assert_allclose(on_a, 0.725, atol=2e-3)


@pytest.mark.parametrize("interpolation", ["linear", "monotone_cubic"])
def test_a_pole_inside_the_interval_without_a_constraint_is_not_proven(interpolation: str) -> None:
    """``-1/c`` with no constraint: past ``c = 0`` the reward is large and positive, and allowed."""
    cubic = interpolation == "monotone_cubic"

    def saver(feasible: bool) -> dict[str, Any]:
        document = _saver(40, "-1 / c", feasible=feasible)
        return _cubic(document) if cubic else document

    _, problem = compile_document(saver(False))
    assert problem.bound_proof
    env = problem.state_values()
    cash = 1.02 * env["assets"] + env["income"]
    v = np.ascontiguousarray(-4.0 / (1.0 + 0.5 * env["assets"]))
    grid = problem.model_data.state_grids[0]
    left = np.array([max(0.0, min(0.5 * c, grid[-1])) for c in cash])  # a choice left of the pole
    (on_v, _), (off_v, _), proven = _on_off(problem, v, left)
    _, objective = (_dense_cubic if cubic else _dense)(problem, v, lambda c: np.where(c != 0, -1.0 / c, np.nan), cash)
    pole_inside = cash < grid[-1]
    assert pole_inside.sum() >= 10
    assert not np.any(proven[pole_inside])
    at_left = np.array([objective(i, np.array([left[i]]))[0] for i in range(problem.n)])
    assert np.all(on_v[pole_inside] > at_left[pole_inside] + 1.0)  # the better choice past the pole is found
    np.testing.assert_array_equal(on_v, off_v)
    # With the constraint the pole is narrowed out of the box: proven where it holds.
    _, problem = compile_document(saver(True))
    problem.bellman_step(v, restricted=False, policy_guess=problem.bellman_step(v, restricted=False)[1])
    assert np.count_nonzero(problem.proven) >= 0.8 * problem.n


KINKED_REWARD = "min(c**(1 - gamma) / (1 - gamma) - tilt * abs(saving - 4), cap)"
"""A reward with a kink in the choice: the ``abs`` one weighs ``tilt``, the ``min`` one binds below ``cap``.  Each
case switches the other kink off by its params (``tilt = 0``; a ``cap`` far above the CRRA part, which is negative),
so that both cases compile one set of kernels."""
KINKED = {
    "abs": ({"tilt": 0.05, "cap": 1e3}, lambda c, x: _crra(c) - 0.05 * np.abs(x - 4)),
    "min": ({"tilt": 0.0, "cap": -0.6}, lambda c, x: np.minimum(_crra(c), -0.6)),
}
"""Each kink's params, and the reward in numpy (the other kink left out)."""


@pytest.mark.parametrize("kink", list(KINKED))
def test_kinked_rewards_use_the_hull_of_both_slopes(kink: str) -> None:
    """``abs`` and ``min`` (Lebourg's mean value inequality) are proven and agree with the independent check."""
    params, numpy_reward = KINKED[kink]
    document = _saver(50, KINKED_REWARD)
    document["model"]["params"].update(params)
    _, problem = compile_document(document)
    assert problem.bound_proof
    env = problem.state_values()
    cash = 1.02 * env["assets"] + env["income"]
    v = np.ascontiguousarray(-4.0 / (1.0 + 0.5 * env["assets"]))
    first = problem.bellman_step(v, restricted=False)[1]
    (on_v, _), (off_v, _), proven = _on_off(problem, v, first)
    # Where the optimum sits on the reward's kink the incumbent is only within Brent's tolerance of it, and
    # the proof fails by about that tolerance times the jump of the slope (the branch and bound answers).
    assert np.count_nonzero(proven) >= 0.25 * problem.n, (kink, np.count_nonzero(proven))
    best = np.empty(problem.n)
    grid = problem.model_data.state_grids[0]
    choices = np.unique(np.concatenate([np.linspace(grid[0], grid[-1], DENSE), grid]))
    EVt = problem.model_data.transition @ v.reshape(problem.model_data.n_grid, -1).T
    for i in range(problem.n):
        with np.errstate(all="ignore"):
            values = numpy_reward(cash[i] - choices, choices) + problem.discount * np.interp(
                choices, grid, EVt[i % 2])
        best[i] = np.nanmax(values)
    size = float(np.abs(best).max())
    # Where the proof held, no choice is better (the branch and bound's answer elsewhere is Brent's, which
    # stops within its tolerance of a kink of the reward: 1e-9 of the value here).
    held = proven > 0
    assert np.all(on_v[held] >= best[held] - 1e-11 * size), (kink, float((best - on_v)[held].max()))
    np.testing.assert_allclose(on_v, off_v, rtol=0, atol=1e-12 * size)


def test_a_reward_that_may_jump_in_the_choice_writes_no_proof(monkeypatch: pytest.MonkeyPatch) -> None:
    """``where`` on the choice may jump: no proof is written (the branch and bound stays)."""
    # The flags are the generated module's (BOUNDED, PROVABLE): read without compiling its kernels, which no
    # other test uses and nothing here calls.
    monkeypatch.setattr(ContinuousProblem, "warm_up", lambda self: None)
    _, problem = compile_document(_saver(20, "where(saving > 4, -1 / c, -1 / c - 0.1)"))
    assert problem.bound_search and not problem.bound_proof


@pytest.mark.parametrize("interpolation", ["linear", "monotone_cubic"])
def test_two_threads_give_the_bits_of_one(monkeypatch: pytest.MonkeyPatch, interpolation: str) -> None:
    calls = spy_run_blocks(monkeypatch)
    monkeypatch.setattr(threadpool, "THREAD_MIN_PAIRS", 0)
    document = _cubic(_fishery(80)) if interpolation == "monotone_cubic" else _fishery(80)
    _, v, policy = _solved(copy.deepcopy(document), "escapement")
    answers = []
    for threads in ("1", "2"):
        monkeypatch.setenv(environment.SOLVE_THREADS, threads)
        calls.clear()
        _, problem = compile_document(copy.deepcopy(document))
        problem.last_step = (np.array(v, dtype=np.float64), np.array(policy, dtype=np.float64))
        values, choices = problem.bellman_step(v, restricted=False, policy_guess=policy)
        answers.append((values.tobytes(), np.asarray(choices).tobytes(), problem.proven.tobytes()))
        assert calls and all(t == int(threads) for t, _ in calls)
        assert np.count_nonzero(problem.proven) >= 0.9 * problem.n
    assert any(blocks >= 2 for _, blocks in calls), calls
    assert answers[0] == answers[1]


def test_the_proof_runs_only_from_the_last_steps_choices_at_the_same_value() -> None:
    """At the verification the guess is the hinted step's choices at the same v, and the proof runs; in an
    unhinted solve the guess is the last iteration's policy at another v, and a proof within its slack would keep
    choices whose optimum moved by less than Brent's tolerance (a search's finite differences then see nothing
    move), so it does not run there."""
    result = solve(bench_accuracy.document(60, "(b)"))
    _, problem = compile_document(bench_accuracy.document(60, "(b)"))
    v = np.asarray(result["value"], dtype=np.float64).reshape(-1)
    _, hinted = problem.bellman_step(v, restricted=True)
    problem.bellman_step(v, restricted=False, policy_guess=hinted)
    assert problem.proven.shape == (problem.n,) and np.count_nonzero(problem.proven) >= 0.9 * problem.n
    moved = v + 1e-3 * np.asarray(problem.policy_reward(hinted))  # another value function
    problem.bellman_step(moved, restricted=True)
    problem.bellman_step(v, restricted=False, policy_guess=hinted)  # the guess is not the last step's choices
    assert problem.proven.size == 0
    _, again = problem.bellman_step(moved, restricted=False, policy_guess=hinted)  # the same v, another guess
    assert problem.proven.size == 0


# --- monotone_cubic with one state --------------------------------------------------------------------------
# The independent check reads the continuation with scipy.interpolate.PchipInterpolator (Fritsch & Butland's
# weighted harmonic mean inside, the shape-preserving three-point formula at the ends: the slopes fixq computes,
# which each test checks first, against the problem's own ``continuation``).


def _cubic(document: dict[str, Any]) -> dict[str, Any]:
    document = copy.deepcopy(document)
    document["model"]["interpolation"] = "monotone_cubic"
    return document


def _pchip_rows(problem: Any, v: np.ndarray) -> list[Any]:
    """The continuation's rows as scipy's PCHIP, after checking its slopes equal the kernel's at the nodes."""
    from scipy.interpolate import PchipInterpolator

    data = problem.model_data
    grid = data.state_grids[0]
    EVt = data.transition @ np.asarray(v).reshape(data.n_grid, data.n_shocks).T
    rows = [PchipInterpolator(grid, row) for row in EVt]
    _, D = problem.continuation(np.asarray(v, dtype=np.float64))
    size = float(np.abs(D).max()) + 1.0
    for row, slopes in zip(rows, D):
        np.testing.assert_allclose(row.derivative()(grid), slopes, rtol=0, atol=1e-12 * size)
    return rows


def _dense_cubic(problem: Any, v: np.ndarray, reward: Any, cash: np.ndarray) -> tuple[np.ndarray, Any]:
    """:func:`_dense` with the continuation read by PCHIP."""
    rows = _pchip_rows(problem, v)
    grid = problem.model_data.state_grids[0]
    n_z = problem.model_data.n_shocks

    def objective(i: int, x: np.ndarray) -> np.ndarray:
        with np.errstate(all="ignore"):
            return reward(cash[i] - x) + problem.discount * rows[i % n_z](x)

    choices = np.unique(np.concatenate([np.linspace(grid[0], grid[-1], DENSE), grid]))
    return np.array([np.nanmax(objective(i, choices)) for i in range(problem.n)]), objective


def test_cubic_a_wavy_continuation_is_proven_only_where_the_dense_check_finds_nothing_better() -> None:
    """Guesses spread over the interval (not the optimum) at a wavy continuation: wherever the proof holds, no
    choice of the dense check (PCHIP) beats the guess beyond rounding."""
    document = _cubic(_saver(60, "-1 / c"))  # CRRA at gamma = 2 (_crra), as the false-concave-hint test writes it
    _, problem = compile_document(document)
    env = problem.state_values()
    v = np.ascontiguousarray(-4.0 / (1.0 + 0.5 * env["assets"]) + 0.1 * np.sin(2.3 * env["assets"]))
    _, first = problem.bellman_step(v, restricted=False)
    rng = np.random.default_rng(7)
    h = float(np.diff(problem.model_data.state_grids[0]).max())
    kind = rng.integers(0, 3, problem.n)  # the optimum; far from it; within a grid interval of it (near/mid piece)
    guess = np.where(kind == 0, first, first + np.where(kind == 1, rng.normal(0.0, 0.3, problem.n),
                                                        rng.choice([-0.3, 0.3], problem.n) * h))
    guess = np.ascontiguousarray(np.clip(guess, 0.0, 10.0))
    (on_v, _), (off_v, _), proven = _on_off(problem, v, guess)
    best, objective = _dense_cubic(problem, v, _crra, 1.02 * env["assets"] + env["income"])
    size = float(np.abs(best).max())
    at_guess = np.array([objective(i, np.array([guess[i]]))[0] for i in range(problem.n)])
    held = proven > 0
    better = best > at_guess + 1e-9 * size
    print(held.sum(), better.sum(), np.count_nonzero(held & (kind == 0)), np.count_nonzero(kind == 0))
    assert held.sum() >= 10 and better.sum() >= 0.3 * problem.n, (held.sum(), better.sum())
    assert np.all(best[held] <= at_guess[held] + 1e-11 * size), float((best - at_guess)[held].max())
    assert np.count_nonzero(better & (kind == 2)) >= 5
    assert np.all(on_v >= best - 1e-11 * size), float((best - on_v).max())
    np.testing.assert_allclose(on_v, off_v, rtol=0, atol=1e-12 * size)


def test_cubic_a_higher_peak_inside_the_incumbents_grid_interval_is_not_proven() -> None:
    """Invented: a broad peak of the reward and a narrow, higher one in the same grid interval, between ``x0 ± t``
    and the next node (the mid pieces); ``v = 0``.  The incumbent is the broad local maximum (scipy's bounded
    minimisation of the same objective in numpy, the independent check); the values at ``x0 ± t`` and at the
    nodes are below it, so only the mid piece's bound can see the narrow peak."""
    from scipy.optimize import minimize_scalar

    model = {
        "kind": "grid",
        "params": {"bonus": 0.5, "peak": 0.635, "spread": 0.004},
        "states": {"k": {"min": 0.0, "max": 1.0, "points": 21}},
        "shocks": {"z": {"markov": {"values": [0.0, 0.03], "matrix": [[0.9, 0.1], [0.1, 0.9]]},
                         "transform": "none"}},
        "choices": {"k_next": {"next_of": "k", "continuous": True}},
        "reward": "-(k_next - 0.6 - 0.02 * k - z)**2 + bonus * exp(-((k_next - peak) / spread)**2)",
        "interpolation": "monotone_cubic",
    }
    _, problem = compile_document({"version": 1, "discount": 0.5, "model": model})
    assert problem.bound_proof
    env = problem.state_values()
    broad = np.empty(problem.n)
    for i in range(problem.n):
        centre = 0.6 + 0.02 * env["k"][i] + env["z"][i]

        def minus(x: float, centre: float = centre) -> float:
            return (x - centre) ** 2 - 0.5 * np.exp(-(((x - 0.635) / 0.004) ** 2))

        side = (0.6, 0.62) if centre < 0.62 else (0.645, 0.65)
        broad[i] = minimize_scalar(minus, bounds=side, method="bounded", options={"xatol": 1e-12}).x
    (on_v, _), (off_v, _), proven = _on_off(problem, np.zeros(problem.n), np.ascontiguousarray(broad))
    assert not np.any(proven)  # (where a local search within one interval then misses the peak is the branch
    np.testing.assert_array_equal(on_v, off_v)  # and bound's own rule: single-peaked inside a grid interval)


def _six_points(params: dict[str, float], reward: str) -> dict[str, Any]:
    """Invented: a state on six grid points of [0, 1], two equally likely shock values, a ``next_of`` continuous
    choice read by ``monotone_cubic``, β = 0.9."""
    model = {
        "kind": "grid",
        "params": params,
        "states": {"k": {"min": 0.0, "max": 1.0, "points": 6}},
        "shocks": {"z": {"markov": {"values": [0.0, 1.0], "matrix": [[0.5, 0.5], [0.5, 0.5]]},
                         "transform": "none"}},
        "choices": {"k_next": {"next_of": "k", "continuous": True}},
        "reward": reward,
        "interpolation": "monotone_cubic",
    }
    return {"version": 1, "discount": 0.9, "model": model}


EXPONENTIAL_REWARD = "-0.01 * exp(lam * (k_next - p)) + lin * k_next"
"""A reward falling steeply past ``p`` (rate ``lam``) beside a linear one (slope ``lin``)."""


def _exponential_case(params: dict[str, float], nodes: list[float]) -> tuple[Any, np.ndarray, Any]:
    """The six-point model with ``EXPONENTIAL_REWARD`` at ``params`` (its proof written), the value ``nodes`` at
    every shock point, and the continuation's first row as scipy's PCHIP."""
    _, problem = compile_document(_six_points(params, EXPONENTIAL_REWARD))
    assert problem.bound_proof
    v = np.ascontiguousarray(np.repeat(np.asarray(nodes, dtype=np.float64), problem.model_data.n_shocks))
    return problem, v, _pchip_rows(problem, v)[0]


def test_cubic_a_better_choice_inside_a_far_interval_above_the_nodes_hull_is_not_proven() -> None:
    """Invented: a linear reward and a continuation with a step, whose cubic piece rises above the hull of the
    nodes inside its interval; the better choice is there, every node's value is below the incumbent's (a local
    maximum further left), so only the far piece's hull of the control points can see it (the nodes' hull
    would prove the incumbent)."""
    from scipy.optimize import minimize_scalar

    # The reward -0.01 - 1.563 k_next, written as the next test's with its exponential switched off (lam = 0), so
    # that the two tests compile the same kernels.
    nodes = [0.0, 0.46, 0.624, 0.786, 1.5, 1.5]  # found by a random search for this shape
    problem, v, row = _exponential_case({"lam": 0.0, "p": 0.0, "lin": -1.563}, nodes)

    def objective(x: Any) -> Any:
        return -0.01 - 1.563 * x + 0.9 * row(x)

    local = minimize_scalar(lambda x: -objective(x), bounds=(0.1, 0.2), method="bounded",
                            options={"xatol": 1e-12}).x
    grid = problem.model_data.state_grids[0]
    dense = np.linspace(0.0, 1.0, DENSE)
    assert np.all(objective(grid) < objective(local) - 1e-3)
    assert objective(dense).max() > objective(local) + 1e-3
    (on_v, _), (off_v, _), proven = _on_off(problem, v, np.full(problem.n, local))
    assert not np.any(proven)
    assert np.all(on_v >= objective(dense).max() - 1e-9)
    np.testing.assert_array_equal(on_v, off_v)


def test_cubic_a_rise_of_the_continuation_inside_the_incumbents_interval_is_not_proven() -> None:
    """Invented: a concave reward that falls steeply near the next node and a continuation whose cubic piece has
    a U-shaped slope: inside the incumbent's grid interval, past ``x0 + t``, ``W`` rises enough to beat the
    incumbent (a local maximum) while the nodes' values stay below it.  (Here the far piece's bound fails too: a
    case where only the mid piece's ``W'`` term sees the better choice was not found by a random search.)"""
    from scipy.optimize import minimize_scalar

    nodes = [0.0, 0.1045, 0.2195, 0.2694, 0.4012, 0.4105]  # found by a random search for this shape
    problem, v, row = _exponential_case({"lam": 54.48, "p": 0.61, "lin": -0.182}, nodes)

    def objective(x: Any) -> Any:
        return -0.01 * np.exp(54.48 * (x - 0.61)) - 0.182 * x + 0.9 * row(x)

    local = minimize_scalar(lambda x: -objective(x), bounds=(0.45, 0.5), method="bounded",
                            options={"xatol": 1e-12}).x
    grid = problem.model_data.state_grids[0]
    inside = np.linspace(local, 0.6, 4001)
    assert np.all(objective(grid) < objective(local) - 1e-4)
    assert objective(inside).max() > objective(local) + 1e-4  # before the next node
    (on_v, _), (off_v, _), proven = _on_off(problem, v, np.full(problem.n, local))
    assert not np.any(proven)
    np.testing.assert_array_equal(on_v, off_v)
