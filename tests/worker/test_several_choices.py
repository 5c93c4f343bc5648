"""Speed hints with several choices: used along the choice left once static choices are maximised out, and
reported plainly, hint by hint and choice by choice, wherever they cannot be used."""

from __future__ import annotations

import numpy as np

from tests._documents import TWO_CHOICES
from tests._documents import grid_document as document
from worker import solve
from worker.document import parse_document
from worker.estimate import grid_plan
from worker.feasibility import model_data
from worker.gridmodel import compile_grid
from worker.gridtables import precompute_tables
from worker.solvers import METHODS
from worker.statickernel import static_tables

LABOUR = {
    "params": {"alpha": 0.33, "delta": 0.1, "chi": 2.0, "eta": 0.5},
    "states": {"k": {"min": 1.0, "max": 6.0, "points": 40}},
    "shocks": {"z": {"markov": {"values": [0.9, 1.0, 1.1], "matrix": [[0.8, 0.15, 0.05], [0.1, 0.8, 0.1],
                                                                       [0.05, 0.15, 0.8]]}, "transform": "none"}},
    "choices": {"k_next": {"next_of": "k"}, "h": {"min": 0.1, "max": 1.0, "points": 15}},
    "define": {"c": "z * k**alpha * h**(1 - alpha) + (1 - delta) * k - k_next"},
    "reward": "log(c) - chi * h**(1 + 1 / eta) / (1 + 1 / eta)",
    "feasible": ["c > 0"],
}
"""Invented growth with elastic labour: capital is chosen for tomorrow, hours only matter today (log
utility of consumption is concave in hours, so the concave hint holds along both choices)."""
BOTH = {"monotone": True, "concave": True}


def _plain_value_iteration(
    beta: float, tolerance: float, bump: float = 0.0
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Independent plain numpy value iteration over every (k', h) pair at once: values, k' and h indices, (k, z).

    ``bump`` adds ``bump · |h − 0.5|`` to the reward (two peaks along the hours)."""
    alpha, delta, chi, eta = 0.33, 0.1, 2.0, 0.5
    k = np.linspace(1.0, 6.0, 40)
    z = np.array([0.9, 1.0, 1.1])
    P = np.array([[0.8, 0.15, 0.05], [0.1, 0.8, 0.1], [0.05, 0.15, 0.8]])
    h = np.linspace(0.1, 1.0, 15)
    c = (z[None, :, None, None] * k[:, None, None, None] ** alpha * h[None, None, None, :] ** (1 - alpha)
         + (1 - delta) * k[:, None, None, None] - k[None, None, :, None])
    with np.errstate(divide="ignore", invalid="ignore"):
        r = np.where(c > 0, np.log(np.where(c > 0, c, 1.0)), -np.inf) - chi * h ** (1 + 1 / eta) / (1 + 1 / eta)
    r = r + bump * np.abs(h - 0.5)
    v = np.zeros((40, 3))
    while True:
        total = r + beta * (v @ P.T).T[None, :, :, None]  # (k, z, k', h)
        new = total.reshape(40, 3, -1).max(axis=2)
        done = np.max(np.abs(new - v)) < tolerance
        v = new
        if done:
            break
    flat = (r + beta * (v @ P.T).T[None, :, :, None]).reshape(40, 3, -1).argmax(axis=2)
    return v, flat // 15, flat % 15


def test_hints_apply_to_capital_once_hours_are_maximised_out() -> None:
    doc = parse_document(document(LABOUR, hints=BOTH))
    plan = grid_plan(doc.model)
    assert plan.reward_storage == "tables" and plan.monotone and plan.concave and plan.static_concave
    assert plan.hint_note is None
    problem = compile_grid(doc, reward_storage="tables")
    assert problem.hints_active and problem._layout.hinted_axis == 0
    result = solve(document(LABOUR, hints=BOTH))
    assert result["status"] == "converged"
    diagnostics = result["diagnostics"]
    assert diagnostics["hints"] == {"monotone": True, "concave": True}
    assert diagnostics["maximised_within_period"] == ["h"]
    assert any("the monotone and concave hints apply to `k_next`" in note and "concave hint to `h`" in note
               for note in diagnostics["notes"])
    v, k_index, h_index = _plain_value_iteration(0.95, 1e-12)
    assert np.max(np.abs(np.array(result["value"]) - v)) <= 1e-7
    assert np.array_equal(np.array(result["policy_index"]["k_next"]), k_index)
    assert np.array_equal(np.array(result["policy_index"]["h"]), h_index)
    assert len(np.unique(h_index)) > 2  # hours respond to capital and productivity


def test_climbing_along_hours_finds_the_exhaustive_maxima_with_fewer_evaluations() -> None:
    data = model_data(parse_document(document(LABOUR)))
    (climbed, _, _, _), climbed_counts = static_tables(data, ("h",), climb=True)
    (scanned, _, _, _), scanned_counts = static_tables(data, ("h",), climb=False)
    assert np.array_equal(climbed, scanned)
    assert np.array_equal(climbed_counts["static_pick"], scanned_counts["static_pick"])
    assert climbed_counts["allowed"] < scanned_counts["allowed"] / 2
    # The compiled exhaustive tables against numpy's evaluation of every pair (worker.gridtables).
    (numpy_R, numpy_base, _, _), numpy_counts = precompute_tables(data, ("h",))
    (_, compiled_base, _, _), _ = static_tables(data, ("h",))
    finite = np.isfinite(numpy_R)
    assert np.array_equal(finite, np.isfinite(scanned))
    assert np.allclose(scanned[finite], numpy_R[finite], rtol=1e-13, atol=0)
    assert np.array_equal(scanned_counts["static_pick"], numpy_counts["static_pick"])
    assert np.array_equal(compiled_base, numpy_base)
    assert scanned_counts["allowed"] == numpy_counts["allowed"]


def test_two_static_choices_are_searched_together_and_the_unused_concave_hint_is_named() -> None:
    model = dict(LABOUR, choices={**LABOUR["choices"], "e": {"values": [0.0, 0.05, 0.1]}},
                 reward="log(c) - chi * h**(1 + 1 / eta) / (1 + 1 / eta) + e * h - e * e")
    doc = parse_document(document(model, hints=BOTH))
    plan = grid_plan(doc.model)
    assert plan.monotone and plan.concave and not plan.static_concave
    assert "the concave hint was not used along `h`, `e`" in plan.hint_note
    data = model_data(doc)
    (R, _, _, _), counts = static_tables(data, ("h", "e"), climb=True)
    (numpy_R, _, _, _), numpy_counts = precompute_tables(data, ("h", "e"))
    finite = np.isfinite(numpy_R)
    assert np.allclose(R[finite], numpy_R[finite], rtol=1e-13, atol=0)
    assert np.array_equal(counts["static_pick"], numpy_counts["static_pick"])
    assert len(np.unique(counts["static_pick"] % 3)) > 1  # `e` is not always the same value


def test_forced_pointwise_storage_says_the_hints_were_not_used_and_still_answers_exactly() -> None:
    doc = parse_document(document(LABOUR, hints=BOTH))
    problem = compile_grid(doc, reward_storage="on_the_fly")
    assert not problem.hints_active
    outcome = METHODS["howard"](problem, np.zeros(problem.n), tolerance=1e-8)
    assert outcome.status == "converged"
    diagnostics = problem.diagnostics(outcome.policy)
    assert diagnostics["hints"] == {"monotone": False, "concave": False}
    assert diagnostics["maximised_within_period"] == []
    assert any("the monotone and concave hints were not used: reward storage `on_the_fly` was forced" in note
               for note in diagnostics["notes"])
    v, k_index, h_index = _plain_value_iteration(0.95, 1e-12)
    assert np.max(np.abs(outcome.value.reshape(40, 3) - v)) <= 1e-7
    chosen = problem.choice_values(outcome.policy)
    assert np.array_equal(chosen["k_next"].reshape(40, 3), np.linspace(1.0, 6.0, 40)[k_index])
    assert np.array_equal(chosen["h"].reshape(40, 3), np.linspace(0.1, 1.0, 15)[h_index])


def test_static_tables_over_the_budget_say_why_the_hints_were_not_used() -> None:
    doc = parse_document(document(LABOUR, hints=BOTH))
    plan = grid_plan(doc.model, limits={"max_bytes": 4 * 120 * 40 * 16 - 4})
    assert plan.reward_storage == "on_the_fly" and not plan.hints_active
    assert "the monotone and concave hints were not used for `k_next`" in plan.hint_note
    assert "`h` could not be maximised out within the period" in plan.hint_note
    assert "over the precompute budget" in plan.hint_note
    assert grid_plan(doc.model, limits={"max_bytes": 4 * 120 * 40 * 16}).hints_active


def test_hints_with_two_choices_that_both_move_tomorrow_apply_to_the_last_one() -> None:
    # Both choices move tomorrow's state: the hinted search runs along `work` for every `a_next`, and the
    # final unrestricted step verifies it, so the answer is the unhinted one.
    result = solve(document(TWO_CHOICES, hints=BOTH))
    plain = solve(document(TWO_CHOICES))
    assert result["status"] == plain["status"] == "converged"
    diagnostics = result["diagnostics"]
    assert diagnostics["hints"] == {"monotone": False, "concave": True}
    assert diagnostics["verification"]["hints_held"]
    notes = " ".join(diagnostics["notes"])
    assert "the hints apply to `work`" in notes and "every combination of `a_next`" in notes
    assert "the monotone hint was not used" in notes
    assert np.abs(np.array(result["value"]) - np.array(plain["value"])).max() <= (
        result["error_bound"] + plain["error_bound"])
    assert result["policy_index"] == plain["policy_index"]


def test_static_tables_with_an_interpolated_state_match_numpy_evaluation() -> None:
    # TWO_CHOICES (human capital moves by a next expression) with an invented static choice `effort`.
    model = dict(TWO_CHOICES, choices={**TWO_CHOICES["choices"], "effort": {"min": 0.0, "max": 1.0, "points": 6}},
                 reward="log(c) - 0.5 * work**2 + 0.3 * effort - 0.4 * effort**2")
    doc = parse_document(document(model))
    data = model_data(doc)
    (R, base, lower, weight), counts = static_tables(data, ("effort",))
    (numpy_R, numpy_base, numpy_lower, numpy_weight), numpy_counts = precompute_tables(data, ("effort",))
    finite = np.isfinite(numpy_R)
    assert np.array_equal(finite, np.isfinite(R))
    assert np.allclose(R[finite], numpy_R[finite], rtol=1e-13, atol=0)
    assert np.array_equal(counts["static_pick"], numpy_counts["static_pick"])
    assert np.array_equal(base, numpy_base)
    assert np.array_equal(lower[finite], numpy_lower[finite])
    assert np.allclose(weight[finite], numpy_weight[finite], rtol=0, atol=1e-13)
    for key in ("allowed", "bad", "clamped"):
        assert counts[key] == numpy_counts[key], key
    # The concave hint along `effort` (its reward term is concave) picks the same.
    (climbed, _, _, _), climbed_counts = static_tables(data, ("effort",), climb=True)
    assert np.array_equal(climbed, R)
    assert np.array_equal(climbed_counts["static_pick"], counts["static_pick"])


def test_a_broken_concave_promise_along_hours_is_caught_and_reported_with_the_exact_answer() -> None:
    # |h − 0.5| bends the hours profile into two peaks: the concave hint is false along `h`.
    model = dict(LABOUR, reward=LABOUR["reward"] + " + 0.8 * abs(h - 0.5)")
    result = solve(document(model, hints=BOTH))
    assert result["status"] == "converged"
    notes = result["diagnostics"]["notes"]
    assert any("the concave hint did not hold along `h`" in note and "is exact all the same" in note
               for note in notes)
    v, k_index, h_index = _plain_value_iteration(0.95, 1e-12, bump=0.8)
    assert np.max(np.abs(np.array(result["value"]) - v)) <= 1e-7
    assert np.array_equal(np.array(result["policy_index"]["k_next"]), k_index)
    assert np.array_equal(np.array(result["policy_index"]["h"]), h_index)
    assert len(np.unique(h_index)) > 1


def test_hints_with_choices_that_move_nothing_apply_to_the_last_one() -> None:
    model = {  # invented: the state drifts on its own, two choices only matter today
        "states": {"x": {"min": 0.0, "max": 1.0, "points": 5}},
        "choices": {"a": {"values": [0.0, 0.5, 1.0]}, "b": {"values": [0.0, 1.0]}},
        "next": {"x": "0.5 * x + 0.1"},
        "reward": "x - (a - 0.3)**2 - (b - 0.6)**2",
    }
    plan = grid_plan(parse_document(document(model, hints={"concave": True})).model)
    assert plan.hints_active and plan.concave and not plan.monotone
    assert "the hints apply to `b`" in plan.hint_note and "every combination of `a`" in plan.hint_note
    hinted, plain = solve(document(model, hints={"concave": True})), solve(document(model))
    assert hinted["policy_index"] == plain["policy_index"]
    assert hinted["diagnostics"]["verification"]["hints_held"]

def test_a_nested_hinted_search_along_the_last_choice_matches_the_exhaustive_one() -> None:
    # TWO_CHOICES with the savings choice last: monotone and concave apply to `a_next`, searched once for every
    # `work`; each storage's answer must be the unhinted one, and the hinted steps the exhaustive ones at v.
    model = dict(TWO_CHOICES, choices={"work": TWO_CHOICES["choices"]["work"], "a_next": {"next_of": "a"}})
    plain = solve(document(model))
    for storage in ("tables", "on_the_fly"):
        doc = parse_document(document(model, hints=BOTH))
        problem = compile_grid(doc, reward_storage=storage)
        assert problem.hints_active and problem.hints.monotone and problem.hints.concave
        outcome = METHODS["howard"](problem, np.zeros(problem.n), tolerance=1e-9)
        assert outcome.verification["hints_held"], storage
        hinted_v, hinted_policy = problem.bellman_step(outcome.value, restricted=True)
        exact_v, exact_policy = problem.bellman_step(outcome.value, exhaustive=True)
        assert np.array_equal(hinted_policy, exact_policy) and np.array_equal(hinted_v, exact_v), storage
        assert np.abs(outcome.value - np.array(plain["value"]).reshape(-1)).max() <= (
            outcome.error_bound + plain["error_bound"])
