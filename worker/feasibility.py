"""A grid model's numbers, its numpy evaluation, and the feasibility check of the door.

Nothing here imports numba, so the service can run :func:`check_feasibility`
on every submitted grid document (``service.admission``) without loading the
compiled kernels; :mod:`worker.gridmodel` builds on the same pieces.

A choice is *allowed* at a state when every ``feasible`` expression is
nonzero (NaN counts as nonzero, as everywhere in the expression language),
the reward is a finite number and every ``next`` value is a number.  A state
with no allowed choice makes the document infeasible: the error names the
first few such states by their grid values, at ``model.feasible`` (or
``model.reward`` when some choices are feasible but none has a finite
reward).
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass
from typing import Any

import numpy as np

from worker import _codegen
from worker.costs import CHUNK_ELEMENTS
from worker.document.horizon import PERIOD_NAME
from worker.draws import Draws, draw_probabilities, model_draws
from worker.errors import InfeasibleModel, InvalidDocument, join_path
from worker.expressions import Expression, evaluate, parse
from worker.shocks import product_chain

__all__ = [
    "FEASIBILITY_MAX_PASS",
    "FEASIBILITY_MAX_STATES",
    "ModelData",
    "check_feasibility",
    "evaluate_pairs",
    "feasibility_scan",
    "infeasible",
    "model_data",
    "period_params",
]

FEASIBILITY_MAX_PASS = 4096
"""Most choices the feasibility check tries in one pass over the undecided states (count)."""
FEASIBILITY_MAX_STATES = 50_000_000
"""A budgeted feasibility check (the service's door) of more states, or more choices, than
this answers "undecided" at once instead of allocating its work lists (count)."""
_LISTED_STATES = 3
"""States named in an infeasibility error before the rest are counted."""


@dataclass
class ModelData:
    """A grid model's numbers and parsed expressions (no tables)."""

    params: tuple[str, ...]
    param_values: np.ndarray
    states: tuple[str, ...]
    state_grids: list[np.ndarray]
    shocks: tuple[str, ...]
    shock_values: list[np.ndarray]
    shock_table: np.ndarray
    transition: np.ndarray
    choices: tuple[str, ...]
    choice_grids: list[np.ndarray]
    choice_is_menu: tuple[bool, ...]
    setter: tuple[int | None, ...]
    source: _codegen.ModelSource
    span: tuple[Expression, Expression] | None = None
    """A continuous choice given by min and max: the two bounds; its grid then holds fractions of the interval."""
    span_choice: int = 0
    """The position of the continuous choice among ``choices`` (its grid holds fractions when ``span`` is set)."""
    draws: Draws | None = None
    """The shocks drawn after the choice (not axes of the value function; see :mod:`worker.draws`)."""

    @property
    def state_sizes(self) -> tuple[int, ...]:
        return tuple(g.size for g in self.state_grids)

    @property
    def choice_sizes(self) -> tuple[int, ...]:
        return tuple(g.size for g in self.choice_grids)

    @property
    def n_grid(self) -> int:
        return math.prod(self.state_sizes)

    @property
    def n_shocks(self) -> int:
        return self.shock_table.shape[0]

    @property
    def n(self) -> int:
        return self.n_grid * self.n_shocks

    @property
    def n_choices(self) -> int:
        return math.prod(self.choice_sizes)

    def state_env(self, rows: np.ndarray) -> dict[str, np.ndarray]:
        """Values of states and shocks at flat states ``rows``, each shaped ``(len(rows), 1)``."""
        ix, iz = np.divmod(rows, self.n_shocks)
        env: dict[str, np.ndarray] = {}
        for name, grid, index in zip(self.states, self.state_grids, np.unravel_index(ix, self.state_sizes)):
            env[name] = grid[index][:, None]
        for t, name in enumerate(self.shocks):
            env[name] = self.shock_table[iz, t][:, None]
        return env

    def choice_env(self, columns: np.ndarray) -> dict[str, np.ndarray]:
        """Values of the choices at flat choices ``columns``, each shaped ``(1, len(columns))``."""
        return {
            name: grid[index][None, :]
            for name, grid, index in zip(self.choices, self.choice_grids, np.unravel_index(columns, self.choice_sizes))
        }

    def describe_state(self, i: int) -> str:
        ix, iz = divmod(int(i), self.n_shocks)
        parts = [
            f"{name} = {grid[index]:.6g}"
            for name, grid, index in zip(self.states, self.state_grids, np.unravel_index(ix, self.state_sizes))
        ]
        parts += [f"{name} = {self.shock_table[iz, t]:.6g}" for t, name in enumerate(self.shocks)]
        return ", ".join(parts)

    def describe_choice(self, c: int) -> str:
        return ", ".join(
            f"{name} = {grid[index]:.6g}"
            for name, grid, index in zip(self.choices, self.choice_grids, np.unravel_index(int(c), self.choice_sizes))
        )


@dataclass
class _Evaluated:
    """Numpy evaluation of the model over a block of (state, choice) pairs, all ``(rows, columns)``."""

    feasible: np.ndarray
    reward: np.ndarray
    next_values: list[np.ndarray]
    probs: np.ndarray | None = None
    """With draws after the choice: ``(K, rows, columns)``, the draws' probabilities; ``reward`` is then the
    expectation over them and each of ``next_values`` is ``(K, rows, columns)``, one entry per draw."""

    @property
    def allowed(self) -> np.ndarray:
        ok = self.feasible & np.isfinite(self.reward)
        for values in self.next_values:
            ok &= ~np.isnan(values) if self.probs is None else ~(np.isnan(values) & (self.probs > 0)).any(axis=0)
        return ok

    @property
    def bad(self) -> np.ndarray:
        """Feasible pairs excluded for a NaN/+inf reward or a NaN next value."""
        return self.feasible & ~self.allowed & (self.reward != -np.inf)


def model_data(doc: Any) -> ModelData:
    model = doc.model
    params = tuple(model.params) + (() if getattr(model, "horizon", None) is None else (PERIOD_NAME,))
    states = tuple(model.states)
    shocks = tuple(name for name, spec in model.shocks.items() if not spec.after_choice)
    choices = tuple(model.choices)
    state_grids = [np.ascontiguousarray(axis.grid(path=join_path("model", "states", name)), dtype=np.float64)
                   for name, axis in model.states.items()]
    chains = [spec.chain(path=join_path("model", "shocks", name)) for name, spec in model.shocks.items()
              if name in shocks]
    shock_table, transition = product_chain(chains)
    choice_grids = []
    setter: list[int | None] = [None] * len(states)
    for j, (name, spec) in enumerate(model.choices.items()):
        choice_grids.append(np.ascontiguousarray(spec.grid(path=join_path("model", "choices", name)), dtype=np.float64))
        if spec.next_of is not None:
            setter[states.index(spec.next_of)] = j
    defines = tuple(
        (name, parse(text, path=join_path("model", "define", name))) for name, text in model.define.items()
    )
    reward = parse(model.reward, path=join_path("model", "reward"))
    feasible = tuple(parse(text, path=join_path("model", "feasible", k)) for k, text in enumerate(model.feasible))
    next_laws = []
    for t, name in enumerate(states):
        if setter[t] is None:
            if name not in model.next:
                raise InvalidDocument.at(
                    join_path("model", "next", name),
                    f"state `{name}` has no law of motion: give next.{name} or a choice with next_of \"{name}\"",
                )
            next_laws.append((t, parse(model.next[name], path=join_path("model", "next", name))))
    span, span_choice = None, 0
    for j, (name, spec) in enumerate(model.choices.items()):
        if spec.continuous:
            span_choice = j
        if spec.continuous and spec.next_of is None:
            span = tuple(parse(str(bound), path=join_path("model", "choices", name, key))
                         for key, bound in (("min", spec.min), ("max", spec.max)))
    source = _codegen.ModelSource(
        params=params,
        states=states,
        shocks=shocks,
        choices=choices,
        defines=defines,
        reward=reward,
        feasible=feasible,
        next=tuple(next_laws),
    )
    return ModelData(
        params=params,
        param_values=period_params(model, 0),
        states=states,
        state_grids=state_grids,
        shocks=shocks,
        shock_values=[np.asarray(values, dtype=np.float64) for values, _ in chains],
        shock_table=np.ascontiguousarray(shock_table, dtype=np.float64),
        transition=np.ascontiguousarray(transition, dtype=np.float64),
        choices=choices,
        choice_grids=choice_grids,
        choice_is_menu=tuple(spec.values is not None for spec in model.choices.values()),
        setter=tuple(setter),
        source=source,
        span=span,
        span_choice=span_choice,
        draws=model_draws(model),
    )


def period_params(model: Any, period: int) -> np.ndarray:
    """The values of a grid model's params in ``period`` (0-based), in :attr:`ModelData.params` order.

    A param given per period (a list) takes its entry of that period; with a horizon the
    last value is ``period`` itself.  Without a horizon every param is a number.
    """
    values = [float(value[period] if isinstance(value, list) else value) for value in model.params.values()]
    if getattr(model, "horizon", None) is not None:
        values.append(float(period))
    return np.array(values, dtype=np.float64)


def evaluate_pairs(data: ModelData, rows: np.ndarray, columns: np.ndarray) -> _Evaluated:
    """Evaluate feasibility, reward and next values at ``rows × columns`` with numpy."""
    env: dict[str, Any] = dict(zip(data.params, data.param_values.tolist()))
    env.update(data.state_env(rows))
    env.update(data.choice_env(columns))
    shape = (rows.size, columns.size)
    src = data.source
    with np.errstate(all="ignore"):
        if data.span is not None:
            low, high = (evaluate(bound, env) for bound in data.span)
            name = data.choices[data.span_choice]
            env[name] = low + env[name] * (high - low)
        draws = data.draws
        for name, expr in src.defines:
            if draws is None or name not in draws.dependent:
                env[name] = evaluate(expr, env)
        feasible = np.ones(shape, dtype=bool)
        for expr in src.feasible:
            feasible &= evaluate(expr, env) != 0.0
        if draws is not None:
            return _with_draws(data, draws, env, rows, columns, feasible)
        reward = np.broadcast_to(evaluate(src.reward, env), shape)
        next_values = [np.broadcast_to(evaluate(expr, env), shape) for _, expr in src.next]
    return _Evaluated(feasible, reward, next_values)


def _with_draws(
    data: ModelData, draws: Draws, env: dict[str, Any], rows: np.ndarray, columns: np.ndarray, feasible: np.ndarray
) -> _Evaluated:
    """The block evaluated at every combination of the draws: the expected reward, each draw's next values."""
    shape = feasible.shape
    probs = draw_probabilities(
        draws, env, shape, feasible,
        lambda r, c: f"{data.describe_state(int(rows[r]))} with {data.describe_choice(int(columns[c]))}",
    )
    # Every combination at once, along a leading axis: one evaluation of each expression per block.  One per
    # combination cost a block's Python overhead each time, and blocks shrink as the draws grow (a block holds
    # every draw of its rows), so the fill grew as the square of the draws: 1.2 s at 2,000 draws of a reward-only
    # draw, 72 s at 20,000 (measured 2026-12-05).
    size = draws.size
    combination = np.unravel_index(np.arange(size), [v.size for v in draws.values])
    env.update({name: v[index].reshape(size, 1, 1)
                for name, v, index in zip(draws.names, draws.values, combination)})
    for name, expr in data.source.defines:
        if name in draws.dependent:
            env[name] = evaluate(expr, env)
    # A draw that cannot happen adds nothing, whatever its reward (0 · inf would be NaN).  The sum runs along the
    # leading axis in order, as the loop over combinations added them.
    terms = np.where(probs > 0, probs * np.broadcast_to(evaluate(data.source.reward, env), (size, *shape)), 0.0)
    reward = np.add.reduce(terms, axis=0)
    next_values = [np.array(np.broadcast_to(evaluate(expr, env), (size, *shape)), dtype=np.float64)
                   for _, expr in data.source.next]
    return _Evaluated(feasible, reward, next_values, probs)


def infeasible(data: ModelData, stuck: np.ndarray, any_feasible: np.ndarray) -> InfeasibleModel:
    """The error for states ``stuck`` (flat indices) with no allowed choice."""
    conditions = " and ".join(f"`{expr.text}`" for expr in data.source.feasible)
    errors = []
    for i in stuck[:_LISTED_STATES]:
        where = data.describe_state(i)
        if not data.source.feasible:
            errors.append(
                {
                    "path": "model.reward",
                    "message": f"at {where} every choice gives a reward that is -inf, NaN or +inf, so none is allowed",
                }
            )
        elif any_feasible[i]:
            errors.append(
                {
                    "path": "model.reward",
                    "message": f"at {where} the choices that satisfy {conditions} all give a reward that is "
                    "-inf, NaN or +inf, so none is allowed",
                }
            )
        elif data.span is not None:
            # A continuous choice given by min and max is scanned at its points only: before, this said "no choice
            # satisfies" where a window of allowed choices lay between two scanned points.
            name, points = data.choices[data.span_choice], data.choice_grids[data.span_choice].size
            errors.append({"path": "model.feasible", "message": f"at {where} none of the {points} scanned points of "
                           f"`{name}`'s interval satisfies {conditions}; an allowed window between them is missed "
                           f"(raise model.choices.{name}.points)"})
        else:
            errors.append({"path": "model.feasible", "message": f"at {where} no choice satisfies {conditions}"})
    if stuck.size > _LISTED_STATES:
        errors.append({
            "path": errors[0]["path"],
            "message": f"… and {stuck.size - _LISTED_STATES:,} more of the {data.n:,} points have no allowed choice",
        })
    return InfeasibleModel(errors, states=int(stuck.size))


def _choice_order(n_choices: int) -> np.ndarray:
    """Every flat choice once, coarse to fine: both ends, then midpoints of ever finer halvings."""
    seen = np.zeros(n_choices, dtype=bool)
    ends = np.unique(np.array([0, n_choices - 1], dtype=np.int64))
    seen[ends] = True
    parts = [ends]
    level = 0
    while (1 << level) < 2 * n_choices:
        points = ((2 * np.arange(1 << level, dtype=np.int64) + 1) * n_choices) >> (level + 1)
        points = np.unique(points[~seen[points]])
        seen[points] = True
        parts.append(points)
        level += 1
    parts.append(np.flatnonzero(~seen))
    return np.concatenate(parts)


def feasibility_scan(data: ModelData, budget_s: float | None) -> dict[str, Any]:
    """Find, per state, one allowed choice; raise :class:`InfeasibleModel` for states with none.

    Choices are tried coarse to fine (:func:`_choice_order`) in passes of
    doubling size, and a state leaves the scan at its first allowed choice:
    where allowed choices form wide stretches (the usual case) a state costs
    one or two evaluations, and the worst case is one evaluation per pair.
    """
    started = time.perf_counter()
    n, n_choices = data.n, data.n_choices
    if budget_s is not None and (n > FEASIBILITY_MAX_STATES or n_choices > FEASIBILITY_MAX_STATES):
        return {"complete": False, "points": n, "unresolved": n, "pairs_evaluated": 0,
                "seconds": time.perf_counter() - started}
    order = _choice_order(n_choices)
    active = np.arange(n, dtype=np.int64)
    any_feasible = np.zeros(n, dtype=bool)
    evaluated = 0
    position, width = 0, 1
    while position < n_choices and active.size:
        columns = order[position : position + width]
        position += columns.size
        width = min(2 * width, FEASIBILITY_MAX_PASS)
        rows_per_chunk = max(1, CHUNK_ELEMENTS // (columns.size * (data.draws.size if data.draws is not None else 1)))
        resolved = np.zeros(active.size, dtype=bool)
        for start in range(0, active.size, rows_per_chunk):
            rows = active[start : start + rows_per_chunk]
            block = evaluate_pairs(data, rows, columns)
            resolved[start : start + rows.size] = block.allowed.any(axis=1)
            any_feasible[rows] |= block.feasible.any(axis=1)
            evaluated += rows.size * columns.size
            unresolved = active.size - int(resolved[: start + rows.size].sum())
            if unresolved and budget_s is not None and time.perf_counter() - started > budget_s:
                return {"complete": False, "points": n, "unresolved": unresolved, "pairs_evaluated": evaluated,
                        "seconds": time.perf_counter() - started}
        active = active[~resolved]
    if active.size:
        raise infeasible(data, active, any_feasible)
    return {"complete": True, "points": n, "unresolved": 0, "pairs_evaluated": evaluated,
            "seconds": time.perf_counter() - started}


def check_feasibility(doc: Any, *, budget_s: float | None = None) -> dict[str, Any]:
    """Check that every point of a validated grid document has an allowed choice.

    Cheap and compile-free: numpy evaluation in chunks, stopping per point at
    its first allowed choice (see :func:`feasibility_scan`).

    Parameters
    ----------
    doc : ProblemDocument with a grid model
    budget_s : float, optional
        Seconds after which the scan gives up undecided (``complete`` false).

    Returns
    -------
    dict
        ``complete`` (bool), ``points`` (points of the state space),
        ``unresolved`` (points not yet shown feasible when the budget ran
        out), ``pairs_evaluated``, ``seconds``.

    Raises
    ------
    InfeasibleModel
        Naming the first few points with no allowed choice by their values.
    """
    return feasibility_scan(model_data(doc), budget_s)
