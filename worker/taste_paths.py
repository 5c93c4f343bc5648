"""Simulated paths of a model with taste shocks: each period a choice is drawn, then tomorrow's point.

Without taste shocks a path follows ``P_σ``; with them the choice itself is
random, so each period first draws the choice ``a ~ π(·|x)`` from the logit
probabilities, then tomorrow's point from the law after ``a`` (the row
``x·A + a`` of the problem's ``pair_transition()``).  Recording the drawn
choice keeps a path's choices and its next points consistent (a drawn
"replace" is followed by the state a replacement leads to).
"""

from __future__ import annotations

from typing import Any, Callable

import numpy as np
import scipy.sparse as sp

__all__ = ["simulate_taste_paths"]


def simulate_taste_paths(
    problem: Any,
    policy: np.ndarray,
    first: np.ndarray,
    periods: int,
    rng: np.random.Generator,
    summarise: Callable[[np.ndarray], dict[str, float]],
) -> tuple[dict[str, Any], dict[str, list[Any]]]:
    """Paths from ``first`` with drawn choices; returns ``(summary, first_path)``.

    Parameters
    ----------
    problem : a compiled problem with ``taste_scale``, ``choice_probabilities(policy)`` ((n, A)),
        ``choice_axes()`` and ``pair_transition()`` ((n·A, n) CSR)
    policy : (n,) int64, the most probable choice (selects the probabilities)
    first : (paths,) int64, the starting points
    periods : int, points recorded per path (the first is the start)
    rng : the generator (the same seed gives the same paths)
    summarise : maps samples to ``mean``, ``sd`` and percentiles

    Returns
    -------
    summary : per axis and per choice, the summary over every recorded period of every path
    first_path : per axis its values along path 0; per choice the drawn choice's value or label
    """
    probabilities = problem.choice_probabilities(policy)
    n_choices = probabilities.shape[1]
    choice_cumulative = np.cumsum(probabilities, axis=1)
    pairs = sp.csr_matrix(problem.pair_transition(), dtype=np.float64)
    pairs.sum_duplicates()
    cumulative = np.cumsum(pairs.data)
    padded = np.concatenate([[0.0], cumulative])
    row_base = padded[pairs.indptr[:-1]]
    row_total = padded[pairs.indptr[1:]] - row_base
    paths = first.shape[0]
    states = np.empty((paths, periods), dtype=np.int64)
    choices = np.empty((paths, periods), dtype=np.int64)
    states[:, 0] = first
    for t in range(periods):
        here = states[:, t]
        rows = choice_cumulative[here]
        drawn = (rows < rng.random(paths)[:, None] * rows[:, -1:]).sum(axis=1)
        choices[:, t] = np.minimum(drawn, n_choices - 1)
        if t + 1 == periods:
            break
        pair = here * n_choices + choices[:, t]
        target = row_base[pair] + rng.random(paths) * row_total[pair]
        entry = np.searchsorted(cumulative, target, side="right")
        entry = np.clip(entry, pairs.indptr[pair], pairs.indptr[pair + 1] - 1)
        states[:, t + 1] = pairs.indices[entry]

    summary = {
        name: summarise(np.asarray(values, dtype=np.float64)[states])
        for name, values in problem.state_values().items()
    }
    first_path: dict[str, list[Any]] = {}
    index = np.unravel_index(states[0], problem.shape)
    for k, (name, axis) in enumerate(problem.axes.items()):
        labels = np.empty(len(axis), dtype=object)
        labels[:] = list(axis)
        first_path[name] = labels[index[k]].tolist()
    axes = problem.choice_axes()
    parts = np.unravel_index(choices, tuple(len(values) for values in axes.values()))
    for k, (name, values) in enumerate(axes.items()):
        numeric = all(isinstance(x, (int, float)) and not isinstance(x, bool) for x in values)
        numbers = np.asarray(values, dtype=np.float64) if numeric else np.arange(len(values), dtype=np.float64)
        summary[name] = summarise(numbers[parts[k]])
        labels = np.empty(len(values), dtype=object)
        labels[:] = list(values)
        first_path[name] = labels[parts[k][0]].tolist()
    return summary, first_path
