"""Taste shocks on some of the choices only (``model.taste_shocks.choices``).

An invented household (labelled invented: no data behind it): assets on a grid of 9 points, a wage drawn
each period (iid, seen before choosing), a choice to work or not and the assets to carry into tomorrow
(``next_of``).  The shocks sit on one choice, the other is maximised exactly given it.

References named beside each check:

* An independent plain-numpy value iteration / backward induction written here, on (assets, wage, work,
  next assets) arrays built by hand from the household's description, with the partial log-sum-exp
  ``V = σ·log Σ_d exp(max_a Q(d, a)/σ)``.
* The log-sum-exp bounds ``max_d x_d ≤ σ·log Σ_d exp(x_d/σ) ≤ max_d x_d + σ·log D`` (elementary), which
  through the β-contraction give ``0 ≤ V_σ − V_0 ≤ σ·log D / (1 − β)`` against the model without shocks.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import pytest

from tests._documents import grid_document
from worker import solve
from worker.errors import InvalidDocument
from worker.solvers import GENERAL_METHODS

ASSETS = np.linspace(0.0, 4.0, 9)
WAGES = np.array([0.5, 1.2])
WAGE_PROBS = np.array([0.4, 0.6])
RATE, FLOOR, EFFORT, BETA = 1.05, 0.3, 0.4, 0.9
PROFILE = [1.0, 1.2, 0.8, 0.3]  # the wage multiplier by period of the finite household


def household(scale: float | None, shocked: list[str] | None = ("work",), **extra: Any) -> dict[str, Any]:
    """The invented household: work ∈ {0, 1} and next assets on the asset grid; consumption must be positive."""
    model: dict[str, Any] = {
        "params": {"profile": 1.0},
        "states": {"assets": {"min": 0.0, "max": 4.0, "points": 9}},
        "shocks": {"wage": {"iid": {"values": WAGES.tolist(), "probs": WAGE_PROBS.tolist()}}},
        "choices": {"work": {"values": [0, 1]}, "save": {"next_of": "assets"}},
        "define": {"consumption": f"{RATE} * assets + work * wage * profile + {FLOOR} - save"},
        "feasible": "consumption > 0",
        "reward": f"log(consumption) - {EFFORT} * work",
        **extra,
    }
    if scale is not None:
        model["taste_shocks"] = {"scale": scale} if shocked is None else {"scale": scale, "choices": list(shocked)}
    return model


def choice_values(after: np.ndarray, multiplier: float, discount: float) -> np.ndarray:
    """Q[assets, wage, work, next assets] with tomorrow's value ``after`` (assets, wage); −inf where c ≤ 0."""
    consumption = (RATE * ASSETS[:, None, None, None] + np.arange(2)[None, None, :, None] * multiplier
                   * WAGES[None, :, None, None] + FLOOR - ASSETS[None, None, None, :])
    with np.errstate(divide="ignore", invalid="ignore"):
        reward = np.where(consumption > 0, np.log(np.where(consumption > 0, consumption, 1.0)), -np.inf)
    reward = reward - EFFORT * np.arange(2)[None, None, :, None]
    return reward + discount * (after @ WAGE_PROBS)[None, None, None, :]


def partial_step(q: np.ndarray, scale: float, shocked: str) -> tuple[np.ndarray, np.ndarray]:
    """Value and probabilities (same shape as ``q``) of the partial log-sum-exp over one choice axis."""
    d_axis, a_axis = (2, 3) if shocked == "work" else (3, 2)
    best = q.argmax(axis=a_axis)  # per (assets, wage, d): the best other choice
    top = q.max(axis=a_axis)
    peak = top.max(axis=-1, keepdims=True)
    value = peak[..., 0] + scale * np.log(np.exp((top - peak) / scale).sum(axis=-1))
    by_d = np.exp((top - value[..., None]) / scale)
    probabilities = np.zeros_like(q)
    i, j, d = np.indices(best.shape)
    if d_axis == 2:
        probabilities[i, j, d, best] = by_d
    else:
        probabilities[i, j, best, d] = by_d
    return value, probabilities


def numpy_household(scale: float, shocked: str) -> tuple[np.ndarray, np.ndarray]:
    """Independent reference: partial smoothed value iteration until the β/(1−β)-scaled step is below 1e-13."""
    v = np.zeros((ASSETS.size, WAGES.size))
    while True:
        new, _ = partial_step(choice_values(v, 1.0, BETA), scale, shocked)
        gap = np.abs(new - v).max()
        v = new
        if BETA / (1 - BETA) * gap < 1e-13:
            return v, partial_step(choice_values(v, 1.0, BETA), scale, shocked)[1]


@pytest.mark.parametrize("method", sorted(GENERAL_METHODS))
@pytest.mark.parametrize("shocked", ["work", "save"])
def test_values_and_probabilities_match_an_independent_numpy_solver(method, shocked):
    # Reference: the plain-numpy partial log-sum-exp value iteration above (independent of fixq's code).
    scale = 0.3
    reference, probabilities = numpy_household(scale, shocked)
    result = solve(grid_document(household(scale, [shocked]), discount=BETA, method=method, tolerance=1e-11))
    assert result["status"] == "converged"
    np.testing.assert_allclose(np.asarray(result["value"]), reference, rtol=0, atol=1e-8)
    p = np.asarray(result["choice_probabilities"])
    assert p.shape == (9, 2, 2, 9)
    np.testing.assert_allclose(p, probabilities, rtol=0, atol=1e-8)
    # Every (point, d) keeps exactly one a: the pairs of probability zero are the ones not best for their d.
    d_axis = -2 if shocked == "work" else -1
    assert ((p > 0).sum(axis=-1 if d_axis == -2 else -2) <= 1).all()
    assert result["diagnostics"]["taste_shocks"]["shocked_choices"] == [shocked]
    assert result["diagnostics"]["taste_shocks"]["choices"]["work"] == [0.0, 1.0]


def test_a_small_scale_approaches_the_model_without_taste_shocks():
    # Source: max ≤ σ·log Σ exp(x/σ) ≤ max + σ·log D per step (D = 2 work choices), so through the
    # contraction 0 ≤ V_σ − V_0 ≤ σ·log 2 / (1 − β); the bounds of both solves are added.
    plain = solve(grid_document(household(None), discount=BETA, tolerance=1e-10))
    gaps = []
    for scale in (0.1, 0.01, 0.001):
        result = solve(grid_document(household(scale), discount=BETA, tolerance=1e-10))
        gap = np.asarray(result["value"]) - np.asarray(plain["value"])
        slack = result["error_bound"] + plain["error_bound"]
        assert gap.min() >= -slack
        assert gap.max() <= scale * math.log(2) / (1 - BETA) + slack
        gaps.append(gap.max())
    assert gaps[2] < gaps[1] < gaps[0]
    # At σ = 0.001 the saving rule given the most probable work choice is the hard max's wherever the hard max
    # is not nearly tied between working and not (the most probable d is then the hard max's d).
    result = solve(grid_document(household(0.001), discount=BETA, tolerance=1e-10))
    assert result["policy_index"]["save"] == plain["policy_index"]["save"]
    assert result["policy_index"]["work"] == plain["policy_index"]["work"]


def test_a_list_naming_every_choice_is_the_default_bit_for_bit():
    default = solve(grid_document(household(0.3, None), discount=BETA, tolerance=1e-9))
    listed = solve(grid_document(household(0.3, ["save", "work"]), discount=BETA, tolerance=1e-9))
    assert listed["value"] == default["value"]
    assert listed["choice_probabilities"] == default["choice_probabilities"]
    assert default["diagnostics"]["taste_shocks"]["shocked_choices"] == ["work", "save"]
    assert listed["diagnostics"]["taste_shocks"]["shocked_choices"] == ["work", "save"]
    # ... and the default puts a shock on every pair: every feasible pair has a positive probability.
    p = np.asarray(default["choice_probabilities"])
    assert (p > 0).sum() > 2 * 9 * 2


@pytest.mark.parametrize(
    ("choices", "path", "words"),
    [
        (["work", "hours"], "model.taste_shocks.choices[1]", "`hours` is not a choice"),
        ([], "model.taste_shocks.choices", "at least one choice"),
        (["work", "work"], "model.taste_shocks.choices[1]", "listed twice"),
    ],
)
def test_bad_lists_are_refused_at_their_path(choices, path, words):
    with pytest.raises(InvalidDocument) as caught:
        solve(grid_document(household(0.3, choices), discount=BETA))
    error = next(e for e in caught.value.errors if e["path"] == path)
    assert words in error["message"]


def test_a_tabular_model_names_its_one_choice_action():
    model = {"kind": "tabular", "states": 2, "actions": 2, "reward": [[0.0, 1.0], [1.0, 0.0]],
             "transition": [[[1.0, 0.0], [0.0, 1.0]], [[0.5, 0.5], [1.0, 0.0]]],
             "taste_shocks": {"scale": 0.5, "choices": ["action"]}}
    document = {"version": 1, "discount": 0.9, "model": model, "solver": {"tolerance": 1e-10}}
    result = solve(document)
    assert result["diagnostics"]["taste_shocks"]["shocked_choices"] == ["action"]
    model["taste_shocks"]["choices"] = ["act"]
    with pytest.raises(InvalidDocument) as caught:
        solve(document)
    assert any(e["path"] == "model.taste_shocks.choices[0]" for e in caught.value.errors)


@pytest.mark.parametrize("shocked", [["work"], None])
def test_stationary_distribution_and_simulation_follow_the_probabilities(shocked):
    # With shocks on every choice too: working or not, then the same assets, reach the same node (a row of P_π
    # with a repeated column, which misled the stationary distribution's class search before it was summed).
    document = grid_document(household(0.3, shocked), discount=BETA, tolerance=1e-10)
    document["report"] = {"stationary": True, "simulation": {"periods": 200, "paths": 200, "seed": 4}}
    result = solve(document)
    p = np.asarray(result["choice_probabilities"])
    pi = np.asarray(result["stationary"]["distribution"])
    share = float((pi * p[:, :, 1, :].sum(axis=-1)).sum())
    assert result["stationary"]["means"]["work"] == pytest.approx(share, abs=1e-12)
    # Seeded draws of 40,000 periods along correlated paths: 0.03 (common practice for a seeded check).
    assert result["simulation"]["summary"]["work"]["mean"] == pytest.approx(share, abs=0.03)
    # A path's saving is the best saving for the work it drew: tomorrow's assets are today's saving.
    first = result["simulation"]["first_path"]
    assert first["assets"][1:] == first["save"][:-1]


@pytest.mark.parametrize("shocked", [["work"], None])
def test_stationary_sd_and_define_means_are_over_the_drawn_choices(shocked):
    # The random choice's moments over (point, choice) pairs, weight pi(x) P(c|x), in plain numpy from the result's
    # distribution and probabilities.  Before, sd(work) was the spread of each point's expected work (0.07 where a
    # 0/1 choice of mean 0.92 has 0.28, as a simulation showed), and consumption was evaluated at the expected
    # work and saving, not averaged over the choices drawn.
    document = grid_document(household(0.3, shocked), discount=BETA, tolerance=1e-10)
    document["report"] = {"stationary": True, "simulation": {"periods": 400, "paths": 200, "seed": 4}}
    result = solve(document)
    weight = (np.asarray(result["stationary"]["distribution"])[:, :, None, None]
              * np.asarray(result["choice_probabilities"]))  # [assets, wage, work, save]
    work = np.arange(2.0)[None, None, :, None]
    save = ASSETS[None, None, None, :]
    consumption = RATE * ASSETS[:, None, None, None] + work * WAGES[None, :, None, None] + FLOOR - save
    stationary = result["stationary"]
    for name, values in (("work", work), ("save", save), ("consumption", consumption)):
        values = np.broadcast_to(values, weight.shape)
        mean = float((weight * values).sum())
        sd = float(np.sqrt((weight * (values - mean) ** 2).sum()))
        assert stationary["means"][name] == pytest.approx(mean, abs=1e-10), name
        assert stationary["sd"][name] == pytest.approx(sd, abs=1e-10), name
    # The simulation's pooled sd of the drawn work agrees (seeded, 80,000 periods; 0.03, common practice).
    assert result["simulation"]["summary"]["work"]["sd"] == pytest.approx(stationary["sd"]["work"], abs=0.03)


def numpy_backward(scale: float, terminal: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Independent reference: plain-numpy backward induction with the partial log-sum-exp over work."""
    after, values, probabilities = terminal, [], []
    for t in range(len(PROFILE) - 1, -1, -1):
        after, p = partial_step(choice_values(after, PROFILE[t], BETA), scale, "work")
        values.append(after)
        probabilities.append(p)
    return np.array(values[::-1]), np.array(probabilities[::-1])


def test_a_finite_horizon_matches_a_numpy_backward_induction():
    # Reference: numpy_backward above, per-period wage multipliers and a terminal value by hand.
    scale = 0.25
    model = household(scale, params={"profile": PROFILE},
                      horizon={"periods": len(PROFILE), "terminal_value": "0.5 * log(1 + assets)"})
    document = grid_document(model, discount=BETA)
    document["report"] = {"cohort": {"start": {"assets": 0.0, "wage": 0.5}}}
    result = solve(document)
    terminal = np.broadcast_to(0.5 * np.log1p(ASSETS)[:, None], (ASSETS.size, WAGES.size))
    values, probabilities = numpy_backward(scale, terminal)
    np.testing.assert_allclose(np.asarray(result["value"]), values, rtol=0, atol=1e-10)
    p = np.asarray(result["choice_probabilities"])
    assert p.shape == (len(PROFILE), 9, 2, 2, 9)
    np.testing.assert_allclose(p, probabilities, rtol=0, atol=1e-10)
    assert result["diagnostics"]["taste_shocks"]["shocked_choices"] == ["work"]
    # The cohort moves by each period's probabilities (zeros included): its mass works with Σ μ_t·P_t(work = 1),
    # and tomorrow's mass is the sum, over every (point, work, save) pair, of μ_t·P_t on (save, tomorrow's wage).
    mu = np.zeros((ASSETS.size, WAGES.size))
    mu[0, 0] = 1.0
    for t in range(len(PROFILE)):
        np.testing.assert_allclose(result["cohort"]["distribution"][t], mu, rtol=0, atol=1e-12)
        expected = float((mu * p[t][:, :, 1, :].sum(axis=-1)).sum())
        assert result["cohort"]["means"]["work"][t] == pytest.approx(expected, abs=1e-12)
        mu = np.einsum("ij,ijwk->k", mu, p[t])[:, None] * WAGE_PROBS[None, :]
