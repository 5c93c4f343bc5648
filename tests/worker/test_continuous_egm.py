"""The endogenous grid method and simulation off the grid, on an invented consumption–saving model.

References written here: the fixed point of the same fitted problem by Howard's method (fixq's other
path), a plain numpy endogenous-grid iteration (Carroll 2006) for the policy, and the long-run mean of the
Young (2010) lottery chain for the simulated mean.
"""

from __future__ import annotations

import copy
from typing import Any

import numpy as np
import pytest

from tests._documents import log_growth
from worker.document import parse_document
from worker.errors import InvalidDocument
from worker.solve import solve

BETA, R, GAMMA = 0.94, 0.03, 2.0
INCOME = np.array([0.7, 1.3])
CHAIN = np.array([[0.8, 0.2], [0.25, 0.75]])

HOUSEHOLD: dict[str, Any] = {
    "kind": "grid",
    "params": {"r": R, "gamma": GAMMA},
    "states": {"a": {"min": 0.0, "max": 12.0, "points": 120, "spacing": "power", "exponent": 2.0}},
    "shocks": {"y": {"markov": {"values": INCOME.tolist(), "matrix": CHAIN.tolist()}, "transform": "none"}},
    "choices": {"save": {"next_of": "a", "continuous": True}},
    "define": {"c": "(1 + r) * a + y - save"},
    "reward": "c**(1 - gamma) / (1 - gamma)",
    "feasible": ["c > 0"],
    "hints": {"concave": True, "monotone": True},
}
"""Invented: a household saving out of a two-state income."""


def _document(method: str = "endogenous_grid", model: dict[str, Any] = HOUSEHOLD, **report: Any) -> dict[str, Any]:
    return {"version": 1, "discount": BETA, "model": copy.deepcopy(model),
            "solver": {"method": method, "tolerance": 1e-9}, "report": report}


def _numpy_egm(grid: np.ndarray, rounds: int = 3000) -> np.ndarray:
    """Savings on ``grid`` (points, shocks) by a plain endogenous-grid iteration (Carroll 2006), linear reading."""
    policy = np.zeros((grid.size, INCOME.size))
    for _ in range(rounds):
        consumption = (1 + R) * grid[:, None] + INCOME[None, :] - policy
        expected = (consumption ** -GAMMA) @ CHAIN.T * (1 + R)
        today_c = (BETA * expected) ** (-1 / GAMMA)
        today_a = (today_c + grid[:, None] - INCOME[None, :]) / (1 + R)
        new = np.column_stack([np.interp(grid, today_a[:, z], grid, left=0.0, right=grid[-1])
                               for z in range(INCOME.size)])
        if np.abs(new - policy).max() < 1e-13:
            return new
        policy = new
    return policy


def test_the_value_agrees_with_howards_method_within_both_bounds() -> None:
    egm = solve(_document())
    howard = solve(_document("howard"))
    assert egm["status"] == howard["status"] == "converged"
    gap = np.abs(np.array(egm["value"]) - np.array(howard["value"])).max()
    assert gap <= egm["error_bound"] + howard["error_bound"]
    report = egm["diagnostics"]["continuous_choice"]["endogenous_grid"]
    assert report["rounds"] > 10 and report["last_change"] < 1e-8
    # The method's policy is close to the fitted problem's maximiser (their gap is reported).
    assert report["greedy_gap"] == pytest.approx(
        np.abs(np.array(egm["policy"]["save"]) - np.array(howard["policy"]["save"])).max(), abs=1e-6)
    assert report["greedy_gap"] < 0.05
    # A concave household: the method's checks of concavity (worker.continuous.egm_checks) raise no alarm.
    assert 0.0 < report["greedy_gap"] and not [w for w in egm["diagnostics"]["warnings"] if "endogenous_grid" in w]


def test_the_policy_agrees_with_a_plain_numpy_endogenous_grid_iteration(monkeypatch: pytest.MonkeyPatch) -> None:
    from worker.continuous import egm

    monkeypatch.setattr(egm, "KINK_STRENGTH", 2.0)
    plain = solve(_document())
    grid = np.array(plain["axes"]["a"])
    reference = _numpy_egm(grid)
    # Without the bends added, both iterate the same map on the same grid; fixq stops when no choice moves by
    # more than POLICY_TOLERANCE of the grid's width (1.2e-9 here), which at this rate of convergence leaves a
    # few times that to the fixed point.
    assert np.abs(np.array(plain["policy"]["save"]) - reference).max() < 1e-8
    monkeypatch.undo()
    # With them the fitted solution moves a little (the bends are read exactly), and its errors fall.
    bent = solve(_document(euler_errors=True))
    assert np.abs(np.array(bent["policy"]["save"]) - reference).max() < 2e-3
    monkeypatch.setattr(egm, "KINK_STRENGTH", 2.0)
    straight = solve(_document(euler_errors=True))
    assert bent["diagnostics"]["euler_errors"]["max_log10"] < straight["diagnostics"]["euler_errors"]["max_log10"]


def test_its_euler_errors_beat_the_linear_value_iteration() -> None:
    egm = solve(_document(euler_errors=True))["diagnostics"]["euler_errors"]
    linear = solve(_document("howard", euler_errors=True))["diagnostics"]["euler_errors"]
    assert egm["max_log10"] < linear["max_log10"] - 0.5
    assert egm["mean_log10"] < linear["mean_log10"] - 2


@pytest.mark.parametrize("change, phrase", [
    ({"choices": {"c": {"min": "0", "max": "(1 + r) * a + y", "continuous": True}}, "define": {},
      "next": {"a": "(1 + r) * a + y - c"}}, "next_of"),
    ({"reward": "c**(1 - gamma) / (1 - gamma) - 0.01 * save"}, "directly"),
    ({"reward": "c**(1 - gamma) / (1 - gamma) * (1 + 0.1 * a)"}, "today's state"),
])
def test_a_model_not_of_its_form_is_refused_naming_the_condition(change: dict[str, Any], phrase: str) -> None:
    model = {**copy.deepcopy(HOUSEHOLD), **change}
    with pytest.raises(InvalidDocument) as caught:
        solve(_document(model=model))
    assert caught.value.errors[0]["path"] == "solver.method"
    assert phrase in caught.value.errors[0]["message"]


def test_a_simulation_follows_states_off_the_grid_with_the_policy_interpolated() -> None:
    document = _document("howard", stationary=True,
                         simulation={"periods": 400, "paths": 2000, "seed": 7, "start": {"a": 1.2345, "y": 0.7}})
    result = solve(document)
    simulation = result["simulation"]
    path = simulation["first_path"]
    assert path["a"][0] == 1.2345 and path["y"][0] == 0.7
    grid = np.array(result["axes"]["a"])
    policy = np.array(result["policy"]["save"])
    # Each period's choice is the policy read linearly at the path's state; tomorrow's state is that choice.
    for t in range(20):
        z = int(np.flatnonzero(INCOME == path["y"][t])[0])
        assert path["save"][t] == pytest.approx(np.interp(path["a"][t], grid, policy[:, z]), abs=1e-12)
        assert path["a"][t + 1] == pytest.approx(path["save"][t], abs=1e-15)
    assert sum(not np.isclose(a, grid).any() for a in path["a"]) > 15
    # The long-run mean of the simulated assets is the Young-lottery chain's mean, within sampling error.
    long_run = result["stationary"]["means"]["a"]
    assert simulation["summary"]["a"]["mean"] == pytest.approx(long_run, rel=0.05)
    assert simulation["summary"]["save"]["mean"] == pytest.approx(result["stationary"]["means"]["save"], rel=0.05)


def test_the_compiled_bookkeeping_gives_what_its_numpy_twin_gives(monkeypatch: pytest.MonkeyPatch) -> None:
    """The rounds' compiled bends, union and reading (worker.continuous.egm_rounds) against the numpy code they
    replace (egm._kinks, np.union1d, egm._rule_at on the grid), on random endogenous grids: ties with grid
    points, bends outside the grid, not-a-number states, earlier bends not among the choices."""
    from worker.continuous import egm
    from worker.continuous.egm_rounds import read_moved, union_sorted

    rng = np.random.default_rng(7)
    for _ in range(200):
        n, n_z = int(rng.integers(3, 40)), int(rng.integers(1, 6))
        grid = np.sort(rng.choice(np.linspace(0.0, 10.0, 200), n, replace=False))
        extra = np.sort(rng.uniform(-1.0, 11.0, int(rng.integers(0, 8))))
        choices = np.union1d(grid, np.concatenate([extra, grid[:2]]) if rng.random() < 0.3 else extra)
        states = np.sort(rng.uniform(-2.0, 12.0, (choices.size, n_z)), axis=0)
        if rng.random() < 0.3:
            states[0, :] = grid[1]
        if rng.random() < 0.2:
            states[rng.integers(0, choices.size), 0] = np.nan
        transition = rng.dirichlet(np.ones(n_z), n_z)
        previous = None
        if rng.random() < 0.7:
            earlier = np.concatenate([choices[rng.integers(0, choices.size, int(rng.integers(0, 6)))], [123.0]])
            strength = rng.choice([1.0, 0.5, 0.02, 0.004], earlier.size)
            previous = (earlier, rng.integers(0, n_z, earlier.size), strength)
        if rng.random() < 0.2:
            monkeypatch.setattr(egm, "KINK_MOST", 2.0 / grid.size)  # at most two bends: the strongest kept
        expected = egm._kinks(grid, (states, choices), previous, transition)
        found = egm._bends(grid, (states, choices), previous, transition)
        monkeypatch.undo()
        assert all(np.array_equal(f, e) for f, e in zip(found, expected, strict=True))
        union, rows = union_sorted(grid, expected[0])
        assert np.array_equal(union, np.union1d(grid, expected[0])) and np.array_equal(union[rows], grid)
        before = rng.uniform(0.0, 10.0, (grid.size, n_z))
        if rng.random() < 0.1:
            before[rng.integers(0, grid.size), 0] = np.nan
        out, tomorrow = np.empty_like(before), np.empty((union.size, n_z))
        moved = read_moved(states, choices, grid[0], grid[-1], union, rows, before, tomorrow, out)
        if not (np.diff(states, axis=0) > 0).all():
            assert moved == -1.0
            continue
        read = egm._rule_at(grid, (states, choices), union)
        plain = np.column_stack([np.interp(union, states[:, z], choices, left=grid[0], right=grid[-1])
                                 for z in range(n_z)])  # numpy's own linear reading
        assert np.allclose(tomorrow, np.clip(plain, grid[0], grid[-1]), rtol=0, atol=1e-12)
        expected_move = np.abs(read[rows] - before).max()
        assert np.array_equal(tomorrow, read) and np.array_equal(out, read[rows])
        assert moved == expected_move or (np.isnan(moved) and np.isnan(expected_move))


def _persistent_household(points: int) -> dict[str, Any]:
    """Invented: a household with a persistent seven-point income chain (Rouwenhorst's recursion, Kopecky & Suen
    2010, written here; persistence 0.9, innovation 0.1) and assets up to 100, at ``points`` asset points."""
    p = (1 + 0.9) / 2
    chain = np.array([[p, 1 - p], [1 - p, p]])
    while chain.shape[0] < 7:
        k = chain.shape[0]
        grown = np.zeros((k + 1, k + 1))
        grown[:k, :k] += p * chain
        grown[:k, 1:] += (1 - p) * chain
        grown[1:, :k] += (1 - p) * chain
        grown[1:, 1:] += p * chain
        grown[1:-1] /= 2
        chain = grown
    spread = 0.1 / np.sqrt(1 - 0.9 ** 2) * np.sqrt(6)
    model = copy.deepcopy(HOUSEHOLD)
    model["states"]["a"].update({"max": 100.0, "points": points})
    model["shocks"]["y"]["markov"] = {"values": np.exp(np.linspace(-spread, spread, 7)).tolist(),
                                      "matrix": chain.tolist()}
    return model


def test_the_leaps_end_on_the_same_fixed_point_in_fewer_rounds(monkeypatch: pytest.MonkeyPatch) -> None:
    """Aitken's leaps (egm._Leaps, egm._leap) change where the rounds stop, not what they converge to: against
    rounds without leaps run to a move of 1e-14 of the grid's width (the fixed point, to rounding), the policy
    with leaps is within the stopping rule's promise (half again for its estimate of the rate), in fewer
    rounds; the certified value is the same within both bounds."""
    from worker.continuous import egm

    document = _document(model=_persistent_household(200))
    document["discount"] = 0.96
    monkeypatch.setattr(egm, "LEAP_EVERY", 0)
    plain = solve(document)
    monkeypatch.setattr(egm, "POLICY_TOLERANCE", 1e-14)
    fixed = np.array(solve(document)["policy"]["save"])
    monkeypatch.undo()
    leapt = solve(document)
    rounds = {name: result["diagnostics"]["continuous_choice"]["endogenous_grid"]["rounds"]
              for name, result in (("plain", plain), ("leapt", leapt))}
    assert rounds["leapt"] < 0.9 * rounds["plain"]
    leaps = {name: result["diagnostics"]["continuous_choice"]["endogenous_grid"]["leaps"]
             for name, result in (("plain", plain), ("leapt", leapt))}
    assert leaps["plain"] == 0 and leaps["leapt"] >= 1
    far = {name: np.abs(np.array(result["policy"]["save"]) - fixed).max()
           for name, result in (("plain", plain), ("leapt", leapt))}
    # The stopping rule's promise: a last move of at most POLICY_TOLERANCE of the width (100) leaves about
    # move·ρ/(1 − ρ) to the fixed point at the rounds' slowest rate ρ; near the top of the grid the consumption
    # function's slope converges at about (βR)^(1/γ)/R = 0.965 a round (the asymptotic marginal propensity to
    # consume of CRRA utility; from memory), which gives 2.8e-8 (measured here: 1.2e-8 without leaps, 2.6e-8 with).
    rho = (0.96 * (1 + R)) ** (1 / GAMMA) / (1 + R)
    promise = egm.POLICY_TOLERANCE * 100.0 * rho / (1 - rho)
    assert far["plain"] <= promise and far["leapt"] <= 1.5 * promise
    gap = np.abs(np.array(plain["value"]) - np.array(leapt["value"])).max()
    assert gap <= plain["error_bound"] + leapt["error_bound"]


def test_a_leap_waits_for_steady_moves_and_stops_when_it_no_longer_pays(monkeypatch: pytest.MonkeyPatch) -> None:
    from worker.continuous import egm

    monkeypatch.setattr(egm, "LEAP_EVERY", 10)
    leaps = egm._Leaps()
    rates = [leaps.rate(0.9 ** t) for t in range(12)]
    assert rates[:9] == [None] * 9 and rates[9] == pytest.approx(0.9) and rates[10:] == [None, None]
    unsteady = egm._Leaps()
    assert all(unsteady.rate(0.9 ** t * (1.5 if t % 2 else 1.0)) is None for t in range(30))
    # After a leap at move m, the next one is due 10 rounds later; a move there not below m ends the leaps.
    stalled = egm._Leaps()
    assert [stalled.rate(0.9 ** t) for t in range(10)][-1] is not None
    assert all(stalled.rate(0.9 ** 9 * 0.99 ** t) is None for t in range(5))  # steady, but not due yet
    assert all(stalled.rate(0.9 ** 9 * 1.2 * 0.99 ** t) is None for t in range(40)) and not stalled.on
    going = egm._Leaps()
    assert [going.rate(0.9 ** t) for t in range(10)][-1] is not None
    assert [going.rate(0.9 ** 9 * 1.2 * 0.97 ** t) for t in range(10)][-1] == pytest.approx(0.97)
    # A leap moves the policy read from the last pairs on by move·ρ/(1 − ρ), not where a choice is at an end.
    grid = np.linspace(0.0, 10.0, 11)
    choices = grid.copy()
    before = (np.column_stack([grid, grid + 0.5]), choices)
    tomorrow = egm._rule_at(grid, (before[0] - 0.1, choices), grid)
    earlier = egm._rule_at(grid, before, grid)
    leapt = egm._leap(grid, before, grid, tomorrow, 0.75)
    free = (tomorrow > 0) & (tomorrow < 10) & (earlier > 0) & (earlier < 10)
    assert np.allclose(leapt[free], np.clip((tomorrow + 3 * (tomorrow - earlier))[free], 0, 10), atol=1e-12)
    assert np.array_equal(leapt[~free], tomorrow[~free]) and free.sum() > 10


def test_the_policy_value_from_the_envelope_start_agrees_with_a_sparse_solve(monkeypatch: pytest.MonkeyPatch) -> None:
    """The policy's value (egm._policy_value) from the envelope condition's start against scipy's sparse LU of
    (I − β P_σ) v = r_σ, up to a constant (the solver's bracket answers for a constant): within the stop, and in
    fewer evaluation steps than from zeros."""
    import scipy.sparse as sp
    import scipy.sparse.linalg as spla

    from worker.continuous import egm

    seen: dict[str, Any] = {}
    original = egm._policy_value

    def spy(problem: Any, policy: np.ndarray, tolerance: float, start: np.ndarray | None = None) -> np.ndarray:
        seen.update(problem=problem, policy=policy, tolerance=tolerance, start=start)
        return original(problem, policy, tolerance, start)

    monkeypatch.setattr(egm, "_policy_value", spy)
    solve(_document())
    problem, policy, tolerance, start = (seen[key] for key in ("problem", "policy", "tolerance", "start"))
    assert start is not None
    exact = spla.spsolve(sp.identity(problem.n, format="csc") - BETA * problem.policy_matrix(policy).tocsc(),
                         problem.policy_reward(policy))
    steps = {"n": 0}
    counted = problem.policy_steps

    def counting(*args: Any, **kwargs: Any) -> Any:
        out = counted(*args, **kwargs)
        steps["n"] += out[1]
        return out

    monkeypatch.setattr(problem, "policy_steps", counting)
    done = {}
    for name, begin in (("envelope", start), ("zeros", None)):
        steps["n"] = 0
        value = original(problem, policy, tolerance, None if begin is None else begin.copy())
        done[name] = steps["n"]
        off = value - exact
        # Span of the last move ≤ tolerance·(1 − β)/β leaves the span of the distance to v_σ at most the
        # tolerance (MacQueen–Porteus), and the level within β/(1 − β) of the move.
        assert off.max() - off.min() <= tolerance
    assert done["envelope"] < 0.8 * done["zeros"]
    off = start - exact
    assert off.max() - off.min() < 0.1 * np.ptp(exact)


def test_growth_with_a_concave_output_is_solved_to_its_closed_form() -> None:
    """Output ``z·k**α`` is concave in the state: Newton's steps for today's state from above overshoot below 0,
    where the define is not a number; they are halved back inside (the method once refused the model as having
    no solution of its first-order condition).  Reference: log utility with full depreciation has the exact
    policy ``k' = αβ·z·k**α`` (Brock & Mirman 1972) whatever the shock chain."""
    alpha, beta = 0.33, 0.95
    model = log_growth(alpha=alpha, k_min=0.05, k_max=0.5, points=60,
                       choices={"k_next": {"next_of": "k", "continuous": True}}, hints={"concave": True})
    result = solve({"version": 1, "discount": beta, "model": model,
                    "solver": {"method": "endogenous_grid", "tolerance": 1e-9}})
    k, z = np.array(result["axes"]["k"]), np.array(result["axes"]["z"])
    exact = alpha * beta * z[None, :] * k[:, None] ** alpha
    assert result["status"] == "converged"
    assert np.abs(np.array(result["policy"]["k_next"]) - exact).max() < 1e-3


@pytest.mark.parametrize("change, phrase", [
    ({"choices": {"save": {"next_of": "a"}}}, "continuous choice that is next_of"),
    ({"choices": {"save": {"next_of": "a", "continuous": True}, "work": {"values": [0, 1]}}}, "only choice"),
    ({"shocks": {**HOUSEHOLD["shocks"], "bill": {"timing": "after_choice", "iid": {"values": [0, 0.1],
                                                                                     "probs": [0.9, 0.1]}}},
      "reward": "c**(1 - gamma) / (1 - gamma) - bill"}, "drawn after the choice"),
])
@pytest.mark.parametrize("horizon", [None, {"periods": 4}])
def test_a_model_not_of_its_form_is_refused_at_the_door(change: dict[str, Any], phrase: str,
                                                        horizon: dict[str, Any] | None) -> None:
    # Before, a grid choice (or a second choice, a draw) passed parse_document: without a horizon the job failed in
    # the worker after the 202, with one the method was dropped by a note blaming the horizon.
    model = {**copy.deepcopy(HOUSEHOLD), **change, "horizon": horizon}
    with pytest.raises(InvalidDocument) as caught:
        parse_document(_document(model=model))
    assert caught.value.errors[0]["path"] == "solver.method"
    assert phrase in caught.value.errors[0]["message"]


def test_a_tabular_model_with_the_method_is_refused_at_the_door() -> None:
    document = {"version": 1, "discount": 0.9, "solver": {"method": "endogenous_grid"},
                "model": {"kind": "tabular", "states": 2, "actions": 1, "reward": [[1.0], [0.0]],
                          "transition": [[[0.5, 0.5]], [[0.5, 0.5]]]}}
    with pytest.raises(InvalidDocument) as caught:
        parse_document(document)
    assert caught.value.errors[0]["path"] == "solver.method"
    assert "tabular" in caught.value.errors[0]["message"]


def test_a_model_of_its_form_passes_the_door() -> None:
    parse_document(_document())
    parse_document(_document(model={**copy.deepcopy(HOUSEHOLD), "horizon": {"periods": 3}}))
