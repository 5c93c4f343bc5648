"""Euler-equation errors of a ``monotone_cubic`` solve whose draws after the choice have probabilities moving with
the choice or the chosen state (worker.euler_states.solve_value, worker.euler_points).

The first-order condition then carries ``Σ_d ∂p_d/∂x · W_d`` and the envelope condition ``Σ_d ∂p_d/∂k · W_d``,
``W_d = r_d + β EV(next_d, z)`` the worth of draw ``d``, with ``EV(·, z) = Σ_z' P[z, z'] V(·, z')`` read as the
solve reads it: the solve interpolates the expectation ``EV`` by the tensor product of monotone cubics, which is
not the expectation of cubic readings of ``V`` (the reading is not linear in the value).

The model (invented): Brock, W. A. and L. J. Mirman (1972), "Optimal economic growth and uncertainty: the
discounted case", Journal of Economic Theory 4(3), with a productivity level ``z`` drawn after the choice
(``z' = d``), the high draw's odds ``0.2 + a_x k' + a_k k`` rising with the capital chosen and today's, and a
Markov shock ``e`` seen before the choice, as in tests/worker/test_euler_draws.py.

Independent reading: scipy's PchipInterpolator (Fritsch, F. N. and J. Butland (1984), "A method for constructing
local monotone piecewise cubic interpolants", SIAM J. Sci. Stat. Comput. 5(2): the weighted harmonic mean of the
secants, zero where they turn, the three-point formula at the ends — the node slopes of fixq's Fritsch–Carlson
interpolant), along k (the last state) first, then along z, of EV formed here with numpy.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest
from scipy.interpolate import PchipInterpolator

from tests._documents import with_horizon, with_period_slot
from worker import euler, euler_points, euler_states
from worker.solve import compile_document, solve

ALPHA, BETA = 0.3, 0.95
E_VALUES, E_CHAIN = np.array([0.95, 1.05]), np.array([[0.8, 0.2], [0.3, 0.7]])
D_VALUES = np.array([0.9, 1.1])


def _document(on_choice: float, on_state: float, k_points: int = 20) -> dict[str, Any]:
    """Invented: capital, a productivity level drawn after the choice for tomorrow with odds rising with the
    capital chosen (``on_choice``) and today's (``on_state``), a shock seen before the choice."""
    high = f"0.2 + {on_choice} * k_next + {on_state} * k"
    model = {
        "kind": "grid",
        "params": {"alpha": ALPHA},
        "states": {"z": {"min": 0.9, "max": 1.1, "points": 2}, "k": {"min": 0.05, "max": 0.45, "points": k_points}},
        "shocks": {
            "e": {"markov": {"values": E_VALUES.tolist(), "matrix": E_CHAIN.tolist()}, "transform": "none"},
            "d": {"timing": "after_choice", "iid": {"values": D_VALUES.tolist(), "probs": [f"1 - ({high})", high]}},
        },
        "choices": {"k_next": {"next_of": "k", "continuous": True}},
        "next": {"z": "d"},
        "define": {"c": "e * z * k**alpha - k_next"},
        "reward": "log(c)",
        "feasible": ["c > 0"],
        "interpolation": "monotone_cubic",
        "hints": {"concave": True},
    }
    # The slot where a horizon puts ``period``: the finite-horizon tests below (with_horizon) share the kernels of
    # the infinite-horizon ones.
    return with_period_slot({"version": 1, "discount": BETA, "model": model,
                             "solver": {"method": "howard", "tolerance": 1e-10},
                             "report": {"stationary": True, "euler_errors": True}})


def _pchip_ev(value: np.ndarray, z_grid: np.ndarray, k_grid: np.ndarray, j: int, z: np.ndarray,
              k: np.ndarray, *, mean_of_reads: bool = False) -> np.ndarray:
    """Independent: EV(·, e_j) = Σ_e' P[e_j, e'] V(·, e') of ``value`` (z, k, e) at points (z, k) by scipy's
    PchipInterpolator along k, then along z; with ``mean_of_reads`` instead the expectation of the cubic readings
    of each V(·, e') (what the solve does not read)."""
    tables = value if mean_of_reads else np.einsum("w,zkw->zk", E_CHAIN[j], value)[:, :, None]
    out = np.zeros(z.size)
    levels, which = np.unique(z, return_inverse=True)  # each point's line along z read at its own z only
    for w in range(tables.shape[-1]):
        lines = PchipInterpolator(k_grid, tables[:, :, w], axis=1)(k)  # (z nodes, points)
        read = PchipInterpolator(z_grid, lines, axis=0)(levels)[which.reshape(-1), np.arange(z.size)]
        out += E_CHAIN[j, w] * read if mean_of_reads else read
    return out


def _scipy_errors(points: np.ndarray, z_grid: np.ndarray, k_grid: np.ndarray, rule: Any, rule_next: Any,
                  value_next: np.ndarray, value_after: np.ndarray, on_choice: float, on_state: float,
                  **reading: bool) -> np.ndarray:
    """Independent: log10 errors at test ``points`` (z, k), (points, e), of the choices ``rule`` today and
    ``rule_next`` tomorrow (points -> (points, e)); ``value_next`` tomorrow's value V_{t+1} (z, k, e), read in
    today's worths, ``value_after`` the day after's V_{t+2}, read in tomorrow's.

    1/c̃ = β Σ_d p_d Σ_e' P[e, e'] V_k(k', d, e') + Σ_d ∂p_d/∂k' W_d, the envelope condition
    V_k(k, z, e) = α e z k^(α−1) / c + Σ_d ∂p_d/∂k W_d (the probabilities sum to one), W_d = log c + β EV(d, x).
    """
    z, k = points[:, 0], points[:, 1]
    x = rule(points)
    signs = (-1.0, 1.0)  # ∂p_low = −∂p_high
    reference = np.empty_like(x)
    for j, e in enumerate(E_VALUES):
        c = e * z * k**ALPHA - x[:, j]
        p_high = 0.2 + on_choice * x[:, j] + on_state * k
        total = np.zeros(z.size)
        for d, p, sign in zip(D_VALUES, (1 - p_high, p_high), signs):
            z_next = np.full(z.size, d)
            x_next = rule_next(np.column_stack([z_next, x[:, j]]))
            worth = np.log(c) + BETA * _pchip_ev(value_next, z_grid, k_grid, j, z_next, x[:, j], **reading)
            total += sign * on_choice * worth
            for jj, e_next in enumerate(E_VALUES):
                c_next = e_next * d * x[:, j] ** ALPHA - x_next[:, jj]
                marginal = ALPHA * e_next * d * x[:, j] ** (ALPHA - 1) / c_next
                for d2, sign2 in zip(D_VALUES, signs):
                    after = _pchip_ev(value_after, z_grid, k_grid, jj, np.full(z.size, d2), x_next[:, jj], **reading)
                    marginal = marginal + sign2 * on_state * (np.log(c_next) + BETA * after)
                total += BETA * p * E_CHAIN[j, jj] * marginal
        reference[:, j] = np.log10(np.maximum(np.abs(1 - (1.0 / total) / c), 2.0**-56))
    return reference


def _solved(document: dict[str, Any]) -> tuple[dict[str, Any], Any]:
    result = solve(document)
    assert result["status"] in ("converged", "completed"), result["status"]
    _, problem = compile_document(document)
    return result, problem


def test_scipy_reads_ev_as_fixq_s_cubic_does() -> None:
    # The independent reading first: on a solved value, scipy's tensor pchip of EV equals fixq's solve_value
    # reading at random points (the nodes of these grids, 2 points of z: there the cubic is the line).
    result, problem = _solved(_document(0.6, 0.3, 12))
    data = problem.model_data
    z_grid, k_grid = data.state_grids
    value = np.asarray(result["value"], dtype=float)
    read = euler_states.solve_value(problem, data, value.reshape(-1))
    rng = np.random.default_rng(3)
    points = np.column_stack([rng.uniform(z_grid[0], z_grid[-1], 60), rng.uniform(k_grid[0], k_grid[-1], 60)])
    rows = rng.integers(0, 2, 60)
    ours = read(points, rows)
    for j in (0, 1):
        at = rows == j
        assert ours[at] == pytest.approx(_pchip_ev(value, z_grid, k_grid, j, points[at, 0], points[at, 1]),
                                         rel=1e-13, abs=1e-13)


@pytest.mark.parametrize(("on_choice", "on_state"), [(0.6, 0.0), (0.0, 0.5), (0.6, 0.3)])
def test_a_solved_cubic_choice_against_an_independent_scipy_reading(on_choice: float, on_state: float) -> None:
    # Every test point's error against one computed here with numpy and scipy: the choices today and tomorrow by
    # the fitted problem's own search (the policy the solve has between grid points), the worths' EV read by scipy.
    result, problem = _solved(_document(on_choice, on_state))
    data = problem.model_data
    found = euler.setup(data)
    value = np.asarray(result["value"], dtype=float)
    rule = euler_states.search_rule(problem, value.reshape(-1), np.asarray(result["policy"]["k_next"]).reshape(-1))
    points, _ = euler_states.test_points(data, found)
    read = euler_states.solve_value(problem, data, value.reshape(-1))
    fixq, constrained = euler_points.errors_at(data, found, BETA, rule, points, (data, rule), (read, read, BETA))
    z_grid, k_grid = data.state_grids
    reference = _scipy_errors(points, z_grid, k_grid, rule, rule, value, value, on_choice, on_state)
    assert not constrained.any()
    # |1 − c̃/c| alike to 1e-13 at every point (largest gap 4.7e-15, one run), so the log10 to 1e-9 wherever the
    # error is above 1e-5 and to 3e-9 everywhere (largest 9.7e-10 at errors near 1e-7, one run: the two readings
    # round differently).  Reading instead the expectation of cubic readings of V(·, e') moves |1 − c̃/c| by
    # 2e-11 to 1e-10 (one run), far above that: the check tells the two readings apart.
    assert np.abs(10.0**fixq - 10.0**reference).max() <= 1e-13
    assert fixq == pytest.approx(reference, abs=3e-9)
    above = reference > -5
    assert above.sum() > reference.size // 4
    assert fixq[above] == pytest.approx(reference[above], abs=1e-9)
    misread = _scipy_errors(points, z_grid, k_grid, rule, rule, value, value, on_choice, on_state,
                            mean_of_reads=True)
    assert np.abs(10.0**misread - 10.0**reference).max() > 1e-12
    errors = result["diagnostics"]["euler_errors"]
    assert errors["points"] == reference.size and errors["constrained"] == 0 and errors["undefined"] == 0
    assert errors["max_log10"] == pytest.approx(reference.max(), abs=1e-9)
    assert errors["mean_log10"] == pytest.approx(reference.mean(), abs=1e-9)
    assert not any("not read here" in note for note in result["diagnostics"].get("notes", []))


def test_a_cubic_finite_horizon_against_the_independent_scipy_reading() -> None:
    # Period t: today's choice by the search against V_{t+1}, tomorrow's against V_{t+2}; today's worths read
    # V_{t+1}, tomorrow's V_{t+2} (the terminal value 0 for the last period measured).
    document = with_horizon(_document(0.6, 0.3, 16), {"periods": 4, "terminal_value": 0.0})
    document["report"] = {"euler_errors": True}
    result, problem = _solved(document)
    errors = result["diagnostics"]["euler_errors"]
    assert errors["by_period"]["period"] == [0, 1, 2]
    data = problem.model_data
    z_grid, k_grid = data.state_grids
    policies = np.asarray(result["policy"]["k_next"], dtype=float).reshape(4, -1)
    values = [*np.asarray(result["value"], dtype=float), np.zeros((z_grid.size, k_grid.size, 2))]  # V_0 .. V_4
    points, _ = euler_states.test_points(data, euler.setup(data))
    for t in (0, 1, 2):
        rule = euler_states.search_rule(problem, values[t + 1].reshape(-1), policies[t])
        rule_next = euler_states.search_rule(problem, values[t + 2].reshape(-1), policies[t + 1])
        reference = _scipy_errors(points, z_grid, k_grid, rule, rule_next, values[t + 1], values[t + 2], 0.6, 0.3)
        assert errors["by_period"]["max_log10"][t] == pytest.approx(reference.max(), abs=1e-9)
        assert errors["by_period"]["mean_log10"][t] == pytest.approx(reference.mean(), abs=1e-9)
    assert errors["constrained"] == 0 and errors["points"] == 3 * reference.size


def test_the_cubic_errors_fall_as_the_grid_is_refined() -> None:
    # About second order in the grid step (common practice for a monotone cubic on smooth data; 0.60 a doubling).
    # Measured worst −2.79, −3.31, −3.98 and mean −3.76, −4.40, −5.01 at 25, 50, 100 capital points (one run;
    # linear interpolation on the same grids: worst −1.13, −1.45, −1.75).
    worst, mean = [], []
    for k_points in (25, 50, 100):
        errors = solve(_document(0.6, 0.3, k_points))["diagnostics"]["euler_errors"]
        assert errors["constrained"] == 0 and errors["undefined"] == 0
        assert errors["points"] >= euler.TEST_POINTS_PER_GRID_POINT * k_points * 2 * 2 * 0.9
        assert errors["weighted_mean_log10"] is not None
        worst.append(errors["max_log10"])
        mean.append(errors["mean_log10"])
    assert worst[0] - worst[1] >= 0.4 and worst[1] - worst[2] >= 0.4
    assert mean[0] - mean[1] >= 0.5 and mean[1] - mean[2] >= 0.5
    assert worst[2] < -3.5


def _with_effort(document: dict[str, Any]) -> dict[str, Any]:
    """Invented: beside the capital chosen, an effort of 0 or 1 that raises output by a tenth at a cost."""
    model = document["model"]
    model["choices"]["effort"] = {"values": [0.0, 1.0]}
    model["define"] = {"c": "e * z * k**alpha * (1 + 0.1 * effort) - k_next"}
    model["reward"] = "log(c) - 0.05 * effort * z"
    return document


def test_beside_a_discrete_choice_the_cubic_errors_fall_as_the_grid_is_refined() -> None:
    # The continuous choice at the chosen combination of the others (worker.continuous.mixed_euler), the worths
    # read as the cubic solve reads them.  Measured worst −2.94, −3.49, −4.03 and mean −3.86, −4.49, −5.10 at 25,
    # 50, 100 capital points (one run; linear: worst −1.22, −1.47, −1.83); with four periods, worst of periods
    # 0 to 2: −2.64 at 25 points, −3.29 at 50 (one run).
    worst = []
    for k_points in (25, 50, 100):
        errors = solve(_with_effort(_document(0.6, 0.3, k_points)))["diagnostics"]["euler_errors"]
        assert errors["points"] >= euler.TEST_POINTS_PER_GRID_POINT * k_points * 2 * 2 * 0.9
        worst.append(errors["max_log10"])
    assert worst[0] - worst[1] >= 0.4 and worst[1] - worst[2] >= 0.4
    by_period = []
    for k_points in (25, 50):
        document = with_horizon(_with_effort(_document(0.6, 0.3, k_points)), {"periods": 4, "terminal_value": 0.0})
        errors = solve(document)["diagnostics"]["euler_errors"]
        assert errors["by_period"]["period"] == [0, 1, 2] and errors["points"] > 0
        by_period.append(errors["max_log10"])
    assert by_period[0] - by_period[1] >= 0.4


def test_one_state_with_odds_moving_with_the_choice_under_the_cubic() -> None:
    # tests/worker/test_euler_draws.py's one-state luck (a bonus of 0.1 drawn after the choice, its chance
    # 0.2 + 0.6 k' rising with tomorrow's capital) with a continuous choice and monotone_cubic: the draw moves no
    # state, so both draws' EV are read at one point and W_high − W_low = 0.1, and the first-order condition reads
    # 1/c̃ = β Σ_e' P[e, e'] α e' k'^(α − 1) / c'(k', e') + 0.06, the choices by the fitted problem's own search.
    model = {
        "kind": "grid", "params": {"alpha": ALPHA},
        "states": {"k": {"min": 0.05, "max": 0.45, "points": 30}},
        "shocks": {"e": {"markov": {"values": E_VALUES.tolist(), "matrix": E_CHAIN.tolist()}, "transform": "none"},
                   "luck": {"timing": "after_choice", "iid": {"values": [0.0, 1.0],
                                                              "probs": ["0.8 - 0.6 * k_next", "0.2 + 0.6 * k_next"]}}},
        "choices": {"k_next": {"next_of": "k", "continuous": True}},
        "define": {"c": "e * k**alpha - k_next"},
        "reward": "log(c) + 0.1 * luck",
        "feasible": ["c > 0"],
        "interpolation": "monotone_cubic",
        "hints": {"concave": True},
    }
    result, problem = _solved({"version": 1, "discount": BETA, "model": model,
                               "solver": {"method": "howard", "tolerance": 1e-10}, "report": {"euler_errors": True}})
    errors = result["diagnostics"]["euler_errors"]
    grid = problem.model_data.state_grids[0]
    rule = problem.policy_rule(np.asarray(result["value"], dtype=float).reshape(-1),
                               np.asarray(result["policy"]["k_next"], dtype=float).reshape(-1))
    k = euler.between_points(grid)
    x = rule(k)
    reference = np.empty_like(x)
    for j, e in enumerate(E_VALUES):
        x_next = rule(x[:, j])
        ahead = sum(E_CHAIN[j, jj] * ALPHA * e_next * x[:, j] ** (ALPHA - 1) / (e_next * x[:, j] ** ALPHA
                                                                               - x_next[:, jj])
                    for jj, e_next in enumerate(E_VALUES))
        c = e * k**ALPHA - x[:, j]
        reference[:, j] = np.log10(np.maximum(np.abs(1 - 1.0 / (BETA * ahead + 0.06) / c), 2.0**-56))
    assert errors["constrained"] == 0 and errors["points"] == reference.size
    assert errors["max_log10"] == pytest.approx(reference.max(), abs=1e-9)
    assert errors["mean_log10"] == pytest.approx(reference.mean(), abs=1e-9)
