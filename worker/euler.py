"""Euler-equation errors of a solved grid model, the unit-free accuracy measure of Judd (1992).

A model qualifies when its one choice ``x`` sets tomorrow's value of a state
``k`` (a ``next_of`` choice; shocks as many as it likes), its reward depends
on the choice only through one define ``c``, through which it is
differentiable (:mod:`worker.euler_setup`; other states whose laws move with
``k`` or ``x`` add terms in the value's slopes, :mod:`worker.euler_laws`;
several ``next_of`` choices each have their own equation,
:mod:`worker.euler_choices`; with several states the
measurement is :mod:`worker.euler_states`'s, with shocks drawn after the
choice :func:`worker.euler_points.errors_at` takes their expectations).
With ``r`` the reward, the first-order condition of an interior choice and
the envelope condition read

    ∂r/∂c(c) · ∂c/∂x  =  −β E_z'[ ∂r/∂k (k', z', x'') ],   k' = x(k, z),  x'' = x(k', z'),

where ``∂r/∂k`` is the total derivative of the reward with respect to the
state at a fixed choice (through every define that depends on it; for
``r = u(c(k, x))`` it is ``u'(c) ∂c/∂k``).  The Euler value ``c̃`` is the
``c`` that makes the left side equal to the right side, found by inverting
the marginal reward ``∂r/∂c`` numerically (vectorised Newton steps on its
derivative tree, with bisection where Newton does not settle:
:mod:`worker.euler_points`), and the error at a point is ``|1 − c̃/c|``,
reported as its log10.  Every derivative is a
tree of :func:`worker._slopes.derivative`, evaluated with numpy: the reward
is differentiated in one name at a time (the choice, the state, or the
define ``c`` held as a leaf).

Where the errors are measured
-----------------------------
At test points strictly between the grid points of ``k`` (the midpoints of
``q`` equal parts of every grid interval, ``q`` the least whole number that
gives at least ten times as many test points as grid points), at every shock
point.  The policy at a test point, and tomorrow's policy at ``k'``, is the
solved policy interpolated linearly along ``k`` — for a continuous choice,
the solved problem's own search there (``rule`` of :func:`euler_report`), and
for the endogenous grid method its own rule.  For a choice restricted to
the grid, the solved policy is a step function on the grid; interpolating it
is what the trade does to measure how coarse the grid is, and the error so
measured falls like the grid step.

A test point is skipped and counted as ``constrained`` when the choice there
is within one local grid step of an end of the grid of ``k`` (for a policy
read linearly from the grid, also when the choice at either end of its grid
interval is at an end of the grid: the limit may bind there), or when moving
the choice by that step either way is not allowed (a feasibility expression
fails or the reward is not finite): there the first-order condition need not
hold with equality.  Points where a derivative or ``c̃`` is not a finite
number are skipped and counted as ``undefined``.

``mean_log10`` is the mean of the log10 errors; ``weighted_mean_log10`` (with
``report.stationary``) weights them by the stationary distribution
interpolated linearly along ``k`` to the test points, renormalised over the
points measured.  Errors below ``2**-56`` are counted as ``2**-56``, so
log10 stays finite.

``profile`` lays the errors out across the state for a plot: the test points
in order, and the log10 error at every shock point, None where the point was
constrained or undefined.  With more than ``PROFILE_POINTS`` test points,
consecutive test points are pooled (equal numbers per pool, the last pool
possibly smaller) and each pool keeps, per shock point, the worst error
measured in it, at the middle of the pool's range of the state: a peak is
never smoothed away, so the profile's largest value is ``max_log10``.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from worker.euler_points import PointsRule, ValueParts, errors_at
from worker.euler_setup import EulerSetup, setup
from worker.feasibility import ModelData

__all__ = [
    "PROFILE_POINTS", "TEST_POINTS_PER_GRID_POINT", "EulerSetup", "PolicyRule", "WEIGHT", "between_points",
    "chunk_rows", "error_profile", "euler_errors", "euler_report", "grid_policy", "pooled_weighted_mean", "setup",
    "weigh",
]

TEST_POINTS_PER_GRID_POINT = 10
"""Test points per grid point of the chosen state, at the least (count)."""
PROFILE_POINTS = 1000
"""Most state values in ``profile``; more test points are pooled, keeping each pool's worst (count).

About one per pixel column of a picture: more would not show, and a profile
is stored with every result that asks for the errors.
"""
_CHUNK_ELEMENTS = 2**18
"""Tomorrow's (test point, shock, next shock) triples evaluated at once: bounds the temporaries (count)."""

PolicyRule = PointsRule
"""``policy(k) -> x``: at states ``k`` (m,) of the one state, the choice at every shock point, (m, shock points).
(With several states the rules take points, (m, states): :data:`worker.euler_points.PointsRule`.)"""


def chunk_rows(n_shocks: int) -> int:
    """Test points measured at once: their tomorrow's (point, shock, next shock) triples bound the temporaries."""
    return max(1, _CHUNK_ELEMENTS // (n_shocks * n_shocks))


def grid_policy(grid: np.ndarray, values: np.ndarray) -> PolicyRule:
    """The policy ``values`` (grid points × shock points) interpolated linearly along ``grid``.

    The policy of a choice restricted to the grid is a step function on the
    grid; interpolating it between grid points is what the trade does to
    measure how coarse the grid is.  Outside the grid the end intervals'
    lines are extended.
    """
    grid = np.asarray(grid, dtype=np.float64)
    values = np.asarray(values, dtype=np.float64)
    slopes = np.diff(values, axis=0) / np.diff(grid)[:, None]
    last = grid.size - 2

    def policy(k: np.ndarray) -> np.ndarray:
        left = np.clip(np.searchsorted(grid, k, side="right") - 1, 0, last)
        return values[left] + (k - grid[left])[:, None] * slopes[left]

    return policy


def between_points(grid: np.ndarray) -> np.ndarray:
    """Points strictly between the grid points, at least ``TEST_POINTS_PER_GRID_POINT`` per grid point."""
    parts = math.ceil(TEST_POINTS_PER_GRID_POINT * grid.size / (grid.size - 1))
    shares = (np.arange(parts) + 0.5) / parts
    return (grid[:-1, None] + shares[None, :] * np.diff(grid)[:, None]).ravel()


def euler_errors(
    data: ModelData,
    found: EulerSetup,
    discount: float,
    policy: PolicyRule,
    distribution: np.ndarray | None = None,
    at_end: np.ndarray | None = None,
    *,
    tomorrow: tuple[ModelData, PolicyRule] | None = None,
    values: ValueParts | None = None,
    pooling: bool = False,
) -> dict[str, Any]:
    """Euler-equation errors of ``policy`` at the test points of ``data``'s state grid.

    Parameters
    ----------
    data : ModelData
    found : EulerSetup
        From :func:`setup`.
    discount : float
        β.
    policy : callable
        ``policy(k) -> x``: at states ``k`` (m,), the choice at every shock point, (m, shock points);
        :func:`grid_policy` for a solved model.
    distribution : ndarray, optional
        The stationary distribution, (grid points, shock points), for ``weighted_mean_log10``.
    at_end : ndarray, optional
        (grid points, shock points): where the solved choice is at an end of its grid; test points in a
        grid interval with such an end are counted as ``constrained`` (for a policy read linearly).
    tomorrow : (ModelData, policy), optional
        Tomorrow's model (its params) and policy, when they differ from today's (a finite horizon's
        next period); default: ``data`` and ``policy``.
    values : ValueParts, optional
        The value read at points, for draws whose probabilities move with the choice or the state
        (:func:`worker.euler_points.errors_at`).
    pooling : bool
        Keep the total stationary weight for pooling parts (:func:`weigh`).

    Returns
    -------
    dict
        ``max_log10``, ``mean_log10`` (None when no point was measured),
        ``points`` (test points measured), ``constrained``, ``undefined``,
        ``define``, ``profile`` (see :func:`error_profile`) and, with
        ``distribution``, ``weighted_mean_log10``.
    """
    grid = data.state_grids[0]
    n_z = data.n_shocks
    k_all = between_points(grid)
    rows = chunk_rows(n_z)
    data_next, policy_next = tomorrow or (data, policy)
    along = (data_next, lambda points: policy_next(points[:, 0]))
    parts = [errors_at(data, found, discount, lambda points: policy(points[:, 0]), k_all[start:start + rows, None],
                       along, values) for start in range(0, k_all.size, rows)]
    log_error = np.concatenate([part[0] for part in parts])
    constrained = np.concatenate([part[1] for part in parts])
    if at_end is not None:
        # A test point between a grid point whose choice is at an end of its grid and one whose choice is not:
        # the limit may bind there, where the policy read linearly says it does not.
        interval = np.clip(np.searchsorted(grid, k_all, side="right") - 1, 0, grid.size - 2)
        constrained |= at_end[interval] | at_end[interval + 1]
    measured = ~constrained & np.isfinite(log_error)
    undefined = ~constrained & ~measured
    result: dict[str, Any] = {
        "max_log10": float(log_error[measured].max()) if measured.any() else None,
        "mean_log10": float(log_error[measured].mean()) if measured.any() else None,
        "points": int(measured.sum()),
        "constrained": int(constrained.sum()),
        "undefined": int(undefined.sum()),
        "define": found.define,
        "profile": error_profile(found.state, k_all, log_error, measured),
    }
    if distribution is not None:
        weights = grid_policy(grid, np.asarray(distribution, dtype=np.float64).reshape(grid.size, n_z))(k_all)
        weigh(result, weights, log_error, measured, pooling=pooling)
    return result


def weigh(result: dict[str, Any], weights: np.ndarray, log_error: np.ndarray, measured: np.ndarray, *,
          pooling: bool = False) -> None:
    """Set ``result["weighted_mean_log10"]``: the log10 errors measured, weighted by the stationary ``weights`` at
    the test points, renormalised over the points measured; with ``pooling`` also ``result[WEIGHT]``, the total
    weight (its sum over several parts renormalises their pooled mean: :func:`pooled_weighted_mean`)."""
    total = float(weights[measured].sum())
    result["weighted_mean_log10"] = (
        float(weights[measured] @ log_error[measured] / total) if measured.any() and total > 0 else None
    )
    if pooling:
        result[WEIGHT] = total


WEIGHT = "_weight"
"""The key of a part's total stationary weight while parts are pooled (never in a result: popped by
:func:`pooled_weighted_mean`)."""


def pooled_weighted_mean(parts: list[dict[str, Any]]) -> float | None:
    """The stationary-weighted mean over parts that each weighted their own points (:func:`weigh` with
    ``pooling``), their weight totals popped: ``Σ_parts W_p · mean_p / Σ_parts W_p``; None when none weighs."""
    totals = [part.pop(WEIGHT, 0.0) for part in parts]
    weight = sum(totals)
    if weight <= 0:
        return None
    return sum(total * part["weighted_mean_log10"] for total, part in zip(totals, parts) if total > 0) / weight


def error_profile(state: str, k_points: np.ndarray, log_error: np.ndarray, measured: np.ndarray) -> dict[str, Any]:
    """The errors across the state, at most ``PROFILE_POINTS`` values of it, for a plot.

    Parameters
    ----------
    state : str
        The state's name.
    k_points : ndarray
        The test points, increasing, (m,).
    log_error, measured : ndarray
        log10 errors and where they were measured, (m, shock points).

    Returns
    -------
    dict
        ``state``; ``at``, the values of the state, (p,); ``log10_error``,
        (p, shock points), shock points in flat (C) order, None where nothing
        was measured; ``pooled``, test points per entry (1: no pooling).
        With ``m > PROFILE_POINTS``, ``pooled = ceil(m / PROFILE_POINTS)``
        consecutive test points make one entry: its worst measured error per
        shock point, at the middle of its first and last test point.
    """
    size = max(1, math.ceil(k_points.size / PROFILE_POINTS))
    count = math.ceil(k_points.size / size)
    padding = count * size - k_points.size
    worst = np.pad(np.where(measured, log_error, -np.inf), ((0, padding), (0, 0)), constant_values=-np.inf)
    worst = worst.reshape(count, size, -1).max(axis=1)
    starts = np.arange(count) * size
    at = 0.5 * (k_points[starts] + k_points[np.minimum(starts + size - 1, k_points.size - 1)])
    return {
        "state": state,
        "at": at.tolist(),
        "log10_error": [[value if value > -np.inf else None for value in row] for row in worst.tolist()],
        "pooled": size,
    }




def euler_report(data: ModelData, discount: float, policy_values: np.ndarray,
                 distribution: np.ndarray | None = None, *, rule: PolicyRule | None = None,
                 values: ValueParts | None = None) -> tuple[dict[str, Any] | None, str | None]:
    """``(diagnostics.euler_errors, note)`` of a solved grid model: the errors, or None and why (or no note).

    ``policy_values`` is the chosen value at every flat point, (n,); ``distribution`` the stationary one, (n,).
    ``rule`` gives the policy between grid points (a continuous choice: the solved problem's own search
    there); by default the grid policy interpolated linearly (:func:`grid_policy`).  One state only: with
    several the errors are :func:`worker.euler_states.states_report`'s (:mod:`worker.euler_result` picks).
    """
    found = setup(data)
    if not isinstance(found, EulerSetup):
        return None, found
    if len(data.states) > 1:
        raise ValueError("euler_report measures one state; several are worker.euler_states.states_report's")
    chosen = np.asarray(policy_values, dtype=np.float64).reshape(data.state_grids[0].size, data.n_shocks)
    at_end = None
    if rule is None:
        rule = grid_policy(data.state_grids[0], chosen)
        grid = data.state_grids[0]
        at_end = (chosen <= grid[0]) | (chosen >= grid[-1])
    return euler_errors(data, found, discount, rule, distribution, at_end, values=values), None
