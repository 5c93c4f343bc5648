"""Stationary moments of the choices and defines of a model with taste shocks.

With taste shocks the choice at a point is random: the stationary distribution is over (point, combination of
the choices) pairs, with weight π(x)·P(c|x).  A choice's or a define's mean and standard deviation are taken over
those pairs, as a simulation's pooled summary estimates them.  (Taken over the points alone, of each point's
expected choice, the standard deviation left out the spread of the choice within a point, and a define was
evaluated at the expected choices: a `where(work > 0, wage, benefit)` income counted the wage at every point.)
"""

from __future__ import annotations

from typing import Any

import numpy as np

__all__ = ["pair_series"]


def pair_series(problem: Any, policy: np.ndarray, pi: np.ndarray, doc: Any = None) -> dict[str, tuple[np.ndarray,
                                                                                                      np.ndarray]]:
    """Per choice and (given the validated grid ``doc``) per define: ``(values, weights)`` over the pairs with
    mass, ``weights`` = π(x)·P(c|x) summing to 1.  States and shocks are not included (they do not vary within a
    point)."""
    weight = pi[:, None] * problem.choice_probabilities(policy)
    points, combinations = np.nonzero(weight > 0)
    weights = weight[points, combinations]
    weights = weights / weights.sum()
    choices = {name: values[combinations] for name, values in problem.combination_values().items()}
    out = {name: (values, weights) for name, values in choices.items()}
    defines = getattr(getattr(doc, "model", None), "define", None)
    if defines:
        from worker.aggregates import defines_env

        states = {name: np.asarray(values, dtype=np.float64)[points] for name, values in problem.state_values().items()}
        env = defines_env(doc, {**states, **choices})
        out.update((name, (np.array(np.broadcast_to(np.asarray(env[name], dtype=np.float64), weights.shape)),
                           weights)) for name in defines if name in env)
    return out
