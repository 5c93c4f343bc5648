"""The continuation and its slopes as a monotone_cubic solve reads them (worker.continuous.cubic_slope).

Independent readings: scipy's PchipInterpolator (Fritsch, F. N. and J. Butland (1984), "A method for constructing
local monotone piecewise cubic interpolants", SIAM J. Sci. Stat. Comput. 5(2): the weighted harmonic mean of the
secants, zero where they turn, the three-point formula at the ends — the node slopes fixq's Fritsch–Carlson
interpolant uses), one state after another from the last; and central differences of the read value.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.interpolate import PchipInterpolator

from worker.continuous.cubic_slope import cubic_reads
from worker.continuous.interp_kernels import monotone_slopes


def _setup(grids: list[np.ndarray], table: np.ndarray) -> tuple[np.ndarray, ...]:
    """``(EVt, D, sgrid, meta)`` of ``table`` (shock points, *sizes), as the solve builds them."""
    sizes = [grid.size for grid in grids]
    EVt = np.ascontiguousarray(table.reshape(table.shape[0], -1))
    D = np.empty_like(EVt)
    monotone_slopes(grids[-1], EVt.reshape(-1, sizes[-1]), D.reshape(-1, sizes[-1]))
    offsets = np.concatenate([[0], np.cumsum(sizes)[:-1]])
    strides = [math.prod(sizes[t + 1:]) for t in range(len(sizes))]
    meta = np.array([*offsets, *sizes, *strides], dtype=np.int64)
    return EVt, D, np.concatenate(grids), meta


def _read(setup: tuple[np.ndarray, ...], points: np.ndarray, rows: np.ndarray, axis: int) -> tuple[np.ndarray, ...]:
    value, slope = np.empty(points.shape[0]), np.empty(points.shape[0])
    cubic_reads(*setup, np.ascontiguousarray(points), rows.astype(np.int64), axis, value, slope)
    return value, slope


def _grids(rng: np.random.Generator, sizes: tuple[int, ...]) -> list[np.ndarray]:
    return [np.cumsum(rng.uniform(0.5, 1.5, size)) for size in sizes]


def _pchip(grids: list[np.ndarray], table: np.ndarray, point: np.ndarray, axis: int | None) -> float:
    """Independent: the tensor product of pchips of ``table`` (*sizes) at ``point``, along the last state first;
    with ``axis`` 0 the slope along the first state instead."""
    lines = table
    for t in range(len(grids) - 1, 0, -1):
        lines = PchipInterpolator(grids[t], lines, axis=t)(point[t])
    read = PchipInterpolator(grids[0], lines)
    return float(read.derivative()(point[0]) if axis == 0 else read(point[0]))


@pytest.mark.parametrize("sizes", [(5, 7), (2, 6), (4, 3, 5)])
def test_the_value_and_its_slope_along_the_first_state_are_scipy_s(sizes: tuple[int, ...]) -> None:
    rng = np.random.default_rng(11)
    grids = _grids(rng, sizes)
    table = rng.normal(size=(2, *sizes))  # turns, flats and ends: every branch of the node slopes
    setup = _setup(grids, table)
    points = np.column_stack([rng.uniform(grid[0], grid[-1], 40) for grid in grids])
    rows = rng.integers(0, 2, 40)
    value, slope = _read(setup, points, rows, 0)
    for i in range(40):
        assert value[i] == pytest.approx(_pchip(grids, table[rows[i]], points[i], None), abs=1e-12)
        assert slope[i] == pytest.approx(_pchip(grids, table[rows[i]], points[i], 0), abs=1e-10)


@pytest.mark.parametrize("sizes", [(5, 7), (4, 3, 5)])
def test_the_slope_along_later_states_is_the_read_value_s(sizes: tuple[int, ...]) -> None:
    # Along a later state the node slopes of the earlier ones move with the values: the slope is the central
    # difference of the value read (a smooth table, so that no node slope changes branch between the two reads).
    rng = np.random.default_rng(4)
    grids = _grids(rng, sizes)
    mesh = np.meshgrid(*grids, indexing="ij")
    table = np.stack([np.log(1 + sum(m * (t + 1) for t, m in enumerate(mesh))) + 0.3 * np.sin(mesh[-1]) * z
                      for z in (1.0, -0.5)])
    setup = _setup(grids, table)
    points = np.column_stack([rng.uniform(grid[0], grid[-1], 40) for grid in grids])
    rows = rng.integers(0, 2, 40)
    h = 1e-6
    for axis in range(1, len(sizes)):
        _, slope = _read(setup, points, rows, axis)
        step = np.zeros(len(sizes))
        step[axis] = h
        up, _ = _read(setup, points + step, rows, axis)
        down, _ = _read(setup, points - step, rows, axis)
        assert slope == pytest.approx((up - down) / (2 * h), abs=1e-7)


def test_beyond_a_grid_the_value_is_held_and_its_slope_is_zero() -> None:
    rng = np.random.default_rng(2)
    grids = _grids(rng, (4, 5))
    setup = _setup(grids, rng.normal(size=(1, 4, 5)))
    inside = np.array([[grids[0][-1], 0.5 * (grids[1][0] + grids[1][1])]])
    outside = inside + [[0.7, 0.0]]
    rows = np.zeros(1, dtype=np.int64)
    value_in, _ = _read(setup, inside, rows, 0)
    value_out, slope_out = _read(setup, outside, rows, 0)
    assert value_out == pytest.approx(value_in, abs=1e-15) and slope_out[0] == 0.0
