"""Invented scenarios with draws revealed after the choice, and their dense arrays written by hand.

Shared by the tests of draws after the choice (test modules do not import each other): a press whose
wear is drawn after the keep-or-replace decision, a worker who may lose a job after accepting it, a
shop whose demand is seen after the order, and a delivery van with taste shocks on its replacement.
Each scenario comes with the reward ``R[s, a]`` and transition ``P[s, a, s']`` arrays of its
description, for the independent numpy checks.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

TOP = 24
WEAR = [0.0, 1.0, 2.0]


def machine() -> dict:
    """An invented press: mileage 0..TOP, keep (0) or replace (1) at 6; half a unit of wear per wear draw seen
    after the decision, a new press wearing less (its probabilities depend on the choice)."""
    return {
        "states": {"mileage": {"min": 0, "max": TOP, "points": TOP + 1}},
        "shocks": {"wear": {"iid": {"values": WEAR, "probs": ["0.3 + 0.2 * replace", "0.5", "0.2 - 0.2 * replace"]},
                            "timing": "after_choice"}},
        "choices": {"replace": {"values": [0, 1]}},
        "next": {"mileage": f"min((1 - replace) * mileage + 0.5 * wear, {TOP})"},
        "reward": "-(1 - replace) * 0.25 * mileage - replace * 6 - 0.3 * wear",
    }


def machine_arrays() -> tuple[np.ndarray, np.ndarray]:
    mileage = np.arange(TOP + 1, dtype=float)
    S = mileage.size
    R = np.empty((S, 2))
    P = np.zeros((S, 2, S))
    for a in range(2):
        probs = np.array([0.3 + 0.2 * a, 0.5, 0.2 - 0.2 * a])
        R[:, a] = -(1 - a) * 0.25 * mileage - a * 6 - 0.3 * (probs @ np.array(WEAR))
        for wear, p in zip(WEAR, probs):
            x = np.minimum((1 - a) * mileage + 0.5 * wear, TOP)
            low = np.minimum(np.floor(x).astype(int), TOP - 1)
            frac = x - low
            P[np.arange(S), a, low] += p * (1 - frac)
            P[np.arange(S), a, low + 1] += p * frac
    return R, P


SEPARATION = 0.25
WAGES = [1.0, 1.5, 2.0, 2.5, 3.0]
OFFER_PROBS = [0.3, 0.25, 0.2, 0.15, 0.1]
EFFORTS = [0.0, 0.5, 1.0]


def job_search() -> dict:
    """An invented worker: unemployed (status 0, benefit 1.1) or employed at a wage; an offer seen before the
    choice; accept it, or (employed) choose an effort that lowers the chance of losing the job, revealed after
    the choice, with a severance payment of 0.4 on separation."""
    sep = f"{SEPARATION} * (1 - 0.7 * effort)"
    return {
        "params": {"benefit": 1.1, "severance": 0.4},
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
    }


def job_search_arrays() -> tuple[np.ndarray, np.ndarray]:
    nw = len(WAGES)
    S, A = 2 * nw * nw, 2 * len(EFFORTS)
    R = np.full((S, A), -np.inf)
    P = np.zeros((S, A, S))
    offer_probs = np.array(OFFER_PROBS)
    for status in range(2):
        for w in range(nw):
            for o in range(nw):
                s = (status * nw + w) * nw + o
                for accept in range(2):
                    for e, effort in enumerate(EFFORTS):
                        a = accept * len(EFFORTS) + e
                        if (status == 0 and effort != 0) or (status == 1 and accept == 1):
                            continue
                        sep = SEPARATION * (1 - 0.7 * effort)
                        if status == 1:
                            R[s, a] = WAGES[w] - 0.6 * effort**2 + 0.4 * sep
                        else:
                            R[s, a] = 1.1
                        working = max(status, accept)
                        wage = w if status == 1 or accept == 0 else o
                        for separated, p in ((0, 1 - sep), (1, sep)):
                            status_next = working * (1 - separated)
                            P[s, a, (status_next * nw + wage) * nw : (status_next * nw + wage + 1) * nw] += (
                                p * offer_probs
                            )
    return R, P


STOCK = 8
DEMAND = [0.0, 1.0, 2.0, 3.0]


def inventory() -> dict:
    """An invented corner shop: stock 0..STOCK, an order placed (fixed cost 2 when positive, 1 a unit) and a
    price set before the day's demand is seen; a higher price makes low demand more likely."""
    shift = "(price - 4)"
    return {
        "params": {"unit_cost": 1.0, "fixed_cost": 2.0, "holding": 0.1},
        "states": {"stock": {"min": 0, "max": STOCK, "points": STOCK + 1}},
        "shocks": {"demand": {"iid": {"values": DEMAND, "probs": [
            f"0.1 + 0.1 * {shift}", f"0.3 + 0.05 * {shift}", f"0.4 - 0.1 * {shift}", f"0.2 - 0.05 * {shift}",
        ]}, "timing": "after_choice"}},
        "choices": {"order": {"min": 0, "max": STOCK, "points": STOCK + 1}, "price": {"values": [4, 6]}},
        "feasible": ["stock + order <= 8"],
        "define": {"sold": "min(stock + order, demand)"},
        "next": {"stock": "stock + order - sold"},
        "reward": "price * sold - unit_cost * order - fixed_cost * (order > 0) - holding * (stock + order - sold)",
    }


def inventory_arrays() -> tuple[np.ndarray, np.ndarray]:
    S = STOCK + 1
    prices = [4.0, 6.0]
    R = np.full((S, S * 2), -np.inf)
    P = np.zeros((S, S * 2, S))
    for x in range(S):
        for q in range(S):
            for j, price in enumerate(prices):
                a = q * 2 + j
                if x + q > STOCK:
                    continue
                shift = price - 4
                probs = [0.1 + 0.1 * shift, 0.3 + 0.05 * shift, 0.4 - 0.1 * shift, 0.2 - 0.05 * shift]
                R[x, a] = 0.0
                for d, p in zip(DEMAND, probs):
                    sold = min(x + q, d)
                    R[x, a] += p * (price * sold - q - 2.0 * (q > 0) - 0.1 * (x + q - sold))
                    P[x, a, int(x + q - sold)] += p
    return R, P


VAN_TOP = 30
VAN_WEAR = np.array([0.0, 1.0, 2.0])
VAN_SEASON = np.array([[0.8, 0.2], [0.3, 0.7]])


def van(scale: float | None = 0.5, top: int = VAN_TOP) -> dict[str, Any]:
    """An invented delivery van: odometer 0..top (10,000 km; :func:`van_arrays` is for ``VAN_TOP``), a busy
    or quiet season seen before the choice, keep (0) or replace (1) with taste shocks of ``scale`` (none when
    None), and the week's wear drawn after the choice, its probabilities depending on the choice and the season."""
    model: dict[str, Any] = {
        "states": {"odometer": {"min": 0, "max": top, "points": top + 1}},
        "shocks": {
            "busy": {"markov": {"values": [0, 1], "matrix": VAN_SEASON.tolist()}},
            "wear": {"iid": {"values": VAN_WEAR.tolist(),
                             "probs": ["0.4 + 0.2 * replace - 0.1 * busy", "0.4", "0.2 - 0.2 * replace + 0.1 * busy"]},
                     "timing": "after_choice"},
        },
        "choices": {"replace": {"values": [0, 1]}},
        "next": {"odometer": f"min((1 - replace) * odometer + 0.75 * wear, {top})"},
        "reward": "-(1 - replace) * 0.3 * odometer * (1 + 0.5 * busy) - replace * 7 + 2 * busy - 0.2 * wear",
    }
    if scale is not None:
        model["taste_shocks"] = {"scale": scale}
    return model


def van_arrays() -> tuple[np.ndarray, np.ndarray]:
    """``R`` (S, 2) and ``P`` (S, 2, S) over the value's points ``x = odometer · 2 + busy``, by hand."""
    odometer = np.arange(VAN_TOP + 1, dtype=float)
    points = (VAN_TOP + 1) * 2
    R = np.zeros((points, 2))
    P = np.zeros((points, 2, points))
    for m in range(VAN_TOP + 1):
        for busy in range(2):
            x = 2 * m + busy
            for a in range(2):
                probs = np.array([0.4 + 0.2 * a - 0.1 * busy, 0.4, 0.2 - 0.2 * a + 0.1 * busy])
                R[x, a] = -(1 - a) * 0.3 * odometer[m] * (1 + 0.5 * busy) - 7 * a + 2 * busy - 0.2 * (probs @ VAN_WEAR)
                for wear, p in zip(VAN_WEAR, probs):
                    after = min((1 - a) * odometer[m] + 0.75 * wear, VAN_TOP)
                    low = min(int(math.floor(after)), VAN_TOP - 1)
                    frac = after - low
                    for node, w in ((low, 1 - frac), (low + 1, frac)):
                        for tomorrow in range(2):
                            P[x, a, 2 * node + tomorrow] += p * w * VAN_SEASON[busy, tomorrow]
    return R, P


FISHERY_STOCK = (0.2, 4.0)
"""The invented fishery's stock grid ends."""
FISHERY_SEASONS = [0.8, 1.25]
"""Its seasons, drawn after the harvest."""


def fishery(points: int = 25, *, tolerance: float = 1e-10, reports: bool = True) -> dict[str, Any]:
    """An invented fishery: a continuous harvest of the stock, the season (bad or good, its odds worse after a
    heavy harvest) drawn after the harvest; ``points`` stock points, β = 0.9."""
    low, high = FISHERY_STOCK
    document = {"version": 1, "discount": 0.9, "model": {
        "kind": "grid",
        "params": {"price": 1.0},
        "states": {"stock": {"min": low, "max": high, "points": points}},
        "shocks": {"season": {"iid": {"values": list(FISHERY_SEASONS),
                                      "probs": ["0.3 + 0.1 * harvest / stock", "0.7 - 0.1 * harvest / stock"]},
                              "timing": "after_choice"}},
        "choices": {"harvest": {"min": 0, "max": "stock - 0.1", "continuous": True, "points": 40}},
        "next": {"stock": f"min(season * 1.6 * (stock - harvest) ** 0.8 + 0.1, {high})"},
        "reward": "price * log(harvest + 0.05) + 0.05 * season"},
        "solver": {"method": "howard", "tolerance": tolerance}}
    if reports:
        document["report"] = {"stationary": True, "euler_errors": True,
                              "simulation": {"paths": 200, "periods": 60, "seed": 4}}
    return document
