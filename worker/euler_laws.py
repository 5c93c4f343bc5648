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
(``∂V/∂y = ∂r/∂y + β E[∂V/∂y' ∂g/∂y]`` and so on), so ``E ∂V/∂y`` is read from the solved value instead, as
the solve reads the value: the slope along ``y`` of the continuation ``EV(·, z) = Σ_z' P[z, z'] V(·, z')``
(what the solve interpolates and maximises against) at tomorrow's states, for today's shock point ``z``, of
tomorrow's value ``V_{t+1}`` at ``s'`` and of the day after's ``V_{t+2}`` at ``s''`` (the same in an infinite
horizon).  :func:`solve_slope` reads it by the solve's interpolation:

* a choice restricted to the grid, or ``linear`` interpolation (:func:`value_slope`): the slope of the
  multilinear interpolant, that of the grid interval along ``y`` holding the point (at a point exactly on a
  grid node of ``y``, the interval to its right), first order in the grid step of ``y``, so these errors
  carry that too;
* ``monotone_cubic`` (:func:`worker.continuous.cubic_slope.cubic_continuation`): the slope of the tensor
  product of Fritsch–Carlson interpolants the solve reads, by the solve's own functions differentiated.  That
  reading is not linear in the value, so the slope of the expectation ``EV`` is read, not the expectation of
  the slopes of ``V`` (with a multilinear reading the two are the same).

Where ``g`` leaves the grid of ``y`` the solve moves ``y'`` to the nearer end, where it does not move with
``k`` or ``x``: the law's slopes count as 0 there.

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

__all__ = ["OpenLaw", "SlopeParts", "SlopeReader", "law_term", "open_laws", "solve_slope", "value_slope"]

SlopeReader = Callable[[np.ndarray, np.ndarray, int], np.ndarray]
"""``slope(points, rows, t) -> ∂EV/∂y_t``: at points (m, states) and today's shock points ``rows`` (m,), the
slope along the state at position ``t`` of the continuation ``EV(·, z) = Σ_z' P[z, z'] V(·, z')``, (m,)."""
SlopeParts = tuple[SlopeReader, SlopeReader, float]
"""The slopes of tomorrow's continuation read today (``V_{t+1}``'s), of the day after's read tomorrow
(``V_{t+2}``'s; the same in an infinite horizon), and tomorrow's discount."""


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


def solve_slope(problem: Any, data: ModelData, value: np.ndarray) -> SlopeReader:
    """The continuation's slopes of ``value`` (flat points) as ``problem``'s solve reads the value: by the monotone
    cubic's tensor product where it interpolates so (``problem.cubic``), else multilinearly (:func:`value_slope`)."""
    if not getattr(problem, "cubic", False):
        return value_slope(data, value)
    from worker.continuous.cubic_slope import cubic_continuation

    read = cubic_continuation(data, value)
    return lambda points, rows, t: read(points, rows, t)[1]


def value_slope(data: ModelData, value: np.ndarray) -> SlopeReader:
    """The slope along one state of the continuation of ``value`` (flat points) read multilinearly over the
    product grid: along that state the slope of the grid interval holding the point (the end intervals' beyond
    the grid), along the others interpolated linearly, held at the ends."""
    sizes, n_z = tuple(data.state_sizes), data.n_shocks
    flat = np.asarray(value, dtype=np.float64).reshape(data.n_grid, n_z)
    table = (data.transition @ flat.T).reshape(n_z, *sizes)  # EV(·, z), today's shock point first
    grids = [np.asarray(grid, dtype=np.float64) for grid in data.state_grids]
    cache: dict[int, np.ndarray] = {}

    def read(points: np.ndarray, rows: np.ndarray, axis: int) -> np.ndarray:
        if axis not in cache:
            shape = [1] * table.ndim
            shape[axis + 1] = grids[axis].size - 1
            cache[axis] = np.diff(table, axis=axis + 1) / np.diff(grids[axis]).reshape(shape)
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
        shock = np.asarray(rows, dtype=np.int64)
        out = np.zeros(points.shape[0])
        for corner in itertools.product((False, True), repeat=len(grids)):
            share = np.prod([w if high else 1.0 - w for w, high in zip(weight, corner)], axis=0)
            if not share.any():
                continue
            index = tuple(up if high else low for low, up, high in zip(lower, upper, corner))
            out += share * slopes[(shock, *index)]
        return out

    return read


def law_term(data: ModelData, laws: tuple[OpenLaw, ...], which: int, slope: tuple[Node, dict[str, Node]],
             env: dict[str, Any], shape: tuple[int, ...], tomorrows: np.ndarray, read: SlopeReader) -> np.ndarray:
    """``Σ_y ∂g_y/∂x · ∂EV/∂y(s')`` (``which`` 0) or ``Σ_y ∂g_y/∂k · ∂EV/∂y(s')`` (1) at ``env``,
    (rows, shock points); ``tomorrows`` the next states (rows × shock points in C order, states), ``read`` the
    slope of the continuation there (:data:`SlopeReader`, at each row's own shock point); ``slope`` the setup's
    ``define_slope`` (0) or ``state_slope`` (1), for the defines' derivatives the laws' slopes use."""
    local = dict(env)
    for name, derived in slope[1].items():
        local[_slopes.prime(name)] = evaluate_tree(derived, local)
    total = np.zeros(shape)
    rows = np.tile(np.arange(shape[1], dtype=np.int64), shape[0])
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
        total += moves * read(tomorrows, rows, law.position).reshape(shape)
    return total
