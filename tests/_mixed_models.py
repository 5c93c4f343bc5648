"""The invented work-or-not-and-save household (a continuous choice beside a discrete one) and its exact solver.

Shared by the tests of a continuous choice beside other choices (test modules do not import each other).
Invented household: assets ``a`` on a grid, income ``y`` from a two-state chain; each period it chooses
whether to work (``work`` ∈ {0, 1}, a menu: working adds ``wage · y`` to cash and costs ``disutility`` in
utility) and how much to save (``save``, tomorrow's assets anywhere in [0, a_max]), with log utility.

:func:`exact_bellman` is the fitted problem's Bellman operator (tomorrow's value read linearly between grid
points) with an exact maximisation written in plain numpy: on each grid segment the continuation is linear,
so the first-order condition ``1/c = β·slope`` gives the segment's maximum in closed form, and the best
segment and the best work choice win.
"""

from __future__ import annotations

import copy
from typing import Any

import numpy as np

from tests._documents import with_period_slot

BETA, R, WAGE, DISUTILITY, BASE, A_MAX = 0.9, 0.04, 1.0, 0.4, 0.3, 8.0
INCOME = np.array([0.6, 1.4])
CHAIN = np.array([[0.75, 0.25], [0.35, 0.65]])
WORK = np.array([0.0, 1.0])

HOUSEHOLD: dict[str, Any] = {
    "kind": "grid",
    "params": {"r": R, "wage": WAGE, "disutility": DISUTILITY, "base": BASE},
    "states": {"a": {"min": 0.0, "max": A_MAX, "points": 30, "spacing": "power", "exponent": 1.5}},
    "shocks": {"y": {"markov": {"values": INCOME.tolist(), "matrix": CHAIN.tolist()}, "transform": "none"}},
    "choices": {"work": {"values": WORK.tolist()}, "save": {"next_of": "a", "continuous": True}},
    "define": {"c": "(1 + r) * a + base + work * wage * y - save"},
    "reward": "log(c) - disutility * work",
    "feasible": ["c > 0"],
}
"""Invented: whether to work and how much to save."""


def household_document(hints: dict | None = None, **report: Any) -> dict[str, Any]:
    """The household as a solve document (Howard, tolerance 1e-10), with ``hints`` and ``report`` options."""
    model = copy.deepcopy(HOUSEHOLD)
    if hints is not None:
        model["hints"] = hints
    # The slot where a horizon puts ``period``: a finite-horizon household (with_horizon) shares the kernels of the
    # infinite-horizon one.
    return with_period_slot({"version": 1, "discount": BETA, "model": model,
                             "solver": {"method": "howard", "tolerance": 1e-10}, "report": report})


def cash(grid: np.ndarray) -> np.ndarray:
    """Cash on hand (points, shocks, work options)."""
    return (1 + R) * grid[:, None, None] + BASE + WORK[None, None, :] * WAGE * INCOME[None, :, None]


def exact_bellman(v: np.ndarray, grid: np.ndarray, at: np.ndarray | None = None
                  ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The fitted Bellman operator with an exact maximisation: ``(Tv, save, work index)``, (points, shocks),
    at the grid points or at the assets ``at``."""
    continuation = v @ CHAIN.T  # (points, shocks): E[v(a', y') | y]
    money = cash(grid if at is None else at)
    best = np.full(money.shape, -np.inf)
    chosen = np.full(money.shape, np.nan)
    for j in range(grid.size - 1):
        slope = (continuation[j + 1] - continuation[j]) / (grid[j + 1] - grid[j])
        slope = slope[None, :, None]
        with np.errstate(divide="ignore", invalid="ignore"):
            interior = money - 1.0 / (BETA * slope)
        upper = np.minimum(grid[j + 1], money)
        save = np.clip(np.where(slope > 0, interior, grid[j]), grid[j], upper)
        c = money - save
        with np.errstate(divide="ignore", invalid="ignore"):
            value = np.where((c > 0) & (grid[j] < money), np.log(np.where(c > 0, c, 1.0))
                             - DISUTILITY * WORK[None, None, :]
                             + BETA * (continuation[j][None, :, None] + slope * (save - grid[j])), -np.inf)
        better = value > best
        best[better], chosen[better] = value[better], save[better]
    work = np.argmax(best, axis=2)
    take = np.take_along_axis
    return (take(best, work[..., None], 2)[..., 0], take(chosen, work[..., None], 2)[..., 0], work)


def exact_fixed_point(grid: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """``(v*, save, work)`` of the fitted problem on ``grid``, iterated until a step moves ``v`` by at most
    1e-13."""
    v = np.zeros((grid.size, INCOME.size))
    save = work = np.empty(0)
    for _ in range(2000):
        tv, save, work = exact_bellman(v, grid)
        moved = np.abs(tv - v).max()
        v = tv
        if moved <= 1e-13:
            break
    return v, save, work


def independent_euler_errors(v: np.ndarray, grid: np.ndarray, *, tomorrow: np.ndarray | None = None
                             ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Judd's (1992) errors of the exact solver's policy for ``v``, in plain numpy: ``(k, save, error, measured)``.

    Tomorrow's policy is the exact solver's for ``tomorrow`` (a finite horizon's next period), else for ``v``.

    ``|1 − c̃/c|`` with ``1/c̃ = β Σ_z' P[z, z'] (1 + r)/c''(a', z')`` for log utility, ``c''`` tomorrow's
    consumption at ``a' = save``; at ten test points per grid point ``k`` (centres of equal parts of each
    interval); ``measured`` where today's work choice and every tomorrow's agree (no kink between) and the
    saving is more than one local grid step from both grid ends (common practice, as fixq's rule).
    """
    parts = int(np.ceil(10 * grid.size / (grid.size - 1)))
    k = (grid[:-1, None] + ((np.arange(parts) + 0.5) / parts)[None, :] * np.diff(grid)[:, None]).ravel()
    _, save, work = exact_bellman(v, grid, k)
    c = cash(k)[np.arange(k.size)[:, None], np.arange(INCOME.size)[None, :], work] - save
    _, save_next, work_next = exact_bellman(v if tomorrow is None else tomorrow, grid, save.reshape(-1))
    c_next = cash(save.reshape(-1))[np.arange(save.size)[:, None], np.arange(INCOME.size)[None, :], work_next] \
        - save_next
    expected = (CHAIN[None, :, :] * (1 + R) / c_next.reshape(k.size, INCOME.size, INCOME.size)).sum(axis=2)
    error = np.log10(np.maximum(np.abs(1.0 - 1.0 / (BETA * expected) / c), 2.0**-56))
    step = np.interp(save, 0.5 * (grid[1:] + grid[:-1]), np.diff(grid))
    same = (work_next.reshape(k.size, INCOME.size, INCOME.size) == work[:, :, None]).all(axis=2)
    measured = same & (save - step >= grid[0]) & (save + step <= grid[-1])
    return k, save, error, measured
