"""The afternoon-practitioner baseline: stochastic growth by numpy value iteration.

What someone writes in an afternoon with numpy alone, independent of fixq:
broadcast the one-period reward over (k, z, k') once, then iterate
``v ← max_{k'} u(k, z, k') + β E[v(k', z') | z]`` until the textbook certified
bound ``β/(1−β)·‖Tv − v‖∞ ≤ tolerance`` holds.  The Rouwenhorst matrix is
written out here, not taken from fixq.

Model (invented calibration in the usual ranges): CRRA utility ``γ = 2``,
Cobb–Douglas output ``z·k**α`` with ``α = 0.36``, depreciation ``δ = 0.08``,
discount ``β = 0.96``; ``log z`` an AR(1) with ``ρ = 0.9``, ``σ = 0.02``,
7 Rouwenhorst states; 1,000 uniform capital points over ±50 % of the
deterministic steady state.

Run ``python bench/baseline_numpy.py`` to time it alone.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass

import numpy as np

GAMMA = 2.0
ALPHA = 0.36
DELTA = 0.08
BETA = 0.96
RHO = 0.9
SIGMA = 0.02
SHOCK_POINTS = 7
CAPITAL_POINTS = 1000
HALF_WIDTH = 0.5
"""Capital grid half-width, as a share of the steady state (dimensionless)."""
TOLERANCE = 1e-6
"""Target of ``β/(1−β)·‖Tv − v‖∞``, in utility units."""


def steady_state_capital() -> float:
    """Deterministic steady state: ``α k**(α−1) = 1/β − 1 + δ`` at ``z = 1``."""
    return (ALPHA / (1.0 / BETA - 1.0 + DELTA)) ** (1.0 / (1.0 - ALPHA))


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
    """``value`` and ``policy_index`` have shape (capital points, shock points)."""

    capital: np.ndarray
    productivity: np.ndarray
    value: np.ndarray
    policy_index: np.ndarray
    iterations: int
    error_bound: float
    seconds: float


def solve(capital_points: int = CAPITAL_POINTS, tolerance: float = TOLERANCE) -> BaselineResult:
    """Numpy value iteration from ``v = 0``; the timer covers everything after the imports."""
    started = time.perf_counter()
    k_star = steady_state_capital()
    capital = np.linspace((1.0 - HALF_WIDTH) * k_star, (1.0 + HALF_WIDTH) * k_star, capital_points)
    productivity = np.exp(rouwenhorst_values(RHO, SIGMA, SHOCK_POINTS))
    transition = rouwenhorst_matrix(RHO, SHOCK_POINTS)

    # Reward over (k, z, k'), k' last so the max runs over contiguous memory.
    resources = productivity[None, :] * capital[:, None] ** ALPHA + (1.0 - DELTA) * capital[:, None]
    consumption = resources[:, :, None] - capital[None, None, :]
    with np.errstate(divide="ignore", invalid="ignore"):
        reward = np.where(consumption > 0, consumption ** (1.0 - GAMMA) / (1.0 - GAMMA), -np.inf)
    del consumption

    value = np.zeros((capital_points, SHOCK_POINTS))
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
    policy_index = objective.argmax(axis=2)
    return BaselineResult(
        capital=capital,
        productivity=productivity,
        value=value,
        policy_index=policy_index,
        iterations=iterations,
        error_bound=factor * distance,
        seconds=time.perf_counter() - started,
    )


if __name__ == "__main__":
    result = solve()
    print(f"baseline: {result.iterations} iterations, bound {result.error_bound:.2e}, {result.seconds:.2f} s")
