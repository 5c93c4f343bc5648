"""The reward tables of a grid model: every (point, choice) pair evaluated once with numpy.

The ``tables`` reward storage (see :mod:`worker.estimate`) keeps them and
every exact Bellman step scans them, in compiled code
(:mod:`worker.gridproblem`) or in numpy (:mod:`worker.reference`).  With
static choices the compiled kernels' tables are filled by
:mod:`worker.statickernel` instead (same tables and counts); numpy fills them
for the cold-start bridge, which compiles nothing.
"""

from __future__ import annotations

import dataclasses
import math
from typing import Any

import numpy as np

from worker import threadpool
from worker.costs import CHUNK_ELEMENTS
from worker.feasibility import ModelData, evaluate_pairs
from worker.grids import locate

__all__ = ["RewardTables", "precompute_tables", "reduce_static"]

RewardTables = tuple[np.ndarray, ...]
"""``(R, next_base, node_lower, node_weight)``, and ``draw_probability`` with draws after the choice; see
:func:`precompute_tables`."""


def reduce_static(data: ModelData, static: tuple[str, ...]) -> ModelData:
    """``data`` seen by the kernels when the ``static`` choices are maximised out: the dynamic choices only."""
    keep = [j for j, name in enumerate(data.choices) if name not in static]
    renumber = {j: k for k, j in enumerate(keep)}
    return dataclasses.replace(
        data,
        choices=tuple(data.choices[j] for j in keep),
        choice_grids=[data.choice_grids[j] for j in keep],
        choice_is_menu=tuple(data.choice_is_menu[j] for j in keep),
        setter=tuple(None if j is None else renumber[j] for j in data.setter),
    )


def precompute_tables(
    data: ModelData, static: tuple[str, ...] = ()
) -> tuple[RewardTables, dict[str, Any]]:
    """Tables of every (point, choice) pair, and their counts.

    With ``static`` choices (see :mod:`worker.staticchoices`) the tables run
    over the dynamic choices only (C their product), each entry the largest
    reward over the static choices' allowed values, and ``counts["static_pick"]``
    (n, C) int64 holds the flat index among the static choices that attains it
    (the first, in C order, on ties).  The counts of allowed, excluded and
    clamped pairs still cover every (point, choice) combination.

    Returns ``(R, next_base, node_lower, node_weight)`` with ``R`` (n, C)
    (``-inf`` where not allowed), ``next_base`` (C,) int64, and per
    interpolated state variable the lower node (n, C, m) int32 and upper
    weight (n, C, m) float64; and counts of excluded and clamped pairs, with
    per point flags ``any_feasible`` and ``any_allowed``.

    With draws after the choice (:mod:`worker.draws`; no static choices) ``R``
    holds the expected reward, and when some state is interpolated the node
    tables gain a draw axis, (n, C, K, m), and a fifth table (n, C, K) holds
    each draw's probability; a draw that cannot happen has its nodes at the
    grid's start.  Clamped pairs are those where some possible draw leaves
    the grid.
    """
    n, n_all = data.n, data.n_choices
    dynamic = [j for j, name in enumerate(data.choices) if name not in static]
    static_axes = [j for j, name in enumerate(data.choices) if name in static]
    kept = reduce_static(data, static) if static else data
    n_choices = kept.n_choices
    n_static = n_all // n_choices
    order = [a + 1 for a in dynamic + static_axes]
    interpolated = [t for t, j in enumerate(data.setter) if j is None]
    strides = np.array([math.prod(data.state_sizes[t + 1 :]) for t in range(len(data.states))], dtype=np.int64)
    choice_index = np.unravel_index(np.arange(n_choices), kept.choice_sizes)
    next_base = np.zeros(n_choices, dtype=np.int64)
    for t, j in enumerate(kept.setter):
        if j is not None:
            next_base += strides[t] * choice_index[j]
    R = np.empty((n, n_choices))
    drawn = data.draws is not None and bool(interpolated)
    if drawn:
        k_draws = data.draws.size
        lower = np.empty((n, n_choices, k_draws, len(interpolated)), dtype=np.int32)
        weight = np.empty((n, n_choices, k_draws, len(interpolated)))
        draw_probability = np.empty((n, n_choices, k_draws))
    elif interpolated:
        lower = np.empty((n, n_choices, len(interpolated)), dtype=np.int32)
        weight = np.empty((n, n_choices, len(interpolated)))
    else:
        lower, weight = np.zeros((1, 1, 1), np.int32), np.zeros((1, 1, 1))
    any_feasible = np.zeros(n, dtype=bool)
    any_allowed = np.zeros(n, dtype=bool)
    pick = np.zeros((n, n_choices), dtype=np.int64) if static else None
    columns = np.arange(n_all, dtype=np.int64)

    def split(block: np.ndarray, rows: int) -> np.ndarray:
        """``(rows, all choices)`` as ``(rows, dynamic, static)``, each group in C order."""
        full = np.broadcast_to(block, (rows, n_all)).reshape((rows, *data.choice_sizes))
        return full.transpose([0, *order]).reshape(rows, n_choices, n_static)

    def chunk(start: int, stop: int) -> tuple[int, int, tuple[int, int] | None, int]:
        """Rows ``[start, stop)`` of the tables; ``(allowed, bad, first bad pair or None, clamped)`` counts."""
        rows = np.arange(start, stop, dtype=np.int64)
        block = evaluate_pairs(data, rows, columns)
        allowed = block.allowed
        reward = np.where(allowed, block.reward, -np.inf)
        next_values = block.next_values
        if static:
            grouped = split(reward, stop - start)
            best = np.argmax(grouped, axis=2)
            pick[start:stop] = best
            reward = np.take_along_axis(grouped, best[:, :, None], axis=2)[:, :, 0]
            # Tomorrow does not depend on the static choices: any one of their values gives the next values.
            next_values = [split(values, stop - start)[:, :, 0] for values in next_values]
        np.copyto(R[start:stop], reward)
        any_feasible[start:stop] = block.feasible.any(axis=1)
        any_allowed[start:stop] = allowed.any(axis=1)
        bad = block.bad
        count = int(bad.sum())
        example = None
        if count:
            r, c = np.argwhere(bad)[0]
            example = (int(rows[r]), int(c))
        clamped_any = np.zeros((stop - start, n_choices), dtype=bool)
        if drawn:
            possible = block.probs > 0
            draw_probability[start:stop] = block.probs.transpose(1, 2, 0)
            for k, t in enumerate(interpolated):
                grid = data.state_grids[t]
                values = np.where(possible & ~np.isnan(next_values[k]), next_values[k], grid[0])
                low, w, clamped = locate(grid, values)
                lower[start:stop, :, :, k] = low.transpose(1, 2, 0)
                weight[start:stop, :, :, k] = w.transpose(1, 2, 0)
                clamped_any |= (clamped & possible).any(axis=0)
        for k, t in enumerate(interpolated if not drawn else ()):
            low, w, clamped = locate(data.state_grids[t], next_values[k])
            lower[start:stop, :, k] = low
            weight[start:stop, :, k] = w
            clamped_any |= clamped
        grouped_allowed = split(allowed, stop - start) if static else allowed[:, :, None]
        clamped_count = int((clamped_any[:, :, None] & grouped_allowed).sum()) if interpolated else 0
        return int(allowed.sum()), count, example, clamped_count

    # The chunks are those of one thread whatever the threads, so every entry has the same bits; up to
    # TABLE_CHUNKS_AT_ONCE of them are evaluated at once (each holds its own temporaries).
    # With draws after the choice a chunk holds every draw's values: fewer rows keep its temporaries the same size.
    rows_per_chunk = max(1, CHUNK_ELEMENTS // (n_all * (data.draws.size if data.draws is not None else 1)))
    chunks = [(start, min(n, start + rows_per_chunk)) for start in range(0, n, rows_per_chunk)]
    at_once = min(threadpool.threads_for(n, n_all), threadpool.TABLE_CHUNKS_AT_ONCE)
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
        "static_pick": pick,
    }
    return ((R, next_base, lower, weight, draw_probability) if drawn else (R, next_base, lower, weight)), counts
