"""The continuation as a ``monotone_cubic`` solve reads it, and its slope along one state, at any points.

The solve reads ``EV(s', z) = Σ_z' P[z, z'] V(s', z')`` between grid points by the tensor product of
Fritsch–Carlson interpolants (:mod:`worker.continuous.interp_kernels`: :func:`hermite` along the last state
with the slopes of :func:`monotone_slopes`, then :func:`four_point` along each earlier state, from the last to
the first).  :func:`cubic_reads` reads it at points by those same functions, and its slope along one state by
differentiating those same steps (forward mode): along the state itself the Hermite form's slope in its share
of the interval; along a later state (read first) the slopes carried through each earlier state's
:func:`four_point`, whose node slopes move with the values they are made of (the derivatives of the weighted
harmonic mean and of the three-point end formula, where they are smooth; where the data turn the node slope is
0 and so is its derivative).  Beyond a grid's end the solve holds the value at the end (tomorrow's state is
moved there), so the slope along that state is 0 there.

Used by the Euler-equation errors when another state's law moves with the chosen state or the choice
(:mod:`worker.euler_laws`).
"""

from __future__ import annotations

import math
from collections.abc import Callable

import numpy as np
from numba import njit

from worker.continuous.interp_kernels import (
    _end_slope,
    _inner_slope,
    four_point,
    hermite,
    line_start,
    monotone_slopes,
    tensor_cubic,
    tensor_two,
)
from worker.feasibility import ModelData
from worker.kernels import locate_one

__all__ = ["cubic_continuation", "cubic_reads"]


@njit(cache=True, nogil=True, error_model="numpy")
def _hermite_slope(t1: float, dt: float, h: float, y0: float, y1: float, d0: float, d1: float, dy0: float,
                   dy1: float, dd0: float, dd1: float) -> float:
    """The derivative of :func:`hermite` when its share moves by ``dt`` and its values and slopes by ``dy``,
    ``dd`` (per unit of the variable differentiated in)."""
    t2 = t1 * t1
    t3 = t2 * t1
    moved = (2.0 * t3 - 3.0 * t2 + 1.0) * dy0 + (t3 - 2.0 * t2 + t1) * h * dd0 + (3.0 * t2 - 2.0 * t3) * dy1 \
        + (t3 - t2) * h * dd1
    if dt == 0.0:
        return moved
    return moved + dt * ((6.0 * t2 - 6.0 * t1) * (y0 - y1) + (3.0 * t2 - 4.0 * t1 + 1.0) * h * d0
                         + (3.0 * t2 - 2.0 * t1) * h * d1)


@njit(cache=True, nogil=True, error_model="numpy")
def _inner_moved(h0: float, h1: float, m0: float, m1: float, dm0: float, dm1: float) -> float:
    """The derivative of :func:`_inner_slope` when the secants move by ``dm0``, ``dm1``."""
    if m0 * m1 <= 0.0:
        return 0.0
    w1 = 2.0 * h1 + h0
    w2 = h1 + 2.0 * h0
    d = _inner_slope(h0, h1, m0, m1)
    return d * d / (w1 + w2) * (w1 * dm0 / (m0 * m0) + w2 * dm1 / (m1 * m1))


@njit(cache=True, nogil=True, error_model="numpy")
def _end_moved(h0: float, h1: float, m0: float, m1: float, dm0: float, dm1: float) -> float:
    """The derivative of :func:`_end_slope` when the secants move by ``dm0``, ``dm1`` (its branches)."""
    d = ((2.0 * h0 + h1) * m0 - h0 * m1) / (h0 + h1)
    if d * m0 <= 0.0:
        return 0.0
    if m0 * m1 <= 0.0 and abs(d) > abs(3.0 * m0):
        return 3.0 * dm0
    return ((2.0 * h0 + h1) * dm0 - h0 * dm1) / (h0 + h1)


@njit(cache=True, nogil=True, error_model="numpy")
def _four_point_slope(sgrid: np.ndarray, off: int, size: int, k: int, t1: float, dt: float, ym: float, y0: float,
                      y1: float, y2: float, dym: float, dy0: float, dy1: float, dy2: float) -> float:
    """The derivative of :func:`four_point` (the same branches) when its share moves by ``dt`` and its four
    values by ``dy``."""
    h = sgrid[off + k + 1] - sgrid[off + k]
    m0 = (y1 - y0) / h
    dm0 = (dy1 - dy0) / h
    if size == 2:
        return _hermite_slope(t1, dt, h, y0, y1, m0, m0, dy0, dy1, dm0, dm0)
    if k >= 1:
        hm = sgrid[off + k] - sgrid[off + k - 1]
        d0 = _inner_slope(hm, h, (y0 - ym) / hm, m0)
        dd0 = _inner_moved(hm, h, (y0 - ym) / hm, m0, (dy0 - dym) / hm, dm0)
    else:
        hp = sgrid[off + 2] - sgrid[off + 1]
        d0 = _end_slope(h, hp, m0, (y2 - y1) / hp)
        dd0 = _end_moved(h, hp, m0, (y2 - y1) / hp, dm0, (dy2 - dy1) / hp)
    if k + 2 <= size - 1:
        hp = sgrid[off + k + 2] - sgrid[off + k + 1]
        d1 = _inner_slope(h, hp, m0, (y2 - y1) / hp)
        dd1 = _inner_moved(h, hp, m0, (y2 - y1) / hp, dm0, (dy2 - dy1) / hp)
    else:
        hm = sgrid[off + k] - sgrid[off + k - 1]
        d1 = _end_slope(h, hm, m0, (y0 - ym) / hm)
        dd1 = _end_moved(h, hm, m0, (y0 - ym) / hm, dm0, (dy0 - dym) / hm)
    return _hermite_slope(t1, dt, h, y0, y1, d0, d1, dy0, dy1, dd0, dd1)


@njit(cache=True, nogil=True, error_model="numpy")
def cubic_reads(EVt: np.ndarray, D: np.ndarray, sgrid: np.ndarray, meta: np.ndarray, points: np.ndarray,
                rows: np.ndarray, axis: int, out_value: np.ndarray, out_slope: np.ndarray) -> None:
    """``out_value[i]``: row ``rows[i]`` of ``EVt`` read at ``points[i]`` as the solve reads it (the point located
    by :func:`worker.kernels.locate_one` on each state's grid, then :func:`hermite`, :func:`tensor_two` or
    :func:`tensor_cubic`); ``out_slope[i]``: its slope along the state at position ``axis`` (0 beyond that
    state's grid).  ``D``, ``sgrid`` and ``meta`` as for :func:`tensor_cubic`."""
    d = points.shape[1]
    last = d - 1
    lo = np.empty(d, dtype=np.int64)
    w = np.empty(d)
    count_all = 1
    for _a in range(last):
        count_all *= 4
    scratch = np.empty(count_all)
    values = np.empty(count_all)
    slopes = np.empty(count_all)
    for i in range(points.shape[0]):
        iz = rows[i]
        moves = True
        for t in range(d):
            lo[t], w[t], clamped = locate_one(sgrid, meta[t], meta[d + t], points[i, t])
            if t == axis and clamped:
                moves = False
        k_last = lo[last]
        h_last = sgrid[meta[last] + k_last + 1] - sgrid[meta[last] + k_last]
        if d == 1:
            out_value[i] = hermite(w[0], h_last, EVt[iz, k_last], EVt[iz, k_last + 1], D[iz, k_last],
                                   D[iz, k_last + 1])
        elif d == 2:
            out_value[i] = tensor_two(EVt, D, iz, sgrid, meta, lo, w)
        else:
            out_value[i] = tensor_cubic(EVt, D, iz, sgrid, meta, lo, w, scratch)
        if not moves:
            out_slope[i] = 0.0
            continue
        dt_last = 1.0 / h_last if axis == last else 0.0
        for m in range(count_all):  # the lines along the last state, as tensor_cubic walks them
            base = line_start(meta, lo, m)
            y0, y1, d0, d1 = EVt[iz, base], EVt[iz, base + 1], D[iz, base], D[iz, base + 1]
            values[m] = hermite(w[last], h_last, y0, y1, d0, d1)
            slopes[m] = _hermite_slope(w[last], dt_last, h_last, y0, y1, d0, d1, 0.0, 0.0, 0.0, 0.0)
        count = count_all
        for a in range(last - 1, -1, -1):
            count //= 4
            off, size, k = meta[a], meta[d + a], lo[a]
            dt = 1.0 / (sgrid[off + k + 1] - sgrid[off + k]) if a == axis else 0.0
            for m in range(count):
                ym, y0, y1, y2 = values[4 * m], values[4 * m + 1], values[4 * m + 2], values[4 * m + 3]
                dym, dy0, dy1, dy2 = slopes[4 * m], slopes[4 * m + 1], slopes[4 * m + 2], slopes[4 * m + 3]
                slopes[m] = _four_point_slope(sgrid, off, size, k, w[a], dt, ym, y0, y1, y2, dym, dy0, dy1, dy2)
                values[m] = four_point(sgrid, off, size, k, w[a], ym, y0, y1, y2)
        out_slope[i] = slopes[0]


def cubic_continuation(data: ModelData, value: np.ndarray) -> Callable[[np.ndarray, np.ndarray, int],
                                                                       tuple[np.ndarray, np.ndarray]]:
    """``read(points, rows, axis) -> (EV, ∂EV/∂s_axis)``: the continuation of ``value`` (flat points) at points
    (m, states) for today's shock points ``rows`` (m,), and its slope along the state at ``axis``, each (m,), as a
    ``monotone_cubic`` solve reads it (:func:`cubic_reads`).  ``EV`` and its slopes along the last state are
    formed as :meth:`worker.continuous.problem.ContinuousProblem.continuation` forms them."""
    values = np.asarray(value, dtype=np.float64).reshape(data.n_grid, data.n_shocks)
    EVt = np.ascontiguousarray(data.transition @ values.T)
    D = np.empty_like(EVt)
    last = np.ascontiguousarray(data.state_grids[-1], dtype=np.float64)
    monotone_slopes(last, EVt.reshape(-1, last.size), D.reshape(-1, last.size))
    sizes = [int(size) for size in data.state_sizes]
    sgrid = np.ascontiguousarray(np.concatenate(data.state_grids), dtype=np.float64)
    offsets = np.concatenate([[0], np.cumsum(sizes)[:-1]]).astype(np.int64)
    strides = [math.prod(sizes[t + 1:]) for t in range(len(sizes))]
    meta = np.array([*offsets, *sizes, *strides], dtype=np.int64)

    def read(points: np.ndarray, rows: np.ndarray, axis: int) -> tuple[np.ndarray, np.ndarray]:
        points = np.ascontiguousarray(points, dtype=np.float64)
        count = points.shape[0]
        out_value, out_slope = np.empty(count), np.empty(count)
        cubic_reads(EVt, D, sgrid, meta, points, np.ascontiguousarray(rows, dtype=np.int64), int(axis), out_value,
                    out_slope)
        return out_value, out_slope

    return read
