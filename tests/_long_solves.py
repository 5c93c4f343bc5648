"""Tabular documents whose solve length a test chooses: invented random replacement problems.

:func:`fleet_upkeep` is a random sparse problem (500 states, 3 actions, 8
successors each) solved by plain value iteration with a tolerance below what
float64 reaches, so the solve always runs to ``max_iterations``: about 70 µs
per iteration on the test machine, 60,000 iterations about 4 s.
"""

from __future__ import annotations

import base64
from typing import Any

import numpy as np

__all__ = ["fleet_upkeep"]


def _packed(array: np.ndarray) -> dict[str, Any]:
    data = np.ascontiguousarray(array, dtype="<f8")
    return {"dtype": "float64", "shape": list(data.shape), "base64": base64.b64encode(data.tobytes()).decode()}


def fleet_upkeep(iterations: int, *, seed: int = 0, checkpoint_s: float | None = None) -> dict[str, Any]:
    """Upkeep of an invented delivery fleet: ``iterations`` Bellman iterations exactly."""
    states, actions, successors = 500, 3, 8
    rng = np.random.default_rng(seed)
    s = np.repeat(np.arange(states), actions * successors)
    a = np.tile(np.repeat(np.arange(actions), successors), states)
    s_next = rng.integers(0, states, states * actions * successors)
    p = rng.dirichlet(np.ones(successors), (states, actions)).ravel()
    solver: dict[str, Any] = {"method": "value_iteration", "tolerance": 1e-30, "max_iterations": iterations}
    if checkpoint_s is not None:
        solver["checkpoint_s"] = checkpoint_s
    return {
        "version": 1,
        "label": "fleet upkeep (invented)",
        "discount": 0.999,
        "model": {
            "kind": "tabular",
            "states": states,
            "actions": actions,
            "reward": _packed(rng.uniform(0.0, 1.0, (states, actions))),
            "transition": {"entries": _packed(np.column_stack([s, a, s_next, p]))},
        },
        "solver": solver,
    }
