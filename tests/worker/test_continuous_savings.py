"""A continuous choice against references outside fixq, on an invented consumption–saving model.

A household with assets ``a`` on a grid, income ``y`` from a two-state chain, chooses tomorrow's assets
(or consumption) with CRRA utility.  The references, all written here: scipy's bounded Brent search at each
point; an independent solver of the same fitted problem (linear interpolation of the continuation), which
maximises exactly segment by segment from the first-order condition and evaluates policies by a linear
solve; Young (2010) lotteries for the stationary distribution.  Also the refusals of continuous choices.
"""

from __future__ import annotations

import copy
import itertools
import math
from typing import Any

import numpy as np
import pytest
from scipy.optimize import minimize_scalar

from worker.continuous.search import XTOL_SHARE
from worker.document import parse_document
from worker.errors import InfeasibleModel, InvalidDocument
from worker.solve import compile_document, solve

BETA, R, GAMMA, A_MAX = 0.9, 0.04, 2.0, 8.0
INCOME = np.array([0.6, 1.4])
CHAIN = np.array([[0.75, 0.25], [0.35, 0.65]])
SQRT_EPS = math.sqrt(np.finfo(float).eps)

SAVINGS: dict[str, Any] = {
    "kind": "grid",
    "params": {"r": R, "gamma": GAMMA},
    "states": {"a": {"min": 0.0, "max": A_MAX, "points": 25, "spacing": "power", "exponent": 1.5}},
    "shocks": {"y": {"markov": {"values": INCOME.tolist(), "matrix": CHAIN.tolist()}, "transform": "none"}},
    "choices": {"save": {"next_of": "a", "continuous": True}},
    "define": {"c": "(1 + r) * a + y - save"},
    "reward": "c**(1 - gamma) / (1 - gamma)",
    "feasible": ["c > 0"],
}
"""Invented: tomorrow's assets chosen anywhere in [0, A_MAX] (the grid's ends); consumption is what is left of cash on
hand.  No param beyond those the expressions read, so that the compiled kernels are those of the same household in
other modules (the endogenous grid method's, the accuracy benchmark's)."""


def _document(model: dict[str, Any] = SAVINGS, **changes: Any) -> dict[str, Any]:
    spec = copy.deepcopy(model)
    spec.update(changes)
    return {"version": 1, "discount": BETA, "model": spec, "solver": {"method": "howard", "tolerance": 1e-11},
            "report": {"stationary": True}}


def _consumption_form(**changes: Any) -> dict[str, Any]:
    """The same household choosing consumption between bounds that keep tomorrow's assets on [0, a_max]."""
    spec = copy.deepcopy(SAVINGS)
    spec["params"]["a_max"] = A_MAX
    spec["choices"] = {"c": {"min": "max(0, (1 + r) * a + y - a_max)", "max": "(1 + r) * a + y", "continuous": True}}
    spec["define"] = {}
    spec["next"] = {"a": "(1 + r) * a + y - c"}
    spec.update(changes)
    return _document(spec)


def _utility(c: np.ndarray) -> np.ndarray:
    return c ** (1 - GAMMA) / (1 - GAMMA)


def _cash(grid: np.ndarray) -> np.ndarray:
    return (1 + R) * grid[:, None] + INCOME[None, :]


def _exact_bellman(v: np.ndarray, grid: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The fitted Bellman operator with an exact maximisation: ``(Tv, a')``, both (points, shocks).

    On each grid segment the continuation ``Σ P v(a')`` is linear with slope ``s``, so the objective
    ``u(cash − a') + β(e + s a')`` is strictly concave there and its maximum solves ``u'(c) = β s``,
    i.e. ``c = (β s)^(−1/γ)``, clipped to the segment; the best segment wins.
    """
    continuation = v @ CHAIN.T
    cash = _cash(grid)
    best = np.full(cash.shape, -np.inf)
    chosen = np.full(cash.shape, np.nan)
    for j in range(grid.size - 1):
        slope = (continuation[j + 1] - continuation[j]) / (grid[j + 1] - grid[j])
        with np.errstate(divide="ignore", invalid="ignore"):
            interior = cash - (BETA * np.maximum(slope, 0.0)) ** (-1 / GAMMA)
        a_next = np.clip(np.where(slope > 0, interior, grid[j]), grid[j], np.minimum(grid[j + 1], cash))
        c = cash - a_next
        with np.errstate(divide="ignore"):
            value = np.where(c > 0, _utility(np.where(c > 0, c, 1.0)) + BETA * (
                continuation[j] + slope * (a_next - grid[j])), -np.inf)
        better = value > best
        best[better], chosen[better] = value[better], a_next[better]
    return best, chosen


def _lotteries(grids: list[np.ndarray], nexts: list[np.ndarray]) -> np.ndarray:
    """Young (2010), JEDC 34(1): the transition on (states, y) when each next state is split between its two
    neighbouring grid points in proportion to its distance from them (on several states, the product of those
    splits), then income moves by its chain.  ``nexts[t]`` (grid points, shocks) is tomorrow's value of state
    ``t`` at each flat (C-order) grid point; the matrix is dense, on flat (states, y)."""
    sizes = [grid.size for grid in grids]
    points, shocks = nexts[0].shape
    lowers, shares = [], []
    for grid, tomorrow in zip(grids, nexts):
        lower = np.clip(np.searchsorted(grid, tomorrow, side="right") - 1, 0, grid.size - 2)
        lowers.append(lower)
        shares.append((tomorrow - grid[lower]) / (grid[lower + 1] - grid[lower]))
    rows = np.arange(points)[:, None] * shocks + np.arange(shocks)[None, :]
    matrix = np.zeros((points * shocks, points * shocks))
    for corner in itertools.product((0, 1), repeat=len(grids)):
        weight = np.prod([share if bit else 1 - share for share, bit in zip(shares, corner)], axis=0)
        target = np.ravel_multi_index([lower + bit for lower, bit in zip(lowers, corner)], sizes)
        for z in range(shocks):
            for zz in range(shocks):
                np.add.at(matrix, (rows[:, z], target[:, z] * shocks + zz), weight[:, z] * CHAIN[z, zz])
    return matrix


def _stationary(matrix: np.ndarray) -> np.ndarray:
    """π with π Q = π and Σ π = 1, as one least-squares system (numpy)."""
    system = np.vstack([(np.eye(matrix.shape[0]) - matrix).T, np.ones(matrix.shape[0])])
    target = np.zeros(matrix.shape[0] + 1)
    target[-1] = 1.0
    found, *_ = np.linalg.lstsq(system, target, rcond=None)
    assert np.abs(found @ matrix - found).max() < 1e-13
    return found


def _independent_solution(grid: np.ndarray) -> tuple[np.ndarray, np.ndarray, float]:
    """Policy iteration on the fitted problem, written here: ``(v*, a', error bound of v*)``.

    Each policy is evaluated exactly, ``v = (I − β Q_σ)^−1 u(c_σ)`` with ``Q_σ`` the lottery matrix (the
    linear interpolation weights); it stops when a Bellman step moves ``v`` by at most 1e-13.  The bound is
    ``β/(1−β)·‖Tv − v‖∞`` plus 16 ulps of the values per step over ``1 − β`` (common practice).
    """
    v = np.zeros((grid.size, INCOME.size))
    for _ in range(50):
        tv, a_next = _exact_bellman(v, grid)
        step = float(np.abs(tv - v).max())
        if step <= 1e-13:
            break
        reward = _utility((_cash(grid) - a_next).reshape(-1))
        v = np.linalg.solve(np.eye(reward.size) - BETA * _lotteries([grid], [a_next]), reward).reshape(v.shape)
    else:
        raise AssertionError("the independent policy iteration did not settle")
    rounding = 16 * np.finfo(float).eps * float(np.abs(tv).max()) / (1 - BETA)
    return tv, a_next, BETA / (1 - BETA) * step + rounding


@pytest.fixture(scope="module")
def saving() -> dict[str, Any]:
    return solve(_document())


@pytest.fixture(scope="module")
def consuming() -> dict[str, Any]:
    return solve(_consumption_form())


@pytest.fixture(scope="module")
def reference(saving: dict[str, Any]) -> tuple[np.ndarray, np.ndarray, np.ndarray, float]:
    grid = np.array(saving["axes"]["a"])
    return (grid, *_independent_solution(grid))


def test_the_bellman_step_finds_scipys_maximum_at_every_point(saving: dict[str, Any]) -> None:
    _, problem = compile_document(_document())
    grid = problem.model_data.state_grids[0]
    v = np.array(saving["value"])
    stepped, chosen = (x.reshape(v.shape) for x in problem.bellman_step(v.reshape(-1)))
    worst = 0.0
    for i, cash_row in enumerate(_cash(grid)):
        for z, cash in enumerate(cash_row):
            def loss(a_next: float, cash: float = cash, z: int = z) -> float:
                later = sum(CHAIN[z, zz] * np.interp(a_next, grid, v[:, zz]) for zz in range(INCOME.size))
                return -(_utility(cash - a_next) + BETA * later) if a_next < cash else np.inf

            # scipy.optimize.minimize_scalar, bounded Brent (Brent 1973) on the same interval [0, min(a_max, cash)].
            found = minimize_scalar(loss, bounds=(grid[0], min(grid[-1], cash)), method="bounded",
                                    options={"xatol": 1e-14, "maxiter": 2000})
            assert found.success
            worst = max(worst, abs(-found.fun - stepped[i, z]))
            # fixq's maximum is never lower than scipy's beyond rounding.
            assert stepped[i, z] >= -found.fun - 1e-12, (i, z, chosen[i, z], found.x)
    # scipy's bounded search stops within about SQRT_EPS·|x| too, so where the maximum sits on a kink of the
    # interpolant its value falls short by a first-order amount (measured up to 5e-10 here).
    assert worst <= 1e-9
    # The exact segment-by-segment maximisation agrees to rounding.
    exact, exact_choice = _exact_bellman(v, grid)
    np.testing.assert_allclose(stepped, exact, rtol=0, atol=1e-12)
    np.testing.assert_allclose(chosen, exact_choice, rtol=0, atol=1e-6)


@pytest.mark.parametrize("hints", [None, {"concave": True, "monotone": True}], ids=["scan", "hinted"])
def test_the_certified_bound_holds_against_an_independent_fixed_point(reference: tuple, hints: dict | None) -> None:
    grid, exact, exact_choice, exact_bound = reference
    result = solve(_document(**({} if hints is None else {"hints": hints})))
    assert result["status"] == "converged"
    assert result["diagnostics"]["continuous_choice"]["certified"]
    gap = np.abs(np.array(result["value"]) - exact).max()
    assert gap <= result["error_bound"] + exact_bound, (gap, result["error_bound"], exact_bound)
    np.testing.assert_allclose(np.array(result["policy"]["save"]), exact_choice, rtol=0, atol=1e-6)


def _kink_allowance(result: dict[str, Any]) -> float:
    """Value a search may lose at a kink of the linear interpolant, per the search's own x tolerance.

    Brent (1973, ch. 5) stops within ``SQRT_EPS·|c| + XTOL_SHARE·width`` of the maximum; where the maximum
    sits on a kink the loss is first order, at most ``u'(c_min)`` times that, and it compounds by ``1/(1−β)``.
    """
    c = np.array(result["policy"]["c"])
    grid = np.array(result["axes"]["a"])
    step = SQRT_EPS * float(c.max()) + XTOL_SHARE * float(_cash(grid).max())
    return float(c.min()) ** -GAMMA * 2 * step / (1 - BETA)


@pytest.mark.parametrize("how", ["linear", "monotone_cubic"])
def test_choosing_consumption_gives_the_same_household(how: str, request: pytest.FixtureRequest) -> None:
    if how == "linear":
        saving, consuming = request.getfixturevalue("saving"), request.getfixturevalue("consuming")
    else:
        saving, consuming = solve(_document(interpolation=how)), solve(_consumption_form(interpolation=how))
    assert consuming["status"] == "converged" and consuming["policy_index"] is None
    cash = _cash(np.array(consuming["axes"]["a"]))
    np.testing.assert_allclose(cash - np.array(consuming["policy"]["c"]), np.array(saving["policy"]["save"]),
                               rtol=0, atol=1e-6)
    gap = np.abs(np.array(saving["value"]) - np.array(consuming["value"])).max()
    # The cubic interpolant is smooth, so both searches end at a smooth maximum: no first-order loss (measured
    # 2e-14 against bounds of 4e-12).  The linear one has kinks the consumption form's search does not land on.
    allowance = _kink_allowance(consuming) if how == "linear" else 0.0
    assert gap <= saving["error_bound"] + consuming["error_bound"] + allowance


def test_euler_errors_asked_for_are_measured_or_explained() -> None:
    document = _consumption_form()
    document["report"] = {"euler_errors": True}
    diagnostics = solve(document)["diagnostics"]
    assert "euler_errors" in diagnostics or any("Euler" in note for note in diagnostics.get("notes", []))


def test_the_consumption_form_is_certified_against_the_independent_fixed_point(reference: tuple,
                                                                                consuming: dict[str, Any]) -> None:
    _, exact, _, exact_bound = reference
    assert consuming["diagnostics"]["continuous_choice"]["certified"]
    gap = np.abs(np.array(consuming["value"]) - exact).max()
    assert gap <= consuming["error_bound"] + exact_bound, (gap, consuming["error_bound"])


def test_a_true_concave_hint_on_the_consumption_form_is_not_reported_broken() -> None:
    result = solve(_consumption_form(hints={"concave": True}))
    assert result["diagnostics"]["verification"]["hints_held"], result["diagnostics"]["warnings"]


@pytest.mark.parametrize("form", ["saving", "consuming"])
def test_the_stationary_distribution_is_youngs(form: str, request: pytest.FixtureRequest) -> None:
    result = request.getfixturevalue(form)
    grid = np.array(result["axes"]["a"])
    a_next = np.array(result["policy"]["save"]) if form == "saving" else _cash(grid) - np.array(result["policy"]["c"])
    expected = _stationary(_lotteries([grid], [a_next]))
    stationary = result["stationary"]
    found = np.array(stationary["distribution"]).reshape(-1)
    np.testing.assert_allclose(found, expected, rtol=0, atol=1e-10)
    means = stationary["means"]
    assert means["a"] == pytest.approx(expected @ np.repeat(grid, INCOME.size), abs=1e-9)
    assert means["y"] == pytest.approx(expected @ np.tile(INCOME, grid.size), abs=1e-12)
    choice = "save" if form == "saving" else "c"
    assert means[choice] == pytest.approx(expected @ np.array(result["policy"][choice]).reshape(-1), abs=1e-9)


def test_the_stationary_distribution_on_two_states_is_youngs() -> None:
    # A second, invented state: a skill level h that drifts toward income and scales it; h' falls between grid
    # points, so each next point's mass goes to four neighbours with bilinear weights.
    spec = copy.deepcopy(SAVINGS)
    spec["states"]["h"] = {"min": 0.5, "max": 1.5, "points": 5}
    spec["next"] = {"h": "0.6 * h + 0.4 * y"}
    spec["define"] = {"c": "(1 + r) * a + h * y - save"}
    result = solve(_document(spec))
    assert result["status"] == "converged"
    grid_a, grid_h = np.array(result["axes"]["a"]), np.array(result["axes"]["h"])
    save = np.array(result["policy"]["save"]).reshape(grid_a.size * grid_h.size, INCOME.size)
    h_next = np.broadcast_to((0.6 * grid_h[:, None] + 0.4 * INCOME[None, :])[None], (grid_a.size, grid_h.size, 2))
    expected = _stationary(_lotteries([grid_a, grid_h], [save, h_next.reshape(save.shape)]))
    found = np.array(result["stationary"]["distribution"]).reshape(-1)
    np.testing.assert_allclose(found, expected, rtol=0, atol=1e-10)
    means = result["stationary"]["means"]
    states = np.stack(np.meshgrid(grid_a, grid_h, INCOME, indexing="ij"), axis=-1).reshape(-1, 3)
    for name, column in (("a", 0), ("h", 1), ("y", 2)):
        assert means[name] == pytest.approx(expected @ states[:, column], abs=1e-9), name
    assert means["save"] == pytest.approx(expected @ save.reshape(-1), abs=1e-9)


def _errors(document: dict[str, Any], exception: type[Exception] = InvalidDocument) -> list[dict[str, str]]:
    with pytest.raises(exception) as info:
        parse_document(document)
    return info.value.errors


def _with(path: list[str], value: Any, document: dict[str, Any] | None = None) -> dict[str, Any]:
    document = copy.deepcopy(document or _document())
    node = document["model"]
    for key in path[:-1]:
        node = node[key]
    node[path[-1]] = value
    return document


REFUSED = {
    "another continuous choice": (_with(["choices", "hours"], {"min": 0.0, "max": 1.0, "continuous": True}),
                                  "model.choices.hours.continuous", "one continuous choice"),
    "cubic with four states": (
        _with(["next"], {"b": "b", "e": "e", "f": "f"}, _with(["states"], {
            "a": SAVINGS["states"]["a"], **{name: {"min": 0.0, "max": 1.0, "points": 3} for name in "bef"}},
            _document(interpolation="monotone_cubic"))),
        "model.interpolation", "at most 3 states"),
    "cubic with a discrete choice": (
        _with(["choices", "save"], {"next_of": "a"}, _document(interpolation="monotone_cubic")),
        "model.interpolation", "continuous"),
    "expression bound of a discrete choice": (
        _with(["choices", "save"], {"min": "a", "max": 2.0, "points": 5}), "model.choices.save.min", "continuous"),
    "bound using a define": (_with(["define"], {"cash": "(1 + r) * a + y"}, _with(
        ["choices", "c", "max"], "cash", _consumption_form())), "model.choices.c.max", "`cash`"),
    "bound using the choice": (_with(["choices", "c", "max"], "c + 1", _consumption_form()),
                               "model.choices.c.max", "`c`"),
    "next_of with bounds": (_with(["choices", "save", "max"], 3.0), "model.choices.save.max", "drop"),
    "max below min": (_with(["choices", "c"], {"min": 2.0, "max": 1.0, "continuous": True}, _consumption_form()),
                      "model.choices.c.max", "greater than"),
}


@pytest.mark.parametrize("case", sorted(REFUSED))
def test_refusals_name_the_field(case: str) -> None:
    document, path, phrase = REFUSED[case]
    errors = _errors(document)
    assert any(e["path"] == path and phrase in e["message"] for e in errors), errors


@pytest.mark.parametrize("key", ["min", "max"])
def test_an_infinite_number_bound_is_refused_at_its_path(key: str) -> None:
    errors = _errors(_with(["choices", "c", key], math.inf, _consumption_form()))
    assert [e["path"] for e in errors] == [f"model.choices.c.{key}"], errors


EDGE = {"min": "0", "max": "where(a > 0, (1 + r) * a + y, edge / a)", "continuous": True}
"""A consumption bound that, at a = 0 only, is +inf (edge 1), NaN (edge 0) or −inf, below the min (edge −1)."""


@pytest.mark.parametrize("edge", [1.0, 0.0, -1.0], ids=["inf", "nan", "below-min"])
def test_a_bound_that_is_not_finite_at_a_point_is_refused_at_the_bound(edge: float) -> None:
    document = _consumption_form(params={**SAVINGS["params"], "a_max": A_MAX, "edge": edge})
    document["model"]["choices"]["c"] = dict(EDGE)
    with pytest.raises((InvalidDocument, InfeasibleModel)) as info:
        solve(document)
    errors = info.value.errors
    assert errors[0]["path"] in ("model.choices.c.max", "model.choices.c.min"), errors
    assert "a = 0" in errors[0]["message"], errors
