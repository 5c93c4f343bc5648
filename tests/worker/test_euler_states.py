"""Euler-equation errors of models with several states (worker.euler_states).

The exact policy: Brock, W. A. and L. J. Mirman (1972), "Optimal economic growth and uncertainty: the
discounted case", Journal of Economic Theory 4(3), 479–513.  With log utility, full depreciation and
output ``e · a · k**alpha`` the optimal policy is ``k' = alpha · beta · e · a · k**alpha`` whatever the
law of total productivity ``e · a`` — here ``a``, a grid state with its own deterministic law
``a' = a**rho`` (between its grid points tomorrow), and ``e``, a Markov shock.  Derivation (the usual
guess and verify): with ``V(k, a, e) = A(a, e) + B log k``, the first-order condition
``1/c = beta B / k'`` and the budget ``c + k' = y`` give ``k' = beta B y / (1 + beta B)``; matching the
coefficient of ``log k`` in the Bellman equation, ``B = alpha (1 + beta B)``, so ``B = alpha / (1 −
alpha beta)`` and ``k' = alpha beta y``; the law of ``(a, e)`` only enters ``A``.  The calibration, the
chain and the law of ``a`` are invented.
"""

from __future__ import annotations

import copy
import math
from typing import Any

import numpy as np
import pytest
from scipy.interpolate import RegularGridInterpolator

from tests._documents import log_growth, with_horizon, with_period_slot
from worker import euler, euler_states
from worker.document import parse_document
from worker.euler_points import PointsRule, errors_at
from worker.feasibility import model_data
from worker.solve import solve

ALPHA, BETA, RHO = 0.3, 0.95, 0.6
E_VALUES = np.array([0.9, 1.1])
E_CHAIN = np.array([[0.8, 0.2], [0.3, 0.7]])
A_MIN, A_MAX = 0.8, 1.25
K_MIN, K_MAX = 0.05, 0.45

GROWTH: dict[str, Any] = log_growth(
    alpha=ALPHA, k_min=K_MIN, k_max=K_MAX, points=30,
    shocks={"e": {"markov": {"values": E_VALUES.tolist(), "matrix": E_CHAIN.tolist()}, "transform": "none"}},
    params={"alpha": ALPHA, "rho": RHO},
    define={"c": "e * a * k**alpha - k_next"},
    next={"a": "a**rho"},
)
"""Invented: capital chosen, a productivity level ``a`` with its own law (listed first), a shock ``e``."""
GROWTH["states"] = {"a": {"min": A_MIN, "max": A_MAX, "points": 5}, **GROWTH["states"]}


def _document(k_points: int = 30, a_points: int = 5, *, continuous: bool = False, interpolation: str = "linear",
              **model: Any) -> dict[str, Any]:
    spec = copy.deepcopy(GROWTH)
    spec["states"]["k"]["points"] = k_points
    spec["states"]["a"]["points"] = a_points
    if continuous:
        spec["choices"]["k_next"]["continuous"] = True
        spec["interpolation"] = interpolation
        spec["hints"] = {"concave": True}
    spec.update(model)
    # The slot where a horizon puts ``period``: the finite-horizon tests below (with_horizon) share the kernels of
    # the infinite-horizon ones (and of tests/_estimate_set.two_state_growth_euler, which carries it too).
    return with_period_slot({"version": 1, "discount": BETA, "model": spec,
                             "solver": {"method": "howard", "tolerance": 1e-10},
                             "report": {"stationary": True, "euler_errors": True}})


def _data(document: dict[str, Any]) -> Any:
    return model_data(parse_document(document))


def _saving(share: float) -> PointsRule:
    """Save ``share`` of output at every point (a, k) and shock point e: (m, 2) points -> (m, shocks)."""
    return lambda points: share * E_VALUES[None, :] * (points[:, 0] * points[:, 1] ** ALPHA)[:, None]


def test_the_exact_policy_has_errors_at_rounding_level() -> None:
    data = _data(_document())
    found = euler.setup(data)
    assert isinstance(found, euler.EulerSetup) and found.state == "k" and found.define == "c"
    errors = euler_states.states_errors(data, found, BETA, _saving(ALPHA * BETA))
    assert errors["max_log10"] < -10
    assert errors["constrained"] == 0 and errors["undefined"] == 0
    # At least ten test points per grid point in all: along k between grid points, at every a, every e.
    assert errors["points"] >= euler.TEST_POINTS_PER_GRID_POINT * 30 * 5 * 2


@pytest.mark.parametrize("ratio", [1.025, 0.4, 3.0])
def test_a_policy_off_by_a_known_factor_has_that_error_everywhere(ratio: float) -> None:
    # Saving s = ratio · alpha · beta of output y = e a k^alpha: c = (1 − s) y; tomorrow c' = (1 − s) y' and
    # the reward's slope in k' is alpha y' / (k' c') = alpha / (k' (1 − s)), whatever a' and e', so
    # c̃ = 1 / (beta · alpha / (s y (1 − s))) = (1 − s) y · s / (alpha beta) and |1 − c̃/c| = |1 − ratio|.
    data = _data(_document())
    found = euler.setup(data)
    errors = euler_states.states_errors(data, found, BETA, _saving(ratio * ALPHA * BETA))
    expected = math.log10(abs(1 - ratio))
    assert errors["points"] > 0 and errors["undefined"] == 0
    assert errors["max_log10"] == pytest.approx(expected, abs=1e-9)
    assert errors["mean_log10"] == pytest.approx(expected, abs=1e-9)
    profile = errors["profile"]
    assert profile["state"] == "k" and profile["over"] == ["a"]
    cells = np.array(profile["log10_error"], dtype=float)  # None (nan) where every a was constrained
    assert cells[np.isfinite(cells)] == pytest.approx(expected, abs=1e-9)
    assert np.isfinite(cells).sum() > 100


def _numpy_errors(today: np.ndarray, tomorrow: np.ndarray, k_grid: np.ndarray, a_grid: np.ndarray) -> np.ndarray:
    """Independent: the Euler errors of the grid policy ``today`` (a, k, e), with ``tomorrow``'s policy
    tomorrow, at every test point, (a, k test values, e).

    scipy's RegularGridInterpolator reads the policy between grid points (multilinear, as the module
    documents); tomorrow's ``a'`` outside its grid is moved to the nearer end, as the solve moves it.
    """
    def readers(policy: np.ndarray) -> list[RegularGridInterpolator]:
        return [RegularGridInterpolator((a_grid, k_grid), policy[:, :, j], bounds_error=False, fill_value=None)
                for j in range(E_VALUES.size)]

    read, read_next = readers(today), readers(tomorrow)
    parts = math.ceil(10 * k_grid.size / (k_grid.size - 1))
    k_test = (k_grid[:-1, None] + ((np.arange(parts) + 0.5) / parts)[None, :] * np.diff(k_grid)[:, None]).ravel()
    a, k = np.meshgrid(a_grid, k_test, indexing="ij")
    out = np.empty((*a.shape, E_VALUES.size))
    for j, e in enumerate(E_VALUES):
        x = read[j]((a, k))
        c = e * a * k**ALPHA - x
        a_next = np.clip(a**RHO, a_grid[0], a_grid[-1])
        expected = np.zeros_like(c)
        for jj, e_next in enumerate(E_VALUES):
            c_next = e_next * a_next * x**ALPHA - read_next[jj]((a_next, x))
            expected += E_CHAIN[j, jj] * ALPHA * e_next * a_next * x ** (ALPHA - 1) / c_next
        c_tilde = 1.0 / (BETA * expected)
        out[:, :, j] = np.log10(np.maximum(np.abs(1 - c_tilde / c), 2.0**-56))
    return out


def test_a_grid_choice_against_an_independent_numpy_computation() -> None:
    document = _document(40, 4)
    result = solve(document)
    assert result["status"] == "converged"
    errors = result["diagnostics"]["euler_errors"]
    k_grid, a_grid = np.asarray(result["axes"]["k"]), np.asarray(result["axes"]["a"])
    policy = np.asarray(result["policy"]["k_next"], dtype=float)
    reference = _numpy_errors(policy, policy, k_grid, a_grid)
    # Every test point is measured here: the policy stays well inside the capital grid.
    assert errors["constrained"] == 0 and errors["undefined"] == 0 and errors["points"] == reference.size
    assert errors["max_log10"] == pytest.approx(reference.max(), abs=1e-9)
    assert errors["mean_log10"] == pytest.approx(reference.mean(), abs=1e-9)
    # The profile: along k, the worst over a's grid points at each shock point.
    assert np.array(errors["profile"]["log10_error"], dtype=float) == pytest.approx(reference.max(axis=0), abs=1e-9)
    # A few test points one by one, through the module's own pieces (multilinear rule, errors_at).
    data = _data(document)
    found = euler.setup(data)
    rule = euler_states.grid_rule(data, np.asarray(result["policy"]["k_next"]).reshape(-1, 2), extend=1)
    picks = [(0, 3), (2, 100), (3, 389)]
    k_test = np.asarray(errors["profile"]["at"])
    points = np.array([[a_grid[i], k_test[m]] for i, m in picks])
    log_error, constrained = errors_at(data, found, BETA, rule, points, (data, rule))
    assert not constrained.any()
    assert log_error == pytest.approx(np.array([reference[i, m] for i, m in picks]), abs=1e-9)


def test_a_finite_horizon_against_the_independent_computation() -> None:
    # Four periods, nothing after the last: period t's errors link its policy today with period t + 1's
    # tomorrow (the numpy computation above, with the two periods' grid policies).
    document = with_horizon(_document(30, 4), {"periods": 4, "terminal_value": 0.0})
    result = solve(document)
    errors = result["diagnostics"]["euler_errors"]
    by_period = errors["by_period"]
    assert by_period["period"] == [0, 1, 2] and errors["profile"]["over"] == ["a"]
    k_grid, a_grid = np.asarray(result["axes"]["k"]), np.asarray(result["axes"]["a"])
    policy = np.asarray(result["policy"]["k_next"], dtype=float)  # (period, a, k, e)
    for t in by_period["period"]:
        reference = _numpy_errors(policy[t], policy[t + 1], k_grid, a_grid)
        assert by_period["max_log10"][t] == pytest.approx(reference.max(), abs=1e-9)
        assert by_period["mean_log10"][t] == pytest.approx(reference.mean(), abs=1e-9)
    assert errors["points"] == 3 * reference.size and errors["constrained"] == 0


@pytest.mark.parametrize(("interpolation", "least_drop"), [("linear", 0.2), ("monotone_cubic", 0.45)])
def test_a_continuous_choice_errors_fall_as_the_grid_is_refined(interpolation: str, least_drop: float) -> None:
    # Each doubling of the capital grid: linear interpolation of the value is first order in the step for the
    # Euler errors (the choice is pulled to the kinks of the interpolant: 0.30 per doubling expected), the
    # monotone cubic about second order (0.60).  Measured: linear −1.04, −1.29, −1.58; cubic −2.54, −3.16, −3.78
    # (one run, 7 points of a).
    worst, mean = [], []
    for k_points in (25, 50, 100):
        result = solve(_document(k_points, 7, continuous=True, interpolation=interpolation))
        assert result["status"] == "converged"
        errors = result["diagnostics"]["euler_errors"]
        assert errors["points"] >= euler.TEST_POINTS_PER_GRID_POINT * k_points * 7 * 2
        assert errors["weighted_mean_log10"] is not None
        worst.append(errors["max_log10"])
        mean.append(errors["mean_log10"])
    for coarse, fine in zip(worst, worst[1:]):
        assert coarse - fine >= least_drop
    for coarse, fine in zip(mean, mean[1:]):
        assert coarse - fine >= least_drop


def test_a_law_that_moves_with_the_chosen_state_is_measured_with_the_value_slope() -> None:
    # a' = a^rho · k^0.1: tomorrow's marginal value of k needs ∂V/∂a, read from the solved value
    # (worker.euler_laws; checked against the exact policy and an independent computation in test_euler_laws.py).
    document = _document(next={"a": "a**rho * k**0.1"})
    found = euler.setup(_data(document))
    assert isinstance(found, euler.EulerSetup) and [law.position for law in found.laws] == [0]
    errors = solve(document)["diagnostics"]["euler_errors"]
    assert errors["points"] > 0 and errors["max_log10"] is not None


def test_the_axis_order_moves_only_the_shock_columns_of_the_profile() -> None:
    # Two shocks (a second, iid, multiplying output) and axis_order listing them before and after the states:
    # the profile's rows stay along k, its columns follow the shocks' new order, and a is no column.
    def document(**model: Any) -> dict[str, Any]:
        spec = _document(20, 3, **model)
        spec["model"]["shocks"]["q"] = {"iid": {"values": [0.95, 1.0, 1.05], "probs": [0.25, 0.5, 0.25]}}
        spec["model"]["define"] = {"c": "e * q * a * k**alpha - k_next"}
        return spec

    before = solve(document())["diagnostics"]["euler_errors"]["profile"]
    moved = solve(document(axis_order=["q", "k", "a", "e"]))
    after = moved["diagnostics"]["euler_errors"]["profile"]
    assert moved["axis_order"] == ["q", "k", "a", "e"]
    assert {**after, "log10_error": None} == {**before, "log10_error": None} and after["over"] == ["a"]
    rows = len(before["at"])
    as_array = lambda table: np.array([[np.nan if v is None else v for v in row] for row in table])  # noqa: E731
    expected = as_array(before["log10_error"]).reshape(rows, 2, 3).transpose(0, 2, 1).reshape(rows, 6)
    np.testing.assert_allclose(as_array(after["log10_error"]), expected, rtol=0, atol=1e-12, equal_nan=True)


def test_a_continuous_choice_over_a_finite_horizon_is_measured_with_each_period_s_search() -> None:
    # Five periods, monotone cubic: every period but the last measured, and the worst error falls with the
    # grid step (measured −2.46, −2.99, −3.50 at 25, 50, 100 capital points, one run).
    worst = []
    for k_points in (25, 50, 100):
        document = with_horizon(_document(k_points, 5, continuous=True, interpolation="monotone_cubic"),
                                {"periods": 5, "terminal_value": 0.0})
        errors = solve(document)["diagnostics"]["euler_errors"]
        assert errors["by_period"]["period"] == [0, 1, 2, 3] and errors["constrained"] == 0
        worst.append(errors["max_log10"])
    assert worst[0] - worst[1] >= 0.4 and worst[1] - worst[2] >= 0.4


def test_a_continuous_choice_beside_a_discrete_one_with_two_states() -> None:
    # A discrete choice that only adds to the reward (`bonus`, always taken) leaves the saving choice the one of
    # the model without it — the value only shifts by 0.1 / (1 − beta) — so the errors at the chosen
    # combination are those of that model; with a choice that matters (`overtime`: a fixed extra income at a
    # utility cost, worth it only where consumption is low) test points where the choice switches today or
    # tomorrow are skipped and counted.
    plain = solve(_document(30, 5, continuous=True, interpolation="monotone_cubic"))["diagnostics"]["euler_errors"]
    document = _document(30, 5, continuous=True, interpolation="monotone_cubic",
                         choices={"bonus": {"values": [0.0, 1.0]}, **GROWTH["choices"]},
                         reward="log(c) + 0.1 * bonus")
    document["model"]["choices"]["k_next"]["continuous"] = True
    beside = solve(document)["diagnostics"]
    errors = beside["euler_errors"]
    assert errors["points"] == plain["points"] and errors["profile"]["over"] == ["a"]
    # Equal up to the searches' own precision (each point's search stops within about 1e-7 of the choice).
    assert errors["max_log10"] == pytest.approx(plain["max_log10"], abs=1e-3)
    assert errors["mean_log10"] == pytest.approx(plain["mean_log10"], abs=1e-3)
    # The stationary weighting too: the same policy has the same distribution (each combination weighs its points).
    assert errors["weighted_mean_log10"] == pytest.approx(plain["weighted_mean_log10"], abs=1e-3)
    assert any("chosen combination" in note for note in beside["notes"])
    document = _document(30, 5, continuous=True, interpolation="monotone_cubic",
                         choices={"overtime": {"values": [0.0, 1.0]}, **GROWTH["choices"]},
                         define={"c": "e * a * k**alpha + 0.05 * overtime - k_next"},
                         reward="log(c) - 0.12 * overtime")
    document["model"]["choices"]["k_next"]["continuous"] = True
    result = solve(document)
    switching = result["diagnostics"]["euler_errors"]
    overtime = np.asarray(result["policy"]["overtime"])
    assert 0 < overtime.sum() < overtime.size  # both regimes occur
    assert switching["constrained"] > 0 and switching["points"] > 0
    assert switching["points"] + switching["constrained"] + switching["undefined"] == plain["points"]
