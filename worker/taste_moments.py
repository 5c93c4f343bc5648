"""Stationary moments of the choices and defines of a model with taste shocks.

With taste shocks the choice at a point is random: the stationary distribution is over (point, combination of
the choices) pairs, with weight π(x)·P(c|x).  A choice's or a define's mean and standard deviation are taken over
those pairs, as a simulation's pooled summary estimates them.  (Taken over the points alone, of each point's
expected choice, the standard deviation left out the spread of the choice within a point, and a define was
evaluated at the expected choices: a `where(work > 0, wage, benefit)` income counted the wage at every point.)
A search's aggregates of a choice or a define are taken over the same pairs (:func:`pair_env`, read by
:func:`worker.search_aggregates.aggregate_values`).
"""

from __future__ import annotations

from typing import Any

import numpy as np

__all__ = ["pair_env", "pair_series"]


def pair_env(problem: Any, policy: np.ndarray, pi: np.ndarray, doc: Any = None) -> tuple[dict[str, Any], np.ndarray]:
    """``(env, weights)`` over the (point, combination) pairs with mass: ``weights`` = π(x)·P(c|x) summing to 1,
    and ``env`` every choice's value in the pair's combination, every state's and shock's at its point, and
    (given the validated grid ``doc``) the params, the discount and the defines that can be evaluated from
    those (see :func:`worker.aggregates.defines_env`)."""
    weight = pi[:, None] * problem.choice_probabilities(policy)
    points, combinations = np.nonzero(weight > 0)
    weights = weight[points, combinations]
    weights = weights / weights.sum()
    choices = {name: values[combinations] for name, values in problem.combination_values().items()}
    states = {name: np.asarray(values, dtype=np.float64)[points] for name, values in problem.state_values().items()}
    if getattr(getattr(doc, "model", None), "define", None) is None:  # no doc, or a tabular model's
        return {**states, **choices}, weights
    from worker.aggregates import defines_env

    return defines_env(doc, {**states, **choices}), weights


def pair_series(problem: Any, policy: np.ndarray, pi: np.ndarray, doc: Any = None) -> dict[str, tuple[np.ndarray,
                                                                                                      np.ndarray]]:
    """Per choice and (given the validated grid ``doc``) per define: ``(values, weights)`` over the pairs with
    mass, ``weights`` = π(x)·P(c|x) summing to 1 (see :func:`pair_env`).  States and shocks are not included
    (they do not vary within a point)."""
    env, weights = pair_env(problem, policy, pi, doc)
    defines = getattr(getattr(doc, "model", None), "define", None) or {}
    names = [*problem.combination_values(), *(name for name in defines if name in env)]
    return {name: (np.array(np.broadcast_to(np.asarray(env[name], dtype=np.float64), weights.shape)), weights)
            for name in names}
