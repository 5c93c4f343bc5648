"""Euler-equation errors of a model with two choices that each set tomorrow's value of a state (worker.euler_choices).

An invented workshop with two kinds of equipment, machines ``k`` and tools ``h``, its output
``y = z · k**A1 · h**A2`` (``z`` a Markov shock) eaten or put into next period's machines and tools, both
wearing out fully, with log utility: ``c = y − k_next − h_next``.  The exact policy is the two-capital
extension of Brock, W. A. and L. J. Mirman (1972), "Optimal economic growth and uncertainty: the discounted
case", Journal of Economic Theory 4(3), 479–513, derived here by guess and verify: with
``V = A(z) + B1 log k + B2 log h``, the first-order conditions ``1/c = β B_i / k_i'`` and the budget give
``k_i' = β B_i y / (1 + β (B1 + B2))``; matching the coefficients of ``log k_i``,
``B_i = A_i (1 + β (B1 + B2))``, so ``k_i' = A_i β y`` for each kind.  The calibration is invented.

The machines may instead be continuous beside tools on their grid (worker.continuous.setters_euler): checked
against an independent numpy computation on the workshop, and on an invented shop buying its tools out of a
fixed allowance, whose exact tools lie on their grid (:func:`_allowance_document` derives it).
"""

from __future__ import annotations

import math
from types import SimpleNamespace
from typing import Any

import numpy as np
import pytest
from scipy.interpolate import RegularGridInterpolator

from tests._documents import grid_document, with_horizon, with_period_slot
from tests._euler_checks import assert_each_choice_off_by
from worker.continuous.setters_euler import setters_errors, setters_setup
from worker.document import parse_document
from worker.euler import TEST_POINTS_PER_GRID_POINT
from worker.euler_choices import choices_errors, choices_setup
from worker.feasibility import model_data
from worker.solve import compile_document, solve

A1, A2, BETA = 0.25, 0.15, 0.95
Z_VALUES = np.array([0.9, 1.1])
Z_CHAIN = np.array([[0.8, 0.2], [0.3, 0.7]])

WORKSHOP: dict[str, Any] = {
    "params": {"a1": A1, "a2": A2},
    "states": {"k": {"min": 0.04, "max": 0.16, "points": 16}, "h": {"min": 0.02, "max": 0.10, "points": 12}},
    "shocks": {"z": {"markov": {"values": Z_VALUES.tolist(), "matrix": Z_CHAIN.tolist()}, "transform": "none"}},
    "choices": {"k_next": {"next_of": "k"}, "h_next": {"next_of": "h"}},
    "define": {"y": "z * k**a1 * h**a2", "c": "y - k_next - h_next"},
    "reward": "log(c)",
    "feasible": ["c > 0"],
}
"""Invented: a workshop choosing tomorrow's machines and tools out of today's output."""


def _document(**model: Any) -> dict[str, Any]:
    document = grid_document({**WORKSHOP, **model}, discount=BETA, method="howard")
    document["solver"]["tolerance"] = 1e-10
    document["report"] = {"stationary": True, "euler_errors": True}
    # The slot where a horizon puts ``period``: the finite-horizon tests below (with_horizon) share the kernels of
    # the infinite-horizon ones.
    return with_period_slot(document)


def _saving(share: float) -> Any:
    """Put ``share`` of output into one kind at every point (k, h) and shock point: (m, 2) -> (m, 2)."""
    return lambda points: share * Z_VALUES[None, :] * (points[:, 0] ** A1 * points[:, 1] ** A2)[:, None]


def test_the_exact_policy_has_errors_at_rounding_level_for_each_choice() -> None:
    data = model_data(parse_document(_document()))
    founds = choices_setup(data)
    assert isinstance(founds, list) and [(f.choice, f.state, f.define) for f in founds] == [
        ("k_next", "k", "c"), ("h_next", "h", "c")]
    rules = {"k_next": _saving(A1 * BETA), "h_next": _saving(A2 * BETA)}
    errors = choices_errors(data, founds, BETA, rules)
    assert errors["max_log10"] < -10 and errors["constrained"] == 0 and errors["undefined"] == 0
    for choice, state, size, other in (("k_next", "k", 16, 12), ("h_next", "h", 12, 16)):
        own = errors["by_choice"][choice]
        assert own["state"] == state and own["max_log10"] < -10
        # Along its own state between grid points, at every grid point of the other, every shock point.
        assert own["points"] >= TEST_POINTS_PER_GRID_POINT * size * other * 2
        assert own["profile"]["state"] == state


@pytest.mark.parametrize(("ratio_k", "ratio_h"), [(1.025, 0.9), (0.97, 1.3)])
def test_each_choice_off_by_a_known_factor_has_its_own_error(ratio_k: float, ratio_h: float) -> None:
    # k_i' = s_i y, s_i = ratio_i · A_i β: c = (1 − s1 − s2) y, tomorrow ∂r/∂k_i' = A_i y'/(k_i' c')
    # = A_i / (k_i' (1 − s1 − s2)) whatever z', so c̃_i = s_i y (1 − s1 − s2)/(A_i β) = ratio_i · c and
    # |1 − c̃_i/c| = |1 − ratio_i|, each choice's own, whatever the other's.
    data = model_data(parse_document(_document()))
    founds = choices_setup(data)
    assert isinstance(founds, list)
    rules = {"k_next": _saving(ratio_k * A1 * BETA), "h_next": _saving(ratio_h * A2 * BETA)}
    errors = choices_errors(data, founds, BETA, rules)
    by_choice = errors["by_choice"]
    for choice, ratio in (("k_next", ratio_k), ("h_next", ratio_h)):
        own = by_choice[choice]
        assert own["points"] > 0 and own["undefined"] == 0
        assert own["max_log10"] == pytest.approx(math.log10(abs(1 - ratio)), abs=1e-9)
        assert own["mean_log10"] == pytest.approx(math.log10(abs(1 - ratio)), abs=1e-9)
    worst = max(by_choice, key=lambda name: by_choice[name]["max_log10"])
    assert errors["max_log10"] == by_choice[worst]["max_log10"] and errors["profile"] == by_choice[worst]["profile"]
    points = by_choice["k_next"]["points"] + by_choice["h_next"]["points"]
    assert errors["points"] == points
    assert errors["mean_log10"] == pytest.approx(sum(
        by_choice[name]["mean_log10"] * by_choice[name]["points"] for name in by_choice) / points, abs=1e-12)


def _numpy_errors(policy_k: np.ndarray, policy_h: np.ndarray, k_grid: np.ndarray, h_grid: np.ndarray,
                  along: int, tomorrow: tuple[np.ndarray, np.ndarray] | None = None,
                  ) -> tuple[np.ndarray, tuple[np.ndarray, np.ndarray]]:
    """Independent: the Euler errors of the grid policies (k, h, z) of the choice setting state ``along`` (0: k,
    1: h) at its test points, (k or k test values, h test values or h, z), and the test points' (k, h) mesh;
    ``tomorrow``'s policies tomorrow (default: the same).

    scipy's RegularGridInterpolator reads both policies multilinearly between grid points (as the module
    documents); ten or more test points per grid point, strictly between grid points, along the choice's state.
    """
    grids = (k_grid, h_grid)
    read_k = [RegularGridInterpolator(grids, policy_k[:, :, j], bounds_error=False, fill_value=None)
              for j in range(Z_VALUES.size)]
    read_h = [RegularGridInterpolator(grids, policy_h[:, :, j], bounds_error=False, fill_value=None)
              for j in range(Z_VALUES.size)]
    next_k, next_h = tomorrow or (policy_k, policy_h)
    read_k_next = [RegularGridInterpolator(grids, next_k[:, :, j], bounds_error=False, fill_value=None)
                   for j in range(Z_VALUES.size)]
    read_h_next = [RegularGridInterpolator(grids, next_h[:, :, j], bounds_error=False, fill_value=None)
                   for j in range(Z_VALUES.size)]
    grid = grids[along]
    parts = math.ceil(10 * grid.size / (grid.size - 1))
    between = (grid[:-1, None] + ((np.arange(parts) + 0.5) / parts)[None, :] * np.diff(grid)[:, None]).ravel()
    k, h = np.meshgrid(between if along == 0 else k_grid, h_grid if along == 0 else between, indexing="ij")
    share = A1 if along == 0 else A2
    out = np.empty((*k.shape, Z_VALUES.size))
    for j, z in enumerate(Z_VALUES):
        xk, xh = read_k[j]((k, h)), read_h[j]((k, h))
        c = z * k**A1 * h**A2 - xk - xh
        expected = np.zeros_like(c)
        for jj, z_next in enumerate(Z_VALUES):
            y_next = z_next * xk**A1 * xh**A2
            c_next = y_next - read_k_next[jj]((xk, xh)) - read_h_next[jj]((xk, xh))
            expected += Z_CHAIN[j, jj] * share * y_next / ((xk if along == 0 else xh) * c_next)
        out[:, :, j] = np.log10(np.maximum(np.abs(1 - 1.0 / (BETA * expected) / c), 2.0**-56))
    return out, (k, h)


def test_the_solved_workshop_against_an_independent_numpy_computation() -> None:
    result = solve(_document())
    assert result["status"] == "converged"
    errors = result["diagnostics"]["euler_errors"]
    k_grid, h_grid = np.asarray(result["axes"]["k"]), np.asarray(result["axes"]["h"])
    policy_k = np.asarray(result["policy"]["k_next"], dtype=float)
    policy_h = np.asarray(result["policy"]["h_next"], dtype=float)
    distribution = np.asarray(result["stationary"]["distribution"], dtype=float)  # (k, h, z)
    total, weight, pooled = 0, 0.0, 0.0
    for along, choice in ((0, "k_next"), (1, "h_next")):
        reference, (k, h) = _numpy_errors(policy_k, policy_h, k_grid, h_grid, along)
        own = errors["by_choice"][choice]
        # Every test point is measured: both choices stay well inside their grids.
        assert own["constrained"] == 0 and own["undefined"] == 0 and own["points"] == reference.size
        assert own["max_log10"] == pytest.approx(reference.max(), abs=1e-9)
        assert own["mean_log10"] == pytest.approx(reference.mean(), abs=1e-9)
        # The stationary distribution read linearly along the choice's state at the test points.
        read = [RegularGridInterpolator((k_grid, h_grid), distribution[:, :, j]) for j in range(Z_VALUES.size)]
        weights = np.stack([r((k, h)) for r in read], axis=-1)
        assert own["weighted_mean_log10"] == pytest.approx((weights * reference).sum() / weights.sum(), abs=1e-9)
        total += reference.size
        weight += weights.sum()
        pooled += (weights * reference).sum()
    assert errors["points"] == total
    assert errors["max_log10"] == max(errors["by_choice"][c]["max_log10"] for c in ("k_next", "h_next"))
    assert errors["weighted_mean_log10"] == pytest.approx(pooled / weight, abs=1e-9)
    assert not any("Euler" in note for note in result["diagnostics"].get("notes", []))


def test_a_finite_horizon_against_the_independent_computation() -> None:
    # Terminal value B1 log k + B2 log h, B_i = A_i / (1 − (A1 + A2) β) (the module docstring's coefficients): the
    # exact policy of every period is then the infinite horizon's, inside both grids; period t's errors link its
    # grid policies today with period t + 1's tomorrow (the numpy computation above).
    bonus = 1 / (1 - (A1 + A2) * BETA)
    document = with_horizon(_document(), {"periods": 4,
                                          "terminal_value": f"{A1 * bonus} * log(k) + {A2 * bonus} * log(h)"})
    document["report"] = {"euler_errors": True}
    result = solve(document)
    errors = result["diagnostics"]["euler_errors"]
    assert errors["by_period"]["period"] == [0, 1, 2] and "weighted_mean_log10" not in errors
    k_grid, h_grid = np.asarray(result["axes"]["k"]), np.asarray(result["axes"]["h"])
    policy_k = np.asarray(result["policy"]["k_next"], dtype=float)  # (period, k, h, z)
    policy_h = np.asarray(result["policy"]["h_next"], dtype=float)
    everything = {"k_next": [], "h_next": []}
    for t in errors["by_period"]["period"]:
        worst = []
        for along, choice in ((0, "k_next"), (1, "h_next")):
            reference, _ = _numpy_errors(policy_k[t], policy_h[t], k_grid, h_grid, along,
                                         (policy_k[t + 1], policy_h[t + 1]))
            everything[choice].append(reference)
            worst.append(reference.max())
        assert errors["by_period"]["max_log10"][t] == pytest.approx(max(worst), abs=1e-9)
    for choice, parts in everything.items():
        own = errors["by_choice"][choice]
        pooled = np.concatenate([part.ravel() for part in parts])
        assert own["constrained"] == 0 and own["points"] == pooled.size
        assert own["max_log10"] == pytest.approx(pooled.max(), abs=1e-9)
        assert own["mean_log10"] == pytest.approx(pooled.mean(), abs=1e-9)
    assert errors["points"] == sum(sum(part.size for part in parts) for parts in everything.values())


def test_a_law_that_moves_with_a_chosen_state_is_in_that_choice_s_equation() -> None:
    # A third state whose law uses tools: the tools' equation carries ∂V/∂q (worker.euler_laws; checked against the
    # exact policy and an independent computation in test_euler_choices_laws.py), the machines' does not.
    states = {**WORKSHOP["states"], "q": {"min": 0.9, "max": 1.1, "points": 3}}
    document = _document(states=states, next={"q": "0.5 + 0.5 * q * (h / 0.05)**0.01"},
                         define={"y": "z * q * k**a1 * h**a2", "c": "y - k_next - h_next"})
    found = choices_setup(model_data(parse_document(document)))
    assert isinstance(found, list) and found[0].laws == () and len(found[1].laws) == 1
    result = solve(document)
    assert set(result["diagnostics"]["euler_errors"]["by_choice"]) == {"k_next", "h_next"}
    assert not any("law of motion of `q`" in note for note in result["diagnostics"].get("notes", []))


# A continuous choice beside a discrete one that sets a state (worker.continuous.setters_euler): machines ``k``
# anywhere in their interval, tools ``h`` on their grid.

CONTINUOUS_MACHINES = {"k_next": {"next_of": "k", "continuous": True}, "h_next": {"next_of": "h"}}


def _between(grid: np.ndarray) -> np.ndarray:
    """Ten or more test values per grid point, the centres of equal parts of each interval (common practice, as
    the module documents)."""
    parts = math.ceil(10 * grid.size / (grid.size - 1))
    return (grid[:-1, None] + ((np.arange(parts) + 0.5) / parts)[None, :] * np.diff(grid)[:, None]).ravel()


def _searched(problem: Any, v: np.ndarray, points: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The fitted problem's own search (fixq's maximiser, not its Euler code) at points (m, 2) of (k, h), every
    shock row: ``(value, k', index of h')``, each (m, shock points)."""
    m, n_z = points.shape[0], Z_VALUES.size
    found, chosen = problem.choose_at(v, np.repeat(points, n_z, axis=0), np.tile(np.arange(n_z), m), None)
    return found.reshape(m, n_z), chosen[:, 0].reshape(m, n_z), chosen[:, 1].astype(int).reshape(m, n_z)


def _exact_maximum(value: np.ndarray, k_grid: np.ndarray, h_grid: np.ndarray, points: np.ndarray
                   ) -> tuple[np.ndarray, np.ndarray]:
    """Independent, plain numpy: the fitted workshop's maximum at points (m, 2), every shock point, ``(value, k')``.

    Tomorrow's value is read linearly along k (``linear`` interpolation; h' is a grid point), so on each grid
    segment of k the continuation is linear and ``1/c = β · slope`` gives the segment's maximum in closed form;
    the best segment and the best h' win."""
    k, h = points[:, 0], points[:, 1]
    best = np.full((k.size, Z_VALUES.size), -np.inf)
    chosen = np.full(best.shape, np.nan)
    for j, z in enumerate(Z_VALUES):
        after = value @ Z_CHAIN[j]  # (k, h): E[V(k', h', z') | z]
        y = z * k**A1 * h**A2
        for i, h_next in enumerate(h_grid):
            for s in range(k_grid.size - 1):
                slope = (after[s + 1, i] - after[s, i]) / (k_grid[s + 1] - k_grid[s])
                interior = y - h_next - 1 / (BETA * slope) if slope > 0 else np.full(k.size, k_grid[s])
                save = np.clip(interior, k_grid[s], k_grid[s + 1])
                c = y - h_next - save
                with np.errstate(invalid="ignore", divide="ignore"):
                    total = np.where(c > 0, np.log(np.where(c > 0, c, 1.0)) + BETA * (
                        after[s, i] + slope * (save - k_grid[s])), -np.inf)
                better = total > best[:, j]
                best[better, j], chosen[better, j] = total[better], save[better]
    return best, chosen


def _machine_errors(problem: Any, v: np.ndarray, k_grid: np.ndarray, h_grid: np.ndarray,
                    v_after: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Independent, plain numpy: Judd's (1992) errors of the machines' equation at the test points (between grid
    points of k, at every grid point of h, C order), every shock point: ``(points, error, constrained,
    measured)``.

    Today's (k', h') and tomorrow's (k'', h'') at (k', h', z') are the fitted problem's search (:func:`_searched`,
    checked against :func:`_exact_maximum` by the test); the equation is ``1/c = β Σ_z' P[z, z'] ∂r/∂k(s')`` with
    ``∂r/∂k = a1 y'/(k' c'')`` (log utility, ``c = y − k_next − h_next``), ``c̃ = 1/(β E[·])``.  Skipped: k'
    within one local grid step of an end of k's grid or c ≤ 0 a step away (common practice, as fixq's rule), and
    tomorrow's best h'' at k' not the one a test points' spacing below or above (the value's kink).  ``v`` is the
    value today's choice is made against; ``v_after`` tomorrow's (a finite horizon's next period; by default ``v``).
    """
    v_after = v if v_after is None else v_after
    k, h = np.meshgrid(_between(k_grid), h_grid, indexing="ij")
    points = np.column_stack([k.ravel(), h.ravel()])
    _, k_next, index = _searched(problem, v, points)
    h_next = h_grid[index]
    y = Z_VALUES[None, :] * points[:, :1] ** A1 * points[:, 1:] ** A2
    c = y - k_next - h_next
    after = np.column_stack([k_next.ravel(), h_next.ravel()])  # tomorrow's states, rows (test point, z)
    _, k_after, index_after = _searched(problem, v_after, after)
    y_after = Z_VALUES[None, :] * after[:, :1] ** A1 * after[:, 1:] ** A2
    c_after = y_after - k_after - h_grid[index_after]
    slope = (A1 * y_after / (after[:, :1] * c_after)).reshape(*c.shape, Z_VALUES.size)
    expected = np.einsum("mzw,zw->mz", slope, Z_CHAIN)
    error = np.log10(np.maximum(np.abs(1 - 1 / (BETA * expected) / c), 2.0**-56))
    step = np.interp(k_next, 0.5 * (k_grid[1:] + k_grid[:-1]), np.diff(k_grid))
    constrained = (k_next - step < k_grid[0]) | (k_next + step > k_grid[-1])
    constrained |= (y - h_next - (k_next - step) <= 0) | (y - h_next - (k_next + step) <= 0)
    apart = np.interp(after[:, 0], 0.5 * (k_grid[1:] + k_grid[:-1]), np.diff(k_grid)) / math.ceil(
        10 * k_grid.size / (k_grid.size - 1))  # the test points' spacing there
    for moved in (after[:, 0] - apart, after[:, 0] + apart):
        beside = np.column_stack([np.clip(moved, k_grid[0], k_grid[-1]), after[:, 1]])
        switched = (_searched(problem, v_after, beside)[2] != index_after).any(axis=1)
        constrained |= switched.reshape(c.shape)
    return points, error, constrained, ~constrained & np.isfinite(error)


def test_a_continuous_choice_beside_a_discrete_next_of_choice_against_an_independent_computation() -> None:
    # The machines' grid starts above the poorest shop's exact choice, so their lower limit binds there.
    states = {"k": {"min": 0.06, "max": 0.16, "points": 8}, "h": {"min": 0.02, "max": 0.10, "points": 6}}
    document = _document(states=states, hints={"concave": True}, choices=CONTINUOUS_MACHINES)
    result = solve(document)
    assert result["status"] == "converged"
    errors = result["diagnostics"]["euler_errors"]
    k_grid, h_grid = np.asarray(result["axes"]["k"]), np.asarray(result["axes"]["h"])
    value = np.asarray(result["value"], dtype=float)  # (k, h, z)
    problem = compile_document(document)[1]
    v = value.reshape(-1)
    points, error, constrained, measured = _machine_errors(problem, v, k_grid, h_grid)
    # The search's choices are the fitted problem's exact maximum (an independent numpy maximiser), to Brent's
    # tolerance; the errors below then use the search's own.
    found, k_next, index = _searched(problem, v, points)
    after = np.column_stack([k_next.ravel(), h_grid[index].ravel()])  # tomorrow's states, off the grid of k
    for where, (found, chosen, _) in ((points, (found, k_next, index)), (after, _searched(problem, v, after))):
        best, exact = _exact_maximum(value, k_grid, h_grid, where)
        assert np.abs(found - best).max() <= 1e-10
        assert np.abs(chosen - exact).max() <= 1e-6
    own = errors["by_choice"]["k_next"]
    assert own["state"] == "k" and own["define"] == "c" and own["undefined"] == 0
    assert own["points"] == measured.sum() and own["constrained"] == constrained.sum() == error.size - measured.sum()
    # Both kinds of skip happen here: the machines' lower limit, and tomorrow's tools switching along k.
    step = np.interp(k_next, 0.5 * (k_grid[1:] + k_grid[:-1]), np.diff(k_grid))
    at_limit = k_next - step < k_grid[0]
    assert at_limit.any() and (constrained & ~at_limit).any() and own["points"] > error.size / 2
    assert own["max_log10"] == pytest.approx(error[measured].max(), abs=1e-9)
    assert own["mean_log10"] == pytest.approx(error[measured].mean(), abs=1e-9)
    # Every test point: the profile along k holds, per shock point, the worst over h of the errors measured.
    layout = (_between(k_grid).size, h_grid.size, Z_VALUES.size)
    worst = np.where(measured, error, -np.inf).reshape(layout).max(axis=1)
    profile = np.array([[-np.inf if entry is None else entry for entry in row]
                        for row in own["profile"]["log10_error"]])
    assert own["profile"]["pooled"] == 1 and np.array_equal(profile == -np.inf, worst == -np.inf)
    np.testing.assert_allclose(profile[worst > -np.inf], worst[worst > -np.inf], rtol=0, atol=1e-9)
    distribution = np.asarray(result["stationary"]["distribution"], dtype=float)
    read = [RegularGridInterpolator((k_grid, h_grid), distribution[:, :, j]) for j in range(Z_VALUES.size)]
    weights = np.stack([r(points) for r in read], axis=-1)
    assert own["weighted_mean_log10"] == pytest.approx(
        (weights * error)[measured].sum() / weights[measured].sum(), abs=1e-9)
    # The tools' own equation: along h, every policy read linearly between grid points (the module documents why).
    reference, _ = _numpy_errors(np.asarray(result["policy"]["k_next"], dtype=float),
                                 np.asarray(result["policy"]["h_next"], dtype=float), k_grid, h_grid, 1)
    tools = errors["by_choice"]["h_next"]
    assert tools["state"] == "h" and tools["constrained"] == 0 and tools["points"] == reference.size
    assert tools["max_log10"] == pytest.approx(reference.max(), abs=1e-9)
    assert tools["mean_log10"] == pytest.approx(reference.mean(), abs=1e-9)
    assert errors["max_log10"] == max(own["max_log10"], tools["max_log10"])
    assert errors["points"] == own["points"] + tools["points"]
    assert any(f"{own['constrained']:,} test points skipped" in note for note in result["diagnostics"]["notes"])


ALLOWANCE = 0.4
H_BAR = BETA * (A2 / (1 - BETA * A1)) * ALLOWANCE / (1 + BETA * A2 / (1 - BETA * A1))
"""The allowance shop's exact tools, whatever the state (:func:`_allowance_document`)."""


def _allowance_document(machines: int) -> dict[str, Any]:
    """Invented: a machine shop whose tools are bought out of a fixed allowance ``e`` (``w = e − h_next`` left for
    other spending) while output ``y = z k**a1 h**a2`` is eaten or put into tomorrow's machines, both wearing out
    fully; ``machines`` grid points of k, tools on a grid of five values centred on the exact choice.

    Exact policy (Brock & Mirman 1972 extended to two capital goods, by guess and verify): with
    ``V = A(z) + B1 log k + B2 log h``, the first-order conditions ``1/c = β B1/k'`` (``c = y − k'``) and
    ``1/w = β B2/h'`` give ``k' = β B1 y/(1 + β B1)`` and ``h' = β B2 e/(1 + β B2)``; the reward adds
    ``(1 + β B1) log y`` plus constants, and ``log y = log z + a1 log k + a2 log h``, so ``B1 = a1/(1 − β a1)``,
    ``B2 = a2/(1 − β a1)``: ``k' = a1 β y`` and ``h' = H_BAR``, a constant that the tools' grid holds.
    """
    states = {"k": {"min": 0.04, "max": 0.16, "points": machines},
              "h": {"values": (H_BAR * np.array([0.6, 0.8, 1.0, 1.2, 1.4])).tolist()}}
    return _document(states=states, hints={"concave": True}, params={"a1": A1, "a2": A2, "e": ALLOWANCE},
                     choices=CONTINUOUS_MACHINES, define={"y": "z * k**a1 * h**a2", "c": "y - k_next",
                                                          "w": "e - h_next"},
                     reward="log(c) + log(w)", feasible=["c > 0", "w > 0"])


@pytest.mark.parametrize("ratio", [1.0, 1.03])
def test_the_allowance_shop_s_exact_policy_beside_its_tools(ratio: float) -> None:
    # k' = s y with s = ratio · a1 β, h' = H_BAR: c = (1 − s) y and tomorrow ∂r/∂k = a1 y'/(k' c'') = a1/(k'(1 − s))
    # whatever z', so c̃ = k'(1 − s)/(β a1) and c̃/c = ratio; the tools' ∂r/∂h = a2/(H_BAR (1 − s)) gives
    # w̃ = H_BAR (1 − s)/(β a2) and w̃/w = (1 − s)/(1 − a1 β) (1 at the exact policy: H_BAR = β B2 w).
    data = model_data(parse_document(_allowance_document(8)))
    problem = SimpleNamespace(others=("h_next",))
    founds = setters_setup(problem, data)
    assert isinstance(founds, list) and [(f.choice, f.state, f.define) for f in founds] == [
        ("k_next", "k", "c"), ("h_next", "h", "w")]
    h_grid = data.state_grids[1]
    index = int(np.flatnonzero(h_grid == H_BAR)[0])
    machines = _saving(ratio * A1 * BETA)

    def search(points: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        return machines(points), np.full((points.shape[0], Z_VALUES.size), index)

    rules = {"k_next": machines, "h_next": lambda points: np.full((points.shape[0], Z_VALUES.size), H_BAR)}
    errors = setters_errors(data, founds, BETA, search, (("h_next",), h_grid[:, None]), rules)
    share = ratio * A1 * BETA
    assert_each_choice_off_by(errors, (("k_next", 8, 5, abs(1 - ratio)),
                                       ("h_next", 5, 8, abs(1 - (1 - share) / (1 - A1 * BETA)))),
                              Z_VALUES.size, exact=ratio == 1.0)


def test_the_machines_errors_fall_as_their_grid_is_refined() -> None:
    # One run (linear interpolation; worst / mean log10 of the machines' equation): 8 points -0.83 / -1.39,
    # 16 points -1.16 / -1.76, 32 points -1.47 / -2.07 (64: -1.79 / -2.39): first order, about log10 2 per halving
    # of the step, as for a continuous choice alone with linear interpolation.  No point is skipped: the solved
    # tools are H_BAR everywhere, so tomorrow's tools never switch.
    worst, mean = [], []
    for machines in (8, 16, 32):
        result = solve(_allowance_document(machines))
        own = result["diagnostics"]["euler_errors"]["by_choice"]["k_next"]
        assert own["constrained"] == 0 and own["undefined"] == 0
        assert np.all(np.asarray(result["policy"]["h_next"]) == H_BAR)
        worst.append(own["max_log10"])
        mean.append(own["mean_log10"])
    assert worst[0] > worst[1] + 0.25 > worst[2] + 0.5 and mean[0] > mean[1] + 0.25 > mean[2] + 0.5


def test_a_finite_horizon_with_a_continuous_choice_beside_a_discrete_next_of_choice() -> None:
    # Period t's machines: today's choice against V_{t+1}, tomorrow's against V_{t+2} (the terminal value for the
    # last period measured), each by the fitted problem's own search; the independent numpy computation above.
    states = {"k": {"min": 0.06, "max": 0.16, "points": 8}, "h": {"min": 0.02, "max": 0.10, "points": 6}}
    document = _document(states=states, hints={"concave": True}, choices=CONTINUOUS_MACHINES)
    periods = 3
    with_horizon(document, {"periods": periods, "terminal_value": "0.5 * log(k) + 0.3 * log(h)"})
    document["report"] = {"euler_errors": True}
    result = solve(document)
    errors = result["diagnostics"]["euler_errors"]
    assert errors["by_period"]["period"] == [0, 1]
    k_grid, h_grid = np.asarray(result["axes"]["k"]), np.asarray(result["axes"]["h"])
    values = np.asarray(result["value"], dtype=float)  # (period, k, h, z)
    terminal = np.broadcast_to((0.5 * np.log(k_grid)[:, None] + 0.3 * np.log(h_grid)[None, :])[:, :, None],
                               values.shape[1:])
    after = [values[t].reshape(-1) for t in range(1, periods)] + [np.ascontiguousarray(terminal).reshape(-1)]
    problem = compile_document(document)[1]
    measured_all, error_all, skipped = [], [], 0
    for t in errors["by_period"]["period"]:
        _, error, constrained, measured = _machine_errors(problem, after[t], k_grid, h_grid, after[t + 1])
        measured_all.append(measured.sum())
        error_all.append(error[measured])
        skipped += int(constrained.sum())
    own = errors["by_choice"]["k_next"]
    pooled = np.concatenate(error_all)
    assert own["points"] == sum(measured_all) == pooled.size > 0 and own["constrained"] == skipped
    assert own["max_log10"] == pytest.approx(pooled.max(), abs=1e-9)
    assert own["mean_log10"] == pytest.approx(pooled.mean(), abs=1e-9)
    # The tools' own equation, period t's grid policies today and period t + 1's tomorrow (numpy, as above).
    policy_k = np.asarray(result["policy"]["k_next"], dtype=float)
    policy_h = np.asarray(result["policy"]["h_next"], dtype=float)
    tools = np.concatenate([_numpy_errors(policy_k[t], policy_h[t], k_grid, h_grid, 1,
                                          (policy_k[t + 1], policy_h[t + 1]))[0].ravel()
                            for t in errors["by_period"]["period"]])
    assert errors["by_choice"]["h_next"]["max_log10"] == pytest.approx(tools.max(), abs=1e-9)
    assert errors["by_choice"]["h_next"]["mean_log10"] == pytest.approx(tools.mean(), abs=1e-9)
    assert any(f"{own['constrained']:,} test points skipped in all periods" in note
               for note in result["diagnostics"]["notes"])
