"""A search's aggregates under the stationary distribution: over the points, or with taste shocks over the
(point, combination of the choices) pairs where an argument depends on the drawn choice (see
:mod:`worker.aggregates`).  Apart from :mod:`worker.aggregates` because the pairs
(:func:`worker.taste_moments.pair_env`) evaluate the defines with it."""

from __future__ import annotations

from typing import Any

import numpy as np

from worker.aggregates import Aggregate, aggregate_value, defines_env
from worker.taste_moments import pair_env

__all__ = ["aggregate_values"]


def aggregate_values(aggregates: dict[str, Aggregate], doc: Any, problem: Any, policy: np.ndarray, pi: np.ndarray,
                     env: dict[str, Any]) -> dict[str, float]:
    """Each aggregate (placeholder → call) under the stationary distribution ``pi`` of ``policy``; ``env`` is
    :func:`~worker.aggregates.point_env`'s.  With taste shocks (``problem.taste_scale``) an argument that uses a
    choice, or a define that depends on one, is taken over the (point, combination) pairs (see
    :mod:`worker.aggregates`)."""
    if getattr(problem, "taste_scale", None) is None:
        return {key: aggregate_value(aggregate, pi, env) for key, aggregate in aggregates.items()}
    # The names with one value per point: a define that depends on a choice cannot be evaluated without it.
    at_points = defines_env(doc, problem.state_values())
    pairs: tuple[dict[str, Any], np.ndarray] | None = None
    values: dict[str, float] = {}
    for key, aggregate in aggregates.items():
        if aggregate.argument.names <= at_points.keys():
            values[key] = aggregate_value(aggregate, pi, at_points)
            continue
        if pairs is None:
            pairs = pair_env(problem, policy, pi, doc)
        values[key] = aggregate_value(aggregate, pairs[1], pairs[0])
    return values
