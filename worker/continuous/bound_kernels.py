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

__all__ = ["block_max", "bound_tables", "build_controls", "build_hulls", "control_rise", "cubic_rise", "hull_rise",
           "hull_top"]


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
    """:func:`hull_top` of the hull of the nodes of row ``z`` (:func:`build_hulls` on ``EVt``), with ``W(anchor)``
    the row's linear interpolant as the search kernel computes it."""
    k, w, _clamped = locate_one(grid, 0, grid.shape[0], anchor)
    w_anchor = 0.0
    if 1.0 - w != 0.0:
        w_anchor += (1.0 - w) * EVt[z, k]
    if w != 0.0:
        w_anchor += w * EVt[z, k + 1]
    return hull_top(EVt, grid, hull, deficit, z, beta, slope, a, b, anchor, w_anchor)


@njit(cache=True, nogil=True, error_model="numpy")
def hull_top(Y: np.ndarray, X: np.ndarray, hull: np.ndarray, deficit: np.ndarray, z: int, beta: float,
             slope: float, a: float, b: float, anchor: float, w_anchor: float) -> float:
    """``max over x in [a, b] of slope·(x − anchor) + β·(H(x) − w_anchor)``, plus ``β`` times the row's deficit:
    ``H`` the hull of the points ``(X[j], Y[z, j])`` of row ``z`` (:func:`build_hulls`); ``inf`` for a row
    without a hull.

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
        if slope * (X[v] - X[u]) + beta * (Y[z, v] - Y[z, u]) > 0.0:
            lo = mid + 1
        else:
            hi = mid
    x = min(max(X[hull[z, lo + 1]], a), b)
    lo = 0
    hi = count - 1
    while hi - lo > 1:  # the segment [hull lo, hull hi] holding x
        mid = (lo + hi) >> 1
        if X[hull[z, mid + 1]] <= x:
            lo = mid
        else:
            hi = mid
    u = hull[z, lo + 1]
    v = hull[z, hi + 1]
    if x == X[u]:
        h = Y[z, u]
    elif x == X[v]:
        h = Y[z, v]
    else:
        h = Y[z, u] + (Y[z, v] - Y[z, u]) * ((x - X[u]) / (X[v] - X[u]))
    return slope * (x - anchor) + beta * (h - w_anchor + deficit[z])


@njit(cache=True, nogil=True, error_model="numpy")
def build_controls(EVt: np.ndarray, D: np.ndarray, grid: np.ndarray, hull: np.ndarray, table: np.ndarray) -> None:
    """For ``monotone_cubic`` with one state: the Bézier control points of each row's pieces and their upper
    concave hulls (:func:`build_hulls`), into ``table`` (rows + 1, 3n − 1) and ``hull`` (rows, 3n − 1).

    Piece ``j`` of row ``z`` (nodes ``s_j``, ``s_{j+1}``, ``h`` apart, values ``W``, slopes ``D``) is the Bézier
    curve of ``(s_j, W_j)``, ``(s_j + h/3, W_j + h·D_j/3)``, ``(s_{j+1} − h/3, W_{j+1} − h·D_{j+1}/3)``,
    ``(s_{j+1}, W_{j+1})`` (x is affine in the Bézier parameter), so it lies in their convex hull and below the
    upper hull ``H`` of the row's 3n − 2 control points; ``W'`` is a convex combination of the control polygon's
    slopes, so ``|W'|`` is at most their largest size ``S``.  Row ``z`` of ``table`` holds in column 0 the hull's
    deficit plus the *widening* ``2**-46·(max|Y| + S·max|X|)``, which covers the rounding of the control points
    (a point moved by ``δy``, ``δx`` moves the hull by at most ``δy + S·δx``) and the kernel's reading of ``W`` at
    ``s_j + w·h`` for ``x`` (``w`` rounded: ``W`` moves by at most ``S`` times a few ulps of ``|x|``); columns 1 …
    the control ordinates; the last row's columns 1 … the control abscissas.  Abscissas that do not increase
    strictly, or a value or slope that is not a number, leave the row(s) without a hull.
    """
    n = grid.shape[0]
    rows = EVt.shape[0]
    X = table[rows, 1:]
    for j in range(n):
        X[3 * j] = grid[j]
        if j + 1 < n:
            h = grid[j + 1] - grid[j]
            X[3 * j + 1] = grid[j] + h / 3.0
            X[3 * j + 2] = grid[j + 1] - h / 3.0
    increasing = True
    x_abs = 0.0
    for c in range(X.shape[0]):
        x_abs = max(x_abs, abs(X[c]))
        if c > 0 and not X[c] > X[c - 1]:
            increasing = False
    Y = table[:rows, 1:]
    for z in range(rows):
        for j in range(n):
            Y[z, 3 * j] = EVt[z, j]
            if j + 1 < n:
                h = grid[j + 1] - grid[j]
                Y[z, 3 * j + 1] = EVt[z, j] + h * D[z, j] / 3.0
                Y[z, 3 * j + 2] = EVt[z, j + 1] - h * D[z, j + 1] / 3.0
    deficit = np.empty(rows)
    build_hulls(Y, X, hull, deficit)
    for z in range(rows):
        y_abs = 0.0
        steep = 0.0
        for c in range(X.shape[0]):
            y_abs = max(y_abs, abs(Y[z, c]))
            if c > 0:
                steep = max(steep, abs((Y[z, c] - Y[z, c - 1]) / (X[c] - X[c - 1])))
        table[z, 0] = deficit[z] + 2.0**-46 * (y_abs + steep * x_abs)
        if not increasing or not table[z, 0] < np.inf:
            hull[z, 0] = 0


@njit(cache=True, nogil=True, error_model="numpy")
def control_rise(table: np.ndarray, hull: np.ndarray, z: int, beta: float, slope: float, a: float, b: float,
                 anchor: float, w_anchor: float) -> float:
    """:func:`hull_top` of the control points' hull of row ``z`` (:func:`build_controls`), for an anchor where
    the continuation is ``w_anchor`` (a grid node: its value)."""
    rows = table.shape[0] - 1
    return hull_top(table[:rows, 1:], table[rows, 1:], hull, table[:rows, 0], z, beta, slope, a, b, anchor,
                    w_anchor)


@njit(cache=True, nogil=True, error_model="numpy")
def cubic_rise(EVt: np.ndarray, D: np.ndarray, grid: np.ndarray, table: np.ndarray, z: int, beta: float,
               slope: float, a: float, b: float, anchor: float, right: bool) -> float:
    """``max over x in [a, b] of (slope + β·M)·(x − anchor)`` plus ``β`` times the row's widening and deficit
    (:func:`build_controls`), with ``M`` the largest ``W'`` over ``[anchor, b]`` (``right``; ``anchor ≤ a``) or
    the smallest over ``[a, anchor]`` (``anchor ≥ b``): so ``β·(W(x) − W(anchor)) ≤ β·M·(x − anchor)`` there by
    the mean value theorem.  ``inf`` where a number is not finite.

    On grid interval ``j`` (``t = (x − s_j)/h``) the monotone cubic's derivative is the quadratic
    ``W' = A·t² + B·t + C``, ``A = 3D_j + 3D_{j+1} − 6σ``, ``B = 6σ − 4D_j − 2D_{j+1}``, ``C = D_j``, ``σ`` the
    secant; its extremes over ``[t_a, t_b]`` are at the ends or at the vertex ``−B/(2A)``.  Each is widened by
    ``2**-46·(12|σ| + 8|D_j| + 6|D_{j+1}|)·(1 + (|u| + |v| + |s_j| + |s_{j+1}|)/h)``: the coefficients and the
    polynomial are within a few ulps of those sizes, and the computed ``t`` within a few ulps of
    ``(|x| + |s_j|)/h``, which moves ``W'`` by at most ``|2A·t + B|`` times that.
    """
    n = grid.shape[0]
    u = anchor if right else a
    v = b if right else anchor
    k, _w, _clamped = locate_one(grid, 0, n, u)
    best = -np.inf if right else np.inf
    while True:
        left = grid[k]
        h = grid[k + 1] - left
        d0 = D[z, k]
        d1 = D[z, k + 1]
        sec = (EVt[z, k + 1] - EVt[z, k]) / h
        qa = 3.0 * d0 + 3.0 * d1 - 6.0 * sec
        qb = 6.0 * sec - 4.0 * d0 - 2.0 * d1
        t_a = min(max((u - left) / h, 0.0), 1.0)
        t_b = min(max((v - left) / h, 0.0), 1.0)
        widen = 2.0**-46 * (12.0 * abs(sec) + 8.0 * abs(d0) + 6.0 * abs(d1)) * (
            1.0 + (abs(u) + abs(v) + abs(left) + abs(grid[k + 1])) / h)
        for e in range(3):
            t = t_a if e == 0 else (t_b if e == 1 else -qb / (2.0 * qa))
            if e == 2 and not (t_a < t < t_b):
                continue
            value = (qa * t + qb) * t + d0
            best = max(best, value + widen) if right else min(best, value - widen)
        if k + 2 >= n or grid[k + 1] >= v:
            break
        k += 1
    total = slope + beta * best  # with the rounding of this sum and of the products (a few ulps of their terms)
    reach = max(abs(a - anchor), abs(b - anchor))
    rise = max(total * (a - anchor), total * (b - anchor)) + beta * table[z, 0] + 2.0**-48 * (
        abs(slope) + beta * abs(best)) * reach
    if not rise - rise == 0.0 or not best - best == 0.0:
        return np.inf
    return rise


def bound_tables(EVt: np.ndarray, sgrid: np.ndarray, meta: np.ndarray, target: int | None, strides: Any,
                 levels: np.ndarray, bound: bool, proof: bool, D: np.ndarray | None = None
                 ) -> tuple[np.ndarray, float, np.ndarray, np.ndarray]:
    """What the search kernel's branch and bound reads for one step: the max-pyramid of ``EVt`` along the chosen
    state ``target``, the largest ``|EVt|``, and (with ``proof``, for one state) the hulls and deficits of
    :func:`build_hulls` (``linear``; the deficits a (rows, 1) table) or the hulls and table of
    :func:`build_controls` (``monotone_cubic``: ``D``, the slopes, has ``EVt``'s shape); empty where not ``bound``
    (the scan) or not ``proof`` (the branch and bound alone), the table then (0, 0): the kernel sees one type."""
    cubic = D is not None and D.shape == EVt.shape
    pyramid, ev_abs, hull = np.empty(0), 0.0, np.empty((0, 0), dtype=np.int64)
    deficit = np.empty((0, 0))
    if bound and target is not None:
        d = len(strides)
        size, stride = int(meta[d + target]), int(strides[target])
        pyramid = np.empty(EVt.size // (size * stride) * int(levels[-1]) * stride)
        build_pyramid(EVt, size, stride, levels, pyramid)
        ev_abs = float(np.abs(EVt).max())
        off = int(meta[target])
        if proof and d == 1 and cubic:
            hull, deficit = np.empty((EVt.shape[0], 3 * size - 1), dtype=np.int64), np.empty(
                (EVt.shape[0] + 1, 3 * size - 1))
            build_controls(EVt, D, sgrid[off:off + size], hull, deficit)
        elif proof and d == 1:
            hull, deficit = np.empty((EVt.shape[0], size + 1), dtype=np.int64), np.empty((EVt.shape[0], 1))
            build_hulls(EVt, sgrid[off:off + size], hull, deficit[:, 0])
    return pyramid, ev_abs, hull, deficit
