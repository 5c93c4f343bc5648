"""The hand-written baseline for growth with elastic labour: numpy value iteration, hours maximised out first.

What someone writes with numpy alone, independent of fixq.  Hours worked
affect nothing tomorrow, so the best hours for every (k, z, k') are found
once, before iterating:

    R(k, z, k') = max over h of  log c − χ h^(1+1/η) / (1 + 1/η),
    c = z k^α h^(1−α) + (1 − δ) k − k'  (−inf unless c > 0),

and then ``v ← max_{k'} R(k, z, k') + β E[v(k', z') | z]`` until the textbook
certified bound ``β/(1−β)·‖Tv − v‖∞ ≤ tolerance`` holds.  The Rouwenhorst
matrix is written out here, not taken from fixq.

Model (an invented calibration in the usual ranges): log consumption, hours
disutility with Frisch elasticity ``η = 0.5`` and weight ``χ = 20``,
Cobb–Douglas output ``z·k**α·h**(1−α)`` with ``α = 0.36``, depreciation
``δ = 0.08``, discount ``β = 0.96``; ``log z`` an AR(1) with ``ρ = 0.9``,
``σ = 0.02``, 7 Rouwenhorst states; 500 uniform capital points over
0.5–1.5 times ``K_CENTRE``; 91 hours points 0.10, 0.11, …, 1.00.

Run ``python bench/baseline_elastic_labour.py`` to time it alone.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass

import numpy as np

ALPHA = 0.36
DELTA = 0.08
BETA = 0.96
CHI = 20.0
ETA = 0.5
RHO = 0.9
SIGMA = 0.02
SHOCK_POINTS = 7
CAPITAL_POINTS = 500
HOURS_POINTS = 91
HOURS_MIN, HOURS_MAX = 0.1, 1.0
K_CENTRE = 2.0
"""Centre of the capital grid (about the deterministic steady state of this calibration, where hours
are near 0.4)."""
HALF_WIDTH = 0.5
"""Capital grid half-width, as a share of ``K_CENTRE`` (dimensionless)."""
TOLERANCE = 1e-6
"""Target of ``β/(1−β)·‖Tv − v‖∞``, in utility units."""


def rouwenhorst_matrix(rho: float, points: int) -> np.ndarray:
    """Rouwenhorst (1995) transition matrix, built by its recursion; (points, points)."""
    p = (1.0 + rho) / 2.0
    matrix = np.array([[p, 1.0 - p], [1.0 - p, p]])
    for size in range(3, points + 1):
        grown = np.zeros((size, size))
        grown[:-1, :-1] += p * matrix
        grown[:-1, 1:] += (1.0 - p) * matrix
        grown[1:, :-1] += (1.0 - p) * matrix
        grown[1:, 1:] += p * matrix
        grown[1:-1] /= 2.0
        matrix = grown
    return matrix


def rouwenhorst_values(rho: float, sigma: float, points: int) -> np.ndarray:
    """Evenly spaced states over ``±σ/√(1−ρ²)·√(points−1)``; (points,)."""
    half = sigma / math.sqrt(1.0 - rho * rho) * math.sqrt(points - 1)
    return np.linspace(-half, half, points)


@dataclass
class BaselineResult:
    """``value``, ``capital_index`` and ``hours_index`` have shape (capital points, shock points)."""

    capital: np.ndarray
    productivity: np.ndarray
    hours: np.ndarray
    value: np.ndarray
    capital_index: np.ndarray
    hours_index: np.ndarray
    iterations: int
    error_bound: float
    seconds: float


def solve(tolerance: float = TOLERANCE) -> BaselineResult:
    """Numpy value iteration from ``v = 0``; the timer covers everything after the imports."""
    started = time.perf_counter()
    capital = np.linspace((1.0 - HALF_WIDTH) * K_CENTRE, (1.0 + HALF_WIDTH) * K_CENTRE, CAPITAL_POINTS)
    productivity = np.exp(rouwenhorst_values(RHO, SIGMA, SHOCK_POINTS))
    transition = rouwenhorst_matrix(RHO, SHOCK_POINTS)
    hours = np.linspace(HOURS_MIN, HOURS_MAX, HOURS_POINTS)
    power = 1.0 + 1.0 / ETA
    disutility = CHI * hours**power / power

    # Hours out first, one capital point at a time (a (z, k', h) block each: the whole array is 1.3 GB).
    reward = np.empty((CAPITAL_POINTS, SHOCK_POINTS, CAPITAL_POINTS))
    best_hours = np.empty((CAPITAL_POINTS, SHOCK_POINTS, CAPITAL_POINTS), dtype=np.int64)
    output = productivity[:, None] * hours[None, :] ** (1.0 - ALPHA)  # (z, h), times k**α below
    for i, k in enumerate(capital):
        consumption = (k**ALPHA * output + (1.0 - DELTA) * k)[:, None, :] - capital[None, :, None]
        with np.errstate(divide="ignore", invalid="ignore"):
            utility = np.where(consumption > 0, np.log(consumption), -np.inf) - disutility
        best_hours[i] = utility.argmax(axis=2)
        reward[i] = np.take_along_axis(utility, best_hours[i][:, :, None], axis=2)[:, :, 0]

    value = np.zeros((CAPITAL_POINTS, SHOCK_POINTS))
    factor = BETA / (1.0 - BETA)
    iterations = 0
    while True:
        expected = value @ transition.T  # (k', z)
        objective = reward + BETA * expected.T[None, :, :]
        updated = objective.max(axis=2)
        iterations += 1
        distance = float(np.abs(updated - value).max())
        value = updated
        if factor * distance <= tolerance:
            break
    capital_index = objective.argmax(axis=2)
    hours_index = np.take_along_axis(best_hours, capital_index[:, :, None], axis=2)[:, :, 0]
    return BaselineResult(
        capital=capital,
        productivity=productivity,
        hours=hours,
        value=value,
        capital_index=capital_index,
        hours_index=hours_index,
        iterations=iterations,
        error_bound=factor * distance,
        seconds=time.perf_counter() - started,
    )


if __name__ == "__main__":
    result = solve()
    print(f"baseline: {result.iterations} iterations, bound {result.error_bound:.2e}, {result.seconds:.2f} s; "
          f"hours {result.hours[result.hours_index].min():.2f}..{result.hours[result.hours_index].max():.2f}, "
          f"k' index {result.capital_index.min()}..{result.capital_index.max()}")
