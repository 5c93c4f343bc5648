"""The endogenous grid method on an infinite horizon whose problem is not concave.

The method (Carroll 2006) solves the first-order condition, which picks the best choice only in a concave
problem.  Before, a convex reward (``c**2/2``) ran 96 rounds and its policy came back the whole grid (12)
from the best choice with no warning, and a savings subsidy growing with the balance (a define convex in
the choice) had its endogenous grid quietly sorted.  Now the reward's concavity is checked before the rounds,
the endogenous states' order in each round and the expected marginal value's after them; a failure abandons
the rounds for Howard's method's search, with a warning, and the policy returned is the search's.

The reference is an independent value iteration written here in plain numpy on the same fitted problem
(tomorrow's value read linearly between the grid points), each choice found by a search over 4,001 evenly
spread choices and the grid points.
"""

from __future__ import annotations

from typing import Any, Callable

import numpy as np
import pytest

from worker.solve import solve

BETA, R, POINTS = 0.94, 0.03, 30
INCOME = np.array([0.7, 1.3])
CHAIN = np.array([[0.8, 0.2], [0.25, 0.75]])
GRID = np.linspace(0.0, 12.0, POINTS)
CHOICES = np.union1d(np.linspace(0.0, 12.0, 4001), GRID)


def household(define: str, reward: str) -> dict[str, Any]:
    """An invented household (a potter with a good and a bad kiln season) saving in a jar."""
    return {
        "version": 1, "label": "potter saving in a jar (invented)", "discount": BETA,
        "model": {
            "kind": "grid", "params": {"r": R},
            "states": {"a": {"min": 0.0, "max": 12.0, "points": POINTS}},
            "shocks": {"y": {"markov": {"values": INCOME.tolist(), "matrix": CHAIN.tolist()}, "transform": "none"}},
            "choices": {"save": {"next_of": "a", "continuous": True}},
            "define": {"c": define}, "reward": reward, "feasible": ["c > 0"],
        },
        "solver": {"method": "endogenous_grid", "tolerance": 1e-9},
    }


def plain_value_iteration(consumption: Callable[..., np.ndarray],
                          reward: Callable[[np.ndarray], np.ndarray]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Independent reference: ``(value (n, 2), choices (n, 2, m), objective (n, 2, m))`` of the fitted problem by
    value iteration to a change below 1e-11, a search at each point over ``CHOICES`` and the largest choice that
    keeps ``c > 0`` (by bisection; the best choice of a convex reward lies there)."""
    a, y = GRID[:, None, None], INCOME[None, :, None]
    c = consumption(a, y, CHOICES[None, None, :])
    # The first choice past the feasible ones at each point, and the boundary between it and the one before.
    first = np.argmax(np.concatenate([c <= 0, np.ones((POINTS, 2, 1), dtype=bool)], axis=2), axis=2)
    low = CHOICES[np.maximum(first - 1, 0)]
    high = np.where(first < CHOICES.size, CHOICES[np.minimum(first, CHOICES.size - 1)], CHOICES[-1])
    for _ in range(80):
        middle = 0.5 * (low + high)
        inside = consumption(GRID[:, None], INCOME[None, :], middle) > 0
        low, high = np.where(inside, middle, low), np.where(inside, high, middle)
    choices = np.concatenate([np.broadcast_to(CHOICES, (POINTS, 2, CHOICES.size)), low[:, :, None]], axis=2)
    c = consumption(a, y, choices)
    with np.errstate(all="ignore"):
        today = np.where(c > 0, reward(c), -np.inf)
    value = np.zeros((POINTS, 2))
    for _ in range(5000):
        later = np.stack([np.interp(choices, GRID, value[:, z]) for z in range(2)], axis=-1) @ CHAIN.T  # (n, 2, m, 2)
        objective = today + BETA * np.take_along_axis(later, np.arange(2)[None, :, None, None], axis=3)[..., 0]
        new = objective.max(axis=2)
        if np.abs(new - value).max() < 1e-11:
            break
        value = new
    return new, choices, objective


def reached(policy: np.ndarray, value: np.ndarray, consumption: Any, reward: Any) -> np.ndarray:
    """The reference's objective at the reported policy (n, 2): its reward and tomorrow's reference value."""
    later = np.stack([np.interp(policy, GRID, value[:, z]) for z in range(2)], axis=-1) @ CHAIN.T  # (n, 2, 2)
    return reward(consumption(GRID[:, None], INCOME[None, :], policy)) + BETA * np.stack(
        [later[:, z, z] for z in range(2)], axis=1)


CASES = [
    # A convex reward (a collector whose joy grows with each piece bought): the marginal reward rises with c.
    ("convex reward", "(1 + r) * a + y - save", "c**2 / 2",
     lambda a, y, s: (1 + R) * a + y - s, lambda c: c ** 2 / 2, "the marginal reward rises"),
    # A concave reward, but a subsidy on the jar growing with its balance: the define is convex in the choice,
    # and the endogenous states do not increase with the choice.
    ("subsidised savings", "(1 + r) * a + y - save + 0.03 * save**2", "log(c)",
     lambda a, y, s: (1 + R) * a + y - s + 0.03 * s ** 2, np.log, "endogenous states do not increase"),
]


@pytest.mark.parametrize(("name", "define", "reward", "consumption", "utility", "reason"), CASES,
                         ids=[case[0] for case in CASES])
def test_a_problem_that_is_not_concave_gets_the_best_choice_and_a_warning(
        name: str, define: str, reward: str, consumption: Any, utility: Any, reason: str) -> None:
    result = solve(household(define, reward))
    value, choices, objective = plain_value_iteration(consumption, utility)
    policy = np.array(result["policy"]["save"])
    np.testing.assert_allclose(np.array(result["value"]), value, atol=1e-4)  # the 4,001-choice search's accuracy
    # The reported policy reaches the reference's best (its reward and tomorrow's reference value), within the
    # search's accuracy, everywhere; and it is the reference's choice within two of its steps where the best is
    # unique (no rival 0.05 away within 1e-6 of the best).
    assert np.all(reached(policy, value, consumption, utility) >= value - 1e-4)
    best = np.take_along_axis(choices, objective.argmax(axis=2)[:, :, None], axis=2)[..., 0]
    far = np.abs(choices - best[:, :, None]) > 0.05
    unique = np.where(far, objective, -np.inf).max(axis=2) < value - 1e-6
    assert np.abs(policy - best)[unique].max() <= 2 * 12.0 / 4000
    said = [w for w in result["diagnostics"]["warnings"] if "endogenous_grid" in w]
    assert len(said) == 1 and reason in said[0] and "shock point y=" in said[0]
    assert "the method was not used" in said[0]
    assert result["diagnostics"]["continuous_choice"]["endogenous_grid"]["greedy_gap"] == 0.0


def test_the_rounds_check_the_expected_marginal_value(monkeypatch: pytest.MonkeyPatch) -> None:
    # With the reward's check off, the convex reward runs its rounds to the end with endogenous states that
    # increase; the expected marginal value of their policy rises with the choice, and that is caught.
    from worker.continuous import egm_checks

    monkeypatch.setattr(egm_checks, "reward_disorder", lambda *args: None)
    result = solve(household("(1 + r) * a + y - save", "c**2 / 2"))
    convex = (lambda a, y, s: (1 + R) * a + y - s, lambda c: c ** 2 / 2)
    value, _, _ = plain_value_iteration(*convex)
    np.testing.assert_allclose(np.array(result["value"]), value, atol=1e-4)
    assert np.all(reached(np.array(result["policy"]["save"]), value, *convex) >= value - 1e-4)
    report = result["diagnostics"]["continuous_choice"]["endogenous_grid"]
    assert report["rounds"] > 10 and report["greedy_gap"] == 0.0
    assert any("expected marginal value rises with the choice" in w for w in result["diagnostics"]["warnings"])


# The concave households keep the method with no warning: tests/worker/test_continuous_egm.py checks it on its
# household (test_the_value_agrees_with_howards_method_within_both_bounds), sharing that module's kernels.


def test_the_search_that_replaces_the_method_starts_from_solver_initial() -> None:
    # A warm start sent with solver.initial (last night's value, say) is where Howard's search starts when the
    # method is not used; before, it started from zeros whatever the document said.
    document = household("(1 + r) * a + y - save", "c**2 / 2")
    cold = solve(document)
    warm = solve({**document, "solver": {**document["solver"], "initial": {"values": cold["value"]}}})
    np.testing.assert_allclose(np.array(warm["value"]), np.array(cold["value"]), atol=1e-8)
    # From the fixed point itself the first Bellman step moves by no more than the cold solve's tolerance.
    assert warm["log"][0]["distance"] <= 1e-9 < cold["log"][0]["distance"]
    assert warm["iterations"] < cold["iterations"]
    said = [w for w in warm["diagnostics"]["warnings"] if "endogenous_grid" in w]
    assert len(said) == 1 and "from solver.initial" in said[0]
