"""The compiled helpers of :mod:`worker.continuous.bound_search`: the largest node value of a block of grid intervals,
and the upper concave hulls of the continuation that the proof at the incumbent reads
(:mod:`worker.continuous.bound_proof`: :func:`build_hulls` once per step, :func:`hull_rise` per piece of a point).

The branch and bound of an unrestricted continuous search walks aligned dyadic blocks of grid
intervals of the chosen state: block ``q`` of level ``l`` holds intervals ``q·2**l … (q+1)·2**l − 1``,
whose nodes are ``q·2**l … (q+1)·2**l``.  Their largest value is one entry of the max-pyramid of
:func:`worker.kernels.build_pyramid` (block ``q`` of level ``l``: nodes ``q·2**l … (q+1)·2**l − 1``)
and the one node after it, so a block's bound costs two reads instead of a walk over the levels.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from numba import njit

from worker.kernels import build_pyramid, locate_one

__all__ = ["block_max", "bound_tables", "build_hulls", "hull_rise"]


@njit(cache=True, nogil=True, error_model="numpy")
def block_max(pyramid: np.ndarray, level_starts: np.ndarray, EVt: np.ndarray, axis_size: int, axis_stride: int,
              n_outer: int, z: int, base: int, level: int, q: int) -> float:
    """``max EVt[z, base + t · axis_stride]`` over the nodes ``t`` of intervals ``q·2**level … (q+1)·2**level − 1``
    (those on the grid: a block past the grid's end is cut there).

    ``base`` is a flat grid-state index whose coordinate on the axis is 0; the layout of ``pyramid`` is
    :func:`worker.kernels.build_pyramid`'s.  Equal to :func:`worker.kernels.pyramid_max` over the nodes
    ``q·2**level … min((q+1)·2**level, axis_size − 1)``.
    """
    span = axis_size * axis_stride
    outer = base // span
    inner = base - outer * span
    line = (z * n_outer + outer) * level_starts[-1]
    best = pyramid[(line + level_starts[level] + q) * axis_stride + inner]
    after = (q + 1) << level
    if after < axis_size:
        value = EVt[z, base + after * axis_stride]
        if value > best:
            best = value
    return best


@njit(cache=True, nogil=True, error_model="numpy")
def build_hulls(EVt: np.ndarray, grid: np.ndarray, hull: np.ndarray, deficit: np.ndarray) -> None:
    """Per row ``z`` of ``EVt`` (one state: a row is one line), the upper concave hull of the nodes
    ``(grid[j], EVt[z, j])``: ``hull[z, 0]`` vertices, the nodes ``hull[z, 1 …]``, and ``deficit[z]``, the most
    a node value exceeds the hull there (0 in exact arithmetic; a row with a value that is not a number gets
    no vertex).

    The monotone chain keeps the last vertex ``b`` before a new node ``j`` only when ``b`` is certainly above
    the chord from the vertex before it ``a`` to ``j``: the cross product ``dy_ab·dx_aj − dy_aj·dx_ab`` (with
    positive ``dx``) exceeds ``2**-48`` of its two terms' sizes, far above its rounding (each term is within
    3 ulps, the difference 1 more).  Every consecutive triple of the final chain was so tested when its last
    node came, so the hull is exactly concave; a node dropped in doubt may lie above it, by the deficit the
    walk then measures, which a bound adds (the hull's breakpoints are nodes, so hull + deficit is at least
    the linear interpolant everywhere).
    """
    n = grid.shape[0]
    for z in range(EVt.shape[0]):
        k = 0
        for j in range(n):
            if not abs(EVt[z, j]) < np.inf:
                k = 0
                break
            while k >= 2:
                a = hull[z, k - 1]
                b = hull[z, k]
                c1 = (EVt[z, b] - EVt[z, a]) * (grid[j] - grid[a])
                c2 = (EVt[z, j] - EVt[z, a]) * (grid[b] - grid[a])
                if c1 - c2 > 2.0**-48 * (abs(c1) + abs(c2)):
                    break
                k -= 1
            hull[z, k + 1] = j
            k += 1
        hull[z, 0] = k
        worst = 0.0
        seg = 1
        for j in range(n if k >= 2 else 0):
            while hull[z, seg + 1] < j:
                seg += 1
            a = hull[z, seg]
            b = hull[z, seg + 1]
            if j != a and j != b:
                h = EVt[z, a] + (EVt[z, b] - EVt[z, a]) * ((grid[j] - grid[a]) / (grid[b] - grid[a]))
                worst = max(worst, EVt[z, j] - h)
        deficit[z] = worst


@njit(cache=True, nogil=True, error_model="numpy")
def hull_rise(EVt: np.ndarray, grid: np.ndarray, hull: np.ndarray, deficit: np.ndarray, z: int, beta: float,
              slope: float, a: float, b: float, anchor: float) -> float:
    """``max over x in [a, b] of slope·(x − anchor) + β·(H(x) − W(anchor))``, plus ``β`` times the row's deficit:
    ``H`` the hull of row ``z`` (:func:`build_hulls`), ``W`` the row's linear interpolant as the search kernel
    computes it; ``inf`` for a row without a hull.

    ``slope·x + β·H(x)`` is concave and piecewise linear, so its maximum over ``[a, b]`` is at the vertex where
    the segments stop rising (found by bisection on the segments' rises ``slope·dx + β·dy``), clamped into
    ``[a, b]``.  A rise of the wrong sign by rounding can only be one within a few ulps of ``slope·dx``, so the
    point found is below the maximum by at most a few ulps of ``|slope|·(b − a)``.
    """
    count = hull[z, 0]
    if count < 2:
        return np.inf
    lo = 0
    hi = count - 1
    while lo < hi:
        mid = (lo + hi) >> 1
        u = hull[z, mid + 1]
        v = hull[z, mid + 2]
        if slope * (grid[v] - grid[u]) + beta * (EVt[z, v] - EVt[z, u]) > 0.0:
            lo = mid + 1
        else:
            hi = mid
    x = min(max(grid[hull[z, lo + 1]], a), b)
    lo = 0
    hi = count - 1
    while hi - lo > 1:  # the segment [hull lo, hull hi] holding x
        mid = (lo + hi) >> 1
        if grid[hull[z, mid + 1]] <= x:
            lo = mid
        else:
            hi = mid
    u = hull[z, lo + 1]
    v = hull[z, hi + 1]
    if x == grid[u]:
        h = EVt[z, u]
    elif x == grid[v]:
        h = EVt[z, v]
    else:
        h = EVt[z, u] + (EVt[z, v] - EVt[z, u]) * ((x - grid[u]) / (grid[v] - grid[u]))
    k, w, _clamped = locate_one(grid, 0, grid.shape[0], anchor)
    w_anchor = 0.0
    if 1.0 - w != 0.0:
        w_anchor += (1.0 - w) * EVt[z, k]
    if w != 0.0:
        w_anchor += w * EVt[z, k + 1]
    return slope * (x - anchor) + beta * (h - w_anchor + deficit[z])


def bound_tables(EVt: np.ndarray, sgrid: np.ndarray, meta: np.ndarray, target: int | None, strides: Any,
                 levels: np.ndarray, bound: bool, proof: bool) -> tuple[np.ndarray, float, np.ndarray, np.ndarray]:
    """What the search kernel's branch and bound reads for one step: the max-pyramid of ``EVt`` along the chosen
    state ``target``, the largest ``|EVt|``, and (with ``proof``, for one state) the hulls and deficits of
    :func:`build_hulls`; empty where not ``bound`` (the scan) or not ``proof`` (the branch and bound alone)."""
    pyramid, ev_abs, hull, deficit = np.empty(0), 0.0, np.empty((0, 0), dtype=np.int64), np.empty(0)
    if bound and target is not None:
        d = len(strides)
        size, stride = int(meta[d + target]), int(strides[target])
        pyramid = np.empty(EVt.size // (size * stride) * int(levels[-1]) * stride)
        build_pyramid(EVt, size, stride, levels, pyramid)
        ev_abs = float(np.abs(EVt).max())
        if proof and d == 1:
            hull, deficit = np.empty((EVt.shape[0], size + 1), dtype=np.int64), np.empty(EVt.shape[0])
            off = int(meta[target])
            build_hulls(EVt, sgrid[off:off + size], hull, deficit)
    return pyramid, ev_abs, hull, deficit
