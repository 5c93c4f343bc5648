"""Euler-equation errors beside a choice that sets no state (worker.euler_within, worker.continuous.setters_euler).

An invented workshop: machines ``k`` chosen anywhere in their interval (continuous, ``next_of`` ``k``), tools
``h`` bought on their grid out of a fixed allowance ``e`` (``w = e − h_next`` left for other spending), and a
daily effort (0 or 1, setting no state) that raises today's output ``y = z k**a1 h**a2 (1 + g · effort)`` and
costs ``κ z`` in utility (effort is dearer in good times); output is eaten or put into tomorrow's machines, both
kinds wearing out fully; reward ``log(c) + log(w) − κ z effort``, ``c = y − k_next``.

Exact policy (Brock, W. A. and L. J. Mirman (1972), "Optimal economic growth and uncertainty: the discounted
case", Journal of Economic Theory 4(3), 479–513, extended by guess and verify to two capital goods and the
effort): with ``V = A(z) + B1 log k + B2 log h``, the first-order conditions ``1/c = β B1/k'`` and
``1/w = β B2/h'`` give ``k' = β B1 y/(1 + β B1)``, ``h' = β B2 e/(1 + β B2)``; the reward then holds
``(1 + β B1) log y``, whose ``log k`` and ``log h`` coefficients give ``B1 = a1/(1 − β a1)``,
``B2 = a2/(1 − β a1)``: ``k' = a1 β y`` and ``h' = H_BAR``, whatever the effort.  The effort enters only
``(1 + β B1) log(1 + g · effort) − κ z effort`` (the rest is the same with or without it), so it is taken
where ``log(1 + g)/(1 − β a1) > κ z``: here at the low shock and not at the high one.  The calibration is
invented.
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
from worker.continuous.mixed_euler import searcher
from worker.continuous.setters_euler import setters_errors, setters_setup
from worker.document import parse_document
from worker.euler import TEST_POINTS_PER_GRID_POINT
from worker.euler_choices import choices_errors, choices_setup, grid_rules
from worker.euler_points import errors_at
from worker.euler_within import maximised, within_reason
from worker.feasibility import model_data
from worker.solve import compile_document, solve

A1, A2, BETA, ALLOWANCE, GAIN, KAPPA = 0.25, 0.15, 0.95, 0.4, 0.1, 0.125
Z_VALUES = np.array([0.9, 1.1])
Z_CHAIN = np.array([[0.8, 0.2], [0.3, 0.7]])
H_BAR = BETA * (A2 / (1 - BETA * A1)) * ALLOWANCE / (1 + BETA * A2 / (1 - BETA * A1))
EFFORT = (math.log(1 + GAIN) / (1 - BETA * A1) > KAPPA * Z_VALUES).astype(float)
"""The exact effort at each shock point (derived in the module's docstring): [1, 0]."""


def _document(machines: int) -> dict[str, Any]:
    """The invented workshop (module docstring): ``machines`` grid points of k, tools on five values centred on the
    exact choice."""
    model = {
        "params": {"a1": A1, "a2": A2, "e": ALLOWANCE, "g": GAIN, "kappa": KAPPA},
        "states": {"k": {"min": 0.04, "max": 0.16, "points": machines},
                   "h": {"values": (H_BAR * np.array([0.6, 0.8, 1.0, 1.2, 1.4])).tolist()}},
        "shocks": {"z": {"markov": {"values": Z_VALUES.tolist(), "matrix": Z_CHAIN.tolist()}, "transform": "none"}},
        "choices": {"effort": {"values": [0.0, 1.0]}, "k_next": {"next_of": "k", "continuous": True},
                    "h_next": {"next_of": "h"}},
        "define": {"y": "z * k**a1 * h**a2 * (1 + g * effort)", "c": "y - k_next", "w": "e - h_next"},
        "reward": "log(c) + log(w) - kappa * z * effort",
        "feasible": ["c > 0", "w > 0"],
        "hints": {"concave": True},
    }
    document = grid_document(model, discount=BETA, method="howard")
    document["solver"]["tolerance"] = 1e-10
    document["report"] = {"stationary": True, "euler_errors": True}
    # The slot where a horizon puts ``period``: the finite-horizon test below (with_horizon) shares the kernels of
    # the infinite-horizon ones.
    return with_period_slot(document)


def test_the_exact_effort_switches_with_the_shock() -> None:
    assert EFFORT.tolist() == [1.0, 0.0]


@pytest.mark.parametrize("ratio", [1.0, 1.03])
def test_the_exact_policy_beside_an_effort_that_sets_no_state(ratio: float) -> None:
    # k' = s y (y with the exact effort) with s = ratio · a1 β, h' = H_BAR: c = (1 − s) y and tomorrow
    # ∂r/∂k = a1 y'/(k' c'') = a1/(k'(1 − s)) whatever z' and the effort, so c̃/c = ratio; the tools' ∂r/∂h =
    # a2/(H_BAR (1 − s)) gives w̃/w = (1 − s)/(1 − a1 β) (1 at the exact policy) — as without the effort, which
    # the tools' equation maximises out within the period (the best reward today at the machines read there).
    data = model_data(parse_document(_document(8)))
    others = ("effort", "h_next")
    founds = setters_setup(SimpleNamespace(others=others), data)
    assert isinstance(founds, list) and [(f.choice, f.state, f.define) for f in founds] == [
        ("k_next", "k", "c"), ("h_next", "h", "w")]
    h_grid = data.state_grids[1]
    combos = np.array([[effort, h] for effort in (0.0, 1.0) for h in h_grid])  # C order, as the search's
    index = np.array([int(np.flatnonzero((combos[:, 0] == effort) & (combos[:, 1] == H_BAR))[0])
                      for effort in EFFORT])
    share = ratio * A1 * BETA

    def machines(points: np.ndarray) -> np.ndarray:
        return share * Z_VALUES[None, :] * (1 + GAIN * EFFORT[None, :]) * (points[:, :1] ** A1 * points[:, 1:] ** A2)

    def search(points: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        return machines(points), np.broadcast_to(index, (points.shape[0], Z_VALUES.size))

    rules = {"k_next": machines, "h_next": lambda points: np.full((points.shape[0], Z_VALUES.size), H_BAR)}
    # Maximised out within the period at the machines and tools read there: the exact effort, at every point.
    points = np.column_stack([np.linspace(0.04, 0.16, 7), np.full(7, H_BAR)])
    assert (maximised(data, founds[1], rules)(points)["effort"] == EFFORT[None, :]).all()
    errors = setters_errors(data, founds, BETA, search, (others, combos), rules)
    assert_each_choice_off_by(errors, (("k_next", 8, 5, abs(1 - ratio)),
                                       ("h_next", 5, 8, abs(1 - (1 - share) / (1 - A1 * BETA)))),
                              Z_VALUES.size, exact=ratio == 1.0)


def _between(grid: np.ndarray) -> np.ndarray:
    """Ten or more test values per grid point, the centres of equal parts of each interval (common practice, as
    fixq documents)."""
    parts = math.ceil(10 * grid.size / (grid.size - 1))
    return (grid[:-1, None] + ((np.arange(parts) + 0.5) / parts)[None, :] * np.diff(grid)[:, None]).ravel()


def _searched(problem: Any, v: np.ndarray, points: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The fitted problem's own search (fixq's maximiser, not its Euler code) at points (m, 2) of (k, h), every shock
    row: ``(k', effort, h', combination index)``, each (m, shock points)."""
    m, n_z = points.shape[0], Z_VALUES.size
    _, chosen = problem.choose_at(v, np.repeat(points, n_z, axis=0), np.tile(np.arange(n_z), m), None)
    index = chosen[:, 1].astype(int)
    assert problem.others == ("effort", "h_next")
    effort, h_next = problem.combos[index, 0], problem.combos[index, 1]
    return (chosen[:, 0].reshape(m, n_z), effort.reshape(m, n_z), h_next.reshape(m, n_z), index.reshape(m, n_z))


def _machine_errors(problem: Any, v: np.ndarray, k_grid: np.ndarray, h_grid: np.ndarray,
                    v_after: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Independent, plain numpy: Judd's (1992) errors of the machines' equation at the test points (between grid
    points of k, every grid point of h, C order), every shock point, and where they are measured.  Today's and
    tomorrow's choices by the fitted problem's search; ``1/c̃ = β Σ_z' P[z, z'] a1 y'/(k' c'')`` with y' at
    tomorrow's effort.  Skipped: k' within one local grid step of an end of k's grid or c ≤ 0 a step away (common
    practice, as fixq's rule), or tomorrow's best combination (effort, h'') at k' not the one a test points'
    spacing below or above (the value's kink).  ``v`` is the value today's choice is made against, ``v_after``
    tomorrow's (a finite horizon's next period; by default ``v``)."""
    v_after = v if v_after is None else v_after
    k, h = np.meshgrid(_between(k_grid), h_grid, indexing="ij")
    points = np.column_stack([k.ravel(), h.ravel()])
    k_next, effort, h_next, _ = _searched(problem, v, points)
    y = Z_VALUES[None, :] * points[:, :1] ** A1 * points[:, 1:] ** A2 * (1 + GAIN * effort)
    c = y - k_next
    after = np.column_stack([k_next.ravel(), h_next.ravel()])
    k_after, effort_after, _, index_after = _searched(problem, v_after, after)
    y_after = Z_VALUES[None, :] * after[:, :1] ** A1 * after[:, 1:] ** A2 * (1 + GAIN * effort_after)
    slope = (A1 * y_after / (after[:, :1] * (y_after - k_after))).reshape(*c.shape, Z_VALUES.size)
    expected = np.einsum("mzw,zw->mz", slope, Z_CHAIN)
    error = np.log10(np.maximum(np.abs(1 - 1 / (BETA * expected) / c), 2.0**-56))
    step = np.interp(k_next, 0.5 * (k_grid[1:] + k_grid[:-1]), np.diff(k_grid))
    constrained = (k_next - step < k_grid[0]) | (k_next + step > k_grid[-1]) | (c - step <= 0)
    apart = np.interp(after[:, 0], 0.5 * (k_grid[1:] + k_grid[:-1]), np.diff(k_grid)) / math.ceil(
        10 * k_grid.size / (k_grid.size - 1))
    for moved in (after[:, 0] - apart, after[:, 0] + apart):
        beside = np.column_stack([np.clip(moved, k_grid[0], k_grid[-1]), after[:, 1]])
        constrained |= (_searched(problem, v_after, beside)[3] != index_after).any(axis=1).reshape(c.shape)
    return error, ~constrained & np.isfinite(error)


def _tool_errors(policy_k: np.ndarray, policy_h: np.ndarray, k_grid: np.ndarray, h_grid: np.ndarray) -> np.ndarray:
    """Independent, plain numpy: the tools' equation at the test points (every grid point of k, between grid points
    of h), every shock point: both grid policies (k, h, z) read linearly along h and k, the effort the best reward
    today at them (``log(y(e) − k') − κ z e``, the tools' term the same for both), ``1/w̃ = β Σ_z' P[z, z']
    a2 y'/(h' c'')`` with tomorrow's effort so too."""
    def read(table: np.ndarray, k: np.ndarray, h: np.ndarray) -> np.ndarray:
        i = np.clip(np.searchsorted(k_grid, k, side="right") - 1, 0, k_grid.size - 2)
        j = np.clip(np.searchsorted(h_grid, h, side="right") - 1, 0, h_grid.size - 2)
        s = np.clip((k - k_grid[i]) / (k_grid[i + 1] - k_grid[i]), 0, 1)  # held at the ends along k
        t = (h - h_grid[j]) / (h_grid[j + 1] - h_grid[j])  # the end intervals' lines extended along h
        return ((1 - s) * (1 - t))[:, None] * table[i, j] + ((1 - s) * t)[:, None] * table[i, j + 1] + (
            s * (1 - t))[:, None] * table[i + 1, j] + (s * t)[:, None] * table[i + 1, j + 1]

    def effort_at(k: np.ndarray, h: np.ndarray, k_next: np.ndarray) -> np.ndarray:
        base = Z_VALUES[None, :] * (k**A1 * h**A2)[:, None]
        with np.errstate(invalid="ignore", divide="ignore"):
            worth = [np.where(base * (1 + GAIN * e) - k_next > 0, np.log(base * (1 + GAIN * e) - k_next)
                              - KAPPA * Z_VALUES[None, :] * e, -np.inf) for e in (0.0, 1.0)]
        return (worth[1] > worth[0]).astype(float)

    k, h = (grid.ravel() for grid in np.meshgrid(k_grid, _between(h_grid), indexing="ij"))
    k_next, h_next = read(policy_k, k, h), read(policy_h, k, h)
    w = ALLOWANCE - h_next
    expected = np.zeros_like(w)
    for j in range(Z_VALUES.size):
        k_after = read(policy_k, k_next[:, j], h_next[:, j])  # tomorrow's tools do not enter c''
        effort = effort_at(k_next[:, j], h_next[:, j], k_after)
        y_after = Z_VALUES[None, :] * (k_next[:, j] ** A1 * h_next[:, j] ** A2)[:, None] * (1 + GAIN * effort)
        slope = A2 * y_after / (h_next[:, j, None] * (y_after - k_after))
        expected[:, j] = slope @ Z_CHAIN[j]
    return np.log10(np.maximum(np.abs(1 - 1 / (BETA * expected) / w), 2.0**-56))


def test_the_solved_workshop_against_an_independent_computation() -> None:
    document = _document(8)
    result = solve(document)
    assert result["status"] == "converged"
    effort = np.asarray(result["policy"]["effort"])
    assert (effort == EFFORT[None, None, :]).all()  # the solved effort is the exact one
    problem = compile_document(document)[1]
    k_grid, h_grid = np.asarray(result["axes"]["k"]), np.asarray(result["axes"]["h"])
    v = np.asarray(result["value"], dtype=float).reshape(-1)
    errors = result["diagnostics"]["euler_errors"]
    error, measured = _machine_errors(problem, v, k_grid, h_grid)
    own = errors["by_choice"]["k_next"]
    assert own["points"] == measured.sum() > error.size / 2 and own["undefined"] == 0
    assert own["max_log10"] == pytest.approx(error[measured].max(), abs=1e-9)
    assert own["mean_log10"] == pytest.approx(error[measured].mean(), abs=1e-9)
    worst = np.where(measured, error, -np.inf).reshape(-1, h_grid.size, Z_VALUES.size).max(axis=1)
    profile = np.array([[-np.inf if entry is None else entry for entry in row]
                        for row in own["profile"]["log10_error"]])
    assert np.array_equal(profile == -np.inf, worst == -np.inf)
    np.testing.assert_allclose(profile[worst > -np.inf], worst[worst > -np.inf], rtol=0, atol=1e-9)
    # Every test point: fixq's per-point errors (worker.euler_points.errors_at, with the search's choices and the
    # combination beside, as the diagnostic reads them) against the independent ones where measured.
    data = problem.model_data
    founds = setters_setup(problem, data)
    assert isinstance(founds, list)
    search = searcher(problem, v)

    def beside(points: np.ndarray) -> dict[str, np.ndarray]:
        return {name: problem.combos[search(points)[1], column] for column, name in enumerate(problem.others)}

    k, h = np.meshgrid(_between(k_grid), h_grid, indexing="ij")
    points = np.column_stack([k.ravel(), h.ravel()])
    fixq, _ = errors_at(data, founds[0], BETA, lambda at: search(at)[0], points, (data, lambda at: search(at)[0]),
                        companions=(beside, beside))
    assert np.abs(fixq - error)[measured].max() <= 1e-9
    tools = errors["by_choice"]["h_next"]
    reference = _tool_errors(np.asarray(result["policy"]["k_next"], dtype=float),
                             np.asarray(result["policy"]["h_next"], dtype=float), k_grid, h_grid)
    rules, _ = grid_rules(data, founds, {name: np.asarray(result["policy"][name], dtype=float).reshape(-1)
                                         for name in ("k_next", "h_next")})
    k, h = np.meshgrid(k_grid, _between(h_grid), indexing="ij")
    within = maximised(data, founds[1], rules)
    fixq, _ = errors_at(data, founds[1], BETA, rules["h_next"], np.column_stack([k.ravel(), h.ravel()]),
                        (data, rules["h_next"]), companions=(within, within))
    assert np.abs(fixq - reference).max() <= 1e-9
    assert tools["constrained"] == 0 and tools["undefined"] == 0 and tools["points"] == reference.size
    assert tools["max_log10"] == pytest.approx(reference.max(), abs=1e-9)
    assert tools["mean_log10"] == pytest.approx(reference.mean(), abs=1e-9)
    assert "effort" not in errors["by_choice"]
    assert any("`effort`, setting no state, maximised out within the period" in note
               for note in result["diagnostics"]["notes"])


def test_the_machines_errors_fall_as_their_grid_is_refined() -> None:
    # One run (linear interpolation; worst / mean log10 of the machines' equation): 8 points −0.89 / −1.47,
    # 16 points −1.19 / −1.78, 32 points −1.50 / −2.10: first order, about log10 2 per halving of the step, as for
    # a continuous choice alone with linear interpolation.
    worst, mean = [], []
    for machines in (8, 16, 32):
        result = solve(_document(machines))
        own = result["diagnostics"]["euler_errors"]["by_choice"]["k_next"]
        assert own["undefined"] == 0
        worst.append(own["max_log10"])
        mean.append(own["mean_log10"])
    assert worst[0] > worst[1] + 0.25 > worst[2] + 0.5 and mean[0] > mean[1] + 0.25 > mean[2] + 0.5


def test_a_finite_horizon_against_the_independent_computation() -> None:
    # Period t's machines: today's choice against V_{t+1}, tomorrow's against V_{t+2} (the terminal value for the
    # last period measured), each by the fitted problem's own search; the effort the search's, as above.
    document = with_horizon(_document(8), {"periods": 3, "terminal_value": "0.3 * log(k) + 0.2 * log(h)"})
    document["report"] = {"euler_errors": True}
    result = solve(document)
    errors = result["diagnostics"]["euler_errors"]
    assert errors["by_period"]["period"] == [0, 1]
    k_grid, h_grid = np.asarray(result["axes"]["k"]), np.asarray(result["axes"]["h"])
    values = np.asarray(result["value"], dtype=float)  # (period, k, h, z)
    terminal = np.broadcast_to((0.3 * np.log(k_grid)[:, None] + 0.2 * np.log(h_grid)[None, :])[:, :, None],
                               values.shape[1:])
    after = [values[1].reshape(-1), values[2].reshape(-1), np.ascontiguousarray(terminal).reshape(-1)]
    problem = compile_document(document)[1]
    parts = [_machine_errors(problem, after[t], k_grid, h_grid, after[t + 1]) for t in (0, 1)]
    pooled = np.concatenate([error[measured] for error, measured in parts])
    own = errors["by_choice"]["k_next"]
    assert own["points"] == pooled.size > 0 and own["undefined"] == 0
    assert own["max_log10"] == pytest.approx(pooled.max(), abs=1e-9)
    assert own["mean_log10"] == pytest.approx(pooled.mean(), abs=1e-9)
    assert any("`effort`, setting no state, maximised out within the period" in note
               for note in result["diagnostics"]["notes"])


def test_a_law_that_moves_with_the_effort_gets_a_note() -> None:
    # Effort that wears the tools: tomorrow's tools would carry it, so it is not maximised out within the period.
    document = _document(8)
    model = document["model"]
    model["states"]["q"] = {"min": 0.5, "max": 1.0, "points": 3}
    model["next"] = {"q": "0.5 + 0.4 * q - 0.1 * effort"}
    data = model_data(parse_document(document))
    assert within_reason(data, ("effort",)).startswith("the law of motion of `q` moves with `effort`")
    # The note a solve's diagnostics carry (a solve passes it on as the continuous hours' note of
    # test_euler_choices_laws.py shows; a solve here would compile one more model structure for it).
    assert setters_setup(SimpleNamespace(others=("effort", "h_next")), data) == (
        "Euler-equation errors were not measured: the law of motion of `q` moves with `effort`, a choice that sets "
        "no state, so that choice is not maximised out within the period")


def test_a_draw_probability_that_moves_with_the_effort_gets_a_note() -> None:
    # Grid choices beside a menu effort that makes a breakdown after the choice less likely (invented): tomorrow's
    # chances would carry the effort.
    document = _grid_document()
    model = document["model"]
    chances = ["0.8 + 0.1 * effort", "0.2 - 0.1 * effort"]
    model["shocks"]["breakdown"] = {"iid": {"values": [0.0, 1.0], "probs": chances}, "timing": "after_choice"}
    model["reward"] = "log(c) - kappa * z * effort - 0.1 * breakdown"
    note = ("Euler-equation errors were not measured: a probability of a draw after the choice moves with `effort`, a "
            "choice that sets no state, so that choice is not maximised out within the period")
    assert choices_setup(model_data(parse_document(document))) == note
    result = solve(document)
    assert "euler_errors" not in result["diagnostics"] and note in result["diagnostics"]["notes"]


# Both kinds on their grids beside a menu effort (worker.euler_choices with worker.euler_within): the workshop of
# test_euler_choices.py (output eaten or put into machines and tools, c = y − k_next − h_next) with the effort above.
# Exact policy by the same guess and verify: k' = A1 β y, h' = A2 β y (y with the effort); the effort enters only
# S log(1 + g · effort) − κ' z effort with S = 1 / (1 − β (A1 + A2)): taken at the low shock, not at the high one.

KAPPA_GRID = 0.155
EFFORT_GRID = (math.log(1 + GAIN) / (1 - BETA * (A1 + A2)) > KAPPA_GRID * Z_VALUES).astype(float)


def _grid_document(k_points: int = 16, h_points: int = 12) -> dict[str, Any]:
    model = {
        "params": {"a1": A1, "a2": A2, "g": GAIN, "kappa": KAPPA_GRID},
        "states": {"k": {"min": 0.04, "max": 0.16, "points": k_points},
                   "h": {"min": 0.02, "max": 0.10, "points": h_points}},
        "shocks": {"z": {"markov": {"values": Z_VALUES.tolist(), "matrix": Z_CHAIN.tolist()}, "transform": "none"}},
        "choices": {"k_next": {"next_of": "k"}, "effort": {"values": [0.0, 1.0]}, "h_next": {"next_of": "h"}},
        "define": {"y": "z * k**a1 * h**a2 * (1 + g * effort)", "c": "y - k_next - h_next"},
        "reward": "log(c) - kappa * z * effort",
        "feasible": ["c > 0"],
    }
    document = grid_document(model, discount=BETA, method="howard")
    document["solver"]["tolerance"] = 1e-10
    document["report"] = {"stationary": True, "euler_errors": True}
    return document


def _grid_share(share: float) -> Any:
    """Put ``share`` of output (with the exact effort) into one kind at points (k, h), every shock point."""
    return lambda points: share * Z_VALUES[None, :] * (1 + GAIN * EFFORT_GRID[None, :]) * (
        points[:, :1] ** A1 * points[:, 1:] ** A2)


@pytest.mark.parametrize("ratio", [1.0, 1.03])
def test_grid_choices_beside_a_menu_effort_with_the_exact_policy(ratio: float) -> None:
    # k' = s_k y, s_k = ratio · A1 β, h' = A2 β y: tomorrow ∂r/∂k' = A1 / (k' (1 − s)) whatever the effort, so
    # c̃ / c = s_k / (β A1) = ratio for the machines and 1 for the tools.
    data = model_data(parse_document(_grid_document()))
    founds = choices_setup(data)
    assert isinstance(founds, list) and [f.choice for f in founds] == ["k_next", "h_next"]
    rules = {"k_next": _grid_share(ratio * A1 * BETA), "h_next": _grid_share(A2 * BETA)}
    points = np.column_stack([np.linspace(0.05, 0.15, 9), np.full(9, 0.05)])
    assert (maximised(data, founds[0], rules)(points)["effort"] == EFFORT_GRID[None, :]).all()
    errors = choices_errors(data, founds, BETA, rules)
    assert set(errors["by_choice"]) == {"k_next", "h_next"}
    for choice in ("k_next", "h_next"):
        own = errors["by_choice"][choice]
        assert own["constrained"] == 0 and own["undefined"] == 0 and own["points"] > 0
    assert errors["by_choice"]["h_next"]["max_log10"] < -13
    if ratio == 1.0:
        assert errors["by_choice"]["k_next"]["max_log10"] < -13
    else:
        assert errors["by_choice"]["k_next"]["max_log10"] == pytest.approx(math.log10(ratio - 1), abs=1e-9)


def _grid_errors(policy_k: np.ndarray, policy_h: np.ndarray, k_grid: np.ndarray, h_grid: np.ndarray, along: int
                 ) -> tuple[np.ndarray, np.ndarray]:
    """Independent (numpy, scipy): the errors of the choice setting state ``along`` (0: k, 1: h) at its test points
    ((k, h) rows, C order), every shock point: both grid policies read multilinearly by scipy, the effort the best
    reward today at them (``log(y(e) − k' − h') − κ' z e``), today and tomorrow."""
    grids = (k_grid, h_grid)
    read = [[RegularGridInterpolator(grids, table[:, :, j]) for j in range(Z_VALUES.size)]
            for table in (policy_k, policy_h)]

    def effort_at(k: np.ndarray, h: np.ndarray, spent: np.ndarray, z: Any) -> np.ndarray:
        with np.errstate(invalid="ignore", divide="ignore"):
            worth = [np.where(z * k**A1 * h**A2 * (1 + GAIN * e) - spent > 0,
                              np.log(z * k**A1 * h**A2 * (1 + GAIN * e) - spent) - KAPPA_GRID * z * e, -np.inf)
                     for e in (0.0, 1.0)]
        return (worth[1] > worth[0]).astype(float)

    k, h = (g.ravel() for g in np.meshgrid(*(_between(grid) if t == along else grid for t, grid in enumerate(grids)),
                                           indexing="ij"))
    points = np.column_stack([k, h])
    out = np.empty((k.size, Z_VALUES.size))
    for j, z in enumerate(Z_VALUES):
        xk, xh = read[0][j](points), read[1][j](points)
        c = z * k**A1 * h**A2 * (1 + GAIN * effort_at(k, h, xk + xh, z)) - xk - xh
        expected = np.zeros(k.size)
        for jj, z_next in enumerate(Z_VALUES):
            tomorrow = np.column_stack([xk, xh])
            xk2, xh2 = read[0][jj](tomorrow), read[1][jj](tomorrow)
            y_next = z_next * xk**A1 * xh**A2 * (1 + GAIN * effort_at(xk, xh, xk2 + xh2, z_next))
            share = A1 / xk if along == 0 else A2 / xh
            expected += Z_CHAIN[j, jj] * share * y_next / (y_next - xk2 - xh2)
        out[:, j] = np.log10(np.maximum(np.abs(1 - 1.0 / (BETA * expected) / c), 2.0**-56))
    return out, points


def test_solved_grid_choices_beside_a_menu_effort_against_an_independent_computation() -> None:
    document = _grid_document()
    result = solve(document)
    assert result["status"] == "converged"
    assert (np.asarray(result["policy"]["effort"]) == EFFORT_GRID[None, None, :]).all()
    k_grid, h_grid = np.asarray(result["axes"]["k"]), np.asarray(result["axes"]["h"])
    policies = {name: np.asarray(result["policy"][name], dtype=float) for name in ("k_next", "h_next")}
    data = model_data(parse_document(document))
    founds = choices_setup(data)
    assert isinstance(founds, list)
    rules, _ = grid_rules(data, founds, {name: table.reshape(-1) for name, table in policies.items()})
    errors = result["diagnostics"]["euler_errors"]
    for along, found in enumerate(founds):
        reference, points = _grid_errors(policies["k_next"], policies["h_next"], k_grid, h_grid, along)
        within = maximised(data, found, rules)
        fixq, constrained = errors_at(data, found, BETA, rules[found.choice], points, (data, rules[found.choice]),
                                      companions=(within, within))
        assert not constrained.any()
        assert np.abs(fixq - reference).max() <= 1e-9  # every test point
        own = errors["by_choice"][found.choice]
        assert own["constrained"] == 0 and own["points"] == reference.size
        assert own["max_log10"] == pytest.approx(reference.max(), abs=1e-9)
        assert own["mean_log10"] == pytest.approx(reference.mean(), abs=1e-9)
        # The stationary distribution of the report read linearly along the choice's state at the test points.
        distribution = np.asarray(result["stationary"]["distribution"], dtype=float)  # (k, h, z)
        weights = np.stack([RegularGridInterpolator((k_grid, h_grid), distribution[:, :, j])(points)
                            for j in range(Z_VALUES.size)], axis=-1)
        assert own["weighted_mean_log10"] == pytest.approx((weights * reference).sum() / weights.sum(), abs=1e-9)
    assert any("`effort`, setting no state, maximised out within the period" in note
               for note in result["diagnostics"]["notes"])


def test_grid_choices_beside_a_menu_effort_fall_as_the_grids_are_refined() -> None:
    # One run (worst / mean log10): 16 × 12 points of (k, h) machines −1.12 / −1.77, tools −0.91 / −1.58;
    # 32 × 24 machines −1.39 / −2.06, tools −1.27 / −1.94: about first order in the grid step.
    coarse, fine = (solve(_grid_document(k, h))["diagnostics"]["euler_errors"]["by_choice"]
                    for k, h in ((16, 12), (32, 24)))
    for choice in ("k_next", "h_next"):
        assert coarse[choice]["max_log10"] > fine[choice]["max_log10"] + 0.2
        assert coarse[choice]["mean_log10"] > fine[choice]["mean_log10"] + 0.2


def test_one_grid_next_of_choice_beside_a_menu_effort() -> None:
    # The machines alone (no tools): y = z k**A1 (1 + g · effort), c = y − k_next, reward log(c) − κ'' z effort.
    # Brock & Mirman (1972): k' = A1 β y whatever the effort, which enters only log(1 + g · effort)/(1 − β A1)
    # − κ'' z effort: taken at the low shock only (κ'' below).  Exact policy at rounding level, off by 3 % the
    # derived error c̃/c = 1.03 (tomorrow ∂r/∂k' = A1/(k'(1 − s)) whatever the effort); and the solve measures it.
    kappa = 0.12  # log(1.1)/(1 − 0.2375) = 0.125: between 0.9 κ'' and 1.1 κ''
    model = {
        "params": {"a1": A1, "g": GAIN, "kappa": kappa},
        "states": {"k": {"min": 0.1, "max": 0.3, "points": 30}},
        "shocks": {"z": {"markov": {"values": Z_VALUES.tolist(), "matrix": Z_CHAIN.tolist()}, "transform": "none"}},
        "choices": {"effort": {"values": [0.0, 1.0]}, "k_next": {"next_of": "k"}},
        "define": {"y": "z * k**a1 * (1 + g * effort)", "c": "y - k_next"},
        "reward": "log(c) - kappa * z * effort",
        "feasible": ["c > 0"],
    }
    document = grid_document(model, discount=BETA, method="howard")
    document["solver"]["tolerance"] = 1e-10
    document["report"] = {"euler_errors": True}
    data = model_data(parse_document(document))
    founds = choices_setup(data)
    assert isinstance(founds, list) and [f.choice for f in founds] == ["k_next"]
    effort = np.array([1.0, 0.0])
    for ratio in (1.0, 1.03):
        rules = {"k_next": lambda points, ratio=ratio: ratio * A1 * BETA * Z_VALUES[None, :] * (
            1 + GAIN * effort[None, :]) * points[:, :1] ** A1}
        own = choices_errors(data, founds, BETA, rules)["by_choice"]["k_next"]
        assert own["constrained"] == 0 and own["points"] >= TEST_POINTS_PER_GRID_POINT * 30 * 2
        if ratio == 1.0:
            assert own["max_log10"] < -13
        else:
            assert own["max_log10"] == pytest.approx(math.log10(0.03), abs=1e-9)
    result = solve(document)
    assert (np.asarray(result["policy"]["effort"]) == effort[None, :]).all()
    errors = result["diagnostics"]["euler_errors"]
    assert list(errors["by_choice"]) == ["k_next"] and errors["points"] > 0
    assert any("`effort`, setting no state, maximised out within the period" in note
               for note in result["diagnostics"]["notes"])
