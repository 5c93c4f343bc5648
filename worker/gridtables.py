"""The reward tables of a grid model: every (point, choice) pair evaluated once with numpy.

The ``tables`` reward storage (see :mod:`worker.estimate`) keeps them and
every exact Bellman step scans them, in compiled code
(:mod:`worker.gridproblem`) or in numpy (:mod:`worker.reference`).
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from worker.estimate import CHUNK_ELEMENTS
from worker.feasibility import ModelData, evaluate_pairs
from worker.grids import locate

__all__ = ["RewardTables", "precompute_tables"]

RewardTables = tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]
"""``(R, next_base, node_lower, node_weight)``; see :func:`precompute_tables`."""


def precompute_tables(data: ModelData) -> tuple[RewardTables, dict[str, Any]]:
    """Tables of every (point, choice) pair, and their counts.

    Returns ``(R, next_base, node_lower, node_weight)`` with ``R`` (n, C)
    (``-inf`` where not allowed), ``next_base`` (C,) int64, and per
    interpolated state variable the lower node (n, C, m) int32 and upper
    weight (n, C, m) float64; and counts of excluded and clamped pairs, with
    per point flags ``any_feasible`` and ``any_allowed``.
    """
    n, n_choices = data.n, data.n_choices
    interpolated = [t for t, j in enumerate(data.setter) if j is None]
    strides = np.array([math.prod(data.state_sizes[t + 1 :]) for t in range(len(data.states))], dtype=np.int64)
    choice_index = np.unravel_index(np.arange(n_choices), data.choice_sizes)
    next_base = np.zeros(n_choices, dtype=np.int64)
    for t, j in enumerate(data.setter):
        if j is not None:
            next_base += strides[t] * choice_index[j]
    R = np.empty((n, n_choices))
    if interpolated:
        lower = np.empty((n, n_choices, len(interpolated)), dtype=np.int32)
        weight = np.empty((n, n_choices, len(interpolated)))
    else:
        lower, weight = np.zeros((1, 1, 1), np.int32), np.zeros((1, 1, 1))
    any_feasible = np.zeros(n, dtype=bool)
    any_allowed = np.zeros(n, dtype=bool)
    bad_count = clamped_count = allowed_count = 0
    bad_example: tuple[int, int] | None = None
    columns = np.arange(n_choices, dtype=np.int64)
    rows_per_chunk = max(1, CHUNK_ELEMENTS // n_choices)
    for start in range(0, n, rows_per_chunk):
        stop = min(n, start + rows_per_chunk)
        rows = np.arange(start, stop, dtype=np.int64)
        block = evaluate_pairs(data, rows, columns)
        allowed = block.allowed
        np.copyto(R[start:stop], np.where(allowed, block.reward, -np.inf))
        any_feasible[start:stop] = block.feasible.any(axis=1)
        any_allowed[start:stop] = allowed.any(axis=1)
        allowed_count += int(allowed.sum())
        bad = block.bad
        count = int(bad.sum())
        if count:
            if bad_example is None:
                r, c = np.argwhere(bad)[0]
                bad_example = (int(rows[r]), int(c))
            bad_count += count
        clamped_any = np.zeros(allowed.shape, dtype=bool)
        for k, t in enumerate(interpolated):
            low, w, clamped = locate(data.state_grids[t], block.next_values[k])
            lower[start:stop, :, k] = low
            weight[start:stop, :, k] = w
            clamped_any |= clamped
        if interpolated:
            clamped_count += int((clamped_any & allowed).sum())
    counts = {
        "allowed": allowed_count,
        "bad": bad_count,
        "bad_example": bad_example,
        "clamped": clamped_count if interpolated else None,
        "any_feasible": any_feasible,
        "any_allowed": any_allowed,
    }
    return (R, next_base, lower, weight), counts
