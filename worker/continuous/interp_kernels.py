"""Compiled helpers of continuous choices that do not depend on a document.

* :func:`monotone_slopes` — the slopes of the monotone cubic interpolant of
  each row of ``EVt`` along one grid (Fritsch & Carlson 1980, "Monotone
  piecewise cubic interpolation", SIAM J. Numer. Anal. 17(2)): zero where
  the data turn, else the weighted harmonic mean of the neighbouring secants
  of Fritsch & Butland (1984), and the shape-preserving three-point formula
  at the ends.  With these slopes the cubic Hermite interpolant is monotone
  wherever the data are, and it reproduces the data at the grid points.
* :func:`tensor_cubic` — with several state variables, the tensor product of
  those one-dimensional interpolants: along the last state with the slopes
  of :func:`monotone_slopes` (computed once per continuation), then along
  each earlier state in turn, from the four values around the point (the
  slopes at the two nodes need their neighbours).  See the README,
  "Continuous choices", for what it preserves and what it does not.
* :func:`cubic_policy_steps` — Howard evaluation steps of a fixed continuous
  policy under that interpolation (the step is not linear in ``v``: the
  slopes are recomputed each step).

The Hermite form used here and in the generated search kernels is
``e = h00·y0 + h10·h·d0 + h01·y1 + h11·h·d1`` in ``t = (x − x0)/h``.
"""

from __future__ import annotations

import numpy as np
from numba import njit

__all__ = ["cubic_policy_steps", "cubic_values", "hermite", "monotone_slopes", "tensor_cubic", "tensor_two"]


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
def _inner_slope(h0: float, h1: float, m0: float, m1: float) -> float:
    """The slope at an inner node: 0 where the data turn, else Fritsch–Butland's weighted harmonic mean."""
    if m0 * m1 <= 0.0:
        return 0.0
    w1 = 2.0 * h1 + h0
    w2 = h1 + 2.0 * h0
    return (w1 + w2) / (w1 / m0 + w2 / m1)


@njit(cache=True, nogil=True, error_model="numpy")
def hermite(t1: float, h: float, y0: float, y1: float, d0: float, d1: float) -> float:
    """The cubic Hermite form at share ``t1`` of an interval of width ``h`` (values ``y``, slopes ``d``)."""
    t2 = t1 * t1
    t3 = t2 * t1
    return (2.0 * t3 - 3.0 * t2 + 1.0) * y0 + (t3 - 2.0 * t2 + t1) * h * d0 + (3.0 * t2 - 2.0 * t3) * y1 \
        + (t3 - t2) * h * d1


@njit(cache=True, nogil=True, error_model="numpy")
def four_point(sgrid: np.ndarray, off: int, size: int, k: int, t1: float, ym: float, y0: float, y1: float,
               y2: float) -> float:
    """The monotone cubic interpolant of one line at share ``t1`` of its interval ``k``, from the values at
    nodes ``k − 1 … k + 2`` (those outside the grid are ignored): the slopes at ``k`` and ``k + 1`` are
    exactly those :func:`monotone_slopes` gives on the whole line."""
    h = sgrid[off + k + 1] - sgrid[off + k]
    m0 = (y1 - y0) / h
    if size == 2:
        return hermite(t1, h, y0, y1, m0, m0)
    if k >= 1:
        hm = sgrid[off + k] - sgrid[off + k - 1]
        d0 = _inner_slope(hm, h, (y0 - ym) / hm, m0)
    else:
        hp = sgrid[off + 2] - sgrid[off + 1]
        d0 = _end_slope(h, hp, m0, (y2 - y1) / hp)
    if k + 2 <= size - 1:
        hp = sgrid[off + k + 2] - sgrid[off + k + 1]
        d1 = _inner_slope(h, hp, m0, (y2 - y1) / hp)
    else:
        hm = sgrid[off + k] - sgrid[off + k - 1]
        d1 = _end_slope(h, hm, m0, (y0 - ym) / hm)
    return hermite(t1, h, y0, y1, d0, d1)


@njit(cache=True, nogil=True, error_model="numpy")
def tensor_two(EVt: np.ndarray, D: np.ndarray, iz: int, sgrid: np.ndarray, meta: np.ndarray, lo: np.ndarray,
                w: np.ndarray) -> float:
    """:func:`tensor_cubic` with two states, written out: the same numbers, about 2.5 times as fast (no scratch
    loops; small enough to be inlined where it is called)."""
    k0 = lo[0]
    size0 = meta[2]
    stride0 = meta[4]
    k1 = lo[1]
    h1 = sgrid[meta[1] + k1 + 1] - sgrid[meta[1] + k1]
    t1 = w[1]
    row_m = max(k0 - 1, 0) * stride0 + k1
    row_0 = k0 * stride0 + k1
    row_1 = (k0 + 1) * stride0 + k1
    row_2 = min(k0 + 2, size0 - 1) * stride0 + k1
    ym = hermite(t1, h1, EVt[iz, row_m], EVt[iz, row_m + 1], D[iz, row_m], D[iz, row_m + 1])
    y0 = hermite(t1, h1, EVt[iz, row_0], EVt[iz, row_0 + 1], D[iz, row_0], D[iz, row_0 + 1])
    y1 = hermite(t1, h1, EVt[iz, row_1], EVt[iz, row_1 + 1], D[iz, row_1], D[iz, row_1 + 1])
    y2 = hermite(t1, h1, EVt[iz, row_2], EVt[iz, row_2 + 1], D[iz, row_2], D[iz, row_2 + 1])
    return four_point(sgrid, meta[0], size0, k0, w[0], ym, y0, y1, y2)


@njit(cache=True, nogil=True, error_model="numpy", inline="always")
def line_start(meta: np.ndarray, lo: np.ndarray, m: int) -> int:
    """The flat index of the ``m``-th line along the last state that :func:`tensor_cubic` reads at the point
    located by ``lo`` (d,): through nodes ``lo − 1 … lo + 2`` of the other states, the first state's digit the
    slowest, moved into the grid at its ends; its node ``lo[last]`` along the last state."""
    d = lo.shape[0]
    base = lo[d - 1]
    rest = m
    for a in range(d - 2, -1, -1):
        j = lo[a] - 1 + rest % 4
        rest //= 4
        if j < 0:
            j = 0
        elif j > meta[d + a] - 1:
            j = meta[d + a] - 1
        base += meta[2 * d + a] * j
    return base


@njit(cache=True, nogil=True, error_model="numpy")
def tensor_cubic(EVt: np.ndarray, D: np.ndarray, iz: int, sgrid: np.ndarray, meta: np.ndarray, lo: np.ndarray,
                 w: np.ndarray, scratch: np.ndarray) -> float:
    """The tensor-product monotone cubic of row ``iz`` of ``EVt`` (flat over the product grid) at the point
    located by ``lo``/``w`` (d,) on each state's grid.

    ``D`` holds the slopes of every line along the last state (:func:`monotone_slopes` on ``EVt`` seen as
    (rows, last size)); ``meta`` is ``offsets, sizes, strides`` of the states in ``sgrid``; ``scratch``
    has room for ``4**(d − 1)`` numbers.  The ``4**(d − 1)`` lines along the last state through the nodes
    ``lo − 1 … lo + 2`` of the other states (moved into the grid at its ends) are read at ``w``; then each
    earlier state, from the last to the first, is interpolated by :func:`four_point`.
    """
    d = lo.shape[0]
    last = d - 1
    k_last = lo[last]
    h_last = sgrid[meta[last] + k_last + 1] - sgrid[meta[last] + k_last]
    count = 1
    for _a in range(last):
        count *= 4
    for m in range(count):
        base = line_start(meta, lo, m)
        scratch[m] = hermite(w[last], h_last, EVt[iz, base], EVt[iz, base + 1], D[iz, base], D[iz, base + 1])
    for a in range(last - 1, -1, -1):
        count //= 4
        for m in range(count):
            scratch[m] = four_point(sgrid, meta[a], meta[d + a], lo[a], w[a], scratch[4 * m], scratch[4 * m + 1],
                                    scratch[4 * m + 2], scratch[4 * m + 3])
    return scratch[0]


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
            d[k] = _inner_slope(h0, h1, (y[k] - y[k - 1]) / h0, (y[k + 1] - y[k]) / h1)
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
    reward: np.ndarray, lower: np.ndarray, share: np.ndarray, mass: np.ndarray, sgrid: np.ndarray,
    meta: np.ndarray, P: np.ndarray, beta: float, v: np.ndarray, steps: int, span_stop: float,
) -> tuple[int, float]:
    """Up to ``steps`` steps ``v ← r_σ + β EV_σ`` in place, ``EV_σ`` read by the monotone cubic (the tensor
    product of :func:`tensor_cubic` with several states).

    Flat point ``i = x · n_shocks + z``; ``lower``/``share`` (n, K, d) locate tomorrow's state of each point on
    each state's grid (``meta``: offsets, sizes, strides in ``sgrid``), for each of the ``K`` combinations of
    the draws after the choice, whose probabilities are ``mass`` (n, K) (K = 1 and probability 1 without
    draws; a combination of probability 0 is not read).  Stops after the first step whose increment has span
    ``max − min`` at most ``span_stop``.

    Returns
    -------
    (steps done, span of the last step's increment; inf when none was done)
    """
    n_shocks = P.shape[0]
    d = lower.shape[2]
    n_grid = v.shape[0] // n_shocks
    size_last = meta[2 * d - 1]
    last_grid = sgrid[meta[d - 1]:meta[d - 1] + size_last]
    EVt = np.empty((n_shocks, n_grid))
    D = np.empty((n_shocks, n_grid))
    scratch = np.empty(4 ** (d - 1))
    done = 0
    span = np.inf
    while done < steps:
        for z in range(n_shocks):
            for x in range(n_grid):
                total = 0.0
                for zz in range(n_shocks):
                    total += P[z, zz] * v[x * n_shocks + zz]
                EVt[z, x] = total
        monotone_slopes(last_grid, EVt.reshape(n_shocks * (n_grid // size_last), size_last),
                        D.reshape(n_shocks * (n_grid // size_last), size_last))
        low = np.inf
        high = -np.inf
        for i in range(reward.shape[0]):
            iz = i % n_shocks
            e = 0.0
            for k in range(mass.shape[1]):
                p = mass[i, k]
                if p == 0.0:
                    continue
                if d == 1:  # one state: the Hermite form at once
                    j = lower[i, k, 0]
                    e += p * hermite(share[i, k, 0], sgrid[j + 1] - sgrid[j], EVt[iz, j], EVt[iz, j + 1], D[iz, j],
                                     D[iz, j + 1])
                elif d == 2:
                    e += p * tensor_two(EVt, D, iz, sgrid, meta, lower[i, k], share[i, k])
                else:
                    e += p * tensor_cubic(EVt, D, iz, sgrid, meta, lower[i, k], share[i, k], scratch)
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
