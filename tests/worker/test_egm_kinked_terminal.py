"""The endogenous grid method through a finite horizon whose continuation is not concave.

The method (Carroll 2006) inverts the first-order condition, which picks the best choice only where the
continuation is concave and smooth in the choice.  With a terminal value that has a kink (``min(a, 2)``)
or a dip (``abs(a - 2)``, ``where(...)``) the method's policy used to be far from the best choice with no
word said (a policy gap of 4.7 and a value loss of 2.4 with ``abs(a - 2)``).  Each period's round is now
checked (the endogenous states must rise with the choice, the interior choices first, and the expected
marginal value must not rise), a kinked terminal value makes the last period a search, and a period that
fails is solved by backward induction's search, with a warning naming the period and the shock point.

The reference is an independent backward induction written here in plain numpy: the same fitted problem
(tomorrow's value read linearly between grid points), each choice found by a search over 6,001 evenly
spread choices.  A concave case (CRRA cake eating, closed form by the standard derivation below) still
uses the method in every period, with no warning.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest

from worker import solve

PERIODS, POINTS, GAMMA, BETA = 3, 30, 2.0, 0.95
SHOCKS = np.array([0.6, 1.4])
MATRIX = np.array([[0.8, 0.2], [0.3, 0.7]])
INCOME = [1.0, 0.8, 0.5]
RETURN = 1.03


def household(terminal: str) -> dict[str, Any]:
    """An invented household (a beekeeper with a good and a bad honey year) saving for a bequest.

    Written as ``tests._documents.aging_saver`` writes its household (interest ``r``, income by period times
    ``exp`` of a shock in logs, its params in that order), so the two are one structure and share their compiled
    kernels (DEVELOPERS.md, the suite's time): the same numbers as the reference's, up to rounding."""
    return {
        "version": 1, "label": "beekeeper with a bequest (invented)", "discount": BETA,
        "model": {
            "kind": "grid",
            "params": {"r": RETURN - 1, "g": GAMMA, "inc": INCOME},
            "states": {"a": {"min": 0.0, "max": 6.0, "points": POINTS}},
            "shocks": {"z": {"markov": {"values": np.log(SHOCKS).tolist(), "matrix": MATRIX.tolist()}}},
            "choices": {"a_next": {"next_of": "a", "continuous": True}},
            "define": {"c": "(1 + r) * a + inc * exp(z) - a_next"},
            "reward": "c**(1-g)/(1-g)", "feasible": ["c > 0"],
            "interpolation": "linear", "hints": {"concave": True},
            "horizon": {"periods": PERIODS, "terminal_value": terminal},
        },
        "solver": {"method": "endogenous_grid"},
    }


def plain_backward_induction(terminal: Any) -> tuple[np.ndarray, np.ndarray, list[np.ndarray]]:
    """Independent reference: ``(values (T, n, 2), policies (T, n, 2), objectives)`` by a search over 6,001
    choices and the grid points per point, tomorrow's value read linearly on the grid (the fitted problem)."""
    grid = np.linspace(0.0, 6.0, POINTS)
    choices = CHOICES
    after = np.repeat(terminal(grid)[:, None], 2, axis=1)
    values, policies, objectives = [], [], []
    for t in reversed(range(PERIODS)):
        later = np.column_stack([np.interp(choices, grid, after[:, z]) for z in range(2)]) @ MATRIX.T  # (m, z)
        c = RETURN * grid[:, None, None] + INCOME[t] * SHOCKS[None, :, None] - choices[None, None, :]
        with np.errstate(all="ignore"):
            objective = np.where(c > 0, c ** (1 - GAMMA) / (1 - GAMMA), -np.inf) + BETA * later.T[None, :, :]
        best = objective.argmax(axis=2)
        after = objective.max(axis=2)
        values.append(after)
        policies.append(choices[best])
        objectives.append(objective)
    return np.array(values[::-1]), np.array(policies[::-1]), objectives[::-1]


CHOICES = np.union1d(np.linspace(0.0, 6.0, 6001), np.linspace(0.0, 6.0, POINTS))
"""The reference's choices: 6,001 evenly spread, and the grid points (where the fitted objective bends)."""

KINKED = [
    ("abs(a - 2)", lambda a: np.abs(a - 2)),
    ("min(a, 2)", lambda a: np.minimum(a, 2)),
    ("where(a < 2, 2 - a, a - 2)", lambda a: np.abs(a - 2)),
]


@pytest.mark.parametrize(("text", "terminal"), KINKED, ids=[text for text, _ in KINKED])
def test_a_kinked_terminal_value_gives_the_best_choice_and_says_so(text: str, terminal: Any) -> None:
    result = solve(household(text))
    values, policies, objectives = plain_backward_induction(terminal)
    policy = np.array(result["policy"]["a_next"])
    np.testing.assert_allclose(np.array(result["value"]), values, atol=1e-4)  # the fine search's accuracy
    choices = CHOICES
    for t in range(PERIODS):
        # The reported policy's objective (tomorrow's value of the reference) is the reference's best, within
        # the 6,001-choice search's accuracy, at every point; and the policy is the reference's choice within
        # a few of its steps wherever the best choice is unique (no second peak within 1e-6 of the best).
        reached = np.stack([[np.interp(policy[t, i, z], choices, objectives[t][i, z]) for z in range(2)]
                            for i in range(POINTS)])
        assert np.all(reached >= values[t] - 1e-4), (t, float((values[t] - reached).max()))
        far = np.abs(choices[None, None, :] - policies[t][:, :, None]) > 0.05
        rival = np.where(far, objectives[t], -np.inf).max(axis=2)
        unique = rival < values[t] - 1e-6
        gap = np.abs(policy[t] - policies[t])[unique]
        assert gap.max() <= 0.01, (t, float(gap.max()))
    egm = result["diagnostics"]["continuous_choice"]["endogenous_grid"]
    assert PERIODS - 1 in egm["searched_periods"]
    assert egm["greedy_gap"] <= 1e-9 and egm["value_gap"] <= 1e-9
    said = [w for w in result["diagnostics"]["warnings"] if "endogenous_grid" in w]
    assert said and all("search" in w for w in said)
    if "min(" in text or "abs(" in text:
        assert any("terminal_value has a kink" in w for w in said)
    if len(egm["searched_periods"]) > 1:
        assert any("at shock point z=" in w and "in period" in w for w in said)


# A concave cake keeps a round in every period with no warning: tests/worker/test_horizon_egm.py checks it on its
# cake (test_each_periods_round_gives_the_textbook_rule_and_the_value_is_the_fitted_steps), sharing its kernels.
