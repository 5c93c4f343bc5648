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
are feasible but none has a finite reward).  :func:`check_feasibility` (from
:mod:`worker.feasibility`, which imports no numba) runs the same check
cheaply, without compiling anything, for the service's door.

Regimes and hints
-----------------
:func:`worker.estimate.grid_plan` picks the regime (``precomputed`` tables or
``on_the_fly`` pointwise evaluation); both run the same generated search code
(:mod:`worker._codegen`).  Hints are used when the model has exactly one
choice (monotone: that choice is ``next_of`` a state); ``restricted=False``
always searches every allowed choice exactly — in the on-the-fly regime by a
branch-and-bound over blocks of choices whose bounds are sound, so its
answer equals the exhaustive search bit for bit.

When the structure's kernels are not compiled on this machine yet and the
problem is small, :func:`compile_grid` returns a :class:`worker.bridge.TableProblem`
instead (numpy scans of the ``precomputed`` tables, nothing compiled) and
starts the compile in the background; see :mod:`worker.bridge`.
"""

from __future__ import annotations

import math
import time
from types import ModuleType, SimpleNamespace
from typing import Any

import numpy as np
import scipy.sparse as sp

from worker import _codegen, kernels
from worker.estimate import CHUNK_ELEMENTS, GridPlan, grid_plan
from worker.expressions import evaluate
from worker.feasibility import ModelData, check_feasibility, evaluate_pairs, feasibility_scan, infeasible, model_data
from worker.grids import locate

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
def _precompute(data: ModelData) -> tuple[tuple[np.ndarray, ...], dict[str, Any]]:
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
        block = evaluate_pairs(data, rows, columns)
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
    data = model_data(doc)
    backend = "table" if chosen == "precomputed" else "expr"
    layout = _codegen.layout_for(data.setter, len(data.shocks), len(data.choices), backend, plan.hints_active)
    source = _codegen.module_source(layout, data.source)
    if regime is None and _bridge_applies(plan, source):
        return _bridged(doc, data, plan, source, chosen, limits, started)
    counts: dict[str, Any]
    if backend == "table":
        tables, counts = _precompute(data)
        stuck = np.flatnonzero(~counts["any_allowed"])
        if stuck.size:
            raise infeasible(data, stuck, counts["any_feasible"])
    else:
        tables = None
        counts = {"feasibility": feasibility_scan(data, None)}
    prepared = time.perf_counter()
    module = _codegen.load(source)
    ctx = _codegen.context(data.param_values, data.state_grids, data.shock_table, data.choice_grids, tables)
    problem = GridProblem(doc, data, plan, layout, module, ctx, chosen, counts)
    problem._warm_up()
    from worker import bridge

    bridge.mark_warm(module.__name__)
    problem.timings = {
        "prepare_s": prepared - started,
        "compile_s": time.perf_counter() - prepared,
    }
    return problem


def _bridge_applies(plan: GridPlan, source: str) -> bool:
    """Whether to solve by numpy table scans while the kernels compile (see :mod:`worker.bridge`)."""
    from worker import bridge

    return (
        bridge.enabled()
        and plan.pairs <= bridge.BRIDGE_MAX_PAIRS
        and plan.precompute_bytes <= min(plan.budget, bridge.BRIDGE_MAX_BYTES)
        and not bridge.is_warm(_codegen.module_name(source))
    )


def _bridged(
    doc: Any, data: ModelData, plan: GridPlan, source: str, regime: str, limits: dict[str, Any] | None, started: float
) -> "GridProblem":
    from worker.document.schema import SUBMISSION_KEYS
    from worker import bridge

    tables, counts = _precompute(data)
    stuck = np.flatnonzero(~counts["any_allowed"])
    if stuck.size:
        raise infeasible(data, stuck, counts["any_feasible"])
    layout = _codegen.layout_for(data.setter, len(data.shocks), len(data.choices), "table", False)
    ctx = _codegen.context(data.param_values, data.state_grids, data.shock_table, data.choice_grids, tables)
    problem = bridge.TableProblem(doc, data, plan, layout, None, ctx, "precomputed", counts)
    # The document as validated, in its own order: the order of params and defines is part of the
    # generated source (sorted keys, as in the canonical form, would name another module).
    text = doc.model_dump(mode="json", exclude_none=True, exclude=set(SUBMISSION_KEYS))
    started_compile = bridge.compile_later(text, _codegen.module_name(source), regime=regime, limits=limits)
    problem.bridge_note = (
        "this model structure's compiled kernels were not in the cache yet: solved by exact numpy scans of the "
        "tables of all (state, choice) pairs"
        + (", while they compile in the background for the next solve" if started_compile else
           "; another background compile is running, so a later solve starts this structure's")
        + " (hints, if any, were not needed)"
    )
    problem.timings = {"prepare_s": time.perf_counter() - started, "compile_s": 0.0}
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
        data: ModelData,
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
        self.bridge_note = ""
        self._policy_cache: tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray] | None = None
        self._last_exact: dict[str, Any] | None = None
        self._pyramid: tuple[np.ndarray, np.ndarray] | None = None
        self._zeros: np.ndarray | None = None
        self._sweep_scratch: tuple[np.ndarray, np.ndarray] | None = None
        self._last_hinted: tuple[np.ndarray, np.ndarray, np.ndarray] | None = None
        self._slope_scratch: tuple[np.ndarray, np.ndarray, np.ndarray] | None = None
        sizes = data.state_sizes
        self._strides = tuple(math.prod(sizes[t + 1 :]) for t in range(len(sizes)))  # of the flat grid-state index

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
            out_reward = np.empty(self.n)
            k.bellman_hinted(EVt, self.discount, self._ctx, self._monotone, self._concave, out_v, out_policy, out_reward)
            self._last_hinted = (np.array(v, dtype=np.float64).reshape(self.n), out_policy.copy(), out_reward)
            return out_v, out_policy
        out_bad = np.empty(self.n, dtype=np.int64)
        out_bad_choice = np.empty(self.n, dtype=np.int64)
        if self.regime == "precomputed" or exhaustive:
            k.bellman_full(EVt, self.discount, self._ctx, out_v, out_policy, out_bad, out_bad_choice)
        else:
            guess = policy_guess
            if self.hints_active:
                last = self._last_hinted
                if last is not None and np.array_equal(last[0], np.asarray(v, dtype=np.float64).reshape(self.n)):
                    # The solver's final check runs at the v of its last hinted step: reuse that policy.
                    guess = last[1]
                else:
                    guess = np.empty(self.n, dtype=np.int64)
                    k.bellman_hinted(EVt, self.discount, self._ctx, self._monotone, self._concave, out_v, guess,
                                     np.empty(self.n))
            pyramid, levels = self._pyramid_of(EVt)
            dpu, dpd, slope = self._slope_of(EVt, levels)
            evmax = EVt.max(axis=1) if self._layout.bound_kind == "global" else np.zeros(EVt.shape[0])
            if guess is not None:
                guess = np.ascontiguousarray(guess, dtype=np.int64).reshape(-1)
                # The kernels do not check bounds: a guess that does not fit this problem is dropped.
                if guess.size != self.n or guess.min() < 0 or guess.max() >= self._data.n_choices:
                    guess = None
            has_guess = guess is not None
            if guess is None:
                guess = np.zeros(1, dtype=np.int64)
            k.bellman_bnb(
                EVt, self.discount, self._ctx, pyramid, levels, evmax, guess, has_guess, BNB_LEAF,
                dpu, dpd, slope, out_v, out_policy, out_bad, out_bad_choice,
            )
        if self.regime == "on_the_fly":
            self._last_exact = {"bad": out_bad, "bad_choice": out_bad_choice}
        return out_v, out_policy

    def _pyramid_of(self, EVt: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        axis = self._layout.pyramid_axis
        if axis is None:
            return np.zeros(1), np.zeros(2, dtype=np.int64)
        size = self._data.state_sizes[axis]
        stride = self._strides[axis]
        if self._pyramid is None:
            levels = kernels.pyramid_levels(size)
            lines = EVt.shape[0] * (EVt.shape[1] // (size * stride))
            self._pyramid = (np.empty(lines * int(levels[-1]) * stride), levels)
        pyramid, levels = self._pyramid
        kernels.build_pyramid(EVt, size, stride, levels, pyramid)
        return pyramid, levels

    def _slope_of(self, EVt: np.ndarray, levels: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """``(dpu, dpd, slope)`` for the block search's slope bound (``_codegen.SLOPE``), else placeholders.

        ``dpu``/``dpd`` are pyramids of ``EV(t+1) − EV(t)`` and ``EV(t) − EV(t+1)``
        along the pyramid axis, each rounded up by a relative ``2**-50`` (four
        half-ulps: above the rounding of the subtraction), ``-inf`` at the
        axis's last point; ``slope`` is ``[least, greatest spacing of the last
        choice's grid (rounded outward), max |EV|]``.
        """
        if not getattr(self._kernels, "SLOPE", False):
            return np.zeros(1), np.zeros(1), np.zeros(3)
        axis = self._layout.pyramid_axis
        size = self._data.state_sizes[axis]
        stride = self._strides[axis]
        if self._slope_scratch is None:
            self._slope_scratch = (np.empty(self._pyramid[0].size), np.empty(self._pyramid[0].size), np.empty(EVt.shape))
        dpu, dpd, diff = self._slope_scratch
        lines = EVt.reshape(EVt.shape[0], -1, size, stride)
        steps = diff.reshape(lines.shape)
        steps[:, :, -1, :] = -np.inf
        np.subtract(lines[:, :, 1:, :], lines[:, :, :-1, :], out=steps[:, :, :-1, :])
        widen = np.abs(steps[:, :, :-1, :]) * 2.0**-50
        raw = steps[:, :, :-1, :].copy()
        steps[:, :, :-1, :] = raw + widen
        kernels.build_pyramid(diff, size, stride, levels, dpu)
        steps[:, :, :-1, :] = widen - raw
        kernels.build_pyramid(diff, size, stride, levels, dpd)
        grid = self._data.choice_grids[-1]
        spacing = np.diff(grid) if grid.size > 1 else np.ones(1)
        slope = np.array([spacing.min() * (1 - 2.0**-50), spacing.max() * (1 + 2.0**-50), np.abs(EVt).max()])
        if not spacing.min() > 0.0:
            slope[:] = np.nan  # a grid that is not increasing: the bound is never used (nan prunes nothing)
        return dpu, dpd, slope

    # Fixed policies --------------------------------------------------------

    def _nodes(self, policy: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """``(reward, node_index, node_weight, clamped)`` of a policy, cached for the last policy.

        After the first policy only the states whose choice changed are
        recomputed, in place: the arrays returned are overwritten by the next
        call with another policy (every caller uses them at once).
        """
        policy, hit = self._cached_nodes(policy)
        if hit is not None:
            return hit
        cached = self._policy_cache
        if cached is None:
            nodes = self._layout.nodes
            cached = (
                np.full(self.n, -1, dtype=np.int64), np.empty(self.n), np.empty((self.n, nodes), dtype=np.int64),
                np.empty((self.n, nodes)), np.empty(self.n, dtype=np.bool_),
            )
        known, reward, index, weight, clamped = cached
        states = np.flatnonzero(known != policy)
        hinted = self._last_hinted
        if not self._layout.interpolated and hinted is not None and np.array_equal(hinted[1], policy):
            # Every state moves onto a grid point: the node is that point with weight 1, and the
            # hinted step that chose this policy computed the rewards, by the same code.
            reward[states] = hinted[2][states]
            index[states, 0] = self._grid_index(policy[states])
            weight[states, 0] = 1.0
            clamped[states] = False
            ok = np.isfinite(reward[states])
        else:
            ok = np.empty(states.size, dtype=np.bool_)
            self._kernels.policy_nodes(
                policy, states, self._zero_continuation(), self._ctx, reward, index, weight, ok, clamped
            )
        known[states] = policy[states]
        self._policy_cache = cached
        if not ok.all():
            i = int(states[np.flatnonzero(~ok)[0]])
            known[i] = -1  # recomputed next time, so the error repeats rather than a stale row being used
            raise self._not_allowed(policy, i)
        return reward, index, weight, clamped

    def _cached_nodes(self, policy: np.ndarray) -> tuple[np.ndarray, tuple[np.ndarray, ...] | None]:
        """``(policy as flat int64, the cached nodes when it is the cached policy, else None)``; checks the range."""
        policy = np.ascontiguousarray(policy, dtype=np.int64).reshape(self.n)
        cached = self._policy_cache
        if cached is not None and np.array_equal(cached[0], policy):
            return policy, cached[1:]
        if policy.min() < 0 or policy.max() >= self._data.n_choices:
            raise ValueError(f"policy indices must lie in [0, {self._data.n_choices}), got {policy.min()}..{policy.max()}")
        return policy, None

    def _not_allowed(self, policy: np.ndarray, i: int) -> ValueError:
        return ValueError(
            f"the policy picks a choice that is not allowed at {self._data.describe_state(i)} "
            f"({self._data.describe_choice(policy[i])})"
        )

    def _grid_index(self, choices: np.ndarray) -> np.ndarray:
        """Tomorrow's flat grid state of flat choices when every state is ``next_of`` a choice."""
        parts = np.unravel_index(choices, self._data.choice_sizes)
        return sum(stride * parts[j] for stride, j in zip(self._strides, self._layout.setter))

    def policy_step(self, v: np.ndarray, policy: np.ndarray) -> np.ndarray:
        """``r_σ + β P_σ v``; (n,) → (n,).  Same bits as :meth:`bellman_step` at its own policy."""
        reward, index, weight, _ = self._nodes(policy)
        return kernels.policy_value(reward, index, weight, self._continuation(v), self.discount)

    def policy_sweeps(
        self, v: np.ndarray, policy: np.ndarray, sweeps: int, span_stop: float = -np.inf
    ) -> tuple[np.ndarray, int, float]:
        """Up to ``sweeps`` Howard sweeps ``v ← r_σ + β P_σ v`` in one kernel call (no sparse matrix).

        Optional extension of :class:`worker.problem.CompiledProblem` that
        :mod:`worker.solvers` uses when present.  Stops early after the first
        sweep whose increment has span ``max − min`` at most ``span_stop``.

        Parameters
        ----------
        v : (n,) float64, not modified
        policy : (n,) int64
        sweeps : int
        span_stop : float

        Returns
        -------
        (the (n,) new value, sweeps done, span of the last sweep's increment)
        """
        reward, index, weight, _ = self._nodes(policy)
        out = np.array(v, dtype=np.float64).reshape(self.n)
        if self._sweep_scratch is None:
            self._sweep_scratch = (np.empty((self._data.n_shocks, self._data.n_grid)), np.empty(self.n))
        EVt, spare = self._sweep_scratch
        done, span = kernels.policy_sweeps(
            reward, index, weight, self._data.transition, self.discount, out, int(sweeps), float(span_stop), EVt, spare
        )
        return out, int(done), float(span)

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
        if self.bridge_note:
            notes = [f"regime {self.regime}: {self.bridge_note}"]
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
                             empty_f, empty_i, empty_f)
        if self.regime == "precomputed":
            k.bellman_full(EVt, self.discount, self._ctx, empty_f, empty_i, empty_i, empty_i)
        else:
            pyramid, levels = np.zeros(1), np.zeros(2, dtype=np.int64)
            k.bellman_bnb(EVt, self.discount, self._ctx, pyramid, levels, np.zeros(EVt.shape[0]), empty_i, True,
                          BNB_LEAF, pyramid, pyramid, np.zeros(3), empty_f, empty_i, empty_i, empty_i)
        k.policy_nodes(empty_i, empty_i, EVt, self._ctx, empty_f, np.empty((0, nodes), dtype=np.int64), np.empty((0, nodes)),
                       np.empty(0, dtype=np.bool_), np.empty(0, dtype=np.bool_))
        kernels.policy_sweeps(empty_f, np.empty((0, nodes), dtype=np.int64), np.empty((0, nodes)),
                              self._data.transition, self.discount, empty_f, 1, -np.inf, EVt, empty_f)
