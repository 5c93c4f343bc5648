"""Taste shocks with a finite horizon: the smoothed Bellman step of each period, by backward induction.

References named beside each check:

* an independent plain-numpy backward induction with log-sum-exp written here (McFadden 1973's expected
  maximum of extreme-value utilities, ``V_t = s · log Σ_a exp(Q_t(a)/s)``, and the logit probabilities
  ``exp((Q_t(a) − V_t)/s)``), on arrays built by hand from each invented scenario's description;
* the log-sum-exp bounds ``max_a q_a ≤ s · log Σ_a exp(q_a/s) ≤ max_a q_a + s · log A`` (elementary: the
  sum lies between its largest term and A times it), which carried through the periods give
  ``0 ≤ V^s_t − V_t ≤ s · log A · (1 + β_t + β_t β_{t+1} + …)``, so the smoothed solution approaches the
  un-smoothed one as the scale goes to 0.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest

from worker import solve

# ----------------------------------------------------------------------------------------------------------------
# A tabular model: an invented courier firm's three vans, each period run, service or replace.

STATES, ACTIONS, PERIODS = 9, 3, 6
DISCOUNTS = [0.97, 0.95, 1.02, 0.9, 0.99, 0.93]


def courier_arrays() -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    rng = np.random.default_rng(11)
    reward = rng.normal(size=(STATES, ACTIONS))
    transition = rng.random((STATES, ACTIONS, STATES)) ** 3
    transition /= transition.sum(axis=2, keepdims=True)
    terminal = np.linspace(-0.5, 1.5, STATES)
    return reward, transition, terminal


def courier(scale: float | None, **report: Any) -> dict[str, Any]:
    reward, transition, terminal = courier_arrays()
    model: dict[str, Any] = {
        "kind": "tabular", "states": STATES, "actions": ["run", "service", "replace"], "reward": reward.tolist(),
        "transition": transition.tolist(),
        "horizon": {"periods": PERIODS, "terminal_value": terminal.tolist(), "discount": DISCOUNTS},
    }
    if scale is not None:
        model["taste_shocks"] = {"scale": scale}
    return {"version": 1, "discount": 0.95, "model": model, "report": report}


def courier_by_numpy(scale: float) -> tuple[np.ndarray, np.ndarray]:
    """Plain-numpy backward induction with log-sum-exp: values (T, S) and probabilities (T, S, A)."""
    reward, transition, after = courier_arrays()
    values, probabilities = [], []
    for t in range(PERIODS - 1, -1, -1):
        q = reward + DISCOUNTS[t] * transition @ after
        top = q.max(axis=1, keepdims=True)
        after = top[:, 0] + scale * np.log(np.exp((q - top) / scale).sum(axis=1))
        values.append(after)
        probabilities.append(np.exp((q - after[:, None]) / scale))
    return np.array(values[::-1]), np.array(probabilities[::-1])


def test_tabular_taste_shocks_match_a_plain_numpy_backward_induction_with_log_sum_exp() -> None:
    result = solve(courier(0.4))
    value, probabilities = courier_by_numpy(0.4)
    assert result["method"] == "backward_induction" and list(result["axes"]) == ["period", "state_label"]
    np.testing.assert_allclose(np.array(result["value"]), value, rtol=0, atol=1e-10)
    np.testing.assert_allclose(np.array(result["choice_probabilities"]), probabilities, rtol=0, atol=1e-10)
    # The policy is each period's most probable action.
    np.testing.assert_array_equal(np.array(result["policy_index"]["action"]), probabilities.argmax(axis=2))
    taste = result["diagnostics"]["taste_shocks"]
    # Location-zero shocks add s·γ in every period left, discounted: o_t = s·γ + β_t o_{t+1}.
    offsets = np.zeros(PERIODS + 1)
    for t in range(PERIODS - 1, -1, -1):
        offsets[t] = 0.4 * 0.5772156649015329 + (DISCOUNTS[t] * offsets[t + 1])
    np.testing.assert_allclose(taste["location_zero_offset"], offsets[:PERIODS], rtol=1e-14)
    assert taste["choices"] == {"action": ["run", "service", "replace"]}


def test_a_tabular_cohort_and_its_paths_follow_each_periods_probabilities() -> None:
    start = np.linspace(1.0, 3.0, STATES)
    start /= start.sum()
    result = solve(courier(0.4, cohort={"distribution": start.tolist()},
                           simulation={"paths": 4000, "periods": PERIODS, "seed": 5}))
    _, probabilities = courier_by_numpy(0.4)
    _, transition, _ = courier_arrays()
    mu = start
    cohort = result["cohort"]
    for t in range(PERIODS):  # plain numpy forward pass: μ_{t+1}(x') = Σ_x μ_t(x) Σ_a π_t(a|x) P(x'|x, a)
        np.testing.assert_allclose(cohort["distribution"][t], mu, rtol=0, atol=1e-13)
        expected_action = float(mu @ (probabilities[t] @ np.arange(ACTIONS)))
        assert cohort["means"]["action"][t] == pytest.approx(expected_action, abs=1e-12)
        mu = np.einsum("x,xa,xay->y", mu, probabilities[t], transition)
    # The paths draw a choice, then the next state: their means by period estimate the cohort's (4,000 paths:
    # five standard errors of a mean of numbers within [0, 8] stay under 5·4/√4000 ≈ 0.32).
    simulated = result["simulation"]["by_period"]
    for name in ("state_label", "action"):
        assert np.abs(np.array(simulated[name]) - np.array(cohort["means"][name])).max() < 0.32
    drawn = result["simulation"]["first_path"]["action"]
    assert len(drawn) == PERIODS and all(float(a).is_integer() for a in drawn)


def test_tabular_smoothed_values_approach_the_unsmoothed_ones_as_the_scale_falls() -> None:
    exact = np.array(solve(courier(None))["value"])
    # s·log A times the discounted number of periods left: the log-sum-exp bound carried back.
    left = np.zeros(PERIODS + 1)
    for t in range(PERIODS - 1, -1, -1):
        left[t] = 1.0 + DISCOUNTS[t] * left[t + 1]
    gaps = []
    for scale in (0.3, 0.03, 0.003):
        smoothed = np.array(solve(courier(scale))["value"])
        gap = smoothed - exact
        assert (gap >= -1e-12).all()
        assert (gap <= scale * np.log(ACTIONS) * left[:PERIODS, None] + 1e-12).all()
        gaps.append(np.abs(gap).max())
    assert gaps == sorted(gaps, reverse=True) and gaps[-1] < 0.02


# ----------------------------------------------------------------------------------------------------------------
# A grid model: an invented machine shop keeps or replaces a lathe whose output price changes by period.

TOP, SPAN = 12, 5
PRICE = [1.0, 1.2, 0.9, 1.1, 0.8]
WEAR, WEAR_PROBS = [1.0, 2.0], [0.6, 0.4]
DEMAND, DEMAND_MATRIX = [0.8, 1.2], [[0.75, 0.25], [0.3, 0.7]]


def lathe(scale: float | None, **report: Any) -> dict[str, Any]:
    """Mileage 0..TOP (tomorrow: mileage plus today's wear, or 0 after a replacement), demand by a chain,
    revenue price·demand·(1 − mileage/10), a replacement cost of 1 that rises by 0.2 a period, a scrap value."""
    model: dict[str, Any] = {
        "kind": "grid",
        "params": {"price": PRICE},
        "states": {"mileage": {"min": 0, "max": TOP, "points": TOP + 1}},
        "shocks": {"wear": {"iid": {"values": WEAR, "probs": WEAR_PROBS}},
                   "demand": {"markov": {"values": DEMAND, "matrix": DEMAND_MATRIX}}},
        "choices": {"replace": {"values": [0, 1]}},
        "next": {"mileage": f"(1 - replace) * min(mileage + wear, {TOP})"},
        "reward": "price * demand * (1 - mileage / 10) - replace * (1 + 0.2 * period)",
        "horizon": {"periods": SPAN, "terminal_value": "2 - mileage / 6"},
    }
    if scale is not None:
        model["taste_shocks"] = {"scale": scale}
    return {"version": 1, "discount": 0.9, "model": model, "report": report}


def lathe_by_numpy(scale: float | None) -> tuple[np.ndarray, np.ndarray]:
    """Plain-numpy backward induction: values (T, mileage, wear, demand), probabilities (T, ..., replace)."""
    mileage = np.arange(TOP + 1, dtype=float)
    wear, demand = np.array(WEAR), np.array(DEMAND)
    joint = np.array([[WEAR_PROBS[w2] * DEMAND_MATRIX[d1][d2] for w2 in range(2) for d2 in range(2)]
                      for w1 in range(2) for d1 in range(2)])  # rows (wear, demand) today, columns tomorrow
    after = np.broadcast_to((2 - mileage / 6)[:, None, None], (TOP + 1, 2, 2))
    values, probabilities = [], []
    for t in range(SPAN - 1, -1, -1):
        expected = (after.reshape(TOP + 1, 4) @ joint.T).reshape(TOP + 1, 2, 2)  # E[V(m', ·) | wear, demand]
        keep_next = np.minimum(mileage[:, None] + wear[None, :], TOP).astype(int)  # (m, wear), on the grid
        revenue = PRICE[t] * demand[None, None, :] * (1 - mileage[:, None, None] / 10)
        keep = revenue + 0.9 * expected[keep_next, np.arange(2)[None, :]]
        replace = revenue - (1 + 0.2 * t) + 0.9 * expected[0][None]
        q = np.stack([keep, np.broadcast_to(replace, keep.shape)], axis=-1)
        if scale is None:
            after = q.max(axis=-1)
            probabilities.append(np.zeros_like(q))
        else:
            top = q.max(axis=-1, keepdims=True)
            after = top[..., 0] + scale * np.log(np.exp((q - top) / scale).sum(axis=-1))
            probabilities.append(np.exp((q - after[..., None]) / scale))
        values.append(after)
    return np.array(values[::-1]), np.array(probabilities[::-1])


def test_grid_taste_shocks_with_period_params_match_a_plain_numpy_backward_induction() -> None:
    result = solve(lathe(0.25))
    value, probabilities = lathe_by_numpy(0.25)
    assert list(result["axes"]) == ["period", "mileage", "wear", "demand"]
    np.testing.assert_allclose(np.array(result["value"]), value, rtol=0, atol=1e-10)
    np.testing.assert_allclose(np.array(result["choice_probabilities"]), probabilities, rtol=0, atol=1e-10)
    assert np.array(result["choice_probabilities"]).shape == (SPAN, TOP + 1, 2, 2, 2)


def test_grid_taste_shocks_approach_the_unsmoothed_backward_induction_as_the_scale_falls() -> None:
    exact, _ = lathe_by_numpy(None)
    np.testing.assert_allclose(np.array(solve(lathe(None))["value"]), exact, rtol=0, atol=1e-12)
    left = (1 - 0.9 ** (SPAN - np.arange(SPAN))) / (1 - 0.9)  # 1 + β + … over the periods left
    previous = np.inf
    for scale in (0.5, 0.05, 0.005):
        gap = np.array(solve(lathe(scale))["value"]) - exact
        assert (gap >= -1e-12).all()
        assert (gap <= scale * np.log(2) * left[:, None, None, None] + 1e-12).all()
        assert np.abs(gap).max() < previous
        previous = np.abs(gap).max()
    assert previous < 0.05


def test_a_grid_cohort_with_taste_shocks_follows_the_probabilities() -> None:
    document = lathe(0.25, cohort={"start": {"mileage": 0, "wear": 1, "demand": 0.8}}, euler_errors=True,
                     simulation={"paths": 4000, "periods": SPAN, "seed": 2})
    result = solve(document)
    _, probabilities = lathe_by_numpy(0.25)
    distribution = np.array(result["cohort"]["distribution"])
    assert distribution.shape == (SPAN, TOP + 1, 2, 2)
    np.testing.assert_allclose(distribution.sum(axis=(1, 2, 3)), 1.0, rtol=0, atol=1e-13)
    for t in range(SPAN):
        expected = float((distribution[t] * probabilities[t][..., 1]).sum())
        assert result["cohort"]["means"]["replace"][t] == pytest.approx(expected, abs=1e-12)
    assert any("taste shocks" in note for note in result["diagnostics"]["notes"])
    assert "euler_errors" not in result["diagnostics"]
    # Paths that draw each choice estimate the cohort's means: five standard errors of 4,000 paths are under
    # 5·6/√4000 ≈ 0.47 for a mileage within [0, 12], and under 5·0.5/√4000 ≈ 0.04 for a yes/no choice.
    simulated, means = result["simulation"]["by_period"], result["cohort"]["means"]
    assert np.abs(np.array(simulated["mileage"]) - np.array(means["mileage"])).max() < 0.47
    assert np.abs(np.array(simulated["replace"]) - np.array(means["replace"])).max() < 0.04
    assert max(means["replace"]) > 0.1  # the probabilities are not all near 0 or 1 along the way


class MemoryCheckpoint:
    """A checkpoint store in memory, holding the bytes the service would write to Redis."""

    def __init__(self) -> None:
        self.payload: bytes | None = None

    def load(self) -> dict[str, Any] | None:
        from service.checkpoints import decode_checkpoint

        return None if self.payload is None else decode_checkpoint(self.payload)

    def save(self, state: dict[str, Any]) -> None:
        from service.checkpoints import encode_checkpoint

        self.payload = encode_checkpoint(state)


def test_a_resumed_taste_shock_horizon_gives_the_same_values_and_probabilities() -> None:
    from worker.errors import Canceled

    document = lathe(0.25)
    document["solver"] = {"checkpoint_s": 1e-9}
    store = MemoryCheckpoint()
    polls = iter(range(100))
    with pytest.raises(Canceled):
        solve(document, checkpoint=store, should_stop=lambda: next(polls) >= 2)
    resumed = solve(lathe(0.25) | {"solver": {"checkpoint_s": 1e-9}}, checkpoint=store)
    whole = solve(lathe(0.25))
    assert resumed["diagnostics"]["resumed_from_iteration"] == 2
    assert resumed["value"] == whole["value"]
    assert resumed["choice_probabilities"] == whole["choice_probabilities"]
    # A time limit before any period: no period, and no probabilities.
    stopped = solve(lathe(0.25) | {"solver": {"time_limit_s": 1e-9}})
    assert stopped["status"] == "time_limit" and stopped["choice_probabilities"] == []
