"""Euler-equation errors when another state's law of motion moves with the chosen state or the choice.

The choice ``x`` sets tomorrow's ``k' = x``; another state ``y`` moves by ``y' = g(s, x, z)`` (``s`` today's
states) that moves with ``k`` or ``x`` — a stock that grows with the capital installed, say.  The value
``V(s) = max_x r(s, x) + β E V(s')`` then has, at an interior choice,

    first-order condition:  ∂r/∂x + β E[ ∂V/∂k(s') + Σ_y ∂V/∂y(s') · ∂g_y/∂x ] = 0,
    envelope condition:     ∂V/∂k(s) = ∂r/∂k(s, x) + β E[ Σ_y ∂V/∂y(s') · ∂g_y/∂k ],

the second from differentiating ``V(s) = r(s, x(s)) + β E V(k' = x(s), y' = g(s, x(s), z), z')`` in ``k``:
the terms in ``∂x/∂k`` are the first-order condition times ``∂x/∂k``, zero at an interior choice, and what
is left is the direct slope of the reward and of every law in ``k``.  With ``r`` depending on ``x`` through
``c``, ``∂r/∂x = ∂r/∂c · ∂c/∂x``, and the Euler value ``c̃`` solves

    ∂r/∂c(c̃) · ∂c/∂x = −β E_z'[ ∂r/∂k(s', x') + β' E_z''[ Σ_y ∂V/∂y(s'') ∂g_y/∂k(s') ]
                                 + Σ_y ∂V/∂y(s') ∂g_y/∂x(s) ],

``s' = (x, g(s, x, z), z')``, ``x' = x(s')``, ``s''`` the day after's states from ``s'`` and ``x'``.  The
policy gives every term but ``∂V/∂y``: the envelope condition of ``y`` is itself recursive
(``∂V/∂y = ∂r/∂y + β E[∂V/∂y' ∂g/∂y]`` and so on), so ``∂V/∂y`` is read from the solved value instead,
as the solve reads the value (:func:`value_slope`: the slope along ``y`` of the multilinear interpolant,
which is what a choice restricted to the grid or ``linear`` interpolation maximises against), the value
of tomorrow ``V_{t+1}`` at ``s'`` and of the day after ``V_{t+2}`` at ``s''`` (the same in an infinite
horizon).  Reading a slope of a piecewise-linear value is first order in the grid step of ``y``, so these
errors carry that too.  Where ``g`` leaves the grid of ``y`` the solve moves ``y'`` to the nearer end,
where it does not move with ``k`` or ``x``: the law's slopes count as 0 there.  At a point exactly on a
grid node of ``y`` the slope is the one of the interval to its right.

Draws after the choice enter as elsewhere: every term is taken per draw and weighted by its probability.
"""

from __future__ import annotations

import itertools
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np

from worker import _slopes
from worker.expressions import Node, names_in
from worker.expressions.evaluator import evaluate_tree
from worker.feasibility import ModelData

__all__ = ["OpenLaw", "SlopeParts", "SlopeReader", "law_term", "open_laws", "value_slope"]

SlopeReader = Callable[[np.ndarray, int], np.ndarray]
"""``slope(points, t) -> ∂V/∂y_t``: at points (rows, states), the value's slope along the state at position
``t``, at every shock point, (rows, shock points)."""
SlopeParts = tuple[SlopeReader, SlopeReader, float]
"""The slopes of tomorrow's value read today (``V_{t+1}``), of the day after's read tomorrow (``V_{t+2}``; the
same in an infinite horizon), and tomorrow's discount."""


@dataclass(frozen=True)
class OpenLaw:
    """A law of motion ``y' = g`` that moves with the chosen state or the choice: its slopes in them."""

    position: int
    """The state ``y``'s position."""
    in_choice: Node | None
    """∂g/∂x (the defines' derivatives are the setup's ``define_slope``'s); None when it does not move with x."""
    in_state: Node | None
    """∂g/∂k (the defines' derivatives are the setup's ``state_slope``'s); None when it does not move with k."""


def open_laws(data: ModelData, moved_k: set[str], moved_x: set[str], state: str, choice: str,
              in_choice: dict[str, Node], in_state: dict[str, Node]) -> tuple[OpenLaw, ...]:
    """The laws of motion that move with ``k`` (names in ``moved_k``: ``k`` and the defines using it) or with
    ``x`` (``moved_x``), with their slopes; raises :class:`worker._slopes.NotSmooth` where a law is not
    differentiable."""
    out = []
    for position, law in data.source.next:
        used = names_in(law.tree)
        by_x, by_k = bool(used & moved_x), bool(used & moved_k)
        if by_x or by_k:
            out.append(OpenLaw(position,
                               _slopes.derivative(law.tree, choice, in_choice) if by_x else None,
                               _slopes.derivative(law.tree, state, in_state) if by_k else None))
    return tuple(out)


def value_slope(data: ModelData, value: np.ndarray) -> SlopeReader:
    """The slope along one state of ``value`` (flat points) read multilinearly over the product grid: along
    that state the slope of the grid interval holding the point (the end intervals' beyond the grid), along
    the others interpolated linearly, held at the ends."""
    sizes, n_z = tuple(data.state_sizes), data.n_shocks
    table = np.asarray(value, dtype=np.float64).reshape(*sizes, n_z)
    grids = [np.asarray(grid, dtype=np.float64) for grid in data.state_grids]
    cache: dict[int, np.ndarray] = {}

    def read(points: np.ndarray, axis: int) -> np.ndarray:
        if axis not in cache:
            shape = [1] * table.ndim
            shape[axis] = grids[axis].size - 1
            cache[axis] = np.diff(table, axis=axis) / np.diff(grids[axis]).reshape(shape)
        slopes = cache[axis]
        lower, upper, weight = [], [], []
        for t, grid in enumerate(grids):
            x = points[:, t]
            if t == axis or grid.size < 2:
                top = max(grid.size - 2, 0)
                i = np.clip(np.searchsorted(grid, x, side="right") - 1, 0, top)
                lower.append(i)
                upper.append(i)
                weight.append(np.zeros(x.size))
                continue
            i = np.clip(np.searchsorted(grid, x, side="right") - 1, 0, grid.size - 2)
            lower.append(i)
            upper.append(i + 1)
            weight.append(np.clip((x - grid[i]) / (grid[i + 1] - grid[i]), 0.0, 1.0))
        out = np.zeros((points.shape[0], n_z))
        for corner in itertools.product((False, True), repeat=len(grids)):
            share = np.prod([w if high else 1.0 - w for w, high in zip(weight, corner)], axis=0)
            if not share.any():
                continue
            index = tuple(up if high else low for low, up, high in zip(lower, upper, corner))
            out += share[:, None] * slopes[index]
        return out

    return read


def law_term(data: ModelData, laws: tuple[OpenLaw, ...], which: int, slope: tuple[Node, dict[str, Node]],
             env: dict[str, Any], shape: tuple[int, ...], tomorrows: np.ndarray, read: SlopeReader,
             transition: np.ndarray) -> np.ndarray:
    """``Σ_y ∂g_y/∂x · E_z'[∂V/∂y(s')]`` (``which`` 0) or ``Σ_y ∂g_y/∂k · E_z'[∂V/∂y(s')]`` (1) at ``env``,
    (rows, shock points); ``tomorrows`` the next states (rows × shock points, states), ``read`` the slope of
    the value there, ``transition`` the shock chain; ``slope`` the setup's ``define_slope`` (0) or
    ``state_slope`` (1), for the defines' derivatives the laws' slopes use."""
    local = dict(env)
    for name, derived in slope[1].items():
        local[_slopes.prime(name)] = evaluate_tree(derived, local)
    total = np.zeros(shape)
    for law in laws:
        tree = law.in_choice if which == 0 else law.in_state
        if tree is None:
            continue
        grid = data.state_grids[law.position]
        if grid.size < 2:  # one grid point: the solve moves every y' there, so it never moves with k or x
            continue
        level = np.broadcast_to(evaluate_tree(dict(data.source.next)[law.position].tree, env), shape)
        inside = (level >= grid[0]) & (level <= grid[-1])  # moved to the nearer end outside: it does not move
        moves = np.where(inside, np.broadcast_to(evaluate_tree(tree, local), shape), 0.0)
        value_slope_next = read(tomorrows, law.position).reshape(shape[0], shape[1], -1)
        total += moves * np.einsum("azw,zw->az", value_slope_next, transition)
    return total
