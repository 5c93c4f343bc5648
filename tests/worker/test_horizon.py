"""Finite horizons (``model.horizon``): backward induction, checked against sources outside fixq.

* the finite-horizon cake-eating problem with log utility, whose consumption rule
  ``c_t = W_t (1 − β) / (1 − β^(T−t))`` and value ``A_t log W + B_t`` are a textbook closed form;
* a small life-cycle model and a tabular model against backward induction written here in plain numpy;
* the infinite-horizon solution as the limit of long horizons: with terminal value 0 the first
  period's value is ``T^T 0`` for the Bellman operator ``T``, a β-contraction, so
  ``‖V_0 − v*‖∞ ≤ β^T ‖v*‖∞`` (Banach's fixed-point theorem).
"""

from __future__ import annotations

import copy
from typing import Any

import numpy as np
import pytest

from service.checkpoints import decode_checkpoint, encode_checkpoint
from tests._documents import with_horizon, with_period_slot
from worker import solve
from worker.document import parse_document
from worker.errors import Canceled, InvalidDocument
from worker.estimate import estimate

BETA = 0.9


def cake(periods: int, points: int, *, hints: bool = True, terminal: Any = 0.0) -> dict[str, Any]:
    """Cake eating on a uniform grid of [0, 2]: eat w − wn, keep wn (a grid point) for tomorrow.

    The point w = 0 stands for "no cake left": every earlier period avoids it (its reward of −10⁶
    stands for log 0 = −∞), and the last period, whose terminal value is 0, eats what is left.
    """
    return {
        "version": 1,
        "discount": BETA,
        "model": {
            "kind": "grid",
            "states": {"w": {"min": 0.0, "max": 2.0, "points": points}},
            "choices": {"wn": {"next_of": "w"}},
            "feasible": ["wn < w or w == 0"],
            "reward": "where(w > 0, log(w - wn), -1e6)",
            "hints": {"monotone": hints, "concave": hints},
            "horizon": {"periods": periods, "terminal_value": terminal},
        },
    }


def cake_closed_form(periods: int, w: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Textbook closed form of finite-horizon log cake eating: consumption and value, each (T, W).

    With ``A_t = (1 − β^(T−t)) / (1 − β)`` the rule is ``c_t = W / A_t`` and the value
    ``A_t log W + B_t``, where ``B_t = −log A_t + β A_{t+1} log(β A_{t+1} / A_t) + β B_{t+1}``,
    ``B_{T−1} = 0`` (substituting the rule into the Bellman equation).
    """
    A = (1 - BETA ** (periods - np.arange(periods + 1))) / (1 - BETA)
    B = np.zeros(periods + 1)
    for t in range(periods - 2, -1, -1):
        B[t] = -np.log(A[t]) + BETA * A[t + 1] * np.log(BETA * A[t + 1] / A[t]) + BETA * B[t + 1]
    consumption = w[None, :] / A[:periods, None]
    value = A[:periods, None] * np.log(w[None, :]) + B[:periods, None]
    return consumption, value


@pytest.mark.parametrize("hints", [True, False])
def test_cake_eating_follows_the_textbook_consumption_rule(hints: bool) -> None:
    periods, points = 8, 601
    result = solve(cake(periods, points, hints=hints))
    assert result["status"] == "converged" and result["method"] == "backward_induction"
    assert list(result["axes"]) == ["period", "w"] and result["axes"]["period"] == list(range(periods))
    w = np.array(result["axes"]["w"])
    step = w[1] - w[0]
    eaten = w[None, :] - np.array(result["policy"]["wn"])
    value = np.array(result["value"])
    assert value.shape == (periods, points)
    consumption, exact = cake_closed_form(periods, w[1:])
    # The choice is a grid point, so consumption is the closed form rounded to the grid, moved a little
    # further by the grid's error in tomorrow's value: within 1.5 grid steps (common practice).
    assert np.abs(eaten[:, 1:] - consumption).max() <= 1.5 * step
    # The last period eats everything (terminal value 0), exactly.
    np.testing.assert_array_equal(eaten[-1], w)
    # Restricting the choices to the grid can only lower the value: never above the closed form.
    assert (value[:, 1:] <= exact + result["error_bound"]).all()
    # From cake 0.5 up, the grid's loss is below 1% of a period's utility scale.
    rich = w[1:] >= 0.5
    assert (exact - value[:, 1:])[:, rich].max() < 0.01
    if hints:
        verification = result["diagnostics"]["verification"]
        assert verification["periods"] == periods and verification["hints_held"]


def test_the_error_bound_is_the_accumulated_rounding_allowance() -> None:
    result = solve(cake(4, 101))
    allowance = result["diagnostics"]["horizon"]["rounding_allowance"]
    assert len(allowance) == 4 and result["error_bound"] == max(allowance)
    # Later periods' allowances carry into earlier ones, discounted: e_t = ρ_t + β e_{t+1}.
    assert all(a >= BETA * b for a, b in zip(allowance, allowance[1:]))
    assert 0 < result["error_bound"] < 1e-6
    assert any("exact up to rounding" in note for note in result["diagnostics"]["notes"])


AGES = 6
INCOME = [1.0, 1.3, 1.6, 1.8, 0.7, 0.7]
SURVIVAL = [0.99, 0.98, 0.96, 0.93, 0.88, 0.8]
ASSETS = np.linspace(0.0, 4.0, 41)
SHOCK_VALUES = [0.8, 1.0, 1.25]
SHOCK_MATRIX = [[0.7, 0.25, 0.05], [0.15, 0.7, 0.15], [0.05, 0.25, 0.7]]


def life_cycle(**horizon: Any) -> dict[str, Any]:
    """An invented life cycle: income by age, a pension from age 4 on, survival in the discount, a bequest."""
    return {
        "version": 1,
        "discount": 0.96,
        "model": {
            "kind": "grid",
            "params": {"r": 0.03, "income": INCOME, "survival": SURVIVAL, "pension": 0.9, "bequest": 0.5},
            "states": {"a": {"values": ASSETS.tolist()}},
            "shocks": {"y": {"markov": {"values": SHOCK_VALUES, "matrix": SHOCK_MATRIX}}},
            "choices": {"an": {"next_of": "a"}},
            "define": {"earnings": "where(period >= 4, pension, income * y)", "c": "(1 + r) * a + earnings - an"},
            "feasible": ["c > 0"],
            "reward": "log(c)",
            "hints": {"monotone": True, "concave": True},
            "horizon": {"periods": AGES, "terminal_value": "bequest * log(1 + a)",
                        "discount": "discount * survival", **horizon},
        },
    }


def life_cycle_by_numpy() -> tuple[np.ndarray, np.ndarray]:
    """Independent backward induction of :func:`life_cycle` in plain numpy: value and savings, (T, a, y)."""
    y = np.array(SHOCK_VALUES)
    P = np.array(SHOCK_MATRIX)
    after = np.broadcast_to(0.5 * np.log(1 + ASSETS)[:, None], (ASSETS.size, y.size))
    values, savings = [], []
    for t in range(AGES - 1, -1, -1):
        earnings = np.full(y.size, 0.9) if t >= 4 else INCOME[t] * y
        c = (1.03 * ASSETS)[:, None, None] + earnings[None, :, None] - ASSETS[None, None, :]  # (a, y, a')
        expected = after @ P.T  # (a', y): E[V(a', y') | y]
        with np.errstate(divide="ignore", invalid="ignore"):
            q = np.where(c > 0, np.log(np.where(c > 0, c, 1.0)), -np.inf) + 0.96 * SURVIVAL[t] * expected.T[None]
        best = q.argmax(axis=2)
        after = q.max(axis=2)
        values.append(after)
        savings.append(ASSETS[best])
    return np.array(values[::-1]), np.array(savings[::-1])


def test_life_cycle_matches_a_plain_numpy_backward_induction() -> None:
    result = solve(life_cycle())
    value, savings = life_cycle_by_numpy()
    assert list(result["axes"]) == ["period", "a", "y"]
    np.testing.assert_allclose(np.array(result["value"]), value, rtol=0, atol=1e-12)
    np.testing.assert_array_equal(np.array(result["policy"]["an"]), savings)
    discounts = result["diagnostics"]["horizon"]["discount"]
    np.testing.assert_allclose(discounts, 0.96 * np.array(SURVIVAL), rtol=1e-15)
    assert result["diagnostics"]["verification"]["hints_held"]


def test_life_cycle_reports_progress_per_period_and_cancels_between_periods() -> None:
    entries: list[dict[str, Any]] = []
    solve(life_cycle(), on_progress=entries.append)
    assert [entry["period"] for entry in entries] == list(range(AGES - 1, -1, -1))
    assert [entry["iteration"] for entry in entries] == list(range(1, AGES + 1))
    polls = iter(range(100))
    with pytest.raises(Canceled) as caught:
        solve(life_cycle(), should_stop=lambda: next(polls) >= 2)
    assert caught.value.context["iteration"] == 2 and len(caught.value.context["log"]) == 2


class MemoryCheckpoint:
    """A checkpoint store in memory, holding the bytes the service would write to Redis."""

    def __init__(self) -> None:
        self.payload: bytes | None = None

    @property
    def state(self) -> dict[str, Any] | None:
        return None if self.payload is None else decode_checkpoint(self.payload)

    def load(self) -> dict[str, Any] | None:
        return self.state

    def save(self, state: dict[str, Any]) -> None:
        self.payload = encode_checkpoint(state)


def test_a_checkpoint_by_period_resumes_with_the_next_period() -> None:
    document = life_cycle()
    document["solver"] = {"checkpoint_s": 1e-9}
    store = MemoryCheckpoint()
    polls = iter(range(100))
    with pytest.raises(Canceled):
        solve(document, checkpoint=store, should_stop=lambda: next(polls) >= 3)
    assert store.state is not None and store.state["iteration"] == 3 and store.state["values"].shape == (3, 41 * 3)
    entries: list[dict[str, Any]] = []
    resumed = solve(document, checkpoint=store, on_progress=entries.append)
    assert resumed["diagnostics"]["resumed_from_iteration"] == 3
    assert [entry["period"] for entry in entries] == [2, 1, 0]
    assert [entry["period"] for entry in resumed["log"]] == [5, 4, 3, 2, 1, 0]
    np.testing.assert_array_equal(np.array(resumed["value"]), np.array(solve(life_cycle())["value"]))
    other = life_cycle()
    other["model"]["params"]["r"] = 0.02
    assert solve(other, checkpoint=store)["diagnostics"]["resumed_from_iteration"] is None


def test_the_estimate_counts_every_period_and_the_log_says_how_many() -> None:
    sized = estimate(parse_document(life_cycle()))
    assert sized["reward_storage"] == "on_the_fly" and "changes with the period" in sized["notes"][0]
    assert sized["bytes"] >= AGES * 41 * 3 * 16
    assert f"{AGES} periods of backward induction" in sized["basis"]
    assert {entry["periods"] for entry in solve(life_cycle())["log"]} == {AGES}


def test_a_time_limit_keeps_the_periods_solved() -> None:
    document = life_cycle()
    document["solver"] = {"time_limit_s": 1e-9}
    result = solve(document)
    assert result["status"] == "time_limit" and result["axes"]["period"] == []


def tabular_mdp(seed: int, states: int = 12, actions: int = 3) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    reward = rng.normal(size=(states, actions))
    transition = rng.random((states, actions, states)) ** 4
    transition /= transition.sum(axis=2, keepdims=True)
    return reward, transition


def test_tabular_horizon_matches_a_plain_numpy_backward_induction() -> None:
    reward, transition = tabular_mdp(3)
    discounts = [1.05, 0.9, 0.8, 1.0, 0.95]
    terminal = np.linspace(-1.0, 1.0, 12)
    document = {
        "version": 1,
        "discount": 1.1,
        "model": {"kind": "tabular", "states": 12, "actions": 3, "reward": reward.tolist(),
                  "transition": transition.tolist(),
                  "horizon": {"periods": 5, "terminal_value": terminal.tolist(), "discount": discounts}},
    }
    result = solve(document)
    after = terminal
    values, actions = [], []
    for t in range(4, -1, -1):  # independent backward induction in plain numpy
        q = reward + discounts[t] * transition @ after
        after = q.max(axis=1)
        values.append(after)
        actions.append(q.argmax(axis=1))
    np.testing.assert_allclose(np.array(result["value"]), np.array(values[::-1]), rtol=0, atol=1e-13)
    np.testing.assert_array_equal(np.array(result["policy_index"]["action"]), np.array(actions[::-1]))
    assert list(result["axes"]) == ["period", "state_label"]
    # A cohort spread over the states in period 0 moves by each period's policy (plain numpy forward pass).
    start = np.linspace(1.0, 2.0, 12)
    start /= start.sum()
    document["report"] = {"cohort": {"distribution": start.tolist()}}
    cohort = solve(document)["cohort"]
    mu = start
    for t, chosen in enumerate(actions[::-1]):
        np.testing.assert_allclose(cohort["distribution"][t], mu, rtol=0, atol=1e-15)
        assert cohort["means"]["action"][t] == pytest.approx(float(mu @ chosen), abs=1e-13)
        mu = mu @ transition[np.arange(12), chosen]


def test_long_horizons_approach_the_infinite_horizon_solution_at_rate_beta_to_the_T() -> None:
    reward, transition = tabular_mdp(5)
    beta = 0.8
    base = {"version": 1, "discount": beta,
            "model": {"kind": "tabular", "states": 12, "actions": 3, "reward": reward.tolist(),
                      "transition": transition.tolist()},
            "solver": {"method": "policy_iteration", "tolerance": 1e-13}}
    infinite = np.array(solve(base)["value"])
    gaps = []
    for periods in (5, 10, 20, 40):
        document = copy.deepcopy(base)
        document["model"]["horizon"] = {"periods": periods}
        first = np.array(solve(document)["value"][0])
        gap = np.abs(first - infinite).max()
        # Banach: ‖T^T 0 − v*‖∞ ≤ β^T ‖0 − v*‖∞ (plus the two solves' error bounds, far smaller).
        assert gap <= beta**periods * np.abs(infinite).max() + 1e-10
        gaps.append(gap)
    assert gaps == sorted(gaps, reverse=True) and gaps[-1] < 1e-3


def test_a_grid_horizon_approaches_the_infinite_horizon_grid_solution() -> None:
    infinite_document = cake(1, 201)
    del infinite_document["model"]["horizon"]
    infinite_document["model"]["reward"] = "where(w > 0, log(w - wn + 0.05), -1e6)"
    infinite_document["model"]["feasible"] = ["wn <= w"]
    infinite_document["solver"] = {"tolerance": 1e-10}
    # The slot where a horizon puts ``period``: the two documents share their kernels.
    infinite = np.array(solve(with_period_slot(infinite_document))["value"])
    document = with_horizon(copy.deepcopy(infinite_document), {"periods": 120})
    first = np.array(solve(document)["value"][0])
    assert np.abs(first - infinite).max() <= BETA**120 * np.abs(infinite).max() + 1e-8


def bad(document: dict[str, Any]) -> dict[str, str]:
    with pytest.raises(InvalidDocument) as caught:
        solve(document)
    return {error["path"]: error["message"] for error in caught.value.errors}


def test_horizon_faults_name_their_field() -> None:
    short = life_cycle()
    short["model"]["params"]["income"] = INCOME[:-1]
    assert "one value per period" in bad(short)["model.params.income"]
    no_horizon = life_cycle()
    del no_horizon["model"]["horizon"]
    faults = bad(no_horizon)
    assert "needs a finite horizon" in faults["model.params.income"]
    assert "unknown name `period`" in faults["model.define.earnings"]
    clash = life_cycle()
    clash["model"]["params"]["period"] = 1.0
    assert "names the period" in bad(clash)["model.params.period"]
    terminal = life_cycle(terminal_value="income * a")
    assert "no period after the last" in bad(terminal)["model.horizon.terminal_value"]
    negative = life_cycle(discount="discount * (survival - 0.9)")
    assert "positive number in every period" in bad(negative)["model.horizon.discount"]
    tabular_reward, tabular_transition = tabular_mdp(1)
    tabular = {"version": 1, "discount": 0.9,
               "model": {"kind": "tabular", "states": 12, "actions": 3, "reward": tabular_reward.tolist(),
                         "transition": tabular_transition.tolist(),
                         "horizon": {"periods": 3, "terminal_value": [0.0, 1.0], "discount": [0.9, -1.0, 0.9]}}}
    faults = bad(tabular)
    assert "one per state" in faults["model.horizon.terminal_value"]
    assert "positive in every period" in faults["model.horizon.discount[1]"]


def test_the_method_may_be_named_backward_induction_with_a_horizon_only() -> None:
    document = cake(3, 51)
    document["solver"] = {"method": "backward_induction"}
    assert solve(document)["method"] == "backward_induction"
    del document["model"]["horizon"]
    assert "finite horizon" in bad(document)["solver.method"]


def test_a_discount_of_one_or_more_needs_a_horizon() -> None:
    document = cake(3, 51)
    document["discount"] = 1.0
    assert solve(document)["status"] == "converged"
    del document["model"]["horizon"]
    assert "strictly between 0 and 1" in bad(document)["discount"]


def test_a_cohort_moves_through_the_periods_as_a_plain_numpy_forward_pass_says() -> None:
    document = life_cycle()
    document["report"] = {"cohort": {"start": {"a": 0.0, "y": 1.0}},
                          "simulation": {"periods": AGES, "paths": 20_000, "seed": 3}}
    result = solve(document)
    _, savings = life_cycle_by_numpy()
    chosen = np.searchsorted(ASSETS, savings)  # (T, a, y): the grid index of next period's assets
    mu = np.zeros((ASSETS.size, len(SHOCK_VALUES)))
    mu[0, 1] = 1.0
    means_a, means_an = [], []
    for t in range(AGES):  # independent forward pass: mass at (a, y) moves to (σ_t(a, y), y') with P[y, y']
        means_a.append(float((mu * ASSETS[:, None]).sum()))
        means_an.append(float((mu * savings[t]).sum()))
        np.testing.assert_allclose(np.array(result["cohort"]["distribution"][t]), mu, rtol=0, atol=1e-14)
        moved = np.zeros_like(mu)
        for y in range(len(SHOCK_VALUES)):
            np.add.at(moved, chosen[t, :, y], mu[:, y, None] * np.array(SHOCK_MATRIX)[y][None, :])
        mu = moved
    np.testing.assert_allclose(result["cohort"]["means"]["a"], means_a, rtol=0, atol=1e-13)
    np.testing.assert_allclose(result["cohort"]["means"]["an"], means_an, rtol=0, atol=1e-13)
    simulated = np.array(result["simulation"]["by_period"]["a"])
    # Law of large numbers: the paths' mean in each period within 5 standard errors of the cohort's mean
    # (common practice), the standard error from the cohort's own distribution.
    for t in range(AGES):
        weights = np.array(result["cohort"]["distribution"][t]).sum(axis=1)
        spread = np.sqrt(weights @ (ASSETS - means_a[t]) ** 2)
        assert abs(simulated[t] - means_a[t]) <= 5 * spread / np.sqrt(20_000) + 1e-12
    assert result["simulation"]["first_path"]["a"][0] == 0.0


def test_cohort_and_simulation_faults_name_their_field() -> None:
    document = life_cycle()
    document["report"] = {"simulation": {"periods": AGES + 1, "paths": 10}}
    faults = bad(document)
    assert "at most model.horizon.periods" in faults["report.simulation.periods"]
    assert "no long-run distribution" in faults["report.simulation.start"]
    document["report"] = {"cohort": {"distribution": [[0.5, 0.2, 0.2]] + [[0.0] * 3] * 40}}
    assert "sums to" in bad(document)["report.cohort.distribution"]
    document["report"] = {"cohort": {"start": {"a": 9.0, "y": 1.0}}}
    assert "outside the grid" in bad(document)["report.cohort.start.a"]
    infinite = life_cycle()
    del infinite["model"]["horizon"]
    infinite["model"]["params"] = {"r": 0.03, "income": 1.0, "survival": 0.9, "pension": 0.9, "bequest": 0.5}
    infinite["model"]["define"]["earnings"] = "income * y"
    infinite["report"] = {"cohort": {"start": {"a": 0.0, "y": 1.0}}}
    assert "finite horizon" in bad(infinite)["report.cohort"]


def test_stationary_with_a_horizon_is_refused_like_a_cohort_without_one() -> None:
    # Before, report.stationary with model.horizon was accepted and the result carried only a note, while
    # report.cohort without a horizon was refused: the two now agree, each refused at its own field.
    document = life_cycle()
    document["report"] = {"stationary": True}
    message = bad(document)["report.stationary"]
    assert "no stationary distribution" in message and "report.cohort" in message
    document["report"] = {"stationary": True, "cohort": {"start": {"a": 0.0, "y": 1.0}}}
    assert set(bad(document)) == {"report.stationary"}


def test_cake_eating_with_a_continuous_choice_follows_the_textbook_rule() -> None:
    periods, extra = 6, 3
    # The terminal value is the closed-form value with `extra` periods left, so the rule of a
    # (periods + extra)-period problem applies in every period; then what is kept, β A_{t+1}/A_t of the
    # cake, is at least 0.7 and the choice's interval [0.6 w, 0.99 w] holds it inside.
    total = periods + extra
    A = (1 - BETA ** (total - np.arange(total + 1))) / (1 - BETA)
    _, exact = cake_closed_form(total, np.array([1.0]))
    B = exact[:, 0]  # the closed form's constant: its value at W = 1
    document = {
        "version": 1,
        "discount": BETA,
        "model": {
            "kind": "grid",
            "params": {"A": float(A[periods]), "B": float(B[periods])},
            "states": {"w": {"min": 0.005, "max": 2.0, "points": 300, "spacing": "log"}},
            "choices": {"wn": {"continuous": True, "min": "0.6 * w", "max": "0.99 * w"}},
            "next": {"w": "wn"},
            "reward": "log(w - wn)",
            "interpolation": "monotone_cubic",
            "hints": {"concave": True},
            "horizon": {"periods": periods, "terminal_value": "A * log(w) + B"},
        },
    }
    result = solve(document)
    assert result["policy_index"] is None and list(result["axes"]) == ["period", "w"]
    assert any("fitted problem" in note for note in result["diagnostics"]["notes"])
    w = np.array(result["axes"]["w"])
    eaten = w[None, :] - np.array(result["policy"]["wn"])
    value = np.array(result["value"])
    step = np.log(w[1] / w[0])
    for t in range(periods):
        # Below the grid's end tomorrow's value is read at the end (clamped, too high), which can pull a
        # point's choice down; a point w reaches below 0.005 within the remaining periods only from
        # w < 0.005 / 0.6^(periods − t), so the check starts above that.
        safe = w >= 0.005 / 0.6 ** (periods - t)
        rule = w[safe] / A[t]
        # Monotone cubic interpolation of smooth data is accurate to order h² in the step h (Fritsch and
        # Carlson 1980; here h is the step of log w): consumption within h² relative, the value within h².
        assert np.abs(eaten[t, safe] - rule).max() <= step**2 * rule.max()
        assert np.abs(value[t, safe] - (A[t] * np.log(w[safe]) + B[t])).max() <= step**2


WAGES = [0.8, 1.0, 1.2, 1.1]


def working_household(wage: Any) -> dict[str, Any]:
    """An invented household over 4 periods: savings and a work menu, skills h that grow with work (moved by
    interpolation), a wage that may change by period."""
    return {
        "version": 1,
        "discount": 0.95,
        "model": {
            "kind": "grid",
            "params": {"wage": wage},
            "states": {"a": {"min": 0.0, "max": 4.0, "points": 25}, "h": {"min": 0.5, "max": 2.0, "points": 4}},
            "shocks": {"e": {"markov": {"values": [0.8, 1.2], "matrix": [[0.9, 0.1], [0.2, 0.8]]}}},
            "choices": {"a_next": {"next_of": "a"}, "work": {"values": [0.0, 0.5, 1.0]}},
            "next": {"h": "0.9 * h + 0.3 * work"},
            "define": {"income": "wage * e * h * work + 1.02 * a", "c": "income + 0.2 - a_next"},
            "reward": "log(c) - 0.5 * work**2",
            "feasible": ["c > 0"],
            "horizon": {"periods": len(WAGES), "terminal_value": "log(1 + a + h)"},
        },
    }


def working_household_by_numpy(wages: list[float]) -> np.ndarray:
    """Independent backward induction of :func:`working_household` in plain numpy: the value, (T, a, h, e).

    Tomorrow's skills are clamped to [0.5, 2] and read by linear interpolation between grid points.
    """
    a = np.linspace(0.0, 4.0, 25)
    h = np.linspace(0.5, 2.0, 4)
    e = np.array([0.8, 1.2])
    P = np.array([[0.9, 0.1], [0.2, 0.8]])
    work = np.array([0.0, 0.5, 1.0])
    after = np.log(1 + a[:, None, None] + h[None, :, None]) * np.ones((1, 1, 2))  # (a', h', e')
    values = []
    for t in range(len(wages) - 1, -1, -1):
        expected = after @ P.T  # (a', h', e): E[V(a', h', e') | e]
        q = np.full((25, 4, 2, 25, 3), -np.inf)  # (a, h, e, a', work)
        for k, w in enumerate(work):
            h_next = np.clip(0.9 * h + 0.3 * w, 0.5, 2.0)
            low = np.minimum(np.searchsorted(h, h_next, side="right") - 1, 2)
            share = (h_next - h[low]) / (h[low + 1] - h[low])
            ev = expected[:, low, :] * (1 - share)[None, :, None] + expected[:, low + 1, :] * share[None, :, None]
            c = (wages[t] * e[None, None, :] * h[None, :, None] * w + 1.02 * a[:, None, None] + 0.2)[..., None] \
                - a[None, None, None, :]
            with np.errstate(divide="ignore", invalid="ignore"):
                utility = np.where(c > 0, np.log(np.where(c > 0, c, 1.0)), -np.inf) - 0.5 * w**2
            q[..., k] = utility + 0.95 * np.moveaxis(ev, 0, -1)[None]  # ev (a', h, e) → (h, e, a')
        after = q.reshape(25, 4, 2, -1).max(axis=3)
        values.append(after)
    return np.array(values[::-1])


@pytest.mark.parametrize("by_period", [True, False])
def test_several_choices_and_interpolated_states_match_a_plain_numpy_backward_induction(by_period: bool) -> None:
    wages = WAGES if by_period else [1.0] * len(WAGES)
    document = working_household(WAGES if by_period else 1.0)
    result = solve(document)
    storage = "on_the_fly" if by_period else "tables"  # per-period params are read as the kernels run
    assert storage in result["diagnostics"]["notes"][0]
    np.testing.assert_allclose(np.array(result["value"]), working_household_by_numpy(wages), rtol=0, atol=1e-12)


def test_a_time_limit_between_periods_keeps_the_last_periods_exactly() -> None:
    import time

    document = life_cycle()
    document["solver"] = {"time_limit_s": 0.1}
    document["report"] = {"cohort": {"start": {"a": 0.0, "y": 1.0}}}
    # Each period's progress report takes 60 ms, so the limit falls after the second period.
    result = solve(document, on_progress=lambda entry: time.sleep(0.06))
    assert result["status"] == "time_limit" and result["axes"]["period"] == [4, 5]
    full = solve(life_cycle())
    np.testing.assert_array_equal(np.array(result["value"]), np.array(full["value"])[4:])
    assert result["cohort"] is None
    assert any("did not reach" in note for note in result["diagnostics"]["notes"])


def test_a_broken_hint_is_reported_and_the_value_stays_exact() -> None:
    # A bonus for keeping more than 1.2 makes the objective two-peaked in the choice: the concave
    # hint's search stops at the first peak.
    document = cake(5, 201)
    document["model"]["reward"] = "where(w > 0, log(w - wn) + where(wn > 1.2, 0.8, 0), -1e6)"
    hinted = solve(document)
    document["model"]["hints"] = {"monotone": False, "concave": False}
    plain = solve(document)
    assert not hinted["diagnostics"]["verification"]["hints_held"]
    assert any("did not hold" in warning for warning in hinted["diagnostics"]["warnings"])
    # With hints the model is evaluated on the fly, without them from tables: the last bits may differ.
    np.testing.assert_allclose(np.array(hinted["value"]), np.array(plain["value"]), rtol=1e-14, atol=0)
    np.testing.assert_array_equal(np.array(hinted["policy"]["wn"]), np.array(plain["policy"]["wn"]))


def test_a_life_solved_in_two_spans_equals_the_whole_life() -> None:
    # The later span's first-period value, passed as the earlier span's solver.initial (as the service
    # passes an earlier job's result), is the value after the earlier span's last period.
    whole = solve(life_cycle())
    later = life_cycle(periods=3, terminal_value="bequest * log(1 + a)")
    later["model"]["params"].update(income=INCOME[3:], survival=SURVIVAL[3:])
    later["model"]["define"]["earnings"] = "where(period + 3 >= 4, pension, income * y)"
    earlier = life_cycle(periods=3)
    del earlier["model"]["horizon"]["terminal_value"]
    earlier["model"]["params"].update(income=INCOME[:3], survival=SURVIVAL[:3])
    earlier["solver"] = {"initial": {"job": "0123456789abcdef"}}
    later_result = solve(later)
    joined = solve(earlier, warm_start={"axes": later_result["axes"], "value": later_result["value"]})
    np.testing.assert_array_equal(np.array(joined["value"]), np.array(whole["value"])[:3])
    np.testing.assert_array_equal(np.array(later_result["value"]), np.array(whole["value"])[3:])
    assert any("solver.initial" in note for note in joined["diagnostics"]["notes"])
    earlier["model"]["horizon"]["terminal_value"] = "0"
    assert "give it once" in bad(earlier)["model.horizon.terminal_value"]


def test_euler_errors_by_period_use_each_period_and_the_next() -> None:
    document = life_cycle()
    document["report"] = {"euler_errors": True}
    result = solve(document)
    errors = result["diagnostics"]["euler_errors"]
    assert errors["by_period"]["period"] == list(range(AGES - 1))
    # Period 0's profile by hand (Judd 1992's unit-free error |1 − c̃/c|, with 1/c̃ = β_0 (1 + r) E[1/c_1]):
    # the policies of periods 0 and 1 read between grid points by linear interpolation, as the report does.
    _, savings = life_cycle_by_numpy()
    y = np.array(SHOCK_VALUES)
    P = np.array(SHOCK_MATRIX)
    k = np.array(errors["profile"]["at"])
    measured = np.array(errors["profile"]["log10_error"], dtype=float)
    saved = np.column_stack([np.interp(k, ASSETS, savings[0][:, z]) for z in range(3)])  # (k, z)
    c_today = 1.03 * k[:, None] + INCOME[0] * y[None, :] - saved
    saved_next = np.stack([np.column_stack([np.interp(saved[:, z], ASSETS, savings[1][:, w]) for w in range(3)])
                           for z in range(3)], axis=1)  # (k, z, z')
    c_next = 1.03 * saved[:, :, None] + INCOME[1] * y[None, None, :] - saved_next
    c_tilde = 1.0 / (0.96 * SURVIVAL[0] * 1.03 * np.einsum("kzw,zw->kz", 1.0 / c_next, P))
    by_hand = np.log10(np.maximum(np.abs(1.0 - c_tilde / c_today), 1e-17))
    shown = np.isfinite(measured)
    assert shown.mean() > 0.8  # the rest: constrained near the borrowing limit
    np.testing.assert_allclose(measured[shown], by_hand[shown], rtol=0, atol=1e-9)
    # A choice restricted to the grid errs by about a grid step: four times the points, about 0.6 lower
    # in log10 (common practice: the error falls like the grid step).
    finer = life_cycle()
    finer["model"]["states"]["a"] = {"min": 0.0, "max": 4.0, "points": 161}
    finer["report"] = {"euler_errors": True}
    drop = errors["mean_log10"] - solve(finer)["diagnostics"]["euler_errors"]["mean_log10"]
    assert 0.4 < drop < 0.8


def test_a_terminal_value_that_is_not_finite_names_a_point() -> None:
    document = cake(3, 51, terminal="log(w)")
    message = bad(document)["model.horizon.terminal_value"]
    assert message.startswith("is -inf at w = 0:") and "1 points fail" in message


def test_a_continuous_choice_whose_bounds_cross_in_a_later_period_is_refused_naming_it() -> None:
    document = {
        "version": 1,
        "discount": BETA,
        "model": {
            "kind": "grid",
            "params": {"keep": [0.6, 0.6, 1.2]},
            "states": {"w": {"min": 0.5, "max": 2.0, "points": 20}},
            "choices": {"wn": {"continuous": True, "min": "keep * w", "max": "0.99 * w"}},
            "next": {"w": "wn"},
            "reward": "log(w - wn + 0.1)",
            "horizon": {"periods": 3},
            "solver": {"method": "howard"},
        },
    }
    document["solver"] = document["model"].pop("solver")
    message = bad(document)["model.choices.wn.max"]
    assert message.startswith("in period 2:") and "below min" in message
    document["model"]["params"]["keep"] = [0.6, 0.6, 0.7]
    assert any("solver.method howard was not used" in note for note in solve(document)["diagnostics"]["notes"])


def test_a_period_with_no_allowed_choice_somewhere_names_the_period_and_the_point() -> None:
    from worker.errors import InfeasibleModel

    document = life_cycle()
    document["model"]["params"]["income"] = [1.0, 1.0, -9.0, 1.0, 1.0, 1.0]
    with pytest.raises(InfeasibleModel) as caught:
        solve(document)
    message = caught.value.errors[0]["message"]
    assert message.startswith("in period 2 no choice is allowed") and "a = 0" in message
