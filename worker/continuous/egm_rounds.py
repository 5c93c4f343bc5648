"""Compiled bookkeeping of the endogenous grid method's rounds (:mod:`worker.continuous.egm`).

A round of the method is a generated kernel (:mod:`worker.continuous.egm_source`) plus
bookkeeping around it: the bends of the policy added to the next round's choices, their union with
the grid, the policy read along the endogenous grid, and its largest move.  Written in numpy, that
bookkeeping took a dozen small array calls per round, about as long as the kernel itself at 1,000
grid points (0.17 ms a round on the accuracy benchmark); compiled, it is a few microseconds.  Each
function here gives exactly what its numpy twin in :mod:`worker.continuous.egm` gives.

* :func:`bends` — :func:`worker.continuous.egm._kinks` (the bends and their generations);
* :func:`union_sorted` — ``np.union1d`` of the grid and the bends;
* :func:`read_moved` — the policy on the grid read along the endogenous grid
  (:func:`worker.continuous.interp_kernels.read_pairs`) and its largest move from the last.
* :func:`root` — ``x ** e`` with the exponents of the common rewards' inverse marginal (CRRA with
  γ = 2 or 1/2, log) as a square root or a division, within an ulp of the power.
"""

from __future__ import annotations

import numpy as np
from numba import njit

from worker.continuous.interp_kernels import read_pairs

__all__ = ["bends", "read_moved", "root", "union_sorted"]


@njit(cache=True, nogil=True, error_model="numpy")
def bends(grid: np.ndarray, states: np.ndarray, choices: np.ndarray, earlier: np.ndarray,
          generation: np.ndarray, most: int) -> tuple[np.ndarray, np.ndarray]:
    """``(states, generations)`` of the bends inside the grid, sorted by state, each state once with its
    lowest generation: generation 1 the first endogenous state of each shock point, and generation
    ``g + 1`` the endogenous states of each earlier bend of generation ``g < most`` found among
    ``choices`` (sorted).  ``earlier`` may be empty."""
    n_z = states.shape[1]
    m = choices.shape[0]
    value = np.empty(n_z * (1 + earlier.shape[0]))
    gen = np.empty(value.shape[0], dtype=np.int64)
    count = 0
    for z in range(n_z):
        value[count] = states[0, z]
        gen[count] = 1
        count += 1
    for e in range(earlier.shape[0]):
        row = min(np.searchsorted(choices, earlier[e]), m - 1)
        if choices[row] == earlier[e] and generation[e] < most:
            for z in range(n_z):
                value[count] = states[row, z]
                gen[count] = generation[e] + 1
                count += 1
    low, high, n = grid[0], grid[-1], grid.shape[0]
    kept = 0
    for i in range(count):
        x = value[i]
        if not (np.isfinite(x) and x > low and x < high):
            continue
        at = np.searchsorted(grid, x)
        if at < n and grid[at] == x:
            continue
        value[kept] = x
        gen[kept] = gen[i]
        kept += 1
    value, gen = value[:kept], gen[:kept]
    by_generation = np.argsort(gen, kind="mergesort")
    order = by_generation[np.argsort(value[by_generation], kind="mergesort")]
    out_value = np.empty(kept)
    out_gen = np.empty(kept, dtype=np.int64)
    unique = 0
    for i in range(kept):
        x = value[order[i]]
        if unique == 0 or x != out_value[unique - 1]:
            out_value[unique] = x
            out_gen[unique] = gen[order[i]]
            unique += 1
    return out_value[:unique], out_gen[:unique]


@njit(cache=True, nogil=True, error_model="numpy")
def union_sorted(grid: np.ndarray, extra: np.ndarray) -> np.ndarray:
    """The sorted distinct values of ``grid`` and ``extra`` (each sorted): ``np.union1d``."""
    out = np.empty(grid.shape[0] + extra.shape[0])
    i = j = count = 0
    while i < grid.shape[0] or j < extra.shape[0]:
        if j >= extra.shape[0] or (i < grid.shape[0] and grid[i] <= extra[j]):
            x = grid[i]
            i += 1
        else:
            x = extra[j]
            j += 1
        if count == 0 or x != out[count - 1]:
            out[count] = x
            count += 1
    return out[:count]


@njit(cache=True, nogil=True, error_model="numpy")
def read_moved(states: np.ndarray, choices: np.ndarray, low: float, high: float, grid: np.ndarray,
               before: np.ndarray, out: np.ndarray) -> float:
    """Write the policy at the (sorted) ``grid`` read along the pairs into ``out`` and return the largest
    ``|out − before|``; −1 (``out`` not usable) when a column of ``states`` is not increasing."""
    if not read_pairs(states, choices, low, high, grid, out):
        return -1.0
    moved = 0.0
    for i in range(out.shape[0]):
        for z in range(out.shape[1]):
            gap = abs(out[i, z] - before[i, z])
            if gap != gap:
                return gap  # NaN, as np.max gives
            moved = max(moved, gap)
    return moved


@njit(cache=True, nogil=True, error_model="numpy")
def root(x: float, e: float) -> float:
    """``x ** e``, as a square root or a division for ``e`` in ±1/2, ±1, ±2 (within an ulp of the power)."""
    if e == -0.5:
        return 1.0 / np.sqrt(x)
    if e == 0.5:
        return np.sqrt(x)
    if e == -1.0:
        return 1.0 / x
    if e == 1.0:
        return x
    if e == -2.0:
        return 1.0 / (x * x)
    if e == 2.0:
        return x * x
    return x ** e
