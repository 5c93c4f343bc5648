"""Draws revealed after the choice with a finite horizon: each period's step takes the expectation over them.

Reference named beside each check: an independent plain-numpy backward induction written here,
``V_t = max_a R_t[s, a] + β_t Σ_s' P_t[s, a, s'] V_{t+1}[s']``, on dense reward and transition arrays
built by hand for every period from the invented scenario's description, each with its own expectation
over the draws (and its own linear interpolation where tomorrow's state falls between grid points).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest

from worker import solve

WAGES = [1.0, 1.5, 2.0, 2.5]
OFFER_PROBS = [0.4, 0.3, 0.2, 0.1]
EFFORTS = [0.0, 0.5, 1.0]
PERIODS = 7
# Invented: the chance of losing a job rises with age, and the benefit falls after period 3.
SEPARATION = [0.1, 0.12, 0.15, 0.2, 0.25, 0.3, 0.35]
BENEFIT = [1.1, 1.1, 1.1, 0.9, 0.9, 0.9, 0.9]


def working_life(**report: Any) -> dict[str, Any]:
    """An invented finite working life: unemployed (status 0, a benefit) or employed at a wage; an offer seen
    before the choice; accept it, or (employed) choose an effort that lowers the chance of separation, which
    is drawn after the choice; a severance of 0.4 on separation; at the end a pension of a third of the wage
    for the employed."""
    sep = "separation * (1 - 0.7 * effort)"
    return {
        "version": 1,
        "discount": 0.95,
        "model": {
            "kind": "grid",
            "params": {"benefit": BENEFIT, "severance": 0.4, "separation": SEPARATION},
            "states": {"status": {"values": [0, 1]}, "wage": {"values": WAGES}},
            "shocks": {
                "offer": {"iid": {"values": WAGES, "probs": OFFER_PROBS}},
                "separated": {"iid": {"values": [0, 1], "probs": [f"1 - {sep}", sep]}, "timing": "after_choice"},
            },
            "choices": {"accept": {"values": [0, 1]}, "effort": {"values": EFFORTS}},
            "feasible": ["status == 1 or effort == 0", "status == 0 or accept == 0"],
            "define": {"working": "max(status, accept)"},
            "next": {
                "status": "working * (1 - separated)",
                "wage": "where(status == 1, wage, where(accept == 1, offer, wage))",
            },
            "reward": "where(status == 1, wage - 0.6 * effort ** 2 + severance * separated, benefit)",
            "horizon": {"periods": PERIODS, "terminal_value": "status * wage * 3"},
        },
        "report": report,
    }


def working_life_arrays(t: int) -> tuple[np.ndarray, np.ndarray]:
    """Period ``t``'s R (S, A) and P (S, A, S), flat points (status, wage, offer), choices (accept, effort)."""
    nw = len(WAGES)
    S, A = 2 * nw * nw, 2 * len(EFFORTS)
    R = np.full((S, A), -np.inf)
    P = np.zeros((S, A, S))
    for status in range(2):
        for w in range(nw):
            for o in range(nw):
                s = (status * nw + w) * nw + o
                for accept in range(2):
                    for e, effort in enumerate(EFFORTS):
                        a = accept * len(EFFORTS) + e
                        if (status == 0 and effort != 0) or (status == 1 and accept == 1):
                            continue
                        sep = SEPARATION[t] * (1 - 0.7 * effort)
                        # The expected reward over the separation draw.
                        R[s, a] = WAGES[w] - 0.6 * effort**2 + 0.4 * sep if status == 1 else BENEFIT[t]
                        working = max(status, accept)
                        wage = w if status == 1 or accept == 0 else o
                        for separated, p in ((0, 1 - sep), (1, sep)):
                            status_next = working * (1 - separated)
                            first = (status_next * nw + wage) * nw
                            P[s, a, first:first + nw] += p * np.array(OFFER_PROBS)
    return R, P


def working_life_by_numpy() -> tuple[np.ndarray, np.ndarray]:
    nw = len(WAGES)
    status = np.repeat([0, 1], nw * nw)
    wage = np.tile(np.repeat(WAGES, nw), 2)
    after = status * wage * 3.0
    values, policies = [], []
    for t in range(PERIODS - 1, -1, -1):
        R, P = working_life_arrays(t)
        q = R + 0.95 * (P @ after)
        after = q.max(axis=1)
        values.append(after)
        policies.append(q.argmax(axis=1))
    return np.array(values[::-1]), np.array(policies[::-1])


def test_a_working_life_with_draws_after_the_choice_matches_a_plain_numpy_backward_induction() -> None:
    result = solve(working_life())
    value, policy = working_life_by_numpy()
    assert result["method"] == "backward_induction"
    assert list(result["axes"]) == ["period", "status", "wage", "offer"]
    np.testing.assert_allclose(np.array(result["value"]).reshape(PERIODS, -1), value, rtol=0, atol=1e-12)
    effort = np.array(result["policy"]["effort"]).reshape(PERIODS, -1)
    employed = np.arange(value.shape[1]) >= len(WAGES) ** 2
    expected = np.array(EFFORTS)[policy % len(EFFORTS)]
    np.testing.assert_array_equal(effort[:, employed], expected[:, employed])
    # Effort pays more while the separation chance is high: the mean effort of the employed does not fall.
    assert effort[-2, employed].mean() >= effort[0, employed].mean()


def test_a_cohort_with_draws_after_the_choice_moves_by_the_mixture_over_the_draws() -> None:
    result = solve(working_life(cohort={"start": {"status": 0, "wage": 1.0, "offer": 2.0}}))
    _, policy = working_life_by_numpy()
    n = 2 * len(WAGES) ** 2
    mu = np.zeros(n)
    mu[(0 * len(WAGES) + 0) * len(WAGES) + 2] = 1.0
    distribution = np.array(result["cohort"]["distribution"]).reshape(PERIODS, n)
    for t in range(PERIODS):  # plain numpy forward pass under each period's policy
        np.testing.assert_allclose(distribution[t], mu, rtol=0, atol=1e-13)
        _, P = working_life_arrays(t)
        mu = mu @ P[np.arange(n), policy[t]]


def test_a_period_whose_draw_probabilities_are_wrong_is_named() -> None:
    from worker.errors import InvalidDocument

    document = working_life()
    document["model"]["params"]["separation"] = [*SEPARATION[:5], 1.6, 0.3]
    with pytest.raises(InvalidDocument) as caught:
        solve(document)
    error = caught.value.errors[0]
    assert error["path"].startswith("model.shocks.separated.iid.probs") and error["message"].startswith("in period 5")


TOP = 10


def press(**horizon: Any) -> dict[str, Any]:
    """An invented press kept or replaced for a few years: wear seen after the choice moves the mileage by half
    a unit per draw (between grid points), a new press wears less, and the press is scrapped for 8 − mileage/2."""
    return {
        "version": 1,
        "discount": 0.9,
        "model": {
            "kind": "grid",
            "states": {"mileage": {"min": 0, "max": TOP, "points": TOP + 1}},
            "shocks": {"wear": {"iid": {"values": [0.0, 1.0, 3.0],
                                        "probs": ["0.3 + 0.2 * replace", "0.5", "0.2 - 0.2 * replace"]},
                                "timing": "after_choice"}},
            "choices": {"replace": {"values": [0, 1]}},
            "next": {"mileage": f"min((1 - replace) * mileage + 0.5 * wear, {TOP})"},
            "reward": "-(1 - replace) * 0.25 * mileage - replace * 6 - 0.3 * wear",
            "horizon": {"periods": 5, "terminal_value": "8 - mileage / 2", **horizon},
        },
    }


def press_by_numpy(discounts: list[float]) -> np.ndarray:
    mileage = np.arange(TOP + 1, dtype=float)
    S = mileage.size
    R = np.empty((S, 2))
    P = np.zeros((S, 2, S))
    for a in range(2):
        probs = np.array([0.3 + 0.2 * a, 0.5, 0.2 - 0.2 * a])
        R[:, a] = -(1 - a) * 0.25 * mileage - a * 6 - 0.3 * (probs @ np.array([0.0, 1.0, 3.0]))
        for wear, p in zip([0.0, 1.0, 3.0], probs):
            x = np.minimum((1 - a) * mileage + 0.5 * wear, TOP)
            low = np.minimum(np.floor(x).astype(int), TOP - 1)
            frac = x - low
            P[np.arange(S), a, low] += p * (1 - frac)
            P[np.arange(S), a, low + 1] += p * frac
    after = 8 - mileage / 2
    values = []
    for t in range(4, -1, -1):
        after = (R + discounts[t] * (P @ after)).max(axis=1)
        values.append(after)
    return np.array(values[::-1])


@pytest.mark.parametrize("discount", [None, "discount * (1 + 0.05 * period)"])
def test_draws_between_grid_points_match_a_plain_numpy_backward_induction(discount: str | None) -> None:
    result = solve(press(**({} if discount is None else {"discount": discount})))
    discounts = [0.9] * 5 if discount is None else [0.9 * (1 + 0.05 * t) for t in range(5)]
    np.testing.assert_allclose(np.array(result["value"]), press_by_numpy(discounts), rtol=0, atol=1e-12)
    assert any("integrated out within the period" in note for note in result["diagnostics"]["notes"])
