"""Compiled bookkeeping of the endogenous grid method's rounds (:mod:`worker.continuous.egm`).

A round of the method is a generated kernel (:mod:`worker.continuous.egm_source`) plus
bookkeeping around it: the bends of the policy added to the next round's choices, their union with
the grid, the policy read along the endogenous grid, and its largest move.  Written in numpy, that
bookkeeping took a dozen small array calls per round, about as long as the kernel itself at 1,000
grid points (0.17 ms a round on the accuracy benchmark); compiled, it is a few microseconds.  Each
function here gives exactly what its numpy twin in :mod:`worker.continuous.egm` gives.

* :func:`bends` — :func:`worker.continuous.egm._kinks` (the bends, their shock points and strengths);
* :func:`union_sorted` — ``np.union1d`` of the grid and the bends, and the grid's rows among them;
* :func:`read_moved` — the policy read along the endogenous grid at the next round's choices
  (:func:`worker.continuous.egm._rule_at`), the policy on the grid (its rows among them) and its
  largest move from the last, in one pass (as two calls, 19 ms of the 58 ms of the rounds on the
  accuracy benchmark at 1,000 points; fused, 17 ms, one profile each; measured 2026-12-05).
* :func:`root` — ``x ** e`` with the exponents of the common rewards' inverse marginal (CRRA with
  γ = 2 or 1/2, log) as a square root or a division, within an ulp of the power.
"""

from __future__ import annotations

import numpy as np
from numba import njit

from worker.continuous.interp_kernels import read_pairs

__all__ = ["bends", "first_disorder", "read_moved", "root", "union_sorted"]


@njit(cache=True, nogil=True, error_model="numpy")
def bends(grid: np.ndarray, states: np.ndarray, choices: np.ndarray, earlier: np.ndarray, column: np.ndarray,
          strength: np.ndarray, transition: np.ndarray, least: float,
          most: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """``(states, columns, strengths)`` of the bends inside the grid and off its points, sorted by state.

    Strength 1: the first endogenous state of each shock point (column).  An earlier bend ``e`` (a
    state of column ``column[e]`` found among ``choices``, sorted) gives in every column ``z`` the
    endogenous state that chooses it, of strength ``strength[e]·transition[z, column[e]]``; those below
    ``least`` are dropped.  Each (state, column) is kept once, with its largest strength; past ``most``
    bends, the strongest ``most`` (ties: the lower state first).  ``earlier`` may be empty."""
    n_z = states.shape[1]
    m = choices.shape[0]
    value = np.empty(n_z * (1 + earlier.shape[0]))
    col = np.empty(value.shape[0], dtype=np.int64)
    power = np.empty(value.shape[0])
    count = 0
    for z in range(n_z):
        value[count] = states[0, z]
        col[count] = z
        power[count] = 1.0
        count += 1
    for e in range(earlier.shape[0]):
        row = min(np.searchsorted(choices, earlier[e]), m - 1)
        if choices[row] != earlier[e]:
            continue
        for z in range(n_z):
            carried = strength[e] * transition[z, column[e]]
            if carried >= least:
                value[count] = states[row, z]
                col[count] = z
                power[count] = carried
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
        col[kept] = col[i]
        power[kept] = power[i]
        kept += 1
    value, col, power = value[:kept], col[:kept], power[:kept]
    # Lexicographic order (state, column, strongest first) by stable sorts from the last key to the first.
    order = np.argsort(-power, kind="mergesort")
    order = order[np.argsort(col[order], kind="mergesort")]
    order = order[np.argsort(value[order], kind="mergesort")]
    unique = np.empty(kept, dtype=np.int64)
    count = 0
    for i in range(kept):
        k = order[i]
        if count == 0 or value[k] != value[unique[count - 1]] or col[k] != col[unique[count - 1]]:
            unique[count] = k
            count += 1
    unique = unique[:count]
    if count > most:
        strongest = unique[np.argsort(-power[unique], kind="mergesort")][:most]
        unique = strongest[np.argsort(value[strongest], kind="mergesort")]
    return value[unique], col[unique], power[unique]


@njit(cache=True, nogil=True, error_model="numpy")
def union_sorted(grid: np.ndarray, extra: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The sorted distinct values of ``grid`` and ``extra`` (each sorted), ``np.union1d``, and the row of each
    grid point among them."""
    out = np.empty(grid.shape[0] + extra.shape[0])
    rows = np.empty(grid.shape[0], dtype=np.int64)
    i = j = count = 0
    while i < grid.shape[0] or j < extra.shape[0]:
        from_grid = j >= extra.shape[0] or (i < grid.shape[0] and grid[i] <= extra[j])
        if from_grid:
            x = grid[i]
        else:
            x = extra[j]
            j += 1
        if count == 0 or x != out[count - 1]:
            out[count] = x
            count += 1
        if from_grid:
            rows[i] = count - 1
            i += 1
    return out[:count], rows


@njit(cache=True, nogil=True, error_model="numpy")
def read_moved(states: np.ndarray, choices: np.ndarray, low: float, high: float, points: np.ndarray,
               rows: np.ndarray, before: np.ndarray, tomorrow: np.ndarray, out: np.ndarray) -> float:
    """The policy read along the endogenous grid ``(states, choices)`` at the next round's choices ``points``
    (sorted) into ``tomorrow``, as :func:`worker.continuous.interp_kernels.read_pairs` reads it (``low`` below
    a column's first state, ``high`` past its last, clipped to ``[low, high]``); its rows ``rows`` (increasing:
    the grid's points among ``points``) into ``out``; and the largest ``|out − before|`` (NaN if any is, as
    ``np.max`` gives).  −1 when a column of ``states`` is not increasing (``tomorrow`` and ``out`` are then
    not all written)."""
    if not read_pairs(states, choices, low, high, points, tomorrow):
        return -1.0
    moved = 0.0
    for z in range(states.shape[1]):
        for r in range(rows.shape[0]):
            value = tomorrow[rows[r], z]
            out[r, z] = value
            gap = abs(value - before[r, z])
            if gap != gap or moved != moved:
                moved = np.nan
            else:
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


def first_disorder(states: np.ndarray, marginal: np.ndarray | None = None) -> tuple[int, str] | None:
    """Where one round's endogenous grid shows a continuation the method cannot use: ``(shock point, what)``,
    or None.  ``states`` (m, n_z) are the endogenous states of the choices (sorted, increasing), NaN where the
    choice is never interior; ``marginal`` (m, n_z), when given, the expected marginal value of the choices.

    The method (Carroll 2006) assumes the continuation is concave in the choice: its expected marginal
    value then does not rise with the choice, the first-order condition has one solution for each state,
    and the endogenous states rise with the choices, the interior ones first.  A rise of the marginal
    value (beyond rounding), an interior choice above one that is not, or endogenous states that do not
    increase mean several choices solve the first-order condition at some state, and the linear reading of
    the choices against those states is not the maximum."""
    with np.errstate(invalid="ignore"):
        for z in range(states.shape[1]):
            finite = np.isfinite(states[:, z])
            count = int(finite.sum())
            if not finite[:count].all():
                return z, "a choice above one that is never interior is interior"
            if np.any(np.diff(states[:count, z]) <= 0.0):
                return z, "the endogenous states do not increase with the choice"
            if marginal is not None:
                m = marginal[:, z]
                rise = np.diff(m) > 1e-9 * np.maximum(np.abs(m[:-1]), np.abs(m[1:]))
                if np.any(rise & np.isfinite(m[1:]) & np.isfinite(m[:-1])):
                    return z, "the expected marginal value rises with the choice"
    return None
