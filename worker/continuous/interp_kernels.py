"""Compiled helpers of continuous choices that do not depend on a document.

* :func:`monotone_slopes` — the slopes of the monotone cubic interpolant of
  each row of ``EVt`` along one grid (Fritsch & Carlson 1980, "Monotone
  piecewise cubic interpolation", SIAM J. Numer. Anal. 17(2)): zero where
  the data turn, else the weighted harmonic mean of the neighbouring secants
  of Fritsch & Butland (1984), and the shape-preserving three-point formula
  at the ends.  With these slopes the cubic Hermite interpolant is monotone
  wherever the data are, and it reproduces the data at the grid points.
* :func:`cubic_policy_steps` — Howard evaluation steps of a fixed continuous
  policy under that interpolation (the step is not linear in ``v``: the
  slopes are recomputed each step).

The Hermite form used here and in the generated search kernels is
``e = h00·y0 + h10·h·d0 + h01·y1 + h11·h·d1`` in ``t = (x − x0)/h``.
"""

from __future__ import annotations

import numpy as np
from numba import njit

__all__ = ["cubic_policy_steps", "cubic_values", "monotone_slopes"]


@njit(cache=True, nogil=True, error_model="numpy")
def _end_slope(h0: float, h1: float, m0: float, m1: float) -> float:
    """The shape-preserving three-point slope at an end (``h`` spacings, ``m`` secants, nearest first)."""
    d = ((2.0 * h0 + h1) * m0 - h0 * m1) / (h0 + h1)
    if d * m0 <= 0.0:
        return 0.0
    if m0 * m1 <= 0.0 and abs(d) > abs(3.0 * m0):
        return 3.0 * m0
    return d


@njit(cache=True, nogil=True, error_model="numpy")
def monotone_slopes(grid: np.ndarray, values: np.ndarray, out: np.ndarray) -> None:
    """Slopes (rows, n) of the monotone cubic interpolant of each row of ``values`` (rows, n) on ``grid`` (n,)."""
    n = grid.shape[0]
    for row in range(values.shape[0]):
        y = values[row]
        d = out[row]
        if n == 2:
            m = (y[1] - y[0]) / (grid[1] - grid[0])
            d[0] = m
            d[1] = m
            continue
        for k in range(1, n - 1):
            h0 = grid[k] - grid[k - 1]
            h1 = grid[k + 1] - grid[k]
            m0 = (y[k] - y[k - 1]) / h0
            m1 = (y[k + 1] - y[k]) / h1
            if m0 * m1 <= 0.0:
                d[k] = 0.0
            else:
                w1 = 2.0 * h1 + h0
                w2 = h1 + 2.0 * h0
                d[k] = (w1 + w2) / (w1 / m0 + w2 / m1)
        h0 = grid[1] - grid[0]
        h1 = grid[2] - grid[1]
        d[0] = _end_slope(h0, h1, (y[1] - y[0]) / h0, (y[2] - y[1]) / h1)
        h0 = grid[n - 1] - grid[n - 2]
        h1 = grid[n - 2] - grid[n - 3]
        d[n - 1] = _end_slope(h0, h1, (y[n - 1] - y[n - 2]) / h0, (y[n - 2] - y[n - 3]) / h1)


@njit(cache=True, nogil=True, error_model="numpy")
def cubic_values(grid: np.ndarray, values: np.ndarray, slopes: np.ndarray, rows: np.ndarray, lower: np.ndarray,
                 share: np.ndarray, out: np.ndarray) -> None:
    """``out[i]``: the Hermite interpolant of row ``rows[i]`` at share ``share[i]`` of interval ``lower[i]``."""
    for i in range(out.shape[0]):
        z = rows[i]
        k = lower[i]
        h = grid[k + 1] - grid[k]
        t1 = share[i]
        t2 = t1 * t1
        t3 = t2 * t1
        out[i] = ((2.0 * t3 - 3.0 * t2 + 1.0) * values[z, k] + (t3 - 2.0 * t2 + t1) * h * slopes[z, k]
                  + (3.0 * t2 - 2.0 * t3) * values[z, k + 1] + (t3 - t2) * h * slopes[z, k + 1])


@njit(cache=True, nogil=True, error_model="numpy")
def cubic_policy_steps(
    reward: np.ndarray, lower: np.ndarray, share: np.ndarray, grid: np.ndarray, P: np.ndarray, beta: float,
    v: np.ndarray, steps: int, span_stop: float,
) -> tuple[int, float]:
    """Up to ``steps`` steps ``v ← r_σ + β EV_σ`` in place, ``EV_σ`` read by monotone cubic interpolation.

    One state (flat point ``i = x · n_shocks + z``); ``lower``/``share`` (n,)
    locate tomorrow's state of each point on ``grid``.  Stops after the first
    step whose increment has span ``max − min`` at most ``span_stop``.

    Returns
    -------
    (steps done, span of the last step's increment; inf when none was done)
    """
    n_shocks = P.shape[0]
    n_grid = grid.shape[0]
    EVt = np.empty((n_shocks, n_grid))
    D = np.empty((n_shocks, n_grid))
    done = 0
    span = np.inf
    while done < steps:
        for z in range(n_shocks):
            for x in range(n_grid):
                total = 0.0
                for zz in range(n_shocks):
                    total += P[z, zz] * v[x * n_shocks + zz]
                EVt[z, x] = total
        monotone_slopes(grid, EVt, D)
        low = np.inf
        high = -np.inf
        for i in range(reward.shape[0]):
            z = i % n_shocks
            k = lower[i]
            h = grid[k + 1] - grid[k]
            t1 = share[i]
            t2 = t1 * t1
            t3 = t2 * t1
            e = ((2.0 * t3 - 3.0 * t2 + 1.0) * EVt[z, k] + (t3 - 2.0 * t2 + t1) * h * D[z, k]
                 + (3.0 * t2 - 2.0 * t3) * EVt[z, k + 1] + (t3 - t2) * h * D[z, k + 1])
            value = reward[i] + beta * e
            step = value - v[i]
            low = min(low, step)
            high = max(high, step)
            v[i] = value
        span = high - low
        done += 1
        if span <= span_stop:
            break
    return done, span


@njit(cache=True, nogil=True, error_model="numpy")
def read_pairs(states: np.ndarray, choices: np.ndarray, low: float, high: float, k: np.ndarray,
               out: np.ndarray) -> bool:
    """``out[i, z]``: ``choices`` read linearly against ``states[:, z]`` at ``k[i]`` (sorted ``k``), ``low``
    below the first state, ``high`` past the last, clipped to ``[low, high]``; False (nothing written
    for that column on) when a column of ``states`` is not increasing."""
    m = states.shape[0]
    for z in range(states.shape[1]):
        for j in range(1, m):
            if not states[j, z] > states[j - 1, z]:
                return False
        j = 0
        for i in range(k.shape[0]):
            x = k[i]
            if x < states[0, z]:
                value = low
            elif x > states[m - 1, z]:
                value = high
            else:
                while j < m - 2 and states[j + 1, z] < x:
                    j += 1
                while j > 0 and states[j, z] > x:
                    j -= 1
                left = states[j, z]
                right = states[j + 1, z]
                value = choices[j] + (choices[j + 1] - choices[j]) * ((x - left) / (right - left))
            out[i, z] = min(max(value, low), high)
    return True
