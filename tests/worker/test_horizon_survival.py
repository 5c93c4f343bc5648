"""A survival probability of 0 at the last age: a horizon's discount may be 0 in a period.

Life tables end in 0 (nobody lives past the last age), so ``"discount": "discount * survival"`` gives
β_{T−1} = 0; before, that was refused ("the discount must be a positive number in every period"). With
β_t = 0 period t's value is its best reward, the next period's value not counting: checked against a plain
numpy backward induction written here (grid) and by hand (tabular). Invented scenarios: a glassblower's
household, a two-state apiary.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest

from tests._documents import tiny_tabular
from worker import solve
from worker.errors import InvalidDocument

BETA, R, POINTS = 0.95, 1.03, 13
INCOME = [0.5, 0.8, 1.0, 0.4]
SURVIVAL = [0.99, 0.97, 0.9, 0.0]


def household(survival: list[float]) -> dict[str, Any]:
    return {
        "version": 1, "label": "a glassblower's household with a life table (invented)", "discount": BETA,
        "model": {
            "kind": "grid",
            "params": {"R": R, "inc": INCOME, "surv": survival},
            "states": {"a": {"min": 0.0, "max": 3.0, "points": POINTS}},
            "choices": {"a_next": {"next_of": "a"}},
            "define": {"c": "R * a + inc - a_next"},
            "reward": "log(c)",
            "feasible": ["c > 0"],
            "horizon": {"periods": 4, "discount": "discount * surv", "terminal_value": "5 * log(1 + a)"},
        },
    }


def numpy_backward(survival: list[float]) -> np.ndarray:
    """V_t(a) = max_{a'} log(R a + y_t − a') + β s_t V_{t+1}(a'), V_4 = 5 log(1 + a): plain numpy."""
    a = np.linspace(0.0, 3.0, POINTS)
    value = 5 * np.log1p(a)
    values = []
    for t in reversed(range(4)):
        c = R * a[:, None] + INCOME[t] - a[None, :]
        with np.errstate(divide="ignore", invalid="ignore"):
            q = np.where(c > 0, np.log(np.where(c > 0, c, 1.0)) + BETA * survival[t] * value[None, :], -np.inf)
        value = q.max(axis=1)
        values.append(value)
    return np.array(values[::-1])


def test_a_life_table_ending_in_zero_is_solved() -> None:
    result = solve(household(SURVIVAL))
    assert result["diagnostics"]["horizon"]["discount"][-1] == 0.0
    assert np.max(np.abs(np.array(result["value"]) - numpy_backward(SURVIVAL))) < 1e-12
    assert np.all(np.array(result["policy_index"]["a_next"])[-1] == 0)  # the bequest does not count: spend it all


def test_a_negative_discount_is_still_refused() -> None:
    with pytest.raises(InvalidDocument) as caught:
        solve(household([0.99, 0.97, -0.1, 0.0]))
    assert caught.value.errors[0]["path"] == "model.horizon.discount"
    assert "in period 2" in caught.value.errors[0]["message"]


def test_a_tabular_discount_of_zero() -> None:
    document = tiny_tabular()
    document["model"]["horizon"] = {"periods": 2, "discount": [0.9, 0.0], "terminal_value": [100.0, -100.0]}
    value = np.array(solve(document)["value"])
    reward = np.array([[1.0, 0.0], [0.0, 2.0]])
    transition = np.array([[[0.5, 0.5], [1.0, 0.0]], [[0.0, 1.0], [0.3, 0.7]]])
    last = reward.max(axis=1)  # β_1 = 0: the terminal value does not count
    first = (reward + 0.9 * transition @ last).max(axis=1)
    assert np.allclose(value, [first, last], rtol=0, atol=1e-14)
