"""The endogenous grid method with a finite horizon: one round of it per period, each period certified.

Reference: the finite-horizon cake-eating problem with log utility and a gross return R on the cake kept,
whose consumption rule is the textbook closed form ``c_t = W_t (1 − β) / (1 − β^(T−t))`` (independent of R
for log utility).  One round of Carroll (2006)'s method per period inverts the Euler equation exactly, so
along the closed-form rule its policy is exact up to rounding wherever no constraint binds; and each
period's value is the fitted Bellman step's, so it agrees with the plain search's backward induction.
"""

from __future__ import annotations

import copy
from typing import Any

import numpy as np
import pytest

from service.checkpoints import decode_checkpoint, encode_checkpoint
from tests._documents import aging_saver
from worker import solve
from worker.errors import Canceled

BETA, RETURN = 0.9, 1.05
PERIODS, EXTRA = 6, 3


def closed_form_constants(total: int) -> tuple[np.ndarray, np.ndarray]:
    """``A_t = (1 − β^(T−t)) / (1 − β)`` and ``B_t`` of the value ``A_t log W + B_t`` (substituted into Bellman)."""
    A = (1 - BETA ** (total - np.arange(total + 1))) / (1 - BETA)
    B = np.zeros(total + 1)
    for t in range(total - 2, -1, -1):
        B[t] = -np.log(A[t]) + BETA * A[t + 1] * np.log(RETURN * BETA * A[t + 1] / A[t]) + BETA * B[t + 1]
    return A, B


def cake(terminal: str = "A * log(w) + B", method: str | None = "endogenous_grid") -> dict[str, Any]:
    """Choose tomorrow's cake `wn`, eat c = w − wn / R; by default the terminal value is the closed-form value
    of EXTRA more periods, so the rule of a (PERIODS + EXTRA)-period problem holds in every period."""
    A, B = closed_form_constants(PERIODS + EXTRA)
    document: dict[str, Any] = {
        "version": 1,
        "discount": BETA,
        "model": {
            "kind": "grid",
            "params": {"A": float(A[PERIODS]), "B": float(B[PERIODS]), "R": RETURN},
            "states": {"w": {"min": 0.005, "max": 2.0, "points": 200, "spacing": "log"}},
            "choices": {"wn": {"next_of": "w", "continuous": True}},
            "define": {"c": "w - wn / R"},
            "feasible": ["c > 0"],
            "reward": "log(c)",
            "hints": {"concave": True},
            "horizon": {"periods": PERIODS, "terminal_value": terminal},
        },
        "report": {"euler_errors": True},
    }
    if method is not None:
        document["solver"] = {"method": method}
    return document


def eaten(result: dict[str, Any]) -> tuple[np.ndarray, np.ndarray]:
    w = np.array(result["axes"]["w"])
    return w, w[None, :] - np.array(result["policy"]["wn"]) / RETURN


def inside(w: np.ndarray, t: int) -> np.ndarray:
    """Cakes from which no path leaves the grid before the horizon ends (what is kept is at least 0.7 of it)."""
    return w >= 0.005 / 0.7 ** (PERIODS - t)


def test_each_periods_round_gives_the_textbook_rule_and_the_value_is_the_fitted_steps() -> None:
    result = solve(cake())
    w, consumption = eaten(result)
    total = PERIODS + EXTRA
    for t in range(PERIODS):
        rule = w * (1 - BETA) / (1 - BETA ** (total - t))
        safe = inside(w, t)
        np.testing.assert_allclose(consumption[t, safe], rule[safe], rtol=1e-12)
    egm = result["diagnostics"]["continuous_choice"]["endogenous_grid"]
    assert egm["periods"] == PERIODS and egm["searched_periods"] == []
    # A concave cake: no period's round fails the method's check (worker.egm_horizon), and nothing is warned.
    assert not [w for w in result["diagnostics"]["warnings"] if "endogenous_grid" in w]
    assert len(egm["greedy_gap_by_period"]) == PERIODS and egm["value_gap"] >= -1e-12
    # The value is each period's fitted Bellman step: the plain search's backward induction gives the same
    # (both are the fitted problem's maxima; the searches stop within about 1e-8 of the choice).
    searched = solve(cake(method=None))
    np.testing.assert_allclose(np.array(result["value"]), np.array(searched["value"]), rtol=0, atol=1e-9)
    assert result["method"] == "backward_induction"
    assert any("endogenous grid method" in note for note in result["diagnostics"]["notes"])
    # The Euler-equation errors use the method's own rule: at rounding level where no constraint binds.
    errors = result["diagnostics"]["euler_errors"]
    assert errors["by_period"]["period"] == list(range(PERIODS - 1))
    assert errors["mean_log10"] < -12
    assert errors["mean_log10"] < searched["diagnostics"]["euler_errors"]["mean_log10"] - 5


def test_a_terminal_value_without_a_slope_makes_the_last_period_a_search() -> None:
    # where() on the state is not differentiable: the last period is searched, the rounds start before it.
    result = solve(cake(terminal="where(w > 100, 0, A * log(w) + B)"))
    egm = result["diagnostics"]["continuous_choice"]["endogenous_grid"]
    assert egm["searched_periods"] == [PERIODS - 1] and egm["periods"] == PERIODS - 1
    w, consumption = eaten(result)
    total = PERIODS + EXTRA
    for t in range(PERIODS - 1):
        # The searched period's policy is the fitted problem's (tomorrow's value read linearly between grid
        # points, whose step in log w is 3%): off by well under 1%, and the rounds before carry that relative
        # error on (with log utility, 1/c_t = βR/c_{t+1} passes it from tomorrow's consumption to today's).
        rule = w * (1 - BETA) / (1 - BETA ** (total - t))
        safe = inside(w, t)
        np.testing.assert_allclose(consumption[t, safe], rule[safe], rtol=1e-2)


def test_a_terminal_value_of_zero_keeps_the_least_in_the_last_period() -> None:
    result = solve(cake(terminal="0"))
    w = np.array(result["axes"]["w"])
    # Keeping is worth nothing after the last period: its choice is the grid's lower end everywhere.
    np.testing.assert_array_equal(np.array(result["policy"]["wn"])[-1], np.full(w.size, w[0]))
    searched = solve(cake(terminal="0", method=None))
    np.testing.assert_allclose(np.array(result["value"]), np.array(searched["value"]), rtol=0, atol=1e-9)


class MemoryCheckpoint:
    """A checkpoint store in memory, holding the bytes the service would write to Redis."""

    def __init__(self) -> None:
        self.payload: bytes | None = None

    def load(self) -> dict[str, Any] | None:
        return None if self.payload is None else decode_checkpoint(self.payload)

    def save(self, state: dict[str, Any]) -> None:
        self.payload = encode_checkpoint(state)


@pytest.mark.parametrize("stop_after", [1, 3])
def test_a_resumed_solve_reads_tomorrows_endogenous_grid_from_the_checkpoint(stop_after: int) -> None:
    document = cake()
    document["solver"]["checkpoint_s"] = 1e-9
    store = MemoryCheckpoint()
    polls = iter(range(100))
    with pytest.raises(Canceled):
        solve(document, checkpoint=store, should_stop=lambda: next(polls) >= stop_after)
    resumed = solve(copy.deepcopy(document), checkpoint=store)
    assert resumed["diagnostics"]["resumed_from_iteration"] == stop_after
    whole = solve(cake())
    assert resumed["value"] == whole["value"] and resumed["policy"] == whole["policy"]
    assert resumed["diagnostics"]["euler_errors"] == whole["diagnostics"]["euler_errors"]


def test_shocks_and_params_by_age_the_rounds_agree_with_the_search_and_solve_the_euler_equation_better() -> None:
    egm, searched = solve(aging_saver("endogenous_grid")), solve(aging_saver(None))
    # Both values are the fitted Bellman steps'.
    np.testing.assert_allclose(np.array(egm["value"]), np.array(searched["value"]), rtol=0, atol=1e-9)
    report = egm["diagnostics"]["continuous_choice"]["endogenous_grid"]
    assert report["periods"] == 8 and 0 <= report["value_gap"] < 1e-3
    # The rounds invert the Euler equation (bends included among their choice points); the linear search's
    # policy sits on the grid's kinks: its errors are thousands of times larger.
    mine, theirs = egm["diagnostics"]["euler_errors"], searched["diagnostics"]["euler_errors"]
    assert mine["mean_log10"] < -6 and mine["mean_log10"] < theirs["mean_log10"] - 3
    # The cohort follows the rounds' policy: its mean savings differ from the search's by the policy gap only.
    gap = np.abs(np.array(egm["cohort"]["means"]["a"]) - np.array(searched["cohort"]["means"]["a"])).max()
    assert 0 < gap < report["greedy_gap"]
