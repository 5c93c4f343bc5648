"""The stationary report's means and standard deviations of defines (consumption, income), computed here
from the result's own distribution, grid and policy (numpy), on an invented household."""

from __future__ import annotations

import math

import numpy as np

from worker import solve


def _household() -> dict:
    """Invented: a household saving in `a` out of income `w * y`; consumption and income are defines."""
    return {
        "version": 1, "discount": 0.95, "solver": {"tolerance": 1e-10}, "report": {"stationary": True},
        "model": {
            "kind": "grid", "params": {"r": 0.03, "w": 1.2},
            "states": {"a": {"min": 0.0, "max": 20.0, "points": 60}},
            "shocks": {"y": {"markov": {"values": [0.5, 1.5], "matrix": [[0.8, 0.2], [0.3, 0.7]]}}},
            "choices": {"save": {"next_of": "a", "continuous": True}},
            "define": {"income": "r * a + w * y", "c": "(1 + r) * a + w * y - save",
                       "log_save": "log(save)"},
            "reward": "log(c)", "feasible": ["c > 0"],
        },
    }


def test_defines_have_means_and_sd_under_the_stationary_distribution() -> None:
    result = solve(_household())
    stationary = result["stationary"]
    pi = np.asarray(stationary["distribution"])  # (a, y)
    a = np.asarray(result["axes"]["a"])[:, None]
    y = np.asarray(result["axes"]["y"])[None, :]
    save = np.asarray(result["policy"]["save"])
    expected = {"income": 0.03 * a + 1.2 * y + 0 * save, "c": 1.03 * a + 1.2 * y - save}
    for name, values in expected.items():
        mean = float((pi * values).sum())
        assert math.isclose(stationary["means"][name], mean, rel_tol=1e-12), name
        assert math.isclose(stationary["sd"][name], math.sqrt((pi * (values - mean) ** 2).sum()), rel_tol=1e-9), name
    # Mean income is r E[a] + w E[y]: the same fact through the states' own means.
    means = stationary["means"]
    assert math.isclose(means["income"], 0.03 * means["a"] + 1.2 * means["y"], rel_tol=1e-12)
    # log(save) is -inf where the borrowing limit binds, which has mass: no number is made up for it.
    assert (save[pi > 0] == 0).any()
    assert means["log_save"] is None and stationary["sd"]["log_save"] is None
