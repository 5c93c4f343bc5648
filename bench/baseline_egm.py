"""Hand-written endogenous-grid baseline for the accuracy benchmark, in plain numpy.

The model is the consumption–saving problem of a household (an invented calibration): assets
``a >= 0`` (borrowing limit 0), income ``y`` a 7-state Markov chain, cash on hand
``(1 + r) a + y``, consumption ``c = (1 + r) a + y - a'`` and CRRA utility
``u(c) = c**(1 - γ) / (1 - γ)``, with β = 0.96, r = 0.03, γ = 2.  Log income is an AR(1) with
persistence :data:`INCOME_RHO` and innovation standard deviation :data:`INCOME_SIGMA` (both invented
numbers), discretised by Rouwenhorst's method (Kopecky & Suen 2010 give the transition matrix and the
spread used here); income is scaled so that its mean under the chain's stationary law is 1.

:func:`solve` iterates the consumption policy by the endogenous grid method (Carroll 2006): for
every asset level tomorrow ``a'`` on the grid, the Euler equation
``u'(c) = β (1 + r) E[u'(c(a', y')) | y]`` gives today's consumption in closed form, and the budget
gives the asset level today at which that choice is made; interpolating back onto the grid gives the
next policy.  :func:`euler_errors` measures the unit-free Euler-equation error of Judd (1992) of any
savings rule at test points between the grid points; it is written here, apart from fixq's own
diagnostic, so the benchmark can check that diagnostic.

Nothing here imports fixq: it is the independent side of the comparison.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np

BETA = 0.96
"""Discount factor per period (dimensionless)."""
INTEREST = 0.03
"""Net interest rate on assets per period (dimensionless)."""
GAMMA = 2.0
"""Relative risk aversion of CRRA utility (dimensionless)."""
INCOME_POINTS = 7
"""Points of the income chain (count)."""
INCOME_RHO = 0.9
"""Persistence of log income per period (dimensionless; an invented number)."""
INCOME_SIGMA = 0.1
"""Standard deviation of the innovation to log income (log points; an invented number)."""
ASSET_MAX = 100.0
"""Upper end of the asset grid (units of mean income, which is 1).

With this calibration a household that keeps the top income stops accumulating at about 64
(:func:`stationary_top`), so the stationary distribution has no mass near the top end and the end
never binds; 50 would cut into the set of assets the household visits."""
ASSET_EXPONENT = 2.0
"""Power of the asset grid's spacing: points ``ASSET_MAX * u**2`` for ``u`` even on [0, 1] (dimensionless).

Packing points near the borrowing limit, where the consumption function bends most, is common
practice for this model; 2 is also fixq's default power, so the benchmark's document need not name it."""
TOLERANCE = 1e-10
"""Stop when consumption moves by less than this at every grid point (units of mean income)."""
MAX_ITERATIONS = 20_000
"""Policy updates at the most (count)."""
TEST_POINTS_PER_GRID_POINT = 10
"""Euler-error test points per grid point, at the least (count)."""
_ERROR_FLOOR = 1e-17
"""Errors below this are reported as it, so log10 stays finite (about a tenth of float64's epsilon)."""

SavingsRule = Callable[[np.ndarray], np.ndarray]
"""``rule(a) -> a'``: at asset levels ``a`` (m,), tomorrow's assets at every income state, (m, income points)."""


def rouwenhorst(rho: float, sigma: float, points: int) -> tuple[np.ndarray, np.ndarray]:
    """Rouwenhorst's discretisation of ``z' = rho z + e``, ``e ~ N(0, sigma**2)``.

    Returns
    -------
    values : ndarray, (points,)
        Evenly spaced over ``±sigma / sqrt(1 - rho**2) * sqrt(points - 1)``, so the chain's
        unconditional variance equals the process's (Kopecky & Suen 2010).
    matrix : ndarray, (points, points)
        Row-stochastic transition matrix, ``p = q = (1 + rho) / 2``, built by the recursion.
    """
    p = (1.0 + rho) / 2.0
    matrix = np.array([[p, 1.0 - p], [1.0 - p, p]])
    for size in range(3, points + 1):
        grown = np.zeros((size, size))
        grown[:-1, :-1] += p * matrix
        grown[:-1, 1:] += (1.0 - p) * matrix
        grown[1:, :-1] += (1.0 - p) * matrix
        grown[1:, 1:] += p * matrix
        grown[1:-1] /= 2.0  # interior rows were counted twice by the four corners
        matrix = grown
    spread = sigma / math.sqrt(1.0 - rho**2) * math.sqrt(points - 1)
    return np.linspace(-spread, spread, points), matrix


def income_chain() -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The benchmark's income chain: levels (7,) with stationary mean 1, transition (7, 7), stationary law (7,).

    The stationary law of Rouwenhorst's chain is binomial(points − 1, 1/2) (Kopecky & Suen 2010).
    """
    log_values, matrix = rouwenhorst(INCOME_RHO, INCOME_SIGMA, INCOME_POINTS)
    law = np.array([math.comb(INCOME_POINTS - 1, i) for i in range(INCOME_POINTS)], dtype=np.float64)
    law /= law.sum()
    levels = np.exp(log_values)
    return levels / (law @ levels), matrix, law


def asset_grid(points: int) -> np.ndarray:
    """``ASSET_MAX * u**ASSET_EXPONENT`` for ``u`` evenly spaced on [0, 1], (points,): dense near the limit."""
    return ASSET_MAX * np.linspace(0.0, 1.0, points) ** ASSET_EXPONENT


def marginal_utility(c: np.ndarray) -> np.ndarray:
    return c**-GAMMA


def inverse_marginal_utility(m: np.ndarray) -> np.ndarray:
    return m ** (-1.0 / GAMMA)


@dataclass(frozen=True)
class BaselineResult:
    """The solved consumption policy.

    ``consumption`` is the policy on the asset grid, (grid points, income points);
    ``endogenous_assets`` and ``endogenous_consumption`` (grid points, income points) are the
    last update's pairs ``(a, c)``, at which the Euler equation holds exactly given the previous policy.
    """

    grid: np.ndarray
    income: np.ndarray
    transition: np.ndarray
    consumption: np.ndarray
    endogenous_assets: np.ndarray
    endogenous_consumption: np.ndarray
    iterations: int
    last_change: float
    seconds: float

    def consumption_at(self, a: np.ndarray) -> np.ndarray:
        """Consumption at asset levels ``a`` (m,), every income state: (m, income points).

        Linear along the last endogenous grid; below its first point the borrowing limit binds and
        the household consumes its cash on hand.
        """
        return _consume(np.asarray(a, dtype=np.float64), self.endogenous_assets, self.endogenous_consumption,
                        self.income)

    def savings_at(self, a: np.ndarray) -> np.ndarray:
        """Tomorrow's assets at asset levels ``a`` (m,): (m, income points), 0 where the limit binds."""
        a = np.asarray(a, dtype=np.float64)
        cash = (1.0 + INTEREST) * a[:, None] + self.income[None, :]
        return np.maximum(cash - self.consumption_at(a), 0.0)


def _interpolate(x: np.ndarray, xp: np.ndarray, fp: np.ndarray) -> np.ndarray:
    """Piecewise-linear through ``(xp, fp)`` at ``x``, extended linearly beyond both ends."""
    y = np.interp(x, xp, fp)
    high = x > xp[-1]
    if high.any():
        y[high] = fp[-1] + (x[high] - xp[-1]) * (fp[-1] - fp[-2]) / (xp[-1] - xp[-2])
    return y


def _consume(a: np.ndarray, assets: np.ndarray, consumption: np.ndarray, income: np.ndarray) -> np.ndarray:
    """Consumption at ``a`` (m,) from endogenous pairs (n, income points): (m, income points)."""
    out = np.empty((a.size, income.size))
    for j in range(income.size):
        cash = (1.0 + INTEREST) * a + income[j]
        # Below the first endogenous point a' = 0 binds: everything is consumed.
        out[:, j] = np.where(a < assets[0, j], cash, _interpolate(a, assets[:, j], consumption[:, j]))
    return out


def solve(points: int, tolerance: float = TOLERANCE, max_iterations: int = MAX_ITERATIONS) -> BaselineResult:
    """Iterate the consumption policy by the endogenous grid method until it moves less than ``tolerance``.

    The exogenous grid of tomorrow's assets is the asset grid itself (its first point is the
    borrowing limit 0), so tomorrow's consumption is read at grid points with no interpolation;
    the start is "consume everything", the policy of a last period.
    """
    started = time.perf_counter()
    grid = asset_grid(points)
    income, transition, _ = income_chain()
    gross = 1.0 + INTEREST
    consumption = gross * grid[:, None] + income[None, :]
    assets = c_endo = consumption
    change = math.inf
    iterations = 0
    while change >= tolerance and iterations < max_iterations:
        # expected[i, j] = E[u'(c(a'_i, y')) | y_j]
        expected = marginal_utility(consumption) @ transition.T
        c_endo = inverse_marginal_utility(BETA * gross * expected)
        assets = (c_endo + grid[:, None] - income[None, :]) / gross
        updated = _consume(grid, assets, c_endo, income)
        change = float(np.max(np.abs(updated - consumption)))
        consumption = updated
        iterations += 1
    return BaselineResult(grid, income, transition, consumption, assets, c_endo, iterations, change,
                          time.perf_counter() - started)


def test_points(grid: np.ndarray) -> np.ndarray:
    """Points strictly inside every grid interval, ``q`` per interval at the centres of ``q`` equal parts,
    ``q`` the least whole number giving ``TEST_POINTS_PER_GRID_POINT`` per grid point; (≥ 10·n,)."""
    per_interval = math.ceil(TEST_POINTS_PER_GRID_POINT * grid.size / (grid.size - 1))
    fractions = (np.arange(per_interval) + 0.5) / per_interval
    return (grid[:-1, None] + np.diff(grid)[:, None] * fractions[None, :]).ravel()


def linear_rule(grid: np.ndarray, savings: np.ndarray) -> SavingsRule:
    """The savings policy ``savings`` (grid points, income points) read linearly between grid points."""
    def rule(a: np.ndarray) -> np.ndarray:
        return np.stack([np.interp(a, grid, savings[:, j]) for j in range(savings.shape[1])], axis=1)

    return rule


def euler_errors(
    rule: SavingsRule,
    grid: np.ndarray,
    income: np.ndarray,
    transition: np.ndarray,
    *,
    skip: str = "binding",
) -> dict[str, Any]:
    """Judd's (1992) unit-free Euler-equation errors ``log10 |1 − c̃/c|`` of a savings rule.

    ``c̃ = u'^{-1}(β (1 + r) E[u'(c')])`` is the consumption the Euler equation asks for, given
    tomorrow's consumption under the same rule; the errors are measured at :func:`test_points`
    of ``grid``, at every income state.

    Parameters
    ----------
    rule : callable
        ``rule(a) -> a'``, (m,) → (m, income points).
    grid, income, transition : ndarray
        Asset grid (n,), income levels (k,), income transition (k, k).
    skip : str
        Which test points are left out because the Euler equation need not hold with equality there:
        ``"binding"``, where ``a' <= 0`` (the borrowing limit binds); ``"grid_step"``, where ``a'`` is
        within one local grid step of either end of the grid, or one step more saving leaves no positive
        consumption (the local step is the width of the grid intervals, interpolated linearly between
        their midpoints at ``a'``: the rule fixq's diagnostic documents, so the two measure the same points);
        ``"limit_interval"``, those and every test point of a grid interval at either end of which the
        rule is within one local step of the borrowing limit.  A policy read linearly between grid points
        straddles the asset level where the limit starts to bind: just above it the rule saves a little
        although the household saves nothing, and ``"grid_step"`` does not catch that where the steps near
        the limit are finer than the interpolated saving.

    Returns
    -------
    dict
        ``max_log10``, ``mean_log10`` (None when no point was measured), ``points`` measured,
        ``skipped``, ``undefined`` (c or c̃ not a positive finite number), and ``worst_at``: the asset
        level and income index of the largest error (None when no point was measured).
    """
    a = test_points(grid)
    gross = 1.0 + INTEREST
    with np.errstate(all="ignore"):
        saved = rule(a)
        c = gross * a[:, None] + income[None, :] - saved
        if skip == "binding":
            skipped = saved <= grid[0]
        elif skip in ("grid_step", "limit_interval"):
            skipped = _near_ends(saved, grid) | (c - _local_step(saved, grid) <= 0)
            if skip == "limit_interval":
                at_limit = _near_ends(rule(grid), grid, top=False)
                interval = np.repeat(np.arange(grid.size - 1), a.size // (grid.size - 1))
                skipped |= at_limit[interval] | at_limit[interval + 1]
        else:
            raise ValueError(f"unknown skip rule {skip!r}")
        later = rule(saved.ravel())  # a'' at every (test point, y) pair, every y'
        c_next = gross * saved.ravel()[:, None] + income[None, :] - later
        mu_next = marginal_utility(c_next).reshape(a.size, income.size, income.size)
        expected = np.einsum("ijk,jk->ij", mu_next, transition)
        c_tilde = inverse_marginal_utility(BETA * gross * expected)
        error = np.abs(1.0 - c_tilde / c)
        defined = np.isfinite(error) & (c > 0) & np.isfinite(c_tilde)
        log_error = np.log10(np.maximum(error, _ERROR_FLOOR))
    measured = ~skipped & defined
    worst = np.unravel_index(np.argmax(np.where(measured, log_error, -np.inf)), log_error.shape)
    return {
        "max_log10": float(log_error[measured].max()) if measured.any() else None,
        "mean_log10": float(log_error[measured].mean()) if measured.any() else None,
        "points": int(measured.sum()),
        "skipped": int(skipped.sum()),
        "undefined": int((~skipped & ~defined).sum()),
        "worst_at": (float(a[worst[0]]), int(worst[1])) if measured.any() else None,
    }


def _local_step(saved: np.ndarray, grid: np.ndarray) -> np.ndarray:
    """The width of the grid intervals, interpolated linearly between their midpoints at ``saved``."""
    return np.interp(saved, 0.5 * (grid[1:] + grid[:-1]), np.diff(grid))


def _near_ends(saved: np.ndarray, grid: np.ndarray, *, top: bool = True) -> np.ndarray:
    """Where ``saved`` is within one local grid step of the grid's lower end (or, with ``top``, its upper end)."""
    step = _local_step(saved, grid)
    near = saved - step < grid[0]
    return near | (saved + step > grid[-1]) if top else near


def stationary_top(result: BaselineResult) -> float:
    """The highest asset level the household ever reaches from below: where saving at the top income stops.

    Above it ``a' < a`` in every income state, so the stationary distribution puts no mass there; the
    benchmark prints it to show that the grid's upper end lies well beyond it.
    """
    saved = result.savings_at(result.grid)[:, -1]
    rising = saved > result.grid
    return float(result.grid[np.flatnonzero(rising)[-1] + 1]) if rising.any() else float(result.grid[0])
