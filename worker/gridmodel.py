"""Grid documents (``kind: grid``) compiled to fast Bellman operators.

Semantics (DESIGN.md section 3b)
--------------------------------
* The value array has shape ``(state sizes..., shock sizes...)`` in document
  order; flat state ``i = x · n_shocks + z`` with ``x`` the C-order index over
  the state grids and ``z`` over the product chain of the shocks (first shock
  slowest).  The choice space is the C-order product of the choices.
* A ``next_of`` choice picks tomorrow's grid point of its state directly.  A
  state with a ``next`` expression moves to a value split between the two
  neighbouring grid points by linear interpolation (several such states: the
  product of the per-state weights over the corners); a value outside the grid
  is moved to its nearer end and *counted* (``clamped_next`` in the
  diagnostics).
* Shocks evolve by their chain whatever is chosen, so the continuation is
  ``EV(x', z) = Σ_z' P[z, z'] V(x', z')``, one matrix product per sweep.
* ``define`` is evaluated in order; ``feasible`` holds when every expression
  is nonzero (NaN counts as nonzero, as everywhere in the expression
  language); ``reward`` is one expression.

Rewards that are not finite
---------------------------
A choice is *allowed* at a state when every feasibility expression holds, its
reward is a finite number and every ``next`` value is a number (not NaN).

* ``-inf`` is a legitimate way to write "not allowed" (``log(0)``, say); such
  pairs are excluded silently.
* NaN or ``+inf`` at a feasible point, or a NaN ``next`` value, almost always
  means an expression left its domain (a power or log of a negative number).
  Such pairs are excluded too — they never enter the value function — and
  the diagnostics warn, with their count and one example state and choice.
  In the precomputed regime the count covers every pair; on the fly it
  covers the pairs the last exact step evaluated (skipped blocks are not
  evaluated).

A state with no allowed choice makes the document infeasible:
:class:`~worker.errors.InfeasibleModel` names the first few such states by
their grid values, at ``model.feasible`` (or ``model.reward`` when choices
are feasible but none has a finite reward).  :func:`check_feasibility` runs
the same check cheaply, without compiling anything, for the service's door.

Regimes and hints
-----------------
:func:`worker.estimate.grid_plan` picks the regime (``precomputed`` tables or
``on_the_fly`` pointwise evaluation); both run the same generated search code
(:mod:`worker._codegen`).  Hints are used when the model has exactly one
choice (monotone: that choice is ``next_of`` a state); ``restricted=False``
always searches every allowed choice exactly — in the on-the-fly regime by a
branch-and-bound over blocks of choices whose bounds are sound, so its
answer equals the exhaustive search bit for bit.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass
from types import ModuleType, SimpleNamespace
from typing import Any

import numpy as np
import scipy.sparse as sp

from worker import _codegen, kernels
from worker.errors import InfeasibleModel, InvalidDocument, join_path
from worker.estimate import CHUNK_ELEMENTS, GridPlan, grid_plan
from worker.expressions import evaluate, parse
from worker.grids import locate
from worker.shocks import product_chain

__all__ = [
    "BNB_LEAF",
    "EDGE_WARNING_SHARE",
    "SCAN_MAX_PAIRS",
    "GridProblem",
    "check_feasibility",
    "compile_grid",
]

BNB_LEAF = 16
"""Choices per leaf block of the exact branch-and-bound search (count; of 4, 8, 16 and 32,
8 and 16 were fastest on the growth benchmark at 1,000 and 5,000 choices)."""
EDGE_WARNING_SHARE = 0.01
"""Share of states at the lowest or highest point of a choice grid above which the diagnostics warn."""
SCAN_MAX_PAIRS = 20_000_000
"""On the fly, (state, choice) pairs up to which the diagnostics count clamped pairs over all choices."""
FEASIBILITY_MAX_PASS = 4096
"""Most choices the feasibility check tries in one pass over the undecided states (count)."""
FEASIBILITY_MAX_STATES = 50_000_000
"""A budgeted feasibility check (the service's door) of more states than this answers
"undecided" at once instead of allocating its work lists (count)."""
_LISTED_STATES = 3
"""States named in an infeasibility error before the rest are counted."""


@dataclass
class _ModelData:
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

    @property
    def allowed(self) -> np.ndarray:
        ok = self.feasible & np.isfinite(self.reward)
        for values in self.next_values:
            ok &= ~np.isnan(values)
        return ok

    @property
    def bad(self) -> np.ndarray:
        """Feasible pairs excluded for a NaN/+inf reward or a NaN next value."""
        return self.feasible & ~self.allowed & (self.reward != -np.inf)


def _model_data(doc: Any) -> _ModelData:
    model = doc.model
    params = tuple(model.params)
    states = tuple(model.states)
    shocks = tuple(model.shocks)
    choices = tuple(model.choices)
    state_grids = [np.ascontiguousarray(axis.grid(path=join_path("model", "states", name)), dtype=np.float64)
                   for name, axis in model.states.items()]
    chains = [spec.chain(path=join_path("model", "shocks", name)) for name, spec in model.shocks.items()]
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
    return _ModelData(
        params=params,
        param_values=np.array([float(model.params[name]) for name in params], dtype=np.float64),
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
    )


def _evaluate(data: _ModelData, rows: np.ndarray, columns: np.ndarray) -> _Evaluated:
    """Evaluate feasibility, reward and next values at ``rows × columns`` with numpy."""
    env: dict[str, Any] = dict(zip(data.params, data.param_values.tolist()))
    env.update(data.state_env(rows))
    env.update(data.choice_env(columns))
    shape = (rows.size, columns.size)
    src = data.source
    with np.errstate(all="ignore"):
        for name, expr in src.defines:
            env[name] = evaluate(expr, env)
        feasible = np.ones(shape, dtype=bool)
        for expr in src.feasible:
            feasible &= evaluate(expr, env) != 0.0
        reward = np.broadcast_to(evaluate(src.reward, env), shape)
        next_values = [np.broadcast_to(evaluate(expr, env), shape) for _, expr in src.next]
    return _Evaluated(feasible, reward, next_values)


def _infeasible(data: _ModelData, stuck: np.ndarray, any_feasible: np.ndarray) -> InfeasibleModel:
    """The error for states ``stuck`` (flat indices) with no allowed choice."""
    conditions = " and ".join(f"`{expr.text}`" for expr in data.source.feasible)
    errors = []
    for i in stuck[:_LISTED_STATES]:
        where = data.describe_state(i)
        if not data.source.feasible:
            errors.append({"path": "model.reward", "message": f"at {where} every choice gives a reward that is -inf, NaN or +inf, so none is allowed"})
        elif any_feasible[i]:
            errors.append({
                "path": "model.reward",
                "message": f"at {where} the choices that satisfy {conditions} all give a reward that is -inf, NaN or +inf, so none is allowed",
            })
        else:
            errors.append({"path": "model.feasible", "message": f"at {where} no choice satisfies {conditions}"})
    if stuck.size > _LISTED_STATES:
        errors.append({
            "path": errors[0]["path"],
            "message": f"… and {stuck.size - _LISTED_STATES:,} more of the {data.n:,} states have no allowed choice",
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


def _feasibility_scan(data: _ModelData, budget_s: float | None) -> dict[str, Any]:
    """Find, per state, one allowed choice; raise :class:`InfeasibleModel` for states with none.

    Choices are tried coarse to fine (:func:`_choice_order`) in passes of
    doubling size, and a state leaves the scan at its first allowed choice:
    where allowed choices form wide stretches (the usual case) a state costs
    one or two evaluations, and the worst case is one evaluation per pair.
    """
    started = time.perf_counter()
    n, n_choices = data.n, data.n_choices
    if budget_s is not None and n > FEASIBILITY_MAX_STATES:
        return {"complete": False, "states": n, "unresolved": n, "pairs_evaluated": 0,
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
        rows_per_chunk = max(1, CHUNK_ELEMENTS // columns.size)
        resolved = np.zeros(active.size, dtype=bool)
        for start in range(0, active.size, rows_per_chunk):
            rows = active[start : start + rows_per_chunk]
            block = _evaluate(data, rows, columns)
            resolved[start : start + rows.size] = block.allowed.any(axis=1)
            any_feasible[rows] |= block.feasible.any(axis=1)
            evaluated += rows.size * columns.size
            unresolved = active.size - int(resolved[: start + rows.size].sum())
            if unresolved and budget_s is not None and time.perf_counter() - started > budget_s:
                return {"complete": False, "states": n, "unresolved": unresolved, "pairs_evaluated": evaluated,
                        "seconds": time.perf_counter() - started}
        active = active[~resolved]
    if active.size:
        raise _infeasible(data, active, any_feasible)
    return {"complete": True, "states": n, "unresolved": 0, "pairs_evaluated": evaluated,
            "seconds": time.perf_counter() - started}


def check_feasibility(doc: Any, *, budget_s: float | None = None) -> dict[str, Any]:
    """Check that every state of a validated grid document has an allowed choice.

    Cheap and compile-free: numpy evaluation in chunks, stopping per state at
    its first allowed choice (see :func:`_feasibility_scan`).

    Parameters
    ----------
    doc : ProblemDocument with a grid model
    budget_s : float, optional
        Seconds after which the scan gives up undecided (``complete`` false).

    Returns
    -------
    dict
        ``complete`` (bool), ``states``, ``unresolved`` (states not yet shown
        feasible when the budget ran out), ``pairs_evaluated``, ``seconds``.

    Raises
    ------
    InfeasibleModel
        Naming the first few states with no allowed choice by their values.
    """
    return _feasibility_scan(_model_data(doc), budget_s)


def _precompute(data: _ModelData) -> tuple[tuple[np.ndarray, ...], dict[str, Any]]:
    """Tables of every (state, choice) pair for the ``table`` backend, and their counts.

    Returns ``(R, next_base, node_lower, node_weight)`` with ``R`` (n, C)
    (``-inf`` where not allowed), ``next_base`` (C,) int64, and per
    interpolated state the lower node (n, C, m) int32 and upper weight
    (n, C, m) float64; and counts of excluded and clamped pairs, with per
    state flags ``any_feasible`` and ``any_allowed``.
    """
    n, n_choices = data.n, data.n_choices
    interpolated = [t for t, j in enumerate(data.setter) if j is None]
    strides = np.array([math.prod(data.state_sizes[t + 1 :]) for t in range(len(data.states))], dtype=np.int64)
    choice_index = np.unravel_index(np.arange(n_choices), data.choice_sizes)
    next_base = np.zeros(n_choices, dtype=np.int64)
    for t, j in enumerate(data.setter):
        if j is not None:
            next_base += strides[t] * choice_index[j]
    R = np.empty((n, n_choices))
    if interpolated:
        lower = np.empty((n, n_choices, len(interpolated)), dtype=np.int32)
        weight = np.empty((n, n_choices, len(interpolated)))
    else:
        lower, weight = np.zeros((1, 1, 1), np.int32), np.zeros((1, 1, 1))
    any_feasible = np.zeros(n, dtype=bool)
    any_allowed = np.zeros(n, dtype=bool)
    bad_count = clamped_count = allowed_count = 0
    bad_example: tuple[int, int] | None = None
    columns = np.arange(n_choices, dtype=np.int64)
    rows_per_chunk = max(1, CHUNK_ELEMENTS // n_choices)
    for start in range(0, n, rows_per_chunk):
        stop = min(n, start + rows_per_chunk)
        rows = np.arange(start, stop, dtype=np.int64)
        block = _evaluate(data, rows, columns)
        allowed = block.allowed
        np.copyto(R[start:stop], np.where(allowed, block.reward, -np.inf))
        any_feasible[start:stop] = block.feasible.any(axis=1)
        any_allowed[start:stop] = allowed.any(axis=1)
        allowed_count += int(allowed.sum())
        bad = block.bad
        count = int(bad.sum())
        if count:
            if bad_example is None:
                r, c = np.argwhere(bad)[0]
                bad_example = (int(rows[r]), int(c))
            bad_count += count
        clamped_any = np.zeros(allowed.shape, dtype=bool)
        for k, t in enumerate(interpolated):
            low, w, clamped = locate(data.state_grids[t], block.next_values[k])
            lower[start:stop, :, k] = low
            weight[start:stop, :, k] = w
            clamped_any |= clamped
        if interpolated:
            clamped_count += int((clamped_any & allowed).sum())
    counts = {
        "allowed": allowed_count,
        "bad": bad_count,
        "bad_example": bad_example,
        "clamped": clamped_count if interpolated else None,
        "any_feasible": any_feasible,
        "any_allowed": any_allowed,
    }
    return (R, next_base, lower, weight), counts


def compile_grid(doc: Any, *, limits: dict[str, Any] | None = None, regime: str | None = None) -> "GridProblem":
    """Compile a validated grid ``ProblemDocument`` into a :class:`GridProblem`.

    Parameters
    ----------
    doc : ProblemDocument
    limits : dict, optional
        ``{"max_bytes": int}``: the memory cap the precompute budget derives
        from (default: the worker's cap).
    regime : str, optional
        Force ``precomputed`` or ``on_the_fly`` (tests and benchmarks);
        default: :func:`worker.estimate.grid_plan`'s choice.

    Raises
    ------
    InvalidDocument
        A state without a law of motion, or a grid or chain the schema let
        through but that cannot be built.
    InfeasibleModel
        Some state has no allowed choice.
    """
    started = time.perf_counter()
    plan = grid_plan(doc.model, limits=limits, method=doc.solver.method)
    chosen = regime or plan.regime
    if chosen not in ("precomputed", "on_the_fly"):
        raise ValueError(f"unknown regime {chosen!r}")
    data = _model_data(doc)
    backend = "table" if chosen == "precomputed" else "expr"
    layout = _codegen.layout_for(data.setter, len(data.shocks), len(data.choices), backend, plan.hints_active)
    counts: dict[str, Any]
    if backend == "table":
        tables, counts = _precompute(data)
        stuck = np.flatnonzero(~counts["any_allowed"])
        if stuck.size:
            raise _infeasible(data, stuck, counts["any_feasible"])
    else:
        tables = None
        counts = {"feasibility": _feasibility_scan(data, None)}
    prepared = time.perf_counter()
    module = _codegen.load(_codegen.module_source(layout, data.source))
    ctx = _codegen.context(data.param_values, data.state_grids, data.shock_table, data.choice_grids, tables)
    problem = GridProblem(doc, data, plan, layout, module, ctx, chosen, counts)
    problem._warm_up()
    problem.timings = {
        "prepare_s": prepared - started,
        "compile_s": time.perf_counter() - prepared,
    }
    return problem


class GridProblem:
    """A compiled grid model; implements :class:`worker.problem.CompiledProblem`.

    Besides the protocol: ``regime`` (``precomputed`` or ``on_the_fly``),
    ``plan`` (the :class:`~worker.estimate.GridPlan`), ``hints`` (the hints
    in use, ``.monotone`` / ``.concave``), ``timings`` (seconds spent
    preparing tables and loading or compiling kernels), and
    ``bellman_step(..., exhaustive=True)``, the plain search over every
    choice (the reference the exact block search is tested against).
    """

    def __init__(
        self,
        doc: Any,
        data: _ModelData,
        plan: GridPlan,
        layout: _codegen.KernelLayout,
        module: ModuleType,
        ctx: tuple[np.ndarray, ...],
        regime: str,
        counts: dict[str, Any],
    ) -> None:
        self._data = data
        self._layout = layout
        self._kernels = module
        self._ctx = ctx
        self._counts = counts
        self.plan = plan
        self.regime = regime
        self.discount = float(doc.discount)
        self.shape = tuple(data.state_sizes) + tuple(v.size for v in data.shock_values)
        self.n = data.n
        self.axes: dict[str, list[float]] = {name: grid.tolist() for name, grid in zip(data.states, data.state_grids)}
        self.axes.update((name, values.tolist()) for name, values in zip(data.shocks, data.shock_values))
        self.hints = SimpleNamespace(monotone=plan.monotone, concave=plan.concave)
        self._monotone, self._concave = bool(plan.monotone), bool(plan.concave)
        self.hints_active = layout.hinted_axis is not None
        self.timings: dict[str, float] = {}
        self._policy_cache: tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray] | None = None
        self._last_exact: dict[str, Any] | None = None
        self._pyramid: tuple[np.ndarray, np.ndarray] | None = None
        self._zeros: np.ndarray | None = None
        self._depth = max(0, math.ceil(math.log2(max(1.0, data.choice_sizes[-1] / BNB_LEAF))))

    # Bellman steps ---------------------------------------------------------

    def _zero_continuation(self) -> np.ndarray:
        """An all-zero ``EVt`` for kernels that need only rewards and nodes (allocated once)."""
        if self._zeros is None:
            self._zeros = np.zeros((self._data.n_shocks, self._data.n_grid))
        return self._zeros

    def _continuation(self, v: np.ndarray) -> np.ndarray:
        """``EVt`` (n_shocks, n_grid): ``EVt[z, x'] = Σ_z' P[z, z'] v[x', z']``."""
        values = np.asarray(v, dtype=np.float64).reshape(self._data.n_grid, self._data.n_shocks)
        return np.ascontiguousarray(self._data.transition @ values.T)

    def bellman_step(
        self,
        v: np.ndarray,
        *,
        restricted: bool = False,
        policy_guess: np.ndarray | None = None,
        exhaustive: bool = False,
    ) -> tuple[np.ndarray, np.ndarray]:
        """One Bellman step; see :meth:`worker.problem.CompiledProblem.bellman_step`.

        ``restricted`` with active hints runs the hinted search.  Otherwise the
        search is exact: a scan of the tables (precomputed), or the block
        search seeded with the hinted (or guessed) policy (on the fly);
        ``exhaustive`` forces the plain scan of every choice.
        """
        EVt = self._continuation(v)
        out_v = np.empty(self.n)
        out_policy = np.empty(self.n, dtype=np.int64)
        k = self._kernels
        if restricted and self.hints_active and not exhaustive:
            k.bellman_hinted(EVt, self.discount, self._ctx, self._monotone, self._concave, out_v, out_policy)
            return out_v, out_policy
        out_bad = np.empty(self.n, dtype=np.int64)
        out_bad_choice = np.empty(self.n, dtype=np.int64)
        if self.regime == "precomputed" or exhaustive:
            k.bellman_full(EVt, self.discount, self._ctx, out_v, out_policy, out_bad, out_bad_choice)
        else:
            guess = policy_guess
            if self.hints_active:
                guess = np.empty(self.n, dtype=np.int64)
                k.bellman_hinted(EVt, self.discount, self._ctx, self._monotone, self._concave, out_v, guess)
            pyramid, levels = self._pyramid_of(EVt)
            evmax = EVt.max(axis=1) if self._layout.bound_kind == "global" else np.zeros(EVt.shape[0])
            has_guess = guess is not None
            guess = np.ascontiguousarray(guess, dtype=np.int64) if has_guess else np.zeros(1, dtype=np.int64)
            k.bellman_bnb(
                EVt, self.discount, self._ctx, pyramid, levels, evmax, guess, has_guess, BNB_LEAF, self._depth,
                out_v, out_policy, out_bad, out_bad_choice,
            )
        if self.regime == "on_the_fly":
            self._last_exact = {"bad": out_bad, "bad_choice": out_bad_choice}
        return out_v, out_policy

    def _pyramid_of(self, EVt: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        axis = self._layout.pyramid_axis
        if axis is None:
            return np.zeros(1), np.zeros(2, dtype=np.int64)
        size = self._data.state_sizes[axis]
        stride = math.prod(self._data.state_sizes[axis + 1 :])
        if self._pyramid is None:
            levels = kernels.pyramid_levels(size)
            lines = EVt.shape[0] * (EVt.shape[1] // (size * stride))
            self._pyramid = (np.empty(lines * int(levels[-1]) * stride), levels)
        pyramid, levels = self._pyramid
        kernels.build_pyramid(EVt, size, stride, levels, pyramid)
        return pyramid, levels

    # Fixed policies --------------------------------------------------------

    def _nodes(self, policy: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """``(reward, node_index, node_weight, clamped)`` of a policy, cached for the last policy."""
        policy = np.ascontiguousarray(policy, dtype=np.int64).reshape(self.n)
        cached = self._policy_cache
        if cached is not None and np.array_equal(cached[0], policy):
            return cached[1:]
        if policy.min() < 0 or policy.max() >= self._data.n_choices:
            raise ValueError(f"policy indices must lie in [0, {self._data.n_choices}), got {policy.min()}..{policy.max()}")
        nodes = self._layout.nodes
        reward = np.empty(self.n)
        index = np.empty((self.n, nodes), dtype=np.int64)
        weight = np.empty((self.n, nodes))
        ok = np.empty(self.n, dtype=np.bool_)
        clamped = np.empty(self.n, dtype=np.bool_)
        self._kernels.policy_nodes(policy, self._zero_continuation(), self._ctx, reward, index, weight, ok, clamped)
        if not ok.all():
            i = int(np.flatnonzero(~ok)[0])
            raise ValueError(
                f"the policy picks a choice that is not allowed at {self._data.describe_state(i)} "
                f"({self._data.describe_choice(policy[i])})"
            )
        self._policy_cache = (policy.copy(), reward, index, weight, clamped)
        return reward, index, weight, clamped

    def policy_step(self, v: np.ndarray, policy: np.ndarray) -> np.ndarray:
        """``r_σ + β P_σ v``; (n,) → (n,).  Same bits as :meth:`bellman_step` at its own policy."""
        reward, index, weight, _ = self._nodes(policy)
        return kernels.policy_value(reward, index, weight, self._continuation(v), self.discount)

    def policy_reward(self, policy: np.ndarray) -> np.ndarray:
        """``r_σ``, shape (n,)."""
        return self._nodes(policy)[0].copy()

    def policy_matrix(self, policy: np.ndarray) -> sp.csr_matrix:
        """``P_σ`` (n, n) CSR: interpolation nodes × shock transitions."""
        _, index, weight, _ = self._nodes(policy)
        indptr, indices, data = kernels.policy_csr(index, weight, self._data.transition)
        return sp.csr_matrix((data, indices, indptr), shape=(self.n, self.n))

    def _choice_indices(self, policy: np.ndarray) -> tuple[np.ndarray, ...]:
        return np.unravel_index(np.asarray(policy, dtype=np.int64).reshape(self.n), self._data.choice_sizes)

    def describe_policy(self, policy: np.ndarray) -> tuple[dict[str, Any], dict[str, Any]]:
        """``policy`` (chosen values) and ``policy_index`` (grid indices), nested to ``shape``."""
        values, indices = {}, {}
        for name, grid, index in zip(self._data.choices, self._data.choice_grids, self._choice_indices(policy)):
            values[name] = grid[index].reshape(self.shape).tolist()
            indices[name] = index.reshape(self.shape).tolist()
        return values, indices

    def choice_values(self, policy: np.ndarray) -> dict[str, np.ndarray]:
        """Per choice, the (n,) chosen value."""
        return {
            name: grid[index]
            for name, grid, index in zip(self._data.choices, self._data.choice_grids, self._choice_indices(policy))
        }

    def state_values(self) -> dict[str, np.ndarray]:
        """Per axis (states, then shocks), the (n,) value at each flat state."""
        env = self._data.state_env(np.arange(self.n, dtype=np.int64))
        return {name: np.ascontiguousarray(env[name][:, 0]) for name in self.axes}

    # Diagnostics -----------------------------------------------------------

    def diagnostics(self, policy: np.ndarray) -> dict[str, Any]:
        """Regime, hints, edge hits per choice, clamped next states and excluded rewards, with warnings."""
        data = self._data
        warnings: list[str] = []
        notes = [f"regime {self.regime}: {self.plan.reason}"]
        if self.plan.hint_note:
            notes.append(self.plan.hint_note)
        model_choices = self._choice_indices(policy)
        edge_hits = {}
        for j, (name, grid, index) in enumerate(zip(data.choices, data.choice_grids, model_choices)):
            lowest = float(np.mean(index == 0))
            highest = float(np.mean(index == grid.size - 1))
            edge_hits[name] = {"lowest": lowest, "highest": highest}
            if not self._is_choice_grid(j):
                continue
            if highest >= EDGE_WARNING_SHARE:
                warnings.append(
                    f"{highest:.1%} of states choose the highest point of `{name}` ({grid[-1]:.6g}): the best choice "
                    f"may lie beyond the grid; consider a larger max for {self._grid_of(j)}"
                )
            if lowest >= EDGE_WARNING_SHARE:
                warnings.append(
                    f"{lowest:.1%} of states choose the lowest point of `{name}` ({grid[0]:.6g}): unless that is a "
                    f"real limit of the problem (a borrowing limit, say), consider a smaller min for {self._grid_of(j)}"
                )
        result: dict[str, Any] = {
            "regime": self.regime,
            "hints": {"monotone": self.hints.monotone, "concave": self.hints.concave},
            "edge_hits": edge_hits,
        }
        clamped = self._clamped(policy, warnings)
        if clamped is not None:
            result["clamped_next"] = clamped
        excluded = self._excluded(warnings)
        if excluded is not None:
            result["nonfinite_rewards"] = excluded
        result["timings"] = dict(self.timings)
        result["notes"] = notes
        result["warnings"] = warnings
        return result

    def _is_choice_grid(self, j: int) -> bool:
        """True for ``next_of`` choices and min/max/points grids, whose ends are arbitrary; not for menus."""
        return not self._data.choice_is_menu[j]

    def _grid_of(self, j: int) -> str:
        name = self._data.choices[j]
        for t, setter in enumerate(self._data.setter):
            if setter == j:
                return f"the grid of state `{self._data.states[t]}`"
        return f"choice `{name}`"

    def _clamped(self, policy: np.ndarray, warnings: list[str]) -> dict[str, Any] | None:
        data = self._data
        interpolated = [data.states[t] for t, j in enumerate(data.setter) if j is None]
        if not interpolated:
            return None
        policy = np.asarray(policy, dtype=np.int64).reshape(self.n)
        if self.regime == "on_the_fly":
            at_policy = int(self._nodes(policy)[3].sum())
        else:
            at_policy = self._clamped_at_policy_numpy(policy)
        overall: dict[str, Any] | None
        if self.regime == "precomputed":
            count, allowed = self._counts["clamped"], self._counts["allowed"]
            overall = {"count": count, "share": count / max(allowed, 1), "of": "allowed (state, choice) pairs"}
        elif data.n * data.n_choices <= SCAN_MAX_PAIRS:
            allowed_per = np.empty(self.n, dtype=np.int64)
            clamped_per = np.empty(self.n, dtype=np.int64)
            bad_per = np.empty(self.n, dtype=np.int64)
            self._kernels.scan_pairs(self._zero_continuation(), self._ctx, allowed_per, clamped_per, bad_per)
            count, allowed = int(clamped_per.sum()), int(allowed_per.sum())
            overall = {"count": count, "share": count / max(allowed, 1), "of": "allowed (state, choice) pairs"}
        else:
            overall = None
        names = ", ".join(f"`{name}`" for name in interpolated)
        result = {
            "states": interpolated,
            "policy": {"count": at_policy, "share": at_policy / self.n},
            "all_pairs": overall,
        }
        if overall is None:
            result["note"] = f"not counted over all {data.n * data.n_choices:,} pairs (more than {SCAN_MAX_PAIRS:,})"
        if at_policy:
            warnings.append(
                f"under the final policy, tomorrow's {names} falls outside its grid at {at_policy:,} of {self.n:,} "
                f"states ({at_policy / self.n:.1%}) and was moved to the nearest end; consider widening the grid"
            )
        return result

    def _clamped_at_policy_numpy(self, policy: np.ndarray) -> int:
        data = self._data
        rows = np.arange(self.n, dtype=np.int64)
        env: dict[str, Any] = dict(zip(data.params, data.param_values.tolist()))
        env.update({k: v[:, 0] for k, v in data.state_env(rows).items()})
        env.update({name: grid[index] for name, grid, index in zip(data.choices, data.choice_grids, self._choice_indices(policy))})
        clamped = np.zeros(self.n, dtype=bool)
        with np.errstate(all="ignore"):
            for name, expr in data.source.defines:
                env[name] = evaluate(expr, env)
            for t, expr in data.source.next:
                values = np.broadcast_to(evaluate(expr, env), (self.n,))
                clamped |= locate(data.state_grids[t], values)[2]
        return int(clamped.sum())

    def _excluded(self, warnings: list[str]) -> dict[str, Any] | None:
        data = self._data
        if self.regime == "precomputed":
            count, example = self._counts["bad"], self._counts["bad_example"]
            scope = "all (state, choice) pairs"
        else:
            if self._last_exact is None:
                return None
            bad = self._last_exact["bad"]
            count = int(bad.sum())
            example = None
            if count:
                i = int(np.flatnonzero(bad)[0])
                example = (i, int(self._last_exact["bad_choice"][i]))
            scope = "the (state, choice) pairs the last exact step evaluated"
        if not count:
            return None
        state, choice = data.describe_state(example[0]), data.describe_choice(example[1])
        warnings.append(
            f"the reward (or a next value) is NaN or +inf at {count:,} feasible (state, choice) pairs, e.g. at "
            f"{state} with {choice}; those pairs were treated as not allowed. This usually means an expression "
            "leaves its domain (a log or fractional power of a negative number): check `reward`, `define` and "
            "`feasible`"
        )
        return {"count": count, "scope": scope, "example": {"state": state, "choice": choice}}

    def _warm_up(self) -> None:
        """Compile (or load from the cache) the kernels a solve will call.

        Each kernel runs once on empty outputs (and an ``EVt`` with no grid
        states), with exactly the argument types of the real calls, so the
        first Bellman step is not slowed by compilation and ``timings`` shows
        what compiling or loading cost.
        """
        nodes = self._layout.nodes
        EVt = np.zeros((self._data.n_shocks, 0))
        empty_f = np.empty(0)
        empty_i = np.empty(0, dtype=np.int64)
        k = self._kernels
        if self.hints_active:
            k.bellman_hinted(EVt, self.discount, self._ctx, bool(self.hints.monotone), bool(self.hints.concave),
                             empty_f, empty_i)
        if self.regime == "precomputed":
            k.bellman_full(EVt, self.discount, self._ctx, empty_f, empty_i, empty_i, empty_i)
        else:
            pyramid, levels = np.zeros(1), np.zeros(2, dtype=np.int64)
            k.bellman_bnb(EVt, self.discount, self._ctx, pyramid, levels, np.zeros(EVt.shape[0]), empty_i, True,
                          BNB_LEAF, self._depth, empty_f, empty_i, empty_i, empty_i)
        k.policy_nodes(empty_i, EVt, self._ctx, empty_f, np.empty((0, nodes), dtype=np.int64), np.empty((0, nodes)),
                       np.empty(0, dtype=np.bool_), np.empty(0, dtype=np.bool_))
