"""Taste shocks on grid models with grid-restricted choices.

References named beside each check:

* An independent plain-numpy smoothed value iteration written here, on arrays built by hand from the
  invented machine's description (mileage, wear draws, keep or replace), with its own linear interpolation.
* Hotz & Miller (1993): log(P_a/P_b) = (v_a − v_b)/s between choice-specific values.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from tests._documents import grid_document
from worker import solve
from worker.errors import InvalidDocument, TooLarge
from worker.solvers import GENERAL_METHODS

WEAR = [0.0, 1.0, 2.0]
WEAR_PROBS = [0.35, 0.5, 0.15]
TOP = 39


def machine(scale: float, step: str = "wear", **extra: object) -> dict:
    """An invented lathe: mileage 0..TOP, a wear draw seen today, keep (0) or replace (1) at a cost of 6."""
    return {
        "states": {"mileage": {"min": 0, "max": TOP, "points": TOP + 1}},
        "shocks": {"wear": {"iid": {"values": WEAR, "probs": WEAR_PROBS}}},
        "choices": {"replace": {"values": [0, 1]}},
        "next": {"mileage": f"(1 - replace) * min(mileage + {step}, {TOP})"},
        "reward": "-(1 - replace) * 0.2 * mileage - replace * 6",
        "taste_shocks": {"scale": scale},
        **extra,
    }


def plain_machine_solution(scale: float, beta: float, half_steps: bool = False) -> np.ndarray:
    """Independent reference: smoothed value iteration on the machine, (mileage, wear) arrays, to 1e-12."""
    mileage = np.arange(TOP + 1, dtype=float)
    wear = np.array(WEAR)
    probs = np.array(WEAR_PROBS)
    v = np.zeros((TOP + 1, 3))
    keep_next = np.minimum(mileage[:, None] + (0.5 if half_steps else 1.0) * wear[None, :], TOP)
    lower = np.minimum(np.floor(keep_next).astype(int), TOP - 1)
    frac = keep_next - lower
    while True:
        expected = v @ probs  # EV(m') over tomorrow's wear
        keep = -0.2 * mileage[:, None] + beta * ((1 - frac) * expected[lower] + frac * expected[lower + 1])
        replace = -6.0 + beta * expected[0] + 0 * keep
        top = np.maximum(keep, replace)
        new = top + scale * np.log(np.exp((keep - top) / scale) + np.exp((replace - top) / scale))
        gap = np.abs(new - v).max()
        v = new
        if beta / (1 - beta) * gap < 1e-12:
            return v


@pytest.mark.parametrize("method", sorted(GENERAL_METHODS))
@pytest.mark.parametrize("half_steps", [False, True])
def test_grid_machine_matches_an_independent_numpy_solver_within_the_bound(method, half_steps):
    beta, scale = 0.95, 0.8
    reference = plain_machine_solution(scale, beta, half_steps)
    model = machine(scale, "0.5 * wear" if half_steps else "wear")
    document = grid_document(model, discount=beta, method=method, tolerance=1e-5)
    result = solve(document)
    assert result["status"] == "converged"
    error = np.abs(np.asarray(result["value"]) - reference).max()
    assert error <= result["error_bound"]
    p = np.asarray(result["choice_probabilities"])
    assert p.shape == (TOP + 1, 3, 2)
    np.testing.assert_allclose(p.sum(axis=-1), 1.0, rtol=0, atol=1e-14)
    assert result["policy_index"]["replace"] == p.argmax(axis=-1).tolist()


def test_three_methods_agree_on_a_grid_model_within_their_bounds():
    document = grid_document(machine(0.3), discount=0.97, tolerance=1e-4)
    results = [solve({**document, "solver": {"method": m, "tolerance": 1e-4}}) for m in sorted(GENERAL_METHODS)]
    for a in results:
        for b in results:
            gap = np.abs(np.asarray(a["value"]) - np.asarray(b["value"])).max()
            assert gap <= a["error_bound"] + b["error_bound"]


def test_two_choices_give_probabilities_over_their_product_and_satisfy_hotz_miller():
    # Hotz & Miller (1993): log(P_a/P_b) = (v_a − v_b)/s, with v_a computed here from the returned value.
    beta, scale = 0.9, 0.5
    model = machine(scale)
    model["choices"] = {"replace": {"values": [0, 1]}, "oil": {"values": [0.0, 0.5, 1.0]}}
    model["reward"] = "-(1 - replace) * 0.2 * mileage - replace * 6 - oil + 1.5 * sqrt(oil) * (mileage > 10)"
    result = solve(grid_document(model, discount=beta, method="policy_iteration", tolerance=1e-11))
    p = np.asarray(result["choice_probabilities"])
    assert p.shape == (TOP + 1, 3, 2, 3)
    assert result["diagnostics"]["taste_shocks"]["choices"] == {"replace": [0.0, 1.0], "oil": [0.0, 0.5, 1.0]}
    assert result["diagnostics"]["maximised_within_period"] == []
    v = np.asarray(result["value"])
    expected = v @ np.array(WEAR_PROBS)
    mileage = np.arange(TOP + 1, dtype=float)[:, None]
    keep_next = np.minimum(mileage + np.array(WEAR)[None, :], TOP).astype(int)
    values = np.empty((TOP + 1, 3, 2, 3))
    for oil, o in enumerate([0.0, 0.5, 1.0]):
        bonus = 1.5 * math.sqrt(o) * (mileage > 10)
        values[:, :, 0, oil] = -0.2 * mileage - o + bonus + beta * expected[keep_next]
        values[:, :, 1, oil] = -6.0 - o + bonus + beta * expected[0]
    for replace in range(2):
        for oil in range(3):
            np.testing.assert_allclose(
                np.log(p[:, :, replace, oil] / p[:, :, 0, 0]),
                (values[:, :, replace, oil] - values[:, :, 0, 0]) / scale,
                rtol=0, atol=1e-9,
            )


def test_stationary_distribution_and_simulation_use_the_probabilities():
    document = grid_document(machine(0.8), discount=0.95, tolerance=1e-10)
    document["report"] = {"stationary": True, "simulation": {"periods": 300, "paths": 300, "seed": 9}}
    result = solve(document)
    p = np.asarray(result["choice_probabilities"])
    pi = np.asarray(result["stationary"]["distribution"])
    share = float((pi * p[:, :, 1]).sum())
    assert result["stationary"]["means"]["replace"] == pytest.approx(share, abs=1e-12)
    # Seeded draws of 90,000 periods along correlated paths: 0.02 (common practice for a seeded check).
    assert result["simulation"]["summary"]["replace"]["mean"] == pytest.approx(share, abs=0.02)
    first = result["simulation"]["first_path"]
    # After a drawn replacement tomorrow's mileage is 0, as the model says.
    assert all(m == 0.0 for r, m in zip(first["replace"][:-1], first["mileage"][1:]) if r == 1.0)
    assert 1.0 in first["replace"]


def test_hints_are_not_used_and_the_diagnostics_say_so():
    result = solve(grid_document(machine(0.5), hints={"monotone": True}))
    notes = " ".join(result["diagnostics"]["notes"])
    assert "hints do not apply with taste shocks" in notes
    assert "scans the tables" in notes
    assert result["diagnostics"]["verification"] is None


def test_tables_over_the_budget_are_refused_at_taste_shocks():
    # The budget is a quarter of the cap: 1,000 bytes cannot hold the tables of 240 pairs.
    document = grid_document(machine(0.5))
    with pytest.raises(TooLarge) as caught:
        solve(document, limits={"max_bytes": 4_000})
    assert caught.value.errors[0]["path"] == "model.taste_shocks"
    from worker.document import parse_document
    from worker.gridmodel import compile_grid

    with pytest.raises(TooLarge) as caught:
        compile_grid(parse_document(document), limits={"max_bytes": 4_000})
    assert caught.value.errors[0]["path"] == "model.taste_shocks"
    assert "taste shocks" in caught.value.errors[0]["message"]


def test_a_continuous_choice_with_taste_shocks_is_refused():
    model = {
        "states": {"k": {"min": 0.1, "max": 2.0, "points": 20}},
        "choices": {"k_next": {"next_of": "k", "continuous": True}},
        "define": {"c": "k**0.3 - k_next"},
        "reward": "log(c)",
        "feasible": ["c > 0"],
        "taste_shocks": {"scale": 0.1},
    }
    with pytest.raises(InvalidDocument) as caught:
        solve(grid_document(model))
    error = next(e for e in caught.value.errors if e["path"] == "model.taste_shocks")
    assert "continuous" in error["message"]
    # Shocks listed on a discrete choice beside it are refused too, and the words say it is the model: before,
    # "`k_next` is continuous" read as if k_next had been listed.
    model["choices"]["work"] = {"values": [0.0, 1.0]}
    model["define"]["c"] = "k**0.3 + 0.1 * work - k_next"
    model["taste_shocks"] = {"scale": 0.1, "choices": ["work"]}
    with pytest.raises(InvalidDocument) as caught:
        solve(grid_document(model))
    error = next(e for e in caught.value.errors if e["path"] == "model.taste_shocks")
    assert "even on `work` alone: a model with a continuous choice has none yet" in error["message"]


@pytest.mark.parametrize("threads", [1, 2])
def test_fused_evaluation_steps_equal_steps_with_the_mixed_matrix(monkeypatch, threads):
    # The compiled fixed-policy kernels evaluate the probabilities through every pair's nodes; the sparse
    # P_π built separately must give the same steps (to rounding), on one thread and on two.
    from worker import threadpool
    from worker.solve import compile_document

    model = machine(0.4, "0.5 * wear")
    model["shocks"] = {"wear": {"markov": {"values": WEAR, "matrix": [[0.6, 0.3, 0.1], [0.2, 0.6, 0.2],
                                                                       [0.1, 0.3, 0.6]]}}}
    problem = compile_document(grid_document(model, discount=0.95))[1]
    problem.threads = threads
    monkeypatch.setattr(threadpool, "THREAD_MIN_STEP_POINTS", 0)
    v = np.random.default_rng(5).normal(size=problem.n)
    _, policy = problem.bellman_step(v)
    matrix, reward = problem.policy_matrix(policy), problem.policy_reward(policy)
    np.testing.assert_allclose(matrix.sum(axis=1).A1, 1.0, rtol=0, atol=1e-13)
    np.testing.assert_allclose(problem.policy_step(v, policy), reward + 0.95 * (matrix @ v), rtol=0, atol=1e-12)
    stepped, done, _ = problem.policy_steps(v, policy, 3)
    assert done == 3
    expected = v
    for _ in range(3):
        expected = reward + 0.95 * (matrix @ expected)
    np.testing.assert_allclose(stepped, expected, rtol=0, atol=1e-11)
