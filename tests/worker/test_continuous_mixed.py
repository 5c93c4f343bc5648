"""A continuous choice beside a discrete one, against an independent plain-numpy solver.

The invented work-or-not-and-save household of ``tests/_mixed_models.py``.  The references: (1) the fitted
problem's fixed point (tomorrow's value read linearly between grid points) solved by a numpy value iteration
whose maximisation is exact (``tests._mixed_models.exact_bellman``); (2) scipy's bounded
``minimize_scalar`` at every point and work choice, at that fixed point, seeded by a
brute-force scan of a fine grid of savings.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest
from scipy.optimize import minimize_scalar

from tests._documents import with_horizon
from tests._memory_checkpoint import Crash, MemoryCheckpoint
from tests._mixed_models import (
    A_MAX,
    BETA,
    CHAIN,
    DISUTILITY,
    INCOME,
    WORK,
    cash,
    exact_bellman,
    exact_fixed_point,
    household_document,
    independent_euler_errors,
)
from tests._thread_spy import spy_run_blocks
from worker import environment, threadpool
from worker.document import parse_document
from worker.errors import InvalidDocument
from worker.solve import compile_document, solve
from worker.solvers import METHODS


@pytest.fixture(scope="module")
def reference() -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """``(grid, v*, save, work)`` of the fitted problem, iterated until a step moves ``v`` by at most 1e-13."""
    grid = np.array(solve(household_document())["axes"]["a"])
    v, save, work = exact_fixed_point(grid)
    return grid, v, save, work


@pytest.fixture(scope="module")
def household() -> dict[str, Any]:
    return solve(household_document({"concave": True}, stationary=True, euler_errors=True,
                                    simulation={"periods": 40, "paths": 30, "seed": 5}))


def test_the_value_and_policy_are_the_independent_solvers(household: dict, reference: tuple) -> None:
    grid, v, save, work = reference
    assert household["status"] == "converged"
    gap = np.abs(np.array(household["value"]) - v).max()
    assert gap <= household["error_bound"] + 1e-11
    np.testing.assert_array_equal(np.array(household["policy"]["work"]), WORK[work])
    np.testing.assert_array_equal(np.array(household["policy_index"]["work"]), work)
    assert "save" not in household["policy_index"]
    # The fixed points agree to 1e-10 or so; the maximiser moves with the value by about gap / curvature.
    np.testing.assert_allclose(np.array(household["policy"]["save"]), save, atol=1e-5)
    # Both regimes occur: the poor work at low assets, the rich rest.
    assert 0 < work.sum() < work.size


def test_scipy_finds_the_same_maximum_at_every_point(household: dict, reference: tuple) -> None:
    grid, v, _, _ = reference
    continuation = v @ CHAIN.T
    money = cash(grid)
    found_value = np.array(household["value"])
    for i in range(grid.size):
        for z in range(INCOME.size):
            best = -np.inf
            for w in range(WORK.size):
                top = min(A_MAX, money[i, z, w] * (1 - 1e-12))

                def loss(s: float, i: int = i, z: int = z, w: int = w) -> float:
                    c = money[i, z, w] - s
                    if c <= 0:
                        return np.inf
                    return -(np.log(c) - DISUTILITY * WORK[w] + BETA * np.interp(s, grid, continuation[:, z]))

                fine = np.linspace(0.0, top, 4001)  # brute force first, then Brent in the best cell
                k = int(np.argmin([loss(s) for s in fine]))
                lo, hi = fine[max(k - 1, 0)], fine[min(k + 1, fine.size - 1)]
                found = minimize_scalar(loss, bounds=(lo, hi), method="bounded", options={"xatol": 1e-12})
                best = max(best, -found.fun, -loss(fine[k]))
            # fixq's value is the Bellman step's maximum at the fixed point, to within its error bound
            assert found_value[i, z] == pytest.approx(best, abs=household["error_bound"] + 1e-9), (i, z)


def test_without_hints_the_scan_finds_the_same_household(household: dict) -> None:
    plain = solve(household_document())
    assert np.abs(np.array(plain["value"]) - np.array(household["value"])).max() <= 1e-8
    np.testing.assert_array_equal(np.array(plain["policy"]["work"]), np.array(household["policy"]["work"]))


def test_the_report_describes_both_choices(household: dict) -> None:
    described = household["diagnostics"]["continuous_choice"]
    assert described["choice"] == "save" and described["searched_for_each"] == ["work"]
    assert described["combinations"] == 2
    means = household["stationary"]["means"]
    assert means["a"] == pytest.approx(means["save"], abs=1e-9)  # Young's lotteries keep the mean
    assert 0.0 <= means["work"] <= 1.0
    path = household["simulation"]["first_path"]
    assert set(path["work"]) <= {0.0, 1.0} and len(path["save"]) == 40


def test_the_endogenous_grid_method_says_which_condition_fails() -> None:
    document = household_document()
    document["solver"]["method"] = "endogenous_grid"
    with pytest.raises(InvalidDocument) as info:
        solve(document)
    assert any(e["path"] == "solver.method" and "only choice" in e["message"] and "`work`" in e["message"]
               for e in info.value.errors), info.value.errors


def test_two_continuous_choices_are_refused() -> None:
    document = household_document()
    document["model"]["choices"]["hours"] = {"min": 0.0, "max": 1.0, "continuous": True}
    with pytest.raises(InvalidDocument) as info:
        parse_document(document)
    assert any(e["path"] == "model.choices.hours.continuous" and "one continuous choice" in e["message"]
               for e in info.value.errors), info.value.errors


def test_choosing_consumption_between_bounds_gives_the_same_household(household: dict) -> None:
    # The same household choosing consumption (given by min and max, the continuous choice second) instead of
    # savings: the same fitted problem, so the same value and work policy.
    document = household_document({"concave": True})
    model = document["model"]
    model["choices"] = {"work": {"values": WORK.tolist()},
                        "c": {"min": "0", "max": "(1 + r) * a + base + wage * y", "continuous": True}}
    model["define"] = {"cash": "(1 + r) * a + base + work * wage * y"}
    model["next"] = {"a": "cash - c"}
    model["feasible"] = ["c > 0", "cash - c >= 0", "cash - c <= 8"]
    consuming = solve(document)
    assert consuming["status"] == "converged"
    assert np.abs(np.array(consuming["value"]) - np.array(household["value"])).max() <= 1e-7
    np.testing.assert_array_equal(np.array(consuming["policy"]["work"]), np.array(household["policy"]["work"]))
    assert list(consuming["policy"]) == ["work", "c"]


def test_a_finite_horizon_is_the_independent_backward_induction(reference: tuple) -> None:
    grid = reference[0]
    document = with_horizon(household_document({"concave": True}), {"periods": 4, "terminal_value": "log(1 + a)"})
    result = solve(document)
    v = np.repeat(np.log1p(grid)[:, None], INCOME.size, axis=1)
    expected_v, expected_work = [], []
    for _ in range(4):
        v, _, work = exact_bellman(v, grid)
        expected_v.insert(0, v)
        expected_work.insert(0, work)
    np.testing.assert_allclose(np.array(result["value"]), np.array(expected_v), rtol=0, atol=1e-9)
    np.testing.assert_array_equal(np.array(result["policy_index"]["work"]), np.array(expected_work))
    assert np.array(result["policy"]["save"]).shape == (4, grid.size, INCOME.size)


def test_two_separable_economies_split_into_their_known_parts() -> None:
    # Invented: two capital stocks under one shock, log utility of each one's consumption, full depreciation.
    # The problem separates, V(k1, k2, z) = V1(k1, z) + V2(k2, z): the continuous k1' has the Brock & Mirman
    # (1972) policy k1' = αβ z k1^α; the grid-restricted k2' is a one-state discrete problem, solved here by a
    # plain numpy value iteration.  Both interpolations keep the separation: tomorrow's k2 is a grid point,
    # and the cubic of V1 + a constant is the cubic of V1 plus it.
    alpha, beta = 0.3, 0.95
    z_values, chain = np.array([0.9, 1.1]), np.array([[0.8, 0.2], [0.3, 0.7]])
    model = {
        "kind": "grid", "params": {"alpha": alpha},
        "states": {"k1": {"min": 0.05, "max": 0.4, "points": 24}, "k2": {"min": 0.05, "max": 0.4, "points": 15}},
        "shocks": {"z": {"markov": {"values": z_values.tolist(), "matrix": chain.tolist()}, "transform": "none"}},
        "choices": {"k2_next": {"next_of": "k2"}, "k1_next": {"next_of": "k1", "continuous": True}},
        "define": {"c1": "z * k1**alpha - k1_next", "c2": "z * k2**alpha - k2_next"},
        "reward": "log(c1) + log(c2)", "feasible": ["c1 > 0", "c2 > 0"], "hints": {"concave": True},
        "interpolation": "monotone_cubic",
    }
    result = solve({"version": 1, "discount": beta, "model": model,
                    "solver": {"method": "howard", "tolerance": 1e-10}})
    assert result["status"] == "converged"
    k1, k2 = np.array(result["axes"]["k1"]), np.array(result["axes"]["k2"])
    # the discrete part: v(k, z) = max_j log(z k^α − k_j) + β Σ P[z, z'] v(k_j, z')
    with np.errstate(divide="ignore", invalid="ignore"):
        c = z_values[None, :, None] * k2[:, None, None] ** alpha - k2[None, None, :]
        reward = np.where(c > 0, np.log(np.where(c > 0, c, 1.0)), -np.inf)  # (k, z, k')
    v2 = np.zeros((k2.size, 2))
    for _ in range(3000):
        candidate = reward + beta * (v2 @ chain.T).T[None, :, :]
        new = candidate.max(axis=2)
        moved = np.abs(new - v2).max()
        v2 = new
        if moved <= 1e-13:
            break
    np.testing.assert_array_equal(np.array(result["policy_index"]["k2_next"]),
                                  np.broadcast_to(candidate.argmax(axis=2)[None], (k1.size, k2.size, 2)))
    rest = np.array(result["value"]) - v2[None, :, :]  # V1(k1, z): the same whatever k2
    assert np.abs(rest - rest[:, :1, :]).max() <= 1e-8
    exact = alpha * beta * z_values[None, None, :] * k1[:, None, None] ** alpha
    assert np.abs(np.array(result["policy"]["k1_next"]) - exact).max() < 2e-4


def test_two_threads_give_the_bits_of_one(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(threadpool, "THREAD_MIN_PAIRS", 0)
    calls = spy_run_blocks(monkeypatch)
    results = []
    for threads in ("1", "2"):
        monkeypatch.setenv(environment.SOLVE_THREADS, threads)
        result = solve(household_document({"concave": True}))
        assert calls and calls[-1][0] == int(threads)
        results.append((result["iterations"], result["error_bound"], np.array(result["value"]).tobytes(),
                        np.array(result["policy"]["save"]).tobytes(), result["policy_index"]["work"]))
    assert results[0] == results[1]



def test_a_resumed_solve_ends_where_the_uninterrupted_one_does() -> None:
    _, problem = compile_document(household_document({"concave": True}))
    options = dict(tolerance=1e-10, evaluation_steps=5, fingerprint="household", checkpoint_s=0.0)
    whole = METHODS["howard"](problem, np.zeros(problem.n), **options)
    counting = MemoryCheckpoint()
    METHODS["howard"](problem, np.zeros(problem.n), checkpoint=counting, **options)
    assert len(counting.saves) >= 3 and counting.state["policy"].shape == (problem.n, 2)
    store = MemoryCheckpoint(crash_after=len(counting.saves) // 2)
    with pytest.raises(Crash):
        METHODS["howard"](problem, np.zeros(problem.n), checkpoint=store, **options)
    at = store.state["iteration"]
    resumed = METHODS["howard"](problem, np.zeros(problem.n), checkpoint=store, **options)
    assert resumed.resumed_from_iteration == at
    np.testing.assert_array_equal(resumed.value, whole.value)
    np.testing.assert_array_equal(resumed.policy, whole.policy)


def test_euler_errors_at_the_chosen_combination_are_the_independent_ones(household: dict, reference: tuple) -> None:
    # Judd (1992): |1 − c̃/c| with 1/c̃ = β Σ_z' P[z, z'] (1 + r)/c''(a', z') for log utility, c'' tomorrow's
    # consumption at a' = save; measured where today's work choice and every tomorrow's are the same (no kink
    # between) and the saving is more than one local grid step from both ends of the grid (common practice, as
    # fixq's rule), at ten test points per grid point; everything from the exact solver here.
    grid, v, _, _ = reference
    k, save, error, measured = independent_euler_errors(v, grid)
    found = household["diagnostics"]["euler_errors"]
    assert found["points"] == pytest.approx(int(measured.sum()), abs=2)
    assert found["max_log10"] == pytest.approx(error[measured].max(), abs=1e-3)
    assert found["mean_log10"] == pytest.approx(error[measured].mean(), abs=0.01)
    assert found["points"] + found["constrained"] + found["undefined"] == k.size * INCOME.size
    assert any("chosen combination" in note for note in household["diagnostics"]["notes"])


def test_the_stationary_distribution_is_youngs(household: dict) -> None:
    # Young (2010), JEDC 34(1): each next asset level's mass split between its two neighbouring grid points in
    # proportion to its distance from them, then income moves by its chain; π Q = π solved by least squares.
    grid = np.array(household["axes"]["a"])
    save = np.array(household["policy"]["save"])  # (points, shocks)
    lower = np.clip(np.searchsorted(grid, save, side="right") - 1, 0, grid.size - 2)
    share = (save - grid[lower]) / (grid[lower + 1] - grid[lower])
    n_z = INCOME.size
    matrix = np.zeros((grid.size * n_z, grid.size * n_z))
    for i in range(grid.size):
        for z in range(n_z):
            for bit, weight in ((0, 1 - share[i, z]), (1, share[i, z])):
                matrix[i * n_z + z, (lower[i, z] + bit) * n_z + np.arange(n_z)] += weight * CHAIN[z]
    system = np.vstack([(np.eye(matrix.shape[0]) - matrix).T, np.ones(matrix.shape[0])])
    target = np.zeros(matrix.shape[0] + 1)
    target[-1] = 1.0
    expected = np.linalg.lstsq(system, target, rcond=None)[0]
    found = np.array(household["stationary"]["distribution"]).reshape(-1)
    np.testing.assert_allclose(found, expected, rtol=0, atol=1e-10)
    work = np.array(household["policy"]["work"]).reshape(-1)
    assert household["stationary"]["means"]["work"] == pytest.approx(expected @ work, abs=1e-9)


def test_euler_errors_through_a_finite_horizon_are_the_independent_ones(reference: tuple) -> None:
    # Period t's Judd (1992) errors: today's choice from the exact Bellman step against V_{t+1}, tomorrow's
    # against V_{t+2} (the terminal value for the last period), skipped as in the infinite horizon's test
    # above; all from the exact solver here, period by period.
    grid = reference[0]
    document = with_horizon(household_document({"concave": True}, euler_errors=True),
                            {"periods": 4, "terminal_value": "log(1 + a)"})
    result = solve(document)
    values = [np.repeat(np.log1p(grid)[:, None], INCOME.size, axis=1)]  # V_4, then V_3, ..., V_0
    for _ in range(4):
        values.insert(0, exact_bellman(values[0], grid)[0])
    errors = result["diagnostics"]["euler_errors"]
    assert errors["by_period"]["period"] == [0, 1, 2]
    points = 0
    for t in range(3):
        k, _, error, measured = independent_euler_errors(values[t + 1], grid, tomorrow=values[t + 2])
        points += int(measured.sum())
        assert errors["by_period"]["max_log10"][t] == pytest.approx(error[measured].max(), abs=1e-3)
        assert errors["by_period"]["mean_log10"][t] == pytest.approx(error[measured].mean(), abs=0.01)
    assert errors["points"] == pytest.approx(points, abs=6)
    assert errors["points"] + errors["constrained"] + errors["undefined"] == 3 * k.size * INCOME.size
    assert any("chosen combination" in note for note in result["diagnostics"]["notes"])
