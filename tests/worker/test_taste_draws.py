"""Taste shocks together with draws revealed after the choice: the machine-replacement model of dynamic choice.

An invented delivery van: its odometer (0..TOP, in units of 10,000 km) and the season (quiet or busy, a Markov
shock seen before the choice); each period the van is kept or replaced, with extreme-value taste shocks on the
decision, and the week's wear is drawn after the decision with probabilities that depend on the choice and the
season.  The worker and the corner shop of ``tests/_draw_models.py`` check several choices with excluded
pairs.  References named beside each check:

* an independent plain-numpy solver written here: dense arrays ``R[x, a]`` (the reward's expectation over the
  draws) and ``P[x, a, x']`` built by hand from the description, with their own linear interpolation between
  odometer points, and smoothed value iteration ``V = s·log Σ_a exp((R + β P V)/s)`` (McFadden 1973's
  expected maximum of extreme-value utilities) run to 1e-13;
* the logit choice probabilities ``exp((Q_a − V)/s)`` and the Hotz & Miller (1993) identity
  ``log(P_a/P_b) = (Q_a − Q_b)/s``;
* the stationary distribution of the implied chain ``Σ_a π(a|x) P[x, a, ·]`` by a numpy linear solve;
* the log-sum-exp bounds ``max_a q_a ≤ s·log Σ_a exp(q_a/s) ≤ max_a q_a + s·log A`` (elementary), which give
  ``0 ≤ V^s − V ≤ s·log A/(1 − β)`` against the un-smoothed solution of the same model with draws.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import pytest

from tests._documents import grid_document
from tests._draw_models import VAN_TOP as TOP
from tests._draw_models import inventory, inventory_arrays, job_search, job_search_arrays, van, van_arrays
from worker import solve
from worker.errors import TooLarge
from worker.solvers import GENERAL_METHODS

BETA, SCALE = 0.95, 0.5


def smoothed_by_numpy(scale: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """``(V, Q, probabilities)`` of the smoothed Bellman equation by value iteration to 1e-13."""
    R, P = van_arrays()
    v = np.zeros(R.shape[0])
    while True:
        q = R + BETA * P @ v
        top = q.max(axis=1)
        new = top + scale * np.log(np.exp((q - top[:, None]) / scale).sum(axis=1))
        gap = np.abs(new - v).max()
        v = new
        if BETA / (1 - BETA) * gap < 1e-13:
            break
    q = R + BETA * P @ v
    return v, q, np.exp((q - v[:, None]) / scale)


@pytest.fixture(scope="module")
def reference() -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    return smoothed_by_numpy(SCALE)


@pytest.fixture(scope="module")
def solved() -> dict[str, dict[str, Any]]:
    out = {}
    for method in sorted(GENERAL_METHODS):
        document = grid_document(van(), discount=BETA, method=method, tolerance=1e-10)
        document["report"] = {"stationary": True, "simulation": {"periods": 200, "paths": 400, "seed": 5}}
        out[method] = solve(document)
    return out


@pytest.mark.parametrize("method", sorted(GENERAL_METHODS))
def test_values_and_probabilities_match_an_independent_numpy_solver(solved, reference, method):
    result = solved[method]
    v, q, probabilities = reference
    assert result["status"] == "converged"
    value = np.asarray(result["value"])
    assert value.shape == (TOP + 1, 2)
    assert np.abs(value.reshape(-1) - v).max() <= max(1e-8, result["error_bound"])
    assert result["error_bound"] <= 1e-8
    p = np.asarray(result["choice_probabilities"])
    assert p.shape == (TOP + 1, 2, 2)
    np.testing.assert_allclose(p.reshape(-1, 2), probabilities, rtol=0, atol=1e-8)
    # Hotz & Miller (1993): log(P_keep / P_replace) = (Q_keep − Q_replace)/s.
    np.testing.assert_allclose(np.log(p[..., 0] / p[..., 1]).reshape(-1), (q[:, 0] - q[:, 1]) / SCALE,
                               rtol=0, atol=1e-7)
    assert result["policy_index"]["replace"] == p.argmax(axis=-1).tolist()
    assert any("integrated out within the period" in note for note in result["diagnostics"]["notes"])


def test_the_three_methods_agree(solved):
    values = [np.asarray(result["value"]) for result in solved.values()]
    probabilities = [np.asarray(result["choice_probabilities"]) for result in solved.values()]
    bound = max(result["error_bound"] for result in solved.values())
    for value, p in zip(values[1:], probabilities[1:]):
        assert np.abs(value - values[0]).max() <= 2 * bound
        np.testing.assert_allclose(p, probabilities[0], rtol=0, atol=1e-8)


def test_stationary_distribution_solves_the_implied_chain(solved, reference):
    _, _, probabilities = reference
    _, P = van_arrays()
    chain = np.einsum("xa,xay->xy", probabilities, P)
    # π (I − P_π) = 0 with Σ π = 1: one balance equation swapped for the sum (a numpy linear solve).
    system = (np.eye(chain.shape[0]) - chain).T
    system[-1] = 1.0
    rhs = np.zeros(chain.shape[0])
    rhs[-1] = 1.0
    expected = np.linalg.solve(system, rhs)
    for result in solved.values():
        pi = np.asarray(result["stationary"]["distribution"]).reshape(-1)
        np.testing.assert_allclose(pi, expected, rtol=0, atol=1e-8)
        odometer = np.repeat(np.arange(TOP + 1, dtype=float), 2)
        means = result["stationary"]["means"]
        assert means["odometer"] == pytest.approx(expected @ odometer, abs=1e-8)
        assert means["replace"] == pytest.approx(expected @ probabilities[:, 1], abs=1e-8)


def test_simulation_means_are_within_sampling_error_of_the_stationary_ones(solved):
    result = solved["howard"]
    paths = 400
    for name in ("odometer", "replace"):
        summary = result["simulation"]["summary"][name]
        # Paths start from the stationary distribution, so every period is a stationary draw and a path's
        # average has variance at most sd²; the 400 paths are independent: 4 standard errors of their mean.
        assert abs(summary["mean"] - result["stationary"]["means"][name]) <= 4 * summary["sd"] / math.sqrt(paths)
    first = result["simulation"]["first_path"]
    # A drawn replacement is followed by an odometer that starts again from 0 (plus at most two wear draws).
    for today, choice, tomorrow in zip(first["odometer"], first["replace"], first["odometer"][1:]):
        if choice == 1:
            assert tomorrow <= 2
        else:
            assert tomorrow >= today - 1e-12 or today == TOP


def test_a_small_scale_approaches_the_unsmoothed_solution_with_draws():
    plain = solve(grid_document(van(None), discount=BETA, tolerance=1e-10))
    v0 = np.asarray(plain["value"])
    gaps = []
    for scale in (0.1, 0.01, 0.001):
        smoothed = np.asarray(solve(grid_document(van(scale), discount=BETA, tolerance=1e-10))["value"])
        gap = smoothed - v0
        # 0 ≤ V^s − V ≤ s·log 2/(1 − β), up to the two solves' error bounds (1e-10 each, 1e-9 allowed).
        assert gap.min() >= -1e-9
        assert gap.max() <= scale * math.log(2) / (1 - BETA) + 1e-9
        gaps.append(gap.max())
    assert gaps[0] > gaps[1] > gaps[2]


def smoothed_arrays(R: np.ndarray, P: np.ndarray, scale: float, beta: float) -> tuple[np.ndarray, np.ndarray]:
    """``(V, probabilities)`` of the smoothed Bellman equation on arrays with ``-inf`` rewards where a choice is not
    allowed (probability 0), by value iteration to 1e-13."""
    allowed = R > -np.inf
    reward = np.where(allowed, R, 0.0)
    v = np.zeros(R.shape[0])
    while True:
        q = np.where(allowed, reward + beta * P @ v, -np.inf)
        top = q.max(axis=1)
        new = top + scale * np.log(np.exp((q - top[:, None]) / scale).sum(axis=1))
        gap = np.abs(new - v).max()
        v = new
        if beta / (1 - beta) * gap < 1e-13:
            return v, np.exp((q - v[:, None]) / scale)


@pytest.mark.parametrize("build, arrays", [(job_search, job_search_arrays), (inventory, inventory_arrays)],
                         ids=["job_search", "inventory"])
def test_several_choices_with_excluded_pairs_match_numpy(build, arrays):
    # The invented worker (accept, effort; separation drawn after the choice) and corner shop (order, price;
    # demand drawn after the choice), each with taste shocks on every combination of its choices.
    R, P = arrays()
    v, probabilities = smoothed_arrays(R, P, 0.4, 0.95)
    result = solve(grid_document({**build(), "taste_shocks": {"scale": 0.4}}, discount=0.95, tolerance=1e-10))
    assert np.abs(np.asarray(result["value"]).reshape(-1) - v).max() <= 1e-8
    p = np.asarray(result["choice_probabilities"]).reshape(R.shape)
    np.testing.assert_allclose(p, probabilities, rtol=0, atol=1e-8)
    assert (p[R == -np.inf] == 0).all()


def test_tables_over_the_budget_are_refused_at_the_taste_shocks():
    with pytest.raises(TooLarge) as caught:
        solve(grid_document(van(), discount=BETA), limits={"max_bytes": 40_000})
    assert caught.value.errors[0]["path"] == "model.taste_shocks"


# ----------------------------------------------------------------------------------------------------------------
# A finite horizon: the van kept for a few more years, the replacement fee rising by period, scrapped at the end.

PERIODS = 5


def van_for_years() -> dict[str, Any]:
    model = van()
    model["reward"] = model["reward"].replace("replace * 7", "replace * (7 + 0.5 * period)")
    model["horizon"] = {"periods": PERIODS, "terminal_value": "8 - odometer / 4"}
    return {"version": 1, "discount": BETA, "model": {"kind": "grid", **model},
            "report": {"simulation": {"periods": PERIODS, "paths": 50, "seed": 2, "start": {"odometer": 3, "busy": 1}}}}


def test_a_finite_horizon_matches_a_plain_numpy_backward_induction():
    result = solve(van_for_years())
    R, P = van_arrays()
    after = np.repeat(8 - np.arange(TOP + 1, dtype=float) / 4, 2)
    values, probabilities = [], []
    for t in range(PERIODS - 1, -1, -1):
        reward = R.copy()
        reward[:, 1] -= 0.5 * t
        q = reward + BETA * P @ after
        top = q.max(axis=1)
        after = top + SCALE * np.log(np.exp((q - top[:, None]) / SCALE).sum(axis=1))
        values.append(after)
        probabilities.append(np.exp((q - after[:, None]) / SCALE))
    np.testing.assert_allclose(np.asarray(result["value"]).reshape(PERIODS, -1), np.array(values[::-1]),
                               rtol=0, atol=1e-10)
    np.testing.assert_allclose(np.asarray(result["choice_probabilities"]).reshape(PERIODS, -1, 2),
                               np.array(probabilities[::-1]), rtol=0, atol=1e-10)
    assert len(result["simulation"]["first_path"]["odometer"]) == PERIODS
