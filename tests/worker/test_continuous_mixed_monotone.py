"""The monotone hint on a continuous choice beside other choices: read for each combination of them.

The invented work-or-not-and-save household of ``tests/_mixed_models.py``: for a fixed work choice, savings
never fall as assets rise, but the kept (best) combination's savings do fall where the household stops
working, so each combination's search is narrowed by that combination's own choice at the point before.
Checked against the concave-only solve and the independent plain-numpy solver
(``tests._mixed_models.exact_bellman``); a false hint is caught by the unrestricted verification.
"""

from __future__ import annotations

import copy
from typing import Any

import numpy as np
import pytest

from tests._documents import with_horizon
from tests._mixed_models import INCOME, exact_bellman, exact_fixed_point, household_document
from worker import environment, threadpool
from worker.solve import compile_document, solve

BOTH = {"concave": True, "monotone": True}


@pytest.fixture(scope="module")
def concave_only() -> dict[str, Any]:
    return solve(household_document({"concave": True}))


@pytest.fixture(scope="module")
def both() -> dict[str, Any]:
    return solve(household_document(BOTH))


@pytest.fixture(scope="module")
def reference(concave_only: dict) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    grid = np.array(concave_only["axes"]["a"])
    return (grid, *exact_fixed_point(grid))


def test_the_kept_savings_fall_where_work_stops(reference: tuple) -> None:
    # What makes the per-combination reading needed: where the household stops working as assets rise, the
    # kept savings fall, so the kept choice at the point before would cut the resting combination's maximum
    # off (from the independent solver).
    _, _, save, work = reference
    stops = (work[:-1] == 1) & (work[1:] == 0)
    assert stops.any()
    assert (save[1:][stops] < save[:-1][stops]).any()


def test_monotone_and_concave_give_the_concave_answer_and_the_independent_one(both: dict, concave_only: dict,
                                                                            reference: tuple) -> None:
    _, v, save, work = reference
    assert both["status"] == "converged"
    assert both["diagnostics"]["verification"]["hints_held"] is True
    assert both["diagnostics"]["verification"]["policy_changes"] == 0
    assert np.abs(np.array(both["value"]) - np.array(concave_only["value"])).max() <= 1e-9
    np.testing.assert_array_equal(np.array(both["policy"]["work"]), np.array(concave_only["policy"]["work"]))
    np.testing.assert_allclose(np.array(both["policy"]["save"]), np.array(concave_only["policy"]["save"]),
                               atol=1e-6)
    # against the exact solver, within the tolerances of tests/worker/test_continuous_mixed.py
    assert np.abs(np.array(both["value"]) - v).max() <= both["error_bound"] + 1e-11
    np.testing.assert_array_equal(np.array(both["policy_index"]["work"]), work)
    np.testing.assert_allclose(np.array(both["policy"]["save"]), save, atol=1e-5)


def test_the_monotone_hint_alone_narrows_the_scan_to_the_same_answer(concave_only: dict) -> None:
    alone = solve(household_document({"monotone": True}))
    assert alone["diagnostics"]["verification"]["hints_held"] is True
    assert alone["diagnostics"]["continuous_choice"]["monotone_narrowing"] is True
    assert np.abs(np.array(alone["value"]) - np.array(concave_only["value"])).max() <= 1e-8
    np.testing.assert_array_equal(np.array(alone["policy"]["work"]), np.array(concave_only["policy"]["work"]))


def test_the_report_says_the_hint_is_read_per_combination(both: dict) -> None:
    described = both["diagnostics"]["continuous_choice"]
    assert described["monotone_narrowing"] is True and described["searched_for_each"] == ["work"]
    notes = both["diagnostics"].get("notes", [])
    assert not any("monotone hint is not used" in note for note in notes), notes
    assert any("monotone hint is read for each combination of `work`" in note for note in notes), notes


def test_each_hinted_step_is_the_unrestricted_one(both: dict) -> None:
    # At the solved value, the hinted Bellman step (narrowed per combination) finds what the scan finds.
    _, problem = compile_document(household_document(BOTH))
    v = np.array(both["value"]).reshape(-1)
    hinted_v, hinted = problem.bellman_step(v, restricted=True, policy_guess=None)
    full_v, full = problem.bellman_step(v, restricted=False)
    assert np.abs(hinted_v - full_v).max() <= 1e-12
    np.testing.assert_array_equal(hinted[:, 1], full[:, 1])
    np.testing.assert_allclose(hinted[:, 0], full[:, 0], atol=1e-6)


def _indebted(hints: dict) -> dict[str, Any]:
    """Invented: the household with cash that falls as ``a`` rises and a bonus for holding ``a``, so for each
    work choice savings fall as ``a`` rises and a monotone hint is false.  Narrowed by the point before, the
    search at high ``a`` finds no allowed saving at all in some combinations (cash below the choice before):
    the step searches those points again without the narrowing, and the verification catches the rest."""
    document = household_document(hints)
    model = copy.deepcopy(document["model"])
    model["define"] = {"c": "(1 + r) * (8 - a) + base + work * wage * y - save"}
    model["reward"] = "log(c) - disutility * work + 0.6 * a"
    document["model"] = model
    return document


def test_a_false_monotone_hint_is_caught_by_the_verification() -> None:
    honest = solve(_indebted({"concave": True}))
    false = solve(_indebted(BOTH))
    save = np.array(honest["policy"]["save"])
    assert (np.diff(save, axis=0) < -0.1).any()  # the hint is false: savings fall as assets rise
    check = false["diagnostics"]["verification"]
    # the first check caught it (the concave hint is true: the local phase from its choices then held)
    assert check["hints_held"] is False and check["local_search"]["first_policy_changes"] > 0
    assert check["local_search"]["hints_held"] is True
    assert any("hint" in warning for warning in false["diagnostics"]["warnings"]), false["diagnostics"]["warnings"]
    # the solve went on without the monotone narrowing, to the honest answer
    assert false["status"] == honest["status"] == "converged"
    assert np.abs(np.array(false["value"]) - np.array(honest["value"])).max() <= 1e-8
    np.testing.assert_array_equal(np.array(false["policy"]["work"]), np.array(honest["policy"]["work"]))
    # the hinted step really is narrowed: at the honest value it keeps savings from falling in each combination
    _, problem = compile_document(_indebted(BOTH))
    v = np.array(honest["value"]).reshape(-1)
    hinted_v, _ = problem.bellman_step(v, restricted=True)
    full_v, _ = problem.bellman_step(v, restricted=False)
    assert (full_v - hinted_v).max() > 1e-3


def test_two_threads_give_the_bits_of_one(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(threadpool, "THREAD_MIN_PAIRS", 0)
    results = []
    for threads in ("1", "2"):
        monkeypatch.setenv(environment.SOLVE_THREADS, threads)
        result = solve(household_document(BOTH))
        results.append((result["iterations"], np.array(result["value"]).tobytes(),
                        np.array(result["policy"]["save"]).tobytes(), result["policy_index"]["work"]))
    assert results[0] == results[1]


def test_a_finite_horizon_with_the_hint_is_the_independent_backward_induction(reference: tuple) -> None:
    grid = reference[0]
    document = with_horizon(household_document({"monotone": True}), {"periods": 4, "terminal_value": "log(1 + a)"})
    result = solve(document)
    v = np.repeat(np.log1p(grid)[:, None], INCOME.size, axis=1)
    expected_v, expected_work = [], []
    for _ in range(4):
        v, _, work = exact_bellman(v, grid)
        expected_v.insert(0, v)
        expected_work.insert(0, work)
    np.testing.assert_allclose(np.array(result["value"]), np.array(expected_v), rtol=0, atol=1e-9)
    np.testing.assert_array_equal(np.array(result["policy_index"]["work"]), np.array(expected_work))
    assert result["diagnostics"]["continuous_choice"]["monotone_narrowing"] is True
