"""Euler-equation errors of a model with two choices that each set tomorrow's value of a state (worker.euler_choices).

An invented workshop with two kinds of equipment, machines ``k`` and tools ``h``, its output
``y = z · k**A1 · h**A2`` (``z`` a Markov shock) eaten or put into next period's machines and tools, both
wearing out fully, with log utility: ``c = y − k_next − h_next``.  The exact policy is the two-capital
extension of Brock, W. A. and L. J. Mirman (1972), "Optimal economic growth and uncertainty: the discounted
case", Journal of Economic Theory 4(3), 479–513, derived here by guess and verify: with
``V = A(z) + B1 log k + B2 log h``, the first-order conditions ``1/c = β B_i / k_i'`` and the budget give
``k_i' = β B_i y / (1 + β (B1 + B2))``; matching the coefficients of ``log k_i``,
``B_i = A_i (1 + β (B1 + B2))``, so ``k_i' = A_i β y`` for each kind.  The calibration is invented.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import pytest
from scipy.interpolate import RegularGridInterpolator

from tests._documents import grid_document
from worker.document import parse_document
from worker.euler import TEST_POINTS_PER_GRID_POINT
from worker.euler_choices import choices_errors, choices_setup
from worker.feasibility import model_data
from worker.solve import solve

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
    return document


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
    document = _document()
    document["model"]["horizon"] = {"periods": 4, "terminal_value": f"{A1 * bonus} * log(k) + {A2 * bonus} * log(h)"}
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


def test_a_law_that_moves_with_a_chosen_state_gets_a_note_naming_the_choice() -> None:
    # A third state whose law uses tools: tomorrow's marginal value of h would need ∂V/∂q.
    states = {**WORKSHOP["states"], "q": {"min": 0.9, "max": 1.1, "points": 3}}
    document = _document(states=states, next={"q": "0.5 + 0.5 * q * (h / 0.05)**0.01"},
                         define={"y": "z * q * k**a1 * h**a2", "c": "y - k_next - h_next"})
    found = choices_setup(model_data(parse_document(document)))
    assert isinstance(found, str) and "(choice `k_next`)" in found and "law of motion of `q` moves with `h`" in found
    result = solve(document)
    assert "euler_errors" not in result["diagnostics"]
    assert any("law of motion of `q`" in note for note in result["diagnostics"]["notes"])


def test_a_continuous_choice_beside_another_next_of_choice_gets_a_note() -> None:
    # Machines continuous, tools on their grid: the tools' combination changes with h from day to day, so the
    # measurement at one combination on both days would skip nearly every point; a note says why instead.
    states = {"k": {"min": 0.04, "max": 0.16, "points": 8}, "h": {"min": 0.02, "max": 0.10, "points": 6}}
    document = _document(states=states, hints={"concave": True},
                         choices={"k_next": {"next_of": "k", "continuous": True}, "h_next": {"next_of": "h"}})
    diagnostics = solve(document)["diagnostics"]
    assert "euler_errors" not in diagnostics
    assert any("another choice that sets tomorrow's value of a state (`h_next`)" in note
               for note in diagnostics["notes"])
