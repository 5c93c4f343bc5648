"""Euler-equation errors (worker.euler) against a model whose exact policy is known.

Brock, W. A. and L. J. Mirman (1972), "Optimal economic growth and uncertainty:
the discounted case", Journal of Economic Theory 4(3), 479–513: with log
utility, full depreciation and output ``z k**alpha``, the optimal policy is
``k' = alpha * beta * z * k**alpha`` whatever the shock process.  The
calibration and the shock chain below are invented.
"""

from __future__ import annotations

import copy
import math
from typing import Any

import numpy as np
import pytest

from tests._documents import log_growth, machine_shop
from worker import euler
from worker.document import parse_document
from worker.feasibility import model_data
from worker.solve import solve

ALPHA = 0.3
BETA = 0.95

EXACT_GROWTH: dict[str, Any] = log_growth(
    alpha=ALPHA,
    k_min=0.05,
    k_max=0.4,
    points=50,
    shocks={
        "z": {"markov": {"values": [0.9, 1.0, 1.1], "matrix": [[0.8, 0.2, 0.0], [0.1, 0.8, 0.1], [0.0, 0.2, 0.8]]}}
    },
    hints={"monotone": True, "concave": True},
)
"""Log utility, full depreciation: the exact policy stays inside the capital grid at every shock."""


def _document(points: int | None = None, **model: Any) -> dict[str, Any]:
    spec = copy.deepcopy(EXACT_GROWTH)
    spec.update(model)
    if points is not None:
        spec["states"]["k"]["points"] = points
    return {"version": 1, "discount": BETA, "model": spec, "solver": {"method": "howard", "tolerance": 1e-10},
            "report": {"stationary": True, "euler_errors": True}}


def _data(document: dict[str, Any]) -> Any:
    return model_data(parse_document(document))


def _exact_policy(data: Any) -> euler.PolicyRule:
    z = data.shock_table[:, 0]
    return lambda k: ALPHA * BETA * z[None, :] * k[:, None] ** ALPHA


def test_the_exact_policy_has_errors_at_rounding_level() -> None:
    data = _data(_document())
    found = euler.setup(data)
    assert isinstance(found, euler.EulerSetup)
    assert found.define == "c"
    errors = euler.euler_errors(data, found, BETA, _exact_policy(data))
    assert errors["max_log10"] < -10
    assert errors["constrained"] == 0 and errors["undefined"] == 0
    assert errors["points"] >= euler.TEST_POINTS_PER_GRID_POINT * 50 * 3


@pytest.mark.parametrize("ratio", [1.025, 0.4, 3.0])
def test_a_policy_off_by_a_known_factor_has_that_error(ratio: float) -> None:
    # Saving a share s = ratio * alpha * beta of output: c̃/c is then known in closed form at every point,
    # so this pins the sign conventions and the inversion, not just "small when exact".  With ratio 0.4
    # Newton's first step from c leaves the domain of 1/c, so the bisection answers.
    data = _data(_document())
    found = euler.setup(data)
    z = data.shock_table[:, 0]
    share = ratio * ALPHA * BETA
    errors = euler.euler_errors(data, found, BETA, lambda k: share * z[None, :] * k[:, None] ** ALPHA)
    # With k' = s y: c = (1 - s) y and the Euler value c̃ = (1 - s) y · s / (alpha beta) (log utility).
    expected = math.log10(abs(1 - ratio))
    assert errors["points"] > 0 and errors["undefined"] == 0
    assert errors["max_log10"] == pytest.approx(expected, abs=1e-9)
    assert errors["mean_log10"] == pytest.approx(expected, abs=1e-9)


def test_points_at_the_grid_end_are_counted_as_constrained() -> None:
    data = _data(_document())
    found = euler.setup(data)
    exact = _exact_policy(data)
    floor = 0.12
    errors = euler.euler_errors(data, found, BETA, lambda k: np.maximum(exact(k), floor))
    assert errors["constrained"] == 0  # 0.12 is far inside the grid: a kink, not a constraint
    grid_floor = euler.euler_errors(data, found, BETA, lambda k: np.maximum(exact(k) - 0.08, 0.05))
    assert grid_floor["constrained"] > 0
    assert grid_floor["points"] + grid_floor["constrained"] + grid_floor["undefined"] == errors["points"]


def test_the_error_falls_with_the_grid_step() -> None:
    results = {points: solve(_document(points)) for points in (200, 800, 3200)}
    worst = []
    for points, result in results.items():
        assert result["status"] == "converged"
        errors = result["diagnostics"]["euler_errors"]
        assert errors["define"] == "c"
        assert errors["points"] >= euler.TEST_POINTS_PER_GRID_POINT * points * 3
        assert errors["weighted_mean_log10"] is not None
        assert errors["mean_log10"] <= errors["max_log10"]
        worst.append(errors["max_log10"])
    # The interpolated step policy is first order in the grid step: 4x finer is about 4x smaller.
    assert worst[0] - worst[1] >= math.log10(2)
    assert worst[1] - worst[2] >= math.log10(2)


def test_a_choice_entering_through_two_defines_gets_a_note_instead() -> None:
    document = _document(
        60,
        define={"c": "z * k**alpha - k_next", "upkeep": "0.05 * k_next**2"},
        reward="log(c) - upkeep",
    )
    found = euler.setup(_data(document))
    assert isinstance(found, str) and "`c`" in found and "`upkeep`" in found
    result = solve(document)
    assert "euler_errors" not in result["diagnostics"]
    assert any("several defines" in note for note in result["diagnostics"]["notes"])


def test_a_define_that_only_renames_is_looked_through() -> None:
    document = _document(define={"c": "z * k**alpha - k_next", "felicity": "log(c)"}, reward="felicity")
    data = _data(document)
    found = euler.setup(data)
    assert isinstance(found, euler.EulerSetup) and found.define == "c"
    assert euler.euler_errors(data, found, BETA, _exact_policy(data))["max_log10"] < -10


def test_models_without_a_next_of_choice_are_left_alone() -> None:
    document = _document(
        choices={"saving": {"min": 0.0, "max": 0.9, "points": 10}},
        define={"c": "z * k**alpha * (1 - saving)"},
        next={"k": "z * k**alpha * saving"},
    )
    assert euler.setup(_data(document)) is None


def test_euler_errors_are_measured_only_when_the_report_asks() -> None:
    document = _document(200)
    del document["report"]["euler_errors"]
    assert "euler_errors" not in solve(document)["diagnostics"]


def test_a_tabular_model_that_asks_gets_a_note_instead() -> None:
    document = machine_shop()
    document["report"] = {"euler_errors": True}
    diagnostics = solve(document)["diagnostics"]
    assert "euler_errors" not in diagnostics
    assert any("grid models" in note for note in diagnostics["notes"])


def test_the_profile_is_bounded_and_keeps_the_worst_of_each_pool() -> None:
    # A policy off by a known factor has the same error everywhere (closed form above), so every entry of
    # the profile, pooled or not, must carry it; 200 grid points give more test points than the bound.
    data = _data(_document(200))
    found = euler.setup(data)
    z = data.shock_table[:, 0]
    share = 1.025 * ALPHA * BETA
    errors = euler.euler_errors(data, found, BETA, lambda k: share * z[None, :] * k[:, None] ** ALPHA)
    profile = errors["profile"]
    tests = euler.between_points(data.state_grids[0])
    assert tests.size > euler.PROFILE_POINTS
    assert profile["state"] == "k" and profile["pooled"] == math.ceil(tests.size / euler.PROFILE_POINTS)
    assert len(profile["at"]) == len(profile["log10_error"]) <= euler.PROFILE_POINTS
    assert all(len(row) == 3 for row in profile["log10_error"])
    at = np.array(profile["at"])
    assert np.all(np.diff(at) > 0) and tests[0] <= at[0] and at[-1] <= tests[-1]
    values = np.array(profile["log10_error"], dtype=float)
    assert values == pytest.approx(math.log10(0.025), abs=1e-9)
    assert values.max() == errors["max_log10"]


def test_the_profile_pools_like_a_plain_loop() -> None:
    # Against a loop written here: pools of `size` consecutive test points, the worst measured per shock point.
    rng = np.random.default_rng(11)
    points = 2 * euler.PROFILE_POINTS + 7
    k_points = np.sort(rng.uniform(0.0, 5.0, points))
    log_error = rng.uniform(-8.0, -1.0, (points, 2))
    measured = rng.random((points, 2)) > 0.3
    measured[:40, 0] = False  # a whole pool with nothing measured at shock point 0
    profile = euler.error_profile("wealth", k_points, log_error, measured)
    size = 3
    assert profile["pooled"] == size and len(profile["at"]) == math.ceil(points / size) <= euler.PROFILE_POINTS
    for entry, start in enumerate(range(0, points, size)):
        stop = min(start + size, points)
        assert profile["at"][entry] == pytest.approx(0.5 * (k_points[start] + k_points[stop - 1]))
        for j in range(2):
            seen = [log_error[i, j] for i in range(start, stop) if measured[i, j]]
            assert profile["log10_error"][entry][j] == (max(seen) if seen else None)
    assert profile["log10_error"][0][0] is None


def test_constrained_test_points_are_gaps_in_the_profile() -> None:
    data = _data(_document())
    found = euler.setup(data)
    exact = _exact_policy(data)
    errors = euler.euler_errors(data, found, BETA, lambda k: np.maximum(exact(k) - 0.08, 0.05))
    profile = errors["profile"]
    assert profile["pooled"] == 1  # 50 grid points: fewer test points than the bound, so one entry each
    assert profile["at"] == euler.between_points(data.state_grids[0]).tolist()
    cells = [value for row in profile["log10_error"] for value in row]
    assert errors["constrained"] > 0
    assert sum(value is None for value in cells) == errors["constrained"] + errors["undefined"]
    assert max(value for value in cells if value is not None) == errors["max_log10"]
    assert sum(value for value in cells if value is not None) / errors["points"] == pytest.approx(errors["mean_log10"])
