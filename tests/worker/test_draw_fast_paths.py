"""The fast paths of models with draws after the choice: compiled tables, merged evaluation steps, reduced solve.

References named beside each check:

* The numpy fill of the tables (:func:`worker.gridtables.precompute_tables`), which the compiled fill
  (:mod:`worker.drawkernel`) must reproduce bit for bit, counts and errors included.
* Dense reward ``R[s, a]`` and transition ``P[s, a, s']`` arrays written by hand from each invented
  scenario (the press, the worker and the shop of ``tests._draw_models``, each with its own
  interpolation and expectation over the draws): a
  policy's evaluation steps ``v ← r_σ + β P_σ v`` and its value ``(I − β P_σ)⁻¹ r_σ`` by
  ``numpy.linalg.solve``.
"""

from __future__ import annotations

import numpy as np
import pytest

from tests._documents import grid_document
from tests._draw_models import (
    TOP,
    inventory,
    inventory_arrays,
    job_search,
    job_search_arrays,
    machine,
    machine_arrays,
)
from worker import drawsteps, solve
from worker.document import parse_document
from worker.drawkernel import draw_tables
from worker.drawsteps import DrawGridProblem
from worker.errors import InvalidDocument
from worker.feasibility import model_data
from worker.gridmodel import compile_grid
from worker.gridproblem import GridProblem
from worker.gridtables import precompute_tables

BETA = 0.93



def wearing_past_the_end() -> dict:
    """The press without the cap on mileage: a kept press at the top wears off its grid (clamped)."""
    model = machine()
    model["next"] = {"mileage": "(1 - replace) * mileage + 0.5 * wear"}
    return model


def two_draws() -> dict:
    """The press with a second draw (a breakdown) and a define that uses both draws."""
    model = machine()
    model["shocks"]["breakdown"] = {
        "iid": {"values": [0, 1], "probs": ["0.9 + 0.08 * replace", "0.1 - 0.08 * replace"]},
        "timing": "after_choice",
    }
    model["define"] = {"moved": "0.5 * (wear + breakdown)"}
    model["next"] = {"mileage": f"min((1 - replace) * mileage + moved, {TOP})"}
    model["reward"] = "-(1 - replace) * 0.25 * mileage - replace * 6 - 0.3 * wear - 3 * breakdown"
    return model


def persistent() -> dict:
    """The press under a persistent price (a Markov chain before the choice, whose rows differ)."""
    model = machine()
    model["shocks"] = {"price": {"markov": {"values": [1.0, 3.0], "matrix": [[0.8, 0.2], [0.3, 0.7]]}},
                       **model["shocks"]}
    model["reward"] = "-(1 - replace) * 0.25 * mileage - replace * 2 * price - 0.3 * wear * price"
    return model


MODELS = {"machine": machine, "job_search": job_search, "inventory": inventory, "clamped": wearing_past_the_end,
          "two_draws": two_draws, "persistent": persistent}
ARRAYS = {"machine": (machine, machine_arrays), "job_search": (job_search, job_search_arrays),
          "inventory": (inventory, inventory_arrays)}


def data_of(model: dict):
    return model_data(parse_document(grid_document(model, discount=BETA)))


def problem_of(model: dict, method: str = "howard") -> DrawGridProblem:
    problem = compile_grid(parse_document(grid_document(model, discount=BETA, method=method)))
    assert isinstance(problem, DrawGridProblem)
    return problem


def random_policy(problem: GridProblem, seed: int) -> np.ndarray:
    """An allowed choice at every point, drawn at random."""
    rng = np.random.default_rng(seed)
    allowed = np.isfinite(problem._ctx[0])
    return np.array([rng.choice(np.flatnonzero(row)) for row in allowed], dtype=np.int64)


@pytest.mark.parametrize("name", sorted(MODELS))
def test_the_compiled_fill_gives_the_numpy_tables_bit_for_bit(name):
    data = data_of(MODELS[name]())
    expected, expected_counts = precompute_tables(data)
    tables, counts = draw_tables(data)
    assert len(tables) == len(expected) == 5
    for got, want in zip(tables, expected):
        assert got.dtype == want.dtype and got.shape == want.shape
        np.testing.assert_array_equal(got, want)
    for key, want in expected_counts.items():
        if isinstance(want, np.ndarray):
            np.testing.assert_array_equal(counts[key], want)
        else:
            assert counts[key] == want, key
    if name == "clamped":
        assert counts["clamped"] > 0


def test_nan_next_values_and_rewards_are_excluded_and_counted_as_numpy_counts_them():
    model = machine()
    # A NaN next value for a draw that can happen (wear 2 of a kept press above 20) and a NaN reward
    # (a kept press at mileage 3): both pairs are not allowed and counted as bad.
    model["next"] = {"mileage": f"where(wear * (1 - replace) * mileage > 40, 0 / 0, min(mileage + 0.5 * wear, {TOP}))"}
    model["reward"] = "where(mileage == 3 and replace == 0, 0 / 0, -(1 - replace) * 0.25 * mileage - replace * 6)"
    data = data_of(model)
    expected, expected_counts = precompute_tables(data)
    tables, counts = draw_tables(data)
    for got, want in zip(tables, expected):
        np.testing.assert_array_equal(got, want)
    assert counts["bad"] == expected_counts["bad"] > 0
    assert counts["bad_example"] == expected_counts["bad_example"]
    assert counts["allowed"] == expected_counts["allowed"]


def test_wrong_probabilities_raise_the_error_of_the_numpy_fill():
    model = machine()
    model["shocks"]["wear"]["iid"]["probs"] = ["0.3 + 0.2 * replace", "0.5", "0.2 - 0.25 * replace"]
    data = data_of(model)
    with pytest.raises(InvalidDocument) as numpy_error:
        precompute_tables(data)
    with pytest.raises(InvalidDocument) as compiled_error:
        draw_tables(data)
    assert compiled_error.value.errors == numpy_error.value.errors
    assert compiled_error.value.errors[0]["path"] == "model.shocks.wear.iid.probs"


def test_the_clamped_count_at_a_policy_reads_the_flags_of_the_tables():
    problem = problem_of(wearing_past_the_end())
    counts = []
    for seed in range(6):
        policy = random_policy(problem, seed)
        counts.append(problem._clamped_at_policy_numpy(policy))
        assert counts[-1] == GridProblem._clamped_at_policy_numpy(problem, policy)  # the numpy evaluation
    assert max(counts) > 0


@pytest.mark.parametrize("name", sorted(ARRAYS))
def test_evaluation_steps_over_merged_nodes_match_plain_numpy_steps(name):
    build, arrays = ARRAYS[name]
    R, P = arrays()
    problem = problem_of(build())
    policy = random_policy(problem, 3)
    rows = np.arange(R.shape[0])
    r, P_sigma = R[rows, policy], P[rows, policy]
    start = np.random.default_rng(4).normal(size=R.shape[0])
    v, done, span = problem.policy_steps(start, policy, 7)
    expected = start
    for _ in range(7):
        previous, expected = expected, r + BETA * P_sigma @ expected
    assert done == 7
    np.testing.assert_allclose(v, expected, rtol=0, atol=1e-12 * max(1.0, np.abs(expected).max()))
    increment = expected - previous
    assert span == pytest.approx(increment.max() - increment.min(), abs=1e-11)
    # The span stop ends the run after the first step whose increment is that narrow.
    _, stopped, _ = problem.policy_steps(start, policy, 1000, span_stop=1e-3)
    assert 0 < stopped < 1000


def test_evaluation_steps_with_a_persistent_shock_read_each_shocks_continuation():
    problem = problem_of(persistent())
    assert not drawsteps.identical_rows(problem._data.transition)
    policy = random_policy(problem, 5)
    dense = problem.policy_matrix(policy).toarray()  # the unmerged nodes of every draw, by the shock chain
    r = problem.policy_reward(policy)
    start = np.random.default_rng(6).normal(size=problem.n)
    v, _, _ = problem.policy_steps(start, policy, 5)
    expected = start
    for _ in range(5):
        expected = r + BETA * dense @ expected
    np.testing.assert_allclose(v, expected, rtol=0, atol=1e-12 * np.abs(expected).max())
    assert problem.exact_policy_value(policy) is None  # the reduced system needs identical rows


@pytest.mark.parametrize("dense", [True, False])
@pytest.mark.parametrize("name", sorted(ARRAYS))
def test_the_reduced_solve_gives_the_policy_value_of_the_full_system(name, dense, monkeypatch):
    if not dense:
        monkeypatch.setattr(drawsteps, "DENSE_SOLVE_MAX_GRID", 0)  # the sparse LU
    build, arrays = ARRAYS[name]
    R, P = arrays()
    problem = problem_of(build(), "policy_iteration")
    policy = random_policy(problem, 7)
    rows = np.arange(R.shape[0])
    expected = np.linalg.solve(np.eye(R.shape[0]) - BETA * P[rows, policy], R[rows, policy])
    value = problem.exact_policy_value(policy)
    np.testing.assert_allclose(value, expected, rtol=0, atol=1e-10 * np.abs(expected).max())


def test_policy_iteration_through_the_reduced_solve_matches_value_iteration_on_the_arrays():
    R, P = job_search_arrays()
    v = np.zeros(R.shape[0])
    while True:  # plain value iteration on the dense arrays, to a MacQueen-Porteus gap of 1e-12
        new = (R + BETA * (P @ v)).max(axis=1)
        gap = np.abs(new - v).max()
        v = new
        if BETA / (1 - BETA) * gap < 1e-12:
            break
    result = solve(grid_document(job_search(), discount=BETA, method="policy_iteration", tolerance=1e-9))
    assert result["status"] == "converged" and result["linear_solves"] >= 1
    assert np.abs(np.asarray(result["value"]).reshape(-1) - v).max() <= max(result["error_bound"], 1e-9)


def test_the_compiled_fill_on_several_threads_gives_the_same_tables(monkeypatch):
    from worker import threadpool

    data = data_of(job_search())
    expected, expected_counts = precompute_tables(data)
    monkeypatch.setattr(threadpool, "THREAD_MIN_PAIRS", 0)
    monkeypatch.setenv("FIXQ_SOLVE_THREADS", "3")
    assert threadpool.threads_for(data.n, data.n_choices) == 3
    tables, counts = draw_tables(data)
    for got, want in zip(tables, expected):
        np.testing.assert_array_equal(got, want)
    assert counts["allowed"] == expected_counts["allowed"] and counts["clamped"] == expected_counts["clamped"]


def test_the_compiled_fill_follows_defines_of_choices_transforms_and_numbers_in_probabilities():
    # An invented orchard: trees 0..6 (a state moved by a next expression), a persistent frost risk seen
    # before the choice, a spray choice; the harvest factor (log values, exp transform) is drawn after the
    # choice with probabilities that use a define of the choice and the state; a second draw has fixed numbers.
    model = {
        "params": {"price": 1.5, "spray_cost": 0.4},
        "states": {"trees": {"min": 0, "max": 6, "points": 7}},
        "shocks": {
            "frost": {"markov": {"values": [0.0, 1.0], "matrix": [[0.9, 0.1], [0.4, 0.6]]}},
            "harvest": {"iid": {"values": [-0.5, 0.0, 0.3], "probs": [
                "0.2 + 0.1 * frost - 0.1 * care", "0.5", "0.3 - 0.1 * frost + 0.1 * care"]},
                "transform": "exp", "timing": "after_choice"},
            "storm": {"iid": {"values": [0, 1], "probs": [0.85, 0.15]}, "timing": "after_choice"},
        },
        "choices": {"spray": {"values": [0, 1]}, "plant": {"values": [0, 1, 2]}},
        "define": {"care": "spray * min(trees, 4) / 4", "crop": "harvest * trees * (1 - 0.5 * storm)"},
        "feasible": ["trees + plant <= 7"],
        "next": {"trees": "min(trees + plant - storm * (trees > 2), 6.5)"},
        "reward": "price * crop - spray_cost * spray * trees - 0.3 * plant ** 2",
    }
    data = data_of(model)
    expected, expected_counts = precompute_tables(data)
    tables, counts = draw_tables(data)
    for got, want in zip(tables, expected):
        np.testing.assert_array_equal(got, want)
    for key in ("allowed", "bad", "bad_example", "clamped"):
        assert counts[key] == expected_counts[key], key
    assert counts["clamped"] > 0  # 6.5 lies beyond the grid's end, 6
