"""The reward tables of a grid model: every (point, choice) pair evaluated once with numpy.

The ``tables`` reward storage (see :mod:`worker.estimate`) keeps them and
every exact Bellman step scans them, in compiled code
(:mod:`worker.gridproblem`) or in numpy (:mod:`worker.reference`).
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from worker import threadpool
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
    columns = np.arange(n_choices, dtype=np.int64)

    def chunk(start: int, stop: int) -> tuple[int, int, tuple[int, int] | None, int]:
        """Rows ``[start, stop)`` of the tables; ``(allowed, bad, first bad pair or None, clamped)`` counts."""
        rows = np.arange(start, stop, dtype=np.int64)
        block = evaluate_pairs(data, rows, columns)
        allowed = block.allowed
        np.copyto(R[start:stop], np.where(allowed, block.reward, -np.inf))
        any_feasible[start:stop] = block.feasible.any(axis=1)
        any_allowed[start:stop] = allowed.any(axis=1)
        bad = block.bad
        count = int(bad.sum())
        example = None
        if count:
            r, c = np.argwhere(bad)[0]
            example = (int(rows[r]), int(c))
        clamped_any = np.zeros(allowed.shape, dtype=bool)
        for k, t in enumerate(interpolated):
            low, w, clamped = locate(data.state_grids[t], block.next_values[k])
            lower[start:stop, :, k] = low
            weight[start:stop, :, k] = w
            clamped_any |= clamped
        return int(allowed.sum()), count, example, int((clamped_any & allowed).sum()) if interpolated else 0

    # The chunks are those of one thread whatever the threads, so every entry has the same bits; up to
    # TABLE_CHUNKS_AT_ONCE of them are evaluated at once (each holds its own temporaries).
    rows_per_chunk = max(1, CHUNK_ELEMENTS // n_choices)
    chunks = [(start, min(n, start + rows_per_chunk)) for start in range(0, n, rows_per_chunk)]
    at_once = min(threadpool.threads_for(n, n_choices), threadpool.TABLE_CHUNKS_AT_ONCE)
    parts = []
    for wave in range(0, len(chunks), at_once):
        parts += threadpool.run_blocks(chunk, chunks[wave : wave + at_once], at_once)
    allowed_count = sum(part[0] for part in parts)
    bad_count = sum(part[1] for part in parts)
    bad_example = next((part[2] for part in parts if part[2] is not None), None)
    clamped_count = sum(part[3] for part in parts)
    counts = {
        "allowed": allowed_count,
        "bad": bad_count,
        "bad_example": bad_example,
        "clamped": clamped_count if interpolated else None,
        "any_feasible": any_feasible,
        "any_allowed": any_allowed,
    }
    return (R, next_base, lower, weight), counts
