"""Euler-equation errors with a shock drawn after the choice (worker.euler_points, worker.euler_setup).

The model: Brock, W. A. and L. J. Mirman (1972), "Optimal economic growth and uncertainty: the discounted
case", Journal of Economic Theory 4(3), 479–513, with productivity drawn after the choice.  Capital ``k`` is
chosen; a productivity level ``z`` is a state whose law is ``z' = d``, ``d`` drawn after today's choice
with probabilities that depend on today's ``z`` (a Markov chain written as draws); ``e`` is a Markov shock
seen before the choice.  Output today is ``e · z · k**alpha``, with ``z`` and ``e`` known today.

The closed form ``k' = alpha · beta · e · z · k**alpha`` still holds.  Derivation: with log utility and
full depreciation, guess ``V(k, z, e) = A(z, e) + B log k``.  The choice maximises
``log(y − k') + beta Σ_d p_d(z) Σ_e' P[e, e'] V(k', d, e')``; only ``B log k'`` of tomorrow's value moves
with ``k'``, whatever the draw, so the first-order condition is ``1/(y − k') = beta B / k'`` and
``k' = beta B y / (1 + beta B)``.  Then ``V`` has the coefficient ``alpha (1 + beta B)`` on ``log k``, so
``B = alpha / (1 − alpha beta)`` and ``k' = alpha beta y``.  The draw's law only enters ``A``; a reward
term ``bonus · d`` that does not move with ``k'`` changes nothing either.  The calibration is invented.
"""

from __future__ import annotations

import copy
import math
from typing import Any

import numpy as np
import pytest
from scipy.interpolate import RegularGridInterpolator

from tests._documents import with_horizon, with_period_slot
from worker import euler, euler_states
from worker.document import parse_document
from worker.euler_points import PointsRule
from worker.feasibility import model_data
from worker.solve import solve

ALPHA, BETA = 0.3, 0.95
E_VALUES, E_CHAIN = np.array([0.95, 1.05]), np.array([[0.8, 0.2], [0.3, 0.7]])
D_VALUES = np.array([0.9, 1.1])

GROWTH: dict[str, Any] = {
    "kind": "grid",
    "params": {"alpha": ALPHA, "bonus": 0.0, "slope": 0.0},
    "states": {"z": {"min": 0.9, "max": 1.1, "points": 2}, "k": {"min": 0.05, "max": 0.45, "points": 30}},
    "shocks": {
        "e": {"markov": {"values": E_VALUES.tolist(), "matrix": E_CHAIN.tolist()}, "transform": "none"},
        "d": {"timing": "after_choice",
              "iid": {"values": D_VALUES.tolist(), "probs": ["0.8 - 3 * (z - 0.9)", "0.2 + 3 * (z - 0.9)"]}},
    },
    "choices": {"k_next": {"next_of": "k"}},
    "next": {"z": "d"},
    "define": {"c": "e * z * k**alpha - k_next"},
    "reward": "log(c) + bonus * d + slope * d * k",
    "feasible": ["c > 0"],
}
"""Invented: capital, a productivity level drawn after the choice for tomorrow, a shock seen before it."""


def _p_high(z: Any) -> Any:
    """The probability of the high draw at today's level ``z`` (the document's expression, in numpy)."""
    return 0.2 + 3 * (np.asarray(z) - 0.9)


def _document(k_points: int = 30, *, continuous: bool = False, **model: Any) -> dict[str, Any]:
    spec = copy.deepcopy(GROWTH)
    spec["states"]["k"]["points"] = k_points
    if continuous:
        spec["choices"]["k_next"]["continuous"] = True
        spec["interpolation"] = "monotone_cubic"
        spec["hints"] = {"concave": True}
    for key, value in model.items():
        spec[key] = {**spec[key], **value} if isinstance(value, dict) and key == "params" else value
    # The slot where a horizon puts ``period``: the finite-horizon tests below (with_horizon) share the kernels of
    # the infinite-horizon ones.
    return with_period_slot({"version": 1, "discount": BETA, "model": spec,
                             "solver": {"method": "howard", "tolerance": 1e-10},
                             "report": {"stationary": True, "euler_errors": True}})


def _data(document: dict[str, Any]) -> Any:
    return model_data(parse_document(document))


def _saving(share: float) -> PointsRule:
    """Save ``share`` of output at points (z, k), every point of e: (m, 2) -> (m, 2)."""
    return lambda points: share * E_VALUES[None, :] * (points[:, 0] * points[:, 1] ** ALPHA)[:, None]


@pytest.mark.parametrize("ratio", [1.0, 1.025, 0.6])
def test_a_policy_saving_a_known_share_has_the_closed_form_error(ratio: float) -> None:
    # Saving s = ratio · alpha beta of output y: c = (1 − s) y, and tomorrow, whatever d and e', the reward's
    # slope in k' is alpha y' / (k' c') = alpha / (k' (1 − s)); the probabilities sum to one, so
    # c̃ = (1 − s) y · s / (alpha beta) and |1 − c̃/c| = |1 − ratio| (rounding level for the exact policy).
    data = _data(_document(params={"bonus": 0.04}))
    found = euler.setup(data)
    assert isinstance(found, euler.EulerSetup) and found.state == "k"
    errors = euler_states.states_errors(data, found, BETA, _saving(ratio * ALPHA * BETA))
    assert errors["undefined"] == 0 and errors["points"] > 0
    if ratio == 1.0:
        assert errors["max_log10"] < -10 and errors["constrained"] == 0
        assert errors["points"] >= euler.TEST_POINTS_PER_GRID_POINT * 30 * 2 * 2
    else:
        assert errors["max_log10"] == pytest.approx(math.log10(abs(1 - ratio)), abs=1e-9)
        assert errors["mean_log10"] == pytest.approx(math.log10(abs(1 - ratio)), abs=1e-9)


def _numpy_errors(result: dict[str, Any], slope: float, period: int | None = None) -> np.ndarray:
    """Independent: the Euler errors of the result's grid policy at every test point, (z, k test values, e).

    Tomorrow's marginal value of k, for the reward ``log(c) + slope · d · k``: the expectation over today's
    draw d (probability p_d(z), tomorrow's level z' = d), over e' and over tomorrow's draw d' (probability
    p_d'(z')) of ``alpha e' z' k'^(alpha − 1) / c' + slope · d'``; the policy read by scipy's
    RegularGridInterpolator (multilinear).  With a horizon: ``period``'s policy today, the next one's tomorrow.
    """
    k_grid, z_grid = np.asarray(result["axes"]["k"]), np.asarray(result["axes"]["z"])
    policy = np.asarray(result["policy"]["k_next"], dtype=float)  # ([period,] z, k, e)
    today, later_policy = (policy, policy) if period is None else (policy[period], policy[period + 1])

    def readers(table: np.ndarray) -> list[RegularGridInterpolator]:
        return [RegularGridInterpolator((z_grid, k_grid), table[:, :, j], bounds_error=False, fill_value=None)
                for j in range(E_VALUES.size)]

    read, read_next = readers(today), readers(later_policy)
    parts = math.ceil(10 * k_grid.size / (k_grid.size - 1))
    k_test = (k_grid[:-1, None] + ((np.arange(parts) + 0.5) / parts)[None, :] * np.diff(k_grid)[:, None]).ravel()
    z, k = np.meshgrid(z_grid, k_test, indexing="ij")
    out = np.empty((*z.shape, E_VALUES.size))
    for j, e in enumerate(E_VALUES):
        x = read[j]((z, k))
        c = e * z * k**ALPHA - x
        expected = np.zeros_like(c)
        for d, p_today in zip(D_VALUES, (1 - _p_high(z), _p_high(z))):
            z_next = np.full_like(z, d)
            later = 1 - _p_high(d), _p_high(d)
            for jj, e_next in enumerate(E_VALUES):
                c_next = e_next * z_next * x**ALPHA - read_next[jj]((z_next, x))
                marginal = ALPHA * e_next * z_next * x ** (ALPHA - 1) / c_next
                marginal = marginal + slope * (later[0] * D_VALUES[0] + later[1] * D_VALUES[1])
                expected += p_today * E_CHAIN[j, jj] * marginal
        c_tilde = 1.0 / (BETA * expected)
        out[:, :, j] = np.log10(np.maximum(np.abs(1 - c_tilde / c), 2.0**-56))
    return out


@pytest.mark.parametrize("slope", [0.0, 0.05])
def test_a_grid_choice_against_an_independent_numpy_computation(slope: float) -> None:
    # slope > 0 puts tomorrow's draw into the reward's slope in k: the expectation over it is checked too.
    result = solve(_document(40, params={"slope": slope}))
    assert result["status"] == "converged"
    errors = result["diagnostics"]["euler_errors"]
    reference = _numpy_errors(result, slope)
    assert errors["constrained"] == 0 and errors["undefined"] == 0 and errors["points"] == reference.size
    assert errors["max_log10"] == pytest.approx(reference.max(), abs=1e-9)
    assert errors["mean_log10"] == pytest.approx(reference.mean(), abs=1e-9)
    assert errors["weighted_mean_log10"] is not None


def test_a_finite_horizon_against_the_independent_computation() -> None:
    # Four periods, nothing after the last: each period's errors with its policy today and the next one's.
    document = with_horizon(_document(30, params={"slope": 0.05}), {"periods": 4, "terminal_value": 0.0})
    result = solve(document)
    errors = result["diagnostics"]["euler_errors"]
    assert errors["by_period"]["period"] == [0, 1, 2] and errors["constrained"] == 0
    for t in errors["by_period"]["period"]:
        reference = _numpy_errors(result, 0.05, t)
        assert errors["by_period"]["max_log10"][t] == pytest.approx(reference.max(), abs=1e-9)
        assert errors["by_period"]["mean_log10"][t] == pytest.approx(reference.mean(), abs=1e-9)


def test_a_continuous_choice_errors_fall_as_the_grid_is_refined() -> None:
    # Monotone cubic: about second order in the grid step (0.60 per doubling); measured −2.68, −3.34, −3.93
    # at 25, 50, 100 points (one run).
    worst = []
    for k_points in (25, 50, 100):
        result = solve(_document(k_points, continuous=True))
        assert result["status"] == "converged"
        errors = result["diagnostics"]["euler_errors"]
        assert errors["constrained"] == 0 and errors["points"] >= euler.TEST_POINTS_PER_GRID_POINT * k_points * 4
        worst.append(errors["max_log10"])
    assert worst[0] - worst[1] >= 0.4 and worst[1] - worst[2] >= 0.4


def test_probabilities_jumping_with_the_choice_get_a_note() -> None:
    # A comparison in a probability makes it jump as the choice moves: no slope, so no first-order condition.
    draw = copy.deepcopy(GROWTH["shocks"]["d"])
    draw["iid"]["probs"] = ["where(k_next > 0.2, 0.3, 0.6)", "where(k_next > 0.2, 0.7, 0.4)"]
    document = _document(shocks={**GROWTH["shocks"], "d": draw})
    found = euler.setup(_data(document))
    assert isinstance(found, str) and "probability is not differentiable" in found
    result = solve(document)
    assert "euler_errors" not in result["diagnostics"]
    assert any("probability is not differentiable" in note for note in result["diagnostics"]["notes"])


def test_a_define_that_changes_with_the_draw_gets_a_note() -> None:
    # (feasibility is decided before the draw, so it cannot use c here)
    document = _document(define={"c": "e * z * k**alpha - k_next + 0.01 * d"},
                         feasible=["e * z * k**alpha - k_next > 0"])
    found = euler.setup(_data(document))
    assert isinstance(found, str) and "changes with the draw" in found and "`c`" in found


def _moving_document(on_choice: float, on_state: float, k_points: int = 40, **options: Any) -> dict[str, Any]:
    """The economy with the high draw's odds moving with tomorrow's capital (investment helps) and today's."""
    draw = copy.deepcopy(GROWTH["shocks"]["d"])
    high = f"0.2 + {on_choice} * k_next + {on_state} * k"
    draw["iid"]["probs"] = [f"1 - ({high})", high]
    return _document(k_points, shocks={**GROWTH["shocks"], "d": draw}, **options)


def _numpy_moving_errors(result: dict[str, Any], on_choice: float, on_state: float) -> np.ndarray:
    """Independent: the errors when p_high = 0.2 + a_x k' + a_k k, at every test point, (z, k test values, e).

    The first-order condition 1/c̃ = β Σ_d p_d E V_k(k', d, e') + Σ_d ∂p_d/∂k' W_d and the envelope
    condition V_k(k, z, e) = Σ_d [p_d ∂r/∂k + ∂p_d/∂k W_d], with W_d = r_d + β E V(k', d, e') the worth
    of draw d; the policy and the value read by scipy's RegularGridInterpolator (linear).
    """
    k_grid, z_grid = np.asarray(result["axes"]["k"]), np.asarray(result["axes"]["z"])
    policy = np.asarray(result["policy"]["k_next"], dtype=float)  # (z, k, e)
    value = np.asarray(result["value"], dtype=float)

    def readers(table: np.ndarray) -> list[RegularGridInterpolator]:
        return [RegularGridInterpolator((z_grid, k_grid), table[:, :, j], bounds_error=False, fill_value=None)
                for j in range(E_VALUES.size)]

    read_x, read_v = readers(policy), readers(value)

    def worth(j: int, z: Any, k: Any, x: Any, c: Any, d: float) -> Any:
        ahead = sum(E_CHAIN[j, jj] * read_v[jj]((np.full_like(x, d), x)) for jj in range(E_VALUES.size))
        return np.log(c) + BETA * ahead

    def odds(k: Any, x: Any) -> tuple[Any, Any]:
        high = 0.2 + on_choice * x + on_state * k
        return 1 - high, high

    def marginal_value(jj: int, z: Any, k: Any) -> Any:
        x = read_x[jj]((z, k))
        c = E_VALUES[jj] * z * k**ALPHA - x
        total = ALPHA * E_VALUES[jj] * z * k ** (ALPHA - 1) / c  # the probabilities sum to one
        for d, sign in zip(D_VALUES, (-1.0, 1.0)):
            total = total + sign * on_state * worth(jj, z, k, x, c, d)
        return total

    parts = math.ceil(10 * k_grid.size / (k_grid.size - 1))
    k_test = (k_grid[:-1, None] + ((np.arange(parts) + 0.5) / parts)[None, :] * np.diff(k_grid)[:, None]).ravel()
    z, k = np.meshgrid(z_grid, k_test, indexing="ij")
    out = np.empty((*z.shape, E_VALUES.size))
    for j, e in enumerate(E_VALUES):
        x = read_x[j]((z, k))
        c = e * z * k**ALPHA - x
        total = np.zeros_like(c)
        for d, p, sign in zip(D_VALUES, odds(k, x), (-1.0, 1.0)):
            ahead = sum(E_CHAIN[j, jj] * marginal_value(jj, np.full_like(x, d), x) for jj in range(E_VALUES.size))
            total += BETA * p * ahead + sign * on_choice * worth(j, z, k, x, c, d)
        out[:, :, j] = np.log10(np.maximum(np.abs(1 - (1.0 / total) / c), 2.0**-56))
    return out


@pytest.mark.parametrize(("on_choice", "on_state"), [(0.6, 0.0), (0.0, 0.5), (0.6, 0.3)])
def test_odds_moving_with_the_choice_or_the_state_against_an_independent_computation(
    on_choice: float, on_state: float
) -> None:
    result = solve(_moving_document(on_choice, on_state))
    assert result["status"] == "converged"
    errors = result["diagnostics"]["euler_errors"]
    reference = _numpy_moving_errors(result, on_choice, on_state)
    assert errors["constrained"] == 0 and errors["undefined"] == 0 and errors["points"] == reference.size
    assert errors["max_log10"] == pytest.approx(reference.max(), abs=1e-9)
    assert errors["mean_log10"] == pytest.approx(reference.mean(), abs=1e-9)
    # Leaving the value's term out would be wrong by far more than the grid's own error.
    assert errors["mean_log10"] < -1.5


def test_odds_moving_with_the_choice_through_a_horizon_and_with_a_continuous_choice() -> None:
    # linear interpolation reads the value as the solve does: the errors fall with the grid step (first order,
    # as without draws); monotone_cubic: tests/worker/test_euler_draws_cubic.py.
    worst = []
    for k_points in (25, 50, 100):
        document = _moving_document(0.6, 0.3, k_points)
        document["model"]["choices"]["k_next"]["continuous"] = True
        result = solve(document)
        worst.append(result["diagnostics"]["euler_errors"]["max_log10"])
    assert worst[0] - worst[1] >= 0.2 and worst[1] - worst[2] >= 0.2
    document = with_horizon(_moving_document(0.6, 0.3, 30), {"periods": 4, "terminal_value": 0.0})
    errors = solve(document)["diagnostics"]["euler_errors"]
    assert errors["by_period"]["period"] == [0, 1, 2] and errors["points"] > 0


def test_one_state_with_odds_moving_with_the_choice() -> None:
    # One state: a bonus of 0.1 drawn after the choice, its chance 0.2 + 0.6 k' rising with tomorrow's capital.
    # The draw moves no state, so W_high − W_low = 0.1 and the first-order condition reads
    # 1/c̃ = β Σ_e' P[e, e'] alpha e' k'^(alpha − 1) / c'(k', e') + 0.6 · 0.1 (computed here with np.interp).
    model = {
        "kind": "grid", "params": {"alpha": ALPHA},
        "states": {"k": {"min": 0.05, "max": 0.45, "points": 60}},
        "shocks": {"e": GROWTH["shocks"]["e"],
                   "luck": {"timing": "after_choice", "iid": {"values": [0.0, 1.0],
                                                              "probs": ["0.8 - 0.6 * k_next", "0.2 + 0.6 * k_next"]}}},
        "choices": {"k_next": {"next_of": "k"}},
        "define": {"c": "e * k**alpha - k_next"},
        "reward": "log(c) + 0.1 * luck",
        "feasible": ["c > 0"],
    }
    result = solve({"version": 1, "discount": BETA, "model": model,
                    "solver": {"method": "howard", "tolerance": 1e-10}, "report": {"euler_errors": True}})
    errors = result["diagnostics"]["euler_errors"]
    grid = np.asarray(result["axes"]["k"])
    policy = np.asarray(result["policy"]["k_next"], dtype=float)  # (k, e)
    parts = math.ceil(10 * grid.size / (grid.size - 1))
    k = (grid[:-1, None] + ((np.arange(parts) + 0.5) / parts)[None, :] * np.diff(grid)[:, None]).ravel()
    reference = np.empty((k.size, E_VALUES.size))
    for j, e in enumerate(E_VALUES):
        x = np.interp(k, grid, policy[:, j])
        c = e * k**ALPHA - x
        ahead = sum(E_CHAIN[j, jj] * ALPHA * e_next * x ** (ALPHA - 1) / (e_next * x**ALPHA
                                                                         - np.interp(x, grid, policy[:, jj]))
                    for jj, e_next in enumerate(E_VALUES))
        reference[:, j] = np.log10(np.maximum(np.abs(1 - 1.0 / (BETA * ahead + 0.06) / c), 2.0**-56))
    assert errors["constrained"] == 0 and errors["points"] == reference.size
    assert errors["max_log10"] == pytest.approx(reference.max(), abs=1e-9)
    assert errors["mean_log10"] == pytest.approx(reference.mean(), abs=1e-9)
