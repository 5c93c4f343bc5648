"""Continuous choices on growth with log utility and full depreciation, whose exact policy is known.

Brock, W. A. and L. J. Mirman (1972), "Optimal economic growth and uncertainty: the discounted case",
Journal of Economic Theory 4(3), 479–513: with ``u = log c``, ``c = z k**alpha − k'`` the optimal policy
is ``k' = alpha · beta · z · k**alpha`` whatever the shock process.  The calibration and the two-state
shock chain (``tests._documents.log_growth``) are invented.  Also here: the monotone cubic slopes against
scipy, the hints, threads, and checkpoints of a continuous solve.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import pytest
from scipy.interpolate import PchipInterpolator

from tests._documents import log_growth
from tests._memory_checkpoint import Crash, MemoryCheckpoint
from tests._thread_spy import spy_run_blocks
from worker import environment, threadpool
from worker.continuous.interp_kernels import cubic_values, monotone_slopes
from worker.document import parse_document
from worker.errors import InvalidDocument
from worker.solve import compile_document, solve
from worker.solvers import METHODS

ALPHA = 0.3
BETA = 0.95
BOTH = {"concave": True, "monotone": True}


def _document(points: int, interpolation: str = "linear", hints: dict | None = None) -> dict[str, Any]:
    """Invented growth on ``k ∈ [0.05, 0.4]``: the exact policy stays inside the grid at both shocks."""
    model = log_growth(alpha=ALPHA, k_min=0.05, k_max=0.4, points=points, interpolation=interpolation)
    model["choices"] = {"k_next": {"next_of": "k", "continuous": True}}
    if hints is not None:
        model["hints"] = hints
    return {"version": 1, "discount": BETA, "model": model, "solver": {"method": "howard", "tolerance": 1e-10},
            "report": {"euler_errors": True}}


def _policy_error(result: dict[str, Any]) -> float:
    """Largest distance of the solved policy from the Brock–Mirman closed form at the grid points."""
    k = np.array(result["axes"]["k"])
    z = np.array(result["axes"]["z"])
    exact = ALPHA * BETA * z[None, :] * k[:, None] ** ALPHA
    return float(np.abs(np.array(result["policy"]["k_next"]) - exact).max())


@pytest.fixture(scope="module")
def refined() -> dict[tuple[str, int], dict[str, Any]]:
    """Hinted solves at 12, 24 and 48 capital points with each interpolation (one compile per interpolation)."""
    return {(how, points): solve(_document(points, how, BOTH))
            for how in ("linear", "monotone_cubic") for points in (12, 24, 48)}


def test_the_policy_is_values_without_indices(refined: dict) -> None:
    for (how, points), result in refined.items():
        assert result["status"] == "converged"
        assert result["policy_index"] is None
        policy = np.array(result["policy"]["k_next"])
        assert policy.shape == (points, 2) and policy.dtype == np.float64
        described = result["diagnostics"]["continuous_choice"]
        assert described["interpolation"] == how
        assert described["certified"] == (how == "linear")
        assert described["search"] == "brent_from_bracket" and described["monotone_narrowing"]
        assert described["clamped_next"] == 0
        notes = " ".join(result["diagnostics"].get("notes", []))
        assert ("not a proof" in notes) == (how == "monotone_cubic")


def test_the_policy_approaches_the_closed_form_at_the_interpolation_order(refined: dict) -> None:
    linear = [_policy_error(refined["linear", points]) for points in (12, 24, 48)]
    cubic = [_policy_error(refined["monotone_cubic", points]) for points in (12, 24, 48)]
    assert linear[0] < 0.02  # 7% of the smallest exact choice (0.104): the coarse grid is still a fair fit
    # The chosen k' balances marginal utility against the slope of the interpolated value: that slope is first
    # order in the grid step for linear interpolation (halving the step halves the error) and second order for
    # the Fritsch–Carlson interpolant (a quarter).  Measured ratios: linear 2.2, 2.0; cubic 6.4, 4.0.
    for coarse, fine in zip(linear, linear[1:]):
        assert coarse / fine >= 1.7
    for coarse, fine in zip(cubic, cubic[1:]):
        assert coarse / fine >= 3.0
    assert cubic[-1] < linear[-1] / 50


def test_euler_errors_fall_with_the_grid_step(refined: dict) -> None:
    # Judd (1992), "Projection methods for solving aggregate growth models", JET 58(2): the unit-free Euler
    # error; at the same rates as the policy's (log10 of 2 and of 4 per halving; measured 0.33/0.24 and 0.69/0.65).
    for how, per_halving in (("linear", math.log10(1.6)), ("monotone_cubic", math.log10(3.0))):
        errors = [refined[how, points]["diagnostics"]["euler_errors"] for points in (12, 24, 48)]
        for errors_at, points in zip(errors, (12, 24, 48)):
            assert errors_at["define"] == "c"
            assert errors_at["points"] >= 10 * points * 2
            assert errors_at["mean_log10"] <= errors_at["max_log10"]
        worst = [e["max_log10"] for e in errors]
        for coarse, fine in zip(worst, worst[1:]):
            assert coarse - fine >= per_halving, (how, worst)
    assert refined["monotone_cubic", 48]["diagnostics"]["euler_errors"]["max_log10"] < -3.3
    assert refined["linear", 48]["diagnostics"]["euler_errors"]["max_log10"] > -2.0


@pytest.mark.parametrize("how", ["linear", "monotone_cubic"])
def test_the_hints_do_not_change_the_answer(how: str) -> None:
    plain = solve(_document(48, how))
    hinted = solve(_document(48, how, BOTH))
    assert plain["diagnostics"]["continuous_choice"]["search"] == "branch_and_bound"
    assert hinted["diagnostics"]["continuous_choice"]["search"] == "brent_from_bracket"
    # Both are certified bounds on the same fitted problem's fixed point (linear; a computed bracket for cubic).
    gap = np.abs(np.array(plain["value"]) - np.array(hinted["value"])).max()
    assert gap <= plain["error_bound"] + hinted["error_bound"]
    # A smooth interior maximum: Brent stops within SQRT_EPS·|k'| of it (Brent 1973, ch. 5), about 6e-9 here.
    chosen = np.abs(np.array(plain["policy"]["k_next"]) - np.array(hinted["policy"]["k_next"])).max()
    assert chosen < 1e-6


@pytest.mark.parametrize("how", [
    "linear",
    "monotone_cubic",
])
def test_hints_that_hold_are_not_reported_broken(how: str) -> None:
    # log c with c = z k^alpha − k' is concave in k' and k' rises with k (Brock–Mirman): both promises hold.
    hinted = solve(_document(48, how, BOTH))
    assert hinted["diagnostics"]["verification"]["hints_held"], hinted["diagnostics"]["warnings"]
    assert hinted["diagnostics"]["warnings"] == []


@pytest.mark.parametrize("how", ["linear", "monotone_cubic"])
def test_the_methods_reach_the_same_fixed_point(how: str) -> None:
    methods = ["howard", "value_iteration"] + (["policy_iteration"] if how == "linear" else [])
    results = []
    for method in methods:
        document = _document(24, how)
        document["solver"]["method"] = method
        results.append(solve(document))
        assert results[-1]["status"] == "converged", method
    for result in results[1:]:
        gap = np.abs(np.array(result["value"]) - np.array(results[0]["value"])).max()
        assert gap <= result["error_bound"] + results[0]["error_bound"], (result["method"], gap)


def test_policy_iteration_is_refused_with_monotone_cubic() -> None:
    # Its exact evaluation solves a linear system; the cubic interpolant is not linear in the values.
    document = _document(24, "monotone_cubic")
    document["solver"]["method"] = "policy_iteration"
    with pytest.raises(InvalidDocument) as info:
        solve(document)
    assert [e["path"] for e in info.value.errors] == ["solver.method"]
    # At the door (what POST /v1/jobs and /v1/check run): before, only the compile refused it, so the job was
    # queued and then failed.
    with pytest.raises(InvalidDocument) as info:
        parse_document(document)
    assert [e["path"] for e in info.value.errors] == ["solver.method"]
    assert "not linear in the value function" in info.value.errors[0]["message"]


def _bits(result: dict[str, Any]) -> tuple:
    return (result["status"], result["iterations"], result["evaluation_steps"], result["error_bound"],
            np.array(result["value"]).tobytes(), np.array(result["policy"]["k_next"]).tobytes(),
            result["diagnostics"]["euler_errors"]["max_log10"])


@pytest.mark.parametrize("hints", [None, BOTH], ids=["scan", "hinted"])
def test_two_threads_give_the_bits_of_one(monkeypatch: pytest.MonkeyPatch, hints: dict | None) -> None:
    calls = spy_run_blocks(monkeypatch)
    monkeypatch.setattr(threadpool, "THREAD_MIN_PAIRS", 0)
    monkeypatch.setenv(environment.SOLVE_THREADS, "1")
    one = solve(_document(30, "linear", hints))
    assert calls and all(threads == 1 for threads, _ in calls)
    calls.clear()
    monkeypatch.setenv(environment.SOLVE_THREADS, "2")
    two = solve(_document(30, "linear", hints))
    assert any(threads == 2 and blocks >= 2 for threads, blocks in calls), calls
    assert _bits(one) == _bits(two)



@pytest.mark.parametrize("method", ["howard", "value_iteration"])
def test_a_resumed_solve_ends_where_the_uninterrupted_one_does(method: str) -> None:
    _, problem = compile_document(_document(24, "linear", BOTH))
    options = dict(tolerance=1e-10, evaluation_steps=5, fingerprint="growth", checkpoint_s=0.0)
    whole = METHODS[method](problem, np.zeros(problem.n), **options)
    counting = MemoryCheckpoint()
    METHODS[method](problem, np.zeros(problem.n), checkpoint=counting, **options)
    assert len(counting.saves) >= 4
    assert counting.state["policy"].dtype == np.float64
    for crash_after in sorted({1, 2, len(counting.saves) // 2, len(counting.saves) - 1}):
        store = MemoryCheckpoint(crash_after=crash_after)
        with pytest.raises(Crash):
            METHODS[method](problem, np.zeros(problem.n), checkpoint=store, **options)
        at = store.state["iteration"]
        resumed = METHODS[method](problem, np.zeros(problem.n), checkpoint=store, **options)
        assert resumed.resumed_from_iteration == at
        np.testing.assert_array_equal(resumed.value, whole.value)
        np.testing.assert_array_equal(resumed.policy, whole.policy)
        assert resumed.policy.dtype == np.float64
        assert (resumed.iterations, resumed.evaluation_steps, resumed.error_bound) == (
            whole.iterations, whole.evaluation_steps, whole.error_bound)
        assert resumed.verification == {**whole.verification, "seconds": resumed.verification["seconds"]}


def _hermite(grid: np.ndarray, values: np.ndarray, slopes: np.ndarray, x: np.ndarray) -> np.ndarray:
    """The kernels' Hermite evaluation (``cubic_values``) of one row at points ``x`` inside the grid."""
    lower = np.clip(np.searchsorted(grid, x, side="right") - 1, 0, grid.size - 2).astype(np.int64)
    share = (x - grid[lower]) / (grid[lower + 1] - grid[lower])
    out = np.empty(x.size)
    cubic_values(grid, values[None, :], slopes[None, :], np.zeros(x.size, dtype=np.int64), lower, share, out)
    return out


@pytest.mark.parametrize("seed", range(6))
def test_monotone_cubic_slopes_and_values_match_scipy_pchip(seed: int) -> None:
    # Fritsch & Carlson (1980), SIAM J. Numer. Anal. 17(2), with the Fritsch–Butland interior slopes and the
    # shape-preserving three-point ends: scipy.interpolate.PchipInterpolator implements the same rules.
    rng = np.random.default_rng(seed)
    size = int(rng.integers(2, 30)) if seed else 2
    grid = np.cumsum(rng.uniform(0.05, 2.0, size)) if seed % 2 else np.linspace(-1.0, 3.0, size)
    rows = [
        np.cumsum(rng.uniform(0.0, 1.0, size)),  # rising, possibly with flat steps below
        -np.cumsum(rng.exponential(1.0, size)),  # falling
        rng.normal(size=size),  # turning
        np.round(rng.normal(size=size), 0),  # plateaus and turns
    ]
    rows[0][size // 2:] = rows[0][size // 2]
    values = np.ascontiguousarray(rows)
    slopes = np.empty_like(values)
    monotone_slopes(grid, values, slopes)
    x = np.concatenate([grid, rng.uniform(grid[0], grid[-1], 400)])
    for row, slope in zip(values, slopes):
        reference = PchipInterpolator(grid, row)
        np.testing.assert_allclose(slope, reference.derivative()(grid), rtol=1e-12, atol=1e-12)
        np.testing.assert_allclose(_hermite(grid, row, slope, x), reference(x), rtol=1e-12, atol=1e-12)


def test_the_monotone_cubic_interpolant_keeps_monotone_data_monotone() -> None:
    # Fritsch & Carlson (1980), theorem 2: with these slopes the interpolant is monotone where the data are.
    rng = np.random.default_rng(11)
    grid = np.cumsum(rng.uniform(0.01, 1.0, 40))
    row = np.cumsum(rng.exponential(1.0, 40) * (rng.random(40) < 0.7))
    slopes = np.empty((1, 40))
    monotone_slopes(grid, row[None, :], slopes)
    dense = _hermite(grid, row, slopes[0], np.linspace(grid[0], grid[-1], 20_001))
    assert np.all(np.diff(dense) >= -1e-12 * np.abs(row).max())
    assert dense.min() >= row.min() - 1e-12 and dense.max() <= row.max() + 1e-12


# Linear only: the edge search is the same generated text for both interpolations, and a monotone_cubic variant
# (which passed) compiled a model structure of its own, about 11 s of the suite's time.
@pytest.mark.parametrize("interpolation", ["linear"])
def test_a_cap_on_tomorrows_capital_binds_to_rounding(interpolation: str) -> None:
    """A ``feasible`` cap ``k' ≤ 0.05 + k/2`` that binds inside the interval: Brent's method ends within its
    tolerance of the cap on the allowed side, and the edge is now found to rounding.  Reference: the MacQueen–
    Porteus bracket at a numpy Bellman step of the same fitted problem (tomorrow's value read linearly, or by
    scipy's PchipInterpolator, the same Fritsch–Carlson interpolant): v* − v ≥ (Tv − v) + β/(1 − β)·min(Tv − v),
    a numpy step that falls short only lowering it.  Before, v fell 4e-9 below v* (linear, measured), the error
    bound 1e-11."""
    document = _document(30, interpolation, BOTH)
    document["model"]["feasible"] = ["c > 0", "k_next <= 0.05 + 0.5 * k"]
    result = solve(document)
    k, z = np.array(result["axes"]["k"]), np.array(result["axes"]["z"])
    v = np.array(result["value"])
    chain = np.array([[0.8, 0.2], [0.3, 0.7]])  # log_growth's default shock chain
    expected = v @ chain.T
    step = np.empty_like(v)
    for j in range(z.size):
        read = (PchipInterpolator(k, expected[:, j]) if interpolation == "monotone_cubic"
                else (lambda x, j=j: np.interp(x, k, expected[:, j])))
        for i, level in enumerate(k):
            output = z[j] * level ** ALPHA
            cap = min(0.05 + 0.5 * level, k[-1])
            choices = np.append(np.linspace(k[0], cap, 4001), k[k <= cap])
            step[i, j] = (np.log(output - choices) + BETA * read(choices)).max()
    gap = step - v
    assert (np.abs(np.array(result["policy"]["k_next"]) - 0.05 - 0.5 * k[:, None]) < 1e-12).sum() > 10
    assert (gap + BETA / (1 - BETA) * gap.min()).max() <= result["error_bound"]


def test_a_narrow_allowed_window_is_found_under_the_concave_hint() -> None:
    # Invented: a fishing household that may borrow down to b = 1 on an asset grid from -2. At the lowest assets
    # and the low catch only choices in about [-1, -0.41] are allowed, narrower than the spacing (3.4) of the
    # concave hint's 9-point scan of [-2, 25]. Before, that scan found no allowed value and the solve failed
    # ("the Bellman step is not finite at 2 states ... for every allowed choice there"), while the same document
    # without the hint solved; now the scan of an unhinted search follows where the coarse one found nothing.
    beta, rate, wage, limit = 0.95, 0.03, 3.0, 1.0
    catch, chain = np.array([0.55, 1.45]), np.array([[0.9, 0.1], [0.1, 0.9]])
    model = {
        "kind": "grid", "params": {"r": rate, "w": wage, "b": limit},
        "states": {"a": {"min": -2.0, "max": 25.0, "points": 28}},
        "shocks": {"z": {"markov": {"values": catch.tolist(), "matrix": chain.tolist()}}},
        "choices": {"a_next": {"next_of": "a", "continuous": True}},
        "define": {"c": "(1 + r) * a + w * z - a_next"},
        "reward": "log(c)", "feasible": ["c > 0", "a_next >= -b"], "hints": {"concave": True},
    }  # fmt: skip
    result = solve({"version": 1, "discount": beta, "model": model, "solver": {"tolerance": 1e-9}})
    assert result["status"] == "converged"
    # An independent Bellman step of the fitted problem (linear interpolation, as fixq reads it) on a fine grid
    # of each point's allowed window and its grid points: no choice beats the value by more than the bound, and
    # the best comes within the fine grid's reach of it (common practice: 20,001 choices per point).
    grid, value = np.array(result["axes"]["a"]), np.array(result["value"])
    expected = value @ chain.T
    for i, a in enumerate(grid):
        for j, z in enumerate(catch):
            cash = (1 + rate) * a + wage * z
            top = min(grid[-1], cash)
            choices = np.linspace(-limit, top, 20_001)[:-1]  # with the grid points, where the objective bends
            choices = np.concatenate([choices, grid[(grid >= -limit) & (grid < top)]])
            best = np.max(np.log(cash - choices) + beta * np.interp(choices, grid, expected[:, j]))
            assert best <= value[i, j] + result["error_bound"] + 1e-12
            assert best >= value[i, j] - 1e-7



def test_no_allowed_scanned_point_of_a_continuous_interval_is_told_as_such() -> None:
    # The same household choosing its saving s from [-2, 25] with a scan of 3 points: the allowed window at the
    # lowest assets and the low catch ([-1, -0.41]) lies between them. Before, the refusal said "no choice
    # satisfies", which is false; with 60 points the window holds one and the document solves.
    model = {
        "kind": "grid", "params": {"r": 0.03, "w": 3.0, "b": 1.0},
        "states": {"a": {"min": -2.0, "max": 25.0, "points": 28}},
        "shocks": {"z": {"markov": {"values": [0.55, 1.45], "matrix": [[0.9, 0.1], [0.1, 0.9]]}}},
        "choices": {"s": {"min": "-2", "max": "25", "points": 3, "continuous": True}},
        "define": {"c": "(1 + r) * a + w * z - s"}, "next": {"a": "s"},
        "reward": "log(c)", "feasible": ["c > 0", "s >= -b"],
    }  # fmt: skip
    with pytest.raises(InvalidDocument) as caught:
        solve({"version": 1, "discount": 0.95, "model": model})
    message = caught.value.errors[0]["message"]
    assert message.startswith("at a = -2, z = 0.55 none of the 3 scanned points of `s`'s interval satisfies")
    assert "raise model.choices.s.points" in message
    model["choices"]["s"]["points"] = 60
    assert solve({"version": 1, "discount": 0.95, "model": model})["status"] == "converged"
