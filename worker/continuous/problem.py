"""A compiled continuous-choice model: :class:`worker.problem.CompiledProblem` with a policy of values.

Semantics, as for every grid model (:mod:`worker.gridmodel`): the value
array has shape ``(state sizes..., shock sizes...)``, flat point
``i = x · n_shocks + z``, and ``EV(x', z) = Σ_z' P[z, z'] V(x', z')``.  The
one choice takes any value of its interval; tomorrow's state ``x'`` is then
off the grid, and ``EV`` is read between grid points by the model's
interpolation:

``linear``
    multilinear on the product grid.  It is monotone and non-expansive in
    the sup norm (a convex combination of grid values), so the fitted
    Bellman operator is a β-contraction and the MacQueen–Porteus bracket of
    :mod:`worker.solvers` certifies its fixed point — the solution of the
    interpolated problem, which is itself an approximation of the model.
``monotone_cubic``
    Fritsch–Carlson along the one state; with several states, the tensor
    product of those one-dimensional interpolants (along the last state, then
    each earlier one: :func:`worker.continuous.interp_kernels.tensor_cubic`).
    Far more accurate for smooth models, but not linear in ``v``: the bracket
    is computed the same way and is not a proof (the result says so).

Under the concave hint, ``local_step`` is that search from a guess without the
monotone narrowing (the loop's local phase after a failed verification).

A policy is a float64 vector: the chosen value at each point.  With other
(discrete) choices beside the continuous one, the continuous one is searched
for each combination of theirs (one row of ``combos``, in C order of their
grids) and the best kept (under the monotone hint, each combination's search
is narrowed by that combination's own choice at the point before, not the
kept one's); a policy is then (n, 2): the chosen value and the index of the
combination (as a float).  Its fixed-policy steps read ``EV`` by the same
interpolation; its transition matrix ``P_σ`` (stationary distribution,
simulation start) always puts each next state's mass on the neighbouring grid
points in proportion (multilinear weights: Young 2010, "Solving the incomplete
markets model with aggregate uncertainty using the Krusell–Smith algorithm and
non-stochastic simulations", JEDC 34(1)), whatever the interpolation.
"""

from __future__ import annotations

import dataclasses
import math
from types import ModuleType
from typing import Any

import numpy as np
import scipy.sparse as sp

from worker import kernels, threadpool
from worker._codegen import kernel_params
from worker.continuous.bound_kernels import bound_tables
from worker.continuous.drawnodes import check_at_policy, draw_nodes
from worker.continuous.interp_kernels import cubic_policy_steps, monotone_slopes
from worker.feasibility import ModelData
from worker.griddiagnostics import end_warnings, real_ends_of
from worker.problem import Hints

__all__ = ["MOVING_STEPS_DIVISOR", "POLICY_RESOLUTION", "ContinuousProblem"]

MOVING_STEPS_DIVISOR = 1
"""Howard's evaluation phases while the policy moves are ``evaluation_steps // this`` long (see
:func:`worker.solvers.evaluation.phase_plan`): full length, because a continuous policy keeps moving a
little until the end and a Bellman step here costs tens of evaluation steps (on the accuracy benchmark at
1,000 points: 12 iterations instead of 26)."""
POLICY_RESOLUTION = 1e-6
"""A choice that moves by less than this share of its interval's scale between two iterations does
not count as a policy change in the log (Howard's evaluation phases key on the count)."""


class ContinuousProblem:
    """A grid model whose one choice is continuous; see the module docstring.

    Besides the protocol: ``model_data`` (the evaluated model), ``cubic``,
    ``target`` (the state the choice is ``next_of``, or None),
    ``policy_resolution``, ``timings``, :meth:`choose_at`, the search at
    points off the grid (Euler errors), and ``local_step`` (under the concave
    hint; else None), the search from a guess without the monotone narrowing.
    """

    def __init__(self, doc: Any, data: ModelData, module: ModuleType, params: np.ndarray) -> None:
        self._data = data
        self._k = module
        self._params = params
        model = doc.model
        self.discount = float(doc.discount)
        self.choice = data.choices[data.span_choice]
        self.target = next((t for t, j in enumerate(data.setter) if j == data.span_choice), None)
        others = [j for j in range(len(data.choices)) if j != data.span_choice]
        self.others = tuple(data.choices[j] for j in others)
        self._other_grids = [data.choice_grids[j] for j in others]
        if others:  # self.combos: one row per combination of the others' values
            mesh = np.meshgrid(*self._other_grids, indexing="ij")
            self.combos = np.ascontiguousarray(np.column_stack([m.reshape(-1) for m in mesh]), dtype=np.float64)
        else:
            self.combos = np.zeros((1, 0))
        self.cubic = model.interpolation == "monotone_cubic"
        self.real_ends = real_ends_of(doc)
        self.interpolation = model.interpolation
        self.shape = tuple(data.state_sizes) + tuple(v.size for v in data.shock_values)
        self.n = data.n
        self.axes: dict[str, list[float]] = {name: grid.tolist() for name, grid in zip(data.states, data.state_grids)}
        self.axes.update((name, values.tolist()) for name, values in zip(data.shocks, data.shock_values))
        monotone = bool(model.hints.monotone) and self.target is not None
        self.policy_shape = (self.n, 2) if others else (self.n,)
        self.hints = Hints(monotone=monotone, concave=bool(model.hints.concave))
        self.hints_active = monotone or self.hints.concave
        self.local_step = self._local_step if self.hints.concave else None  # no local search without the hint
        self.scan_points = model.choices[self.choice].size
        self.timings: dict[str, float] = {}
        self.moving_steps_divisor = MOVING_STEPS_DIVISOR
        self.notes: list[str] = []
        if monotone and others:
            self.notes.append(
                f"the monotone hint is read for each combination of {', '.join(f'`{name}`' for name in self.others)}: "
                f"`{self.choice}`'s search in a combination starts at that combination's own choice at the point "
                "before"
            )
        elif model.hints.monotone and not monotone:
            self.notes.append(
                "the monotone hint is not used: it narrows the search of a continuous choice that is next_of a "
                "state, and this one is given by min and max"
            )
        sizes = data.state_sizes
        self._sgrid = np.ascontiguousarray(np.concatenate(data.state_grids))
        offsets = np.concatenate([[0], np.cumsum(sizes)[:-1]]).astype(np.int64)
        strides = [math.prod(sizes[t + 1:]) for t in range(len(sizes))]
        self._meta = np.array([*offsets, *sizes, *strides], dtype=np.int64)
        self._strides = strides
        rows = np.arange(self.n, dtype=np.int64)
        env = data.state_env(rows)
        self._svals = np.ascontiguousarray(np.column_stack([env[name][:, 0] for name in data.states]))
        self._piz = np.ascontiguousarray(rows % data.n_shocks)
        self._order, self._prev, self._line = self._lines()
        self.threads = threadpool.threads_for(self.n, self.scan_points * self.combos.shape[0])
        if self.target is not None:
            grid = data.state_grids[self.target]
            self.policy_resolution = POLICY_RESOLUTION * float(grid[-1] - grid[0])
        else:
            self.policy_resolution = POLICY_RESOLUTION
        self.egm_form: tuple[Any, Any] | None = None
        self.egm_rule: Any = None
        self.egm_report: dict[str, Any] | None = None
        self._nodes_for: np.ndarray | None = None
        self._nodes: tuple[np.ndarray, ...] = ()
        self._scratch = (np.empty((data.n_shocks, data.n_grid)), np.empty(self.n))
        self._draw_count = 0 if data.draws is None else data.draws.size
        self.bound_search = bool(getattr(module, "BOUNDED", False))  # see worker.continuous.bound_search
        self.bound_proof = bool(getattr(module, "PROVABLE", False))  # see worker.continuous.bound_proof
        self.proven = np.zeros(0, dtype=np.int64)  # per point of the last step: combinations the proof held at
        self.last_step: tuple[np.ndarray, np.ndarray] | None = None  # its v and choices: the proof needs its guess
        self._levels = kernels.pyramid_levels(sizes[self.target] if self.target is not None else 1)
        self.kernel_literals: tuple[float, ...] = ()  # the numbers lifted out of the expressions (set by the compiler)

    def use_params(self, params: np.ndarray) -> None:
        """Search and evaluate with other kernel params from now on (a finite horizon's period).

        ``params`` is ``kernel_params(param values, kernel_literals)``; the cached nodes of the
        last policy are dropped, since its rewards and next values may change with them.
        """
        self._params = np.ascontiguousarray(params, dtype=np.float64)
        self._nodes_for = None
        self._nodes = ()

    def use_period(self, param_values: np.ndarray) -> None:
        """Evaluate with other param values from now on (a finite horizon's period): the kernels' params and the
        numpy evaluations (the draws' probabilities checked at a policy) alike."""
        self._data = dataclasses.replace(self._data, param_values=np.asarray(param_values, dtype=np.float64))
        self.use_params(kernel_params(self._data.param_values, self.kernel_literals))

    def warm_up(self) -> None:
        """Compile (or load) the kernels on empty inputs, so that ``timings`` shows the compile's cost."""
        data = self._data
        none_f, none_i = np.empty(0), np.empty(0, dtype=np.int64)
        states = np.empty((0, len(data.states)))
        self._k.search(np.zeros((data.n_shocks, data.n_grid)), np.zeros((1, 1)), self.discount, self._params,
                       self._sgrid, self._meta, data.shock_table, states, none_i, none_i, none_i, np.zeros(1), False,
                       False, False, self.scan_points, self.combos, none_f, self._levels, 0.0, none_i.reshape(0, 0),
                       none_f.reshape(0, 0), none_i, none_f, none_f, none_f, none_i, 0, 0)
        self._k.policy_at(self._params, self._sgrid, self._meta, data.shock_table, states, none_i, none_f,
                          self.combos, none_i, none_f, self._tomorrow(0), np.empty(0, dtype=np.bool_),
                          np.empty((0, self._draw_count)))

    def _tomorrow(self, count: int) -> np.ndarray:
        """Room for tomorrow's state values at ``count`` points: (count, d), or (count, K, d) with draws."""
        d = len(self._data.states)
        return np.zeros((count, self._draw_count, d) if self._data.draws is not None else (count, d))

    @property
    def model_data(self) -> ModelData:
        return self._data

    def _lines(self) -> tuple[np.ndarray, np.ndarray, int]:
        """The points in the order of the search: lines along the chosen state, each contiguous.

        Returns ``(order, prev, line length)``; ``prev[q]`` is ``q − 1`` inside a
        line and ``−1`` at its start.
        """
        axis = self.target if self.target is not None else len(self.shape) - 1
        index = np.arange(self.n, dtype=np.int64).reshape(self.shape)
        order = np.ascontiguousarray(np.moveaxis(index, axis, -1).reshape(-1))
        length = self.shape[axis]
        prev = np.arange(self.n, dtype=np.int64) - 1
        prev[::length] = -1
        return order, prev, length

    def continuation(self, v: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """``(EVt, D)``: ``EVt[z, x'] = Σ_z' P[z, z'] v[x', z']`` and its monotone cubic slopes along the last
        state (cubic only)."""
        data = self._data
        values = np.asarray(v, dtype=np.float64).reshape(data.n_grid, data.n_shocks)
        EVt = np.ascontiguousarray(data.transition @ values.T)
        if not self.cubic:
            return EVt, np.zeros((1, 1))
        D = np.empty_like(EVt)
        last = data.state_grids[-1]
        monotone_slopes(last, EVt.reshape(-1, last.size), D.reshape(-1, last.size))
        return EVt, D

    def bellman_step(
        self, v: np.ndarray, *, restricted: bool = False, policy_guess: np.ndarray | None = None
    ) -> tuple[np.ndarray, np.ndarray]:
        """One step of the fitted Bellman operator; the policy is the (n,) chosen values (with other choices,
        (n, 2): the values and the combinations' indices).

        ``restricted`` uses the hints (see :mod:`worker.continuous.search`); unrestricted, the search starts from
        a scan of the interval (or the branch and bound)."""
        return self._bellman(v, policy_guess, bool(restricted and self.hints.concave),
                             bool(restricted and self.hints.monotone))

    def _local_step(self, v: np.ndarray, *, policy_guess: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """``local_step``: the concave hint's bracket grown from ``policy_guess`` at each point, without the
        monotone narrowing by the point before (the loop's local phase after a failed verification,
        :mod:`worker.solvers.loop`); verified by an unrestricted step like a hinted one."""
        return self._bellman(v, policy_guess, True, False)

    def _bellman(self, v: np.ndarray, policy_guess: np.ndarray | None, concave: bool,
                 monotone: bool) -> tuple[np.ndarray, np.ndarray]:
        EVt, D = self.continuation(v)
        out_v, out_a, out_r = np.empty(self.n), np.empty(self.n), np.empty(self.n)
        out_j = np.zeros(self.n, dtype=np.int64)
        guess = self._guess(policy_guess)
        last = self.last_step
        proof = (self.bound_proof and guess is not None and last is not None and np.array_equal(last[1], guess)
                 and np.array_equal(last[0], v))
        step = self._step(EVt, D, self._svals, self._piz, self._order, self._prev, guess, concave, monotone,
                          out_v, out_a, out_r, out_j, proof)
        lines = self.n // self._line
        blocks = [(start * self._line, stop * self._line)
                  for start, stop in threadpool.row_blocks(lines, self.threads * threadpool.BLOCKS_PER_THREAD)]
        threadpool.run_blocks(step, blocks if self.threads > 1 else [(0, self.n)], self.threads)
        lost = np.flatnonzero(~(out_v > -np.inf)) if monotone else np.empty(0, dtype=np.int64)
        if lost.size:  # a false monotone hint can leave no allowed choice above the point before: search again there
            self._search_again(EVt, D, lost, guess, concave, out_v, out_a, out_r, out_j)
        self.last_step = (np.array(v, dtype=np.float64), out_a.copy())
        return out_v, self._policy(out_a, out_j)

    def _search_again(self, EVt: np.ndarray, D: np.ndarray, rows: np.ndarray, guess: np.ndarray | None, concave: bool,
                      out_v: np.ndarray, out_a: np.ndarray, out_r: np.ndarray, out_j: np.ndarray) -> None:
        """The search without the monotone narrowing at the points ``rows``, written into the ``out_`` arrays.

        The step then has the value the hint-free search gives there, and the verification at the end of the
        solve still compares every point with the unrestricted step."""
        count = rows.size
        found_v, found_a, found_r = np.empty(count), np.empty(count), np.empty(count)
        found_j = np.zeros(count, dtype=np.int64)
        run = self._step(EVt, D, np.ascontiguousarray(self._svals[rows]), np.ascontiguousarray(self._piz[rows]),
                         np.arange(count, dtype=np.int64), np.full(count, -1, dtype=np.int64),
                         None if guess is None else np.ascontiguousarray(guess[rows]), concave, False,
                         found_v, found_a, found_r, found_j)
        run(0, count)
        out_v[rows], out_a[rows], out_r[rows], out_j[rows] = found_v, found_a, found_r, found_j

    def _policy(self, chosen: np.ndarray, combos: np.ndarray) -> np.ndarray:
        """The policy array: the chosen values, with the combinations beside them when there are others."""
        return np.ascontiguousarray(np.column_stack([chosen, combos.astype(np.float64)])) if self.others else chosen

    def split_policy(self, policy: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """``(chosen values (n,), combinations (n,) int64)`` of a policy."""
        array = np.asarray(policy, dtype=np.float64)
        if not self.others:
            return np.ascontiguousarray(array.reshape(self.n)), np.zeros(self.n, dtype=np.int64)
        array = array.reshape(self.n, 2)
        return np.ascontiguousarray(array[:, 0]), np.ascontiguousarray(array[:, 1]).astype(np.int64)

    def _guess(self, policy_guess: np.ndarray | None) -> np.ndarray | None:
        if policy_guess is None:
            return None
        guess = np.asarray(policy_guess)
        if self.others and guess.dtype.kind == "f" and guess.shape == (self.n, 2):
            guess = guess[:, 0]
        if guess.dtype.kind != "f" or guess.shape != (self.n,):
            return None
        return np.ascontiguousarray(guess, dtype=np.float64)

    def _step(self, EVt: np.ndarray, D: np.ndarray, svals: np.ndarray, piz: np.ndarray, order: np.ndarray,
              prev: np.ndarray, guess: np.ndarray | None, concave: bool, monotone: bool,
              out_v: np.ndarray, out_a: np.ndarray, out_r: np.ndarray, out_j: np.ndarray, proof: bool = False) -> Any:
        has_guess = guess is not None
        guess = guess if has_guess else np.zeros(1)
        search = self._k.search
        pyramid, ev_abs, hull, deficit = bound_tables(EVt, self._sgrid, self._meta, self.target, self._strides,
                                                      self._levels, self.bound_search and not concave, proof, D)
        self.proven = proven = np.zeros(svals.shape[0] if hull.size else 0, dtype=np.int64)

        def run(start: int, stop: int) -> None:
            search(EVt, D, self.discount, self._params, self._sgrid, self._meta, self._data.shock_table, svals,
                   piz, order, prev, guess, has_guess, concave, monotone, self.scan_points, self.combos, pyramid,
                   self._levels, ev_abs, hull, deficit, proven, out_v, out_a, out_r, out_j, start, stop)

        return run

    def choose_at(self, v: np.ndarray, states: np.ndarray, rows: np.ndarray, guess: np.ndarray | None,
                  *, restricted: bool = True) -> tuple[np.ndarray, np.ndarray]:
        """The search at any points: ``states`` (P, d) values, ``rows`` (P,) shock rows; ``(values, choices)``
        (with other choices, ``choices`` is the (P, 2) policy: the values and the combinations).

        Off the grid the state values need not be grid points (test points of the
        Euler errors); ``guess`` (P,) seeds a concave search.
        """
        EVt, D = self.continuation(v)
        count = rows.shape[0]
        out_v, out_a, out_r = np.empty(count), np.empty(count), np.empty(count)
        out_j = np.zeros(count, dtype=np.int64)
        order = np.arange(count, dtype=np.int64)
        prev = np.full(count, -1, dtype=np.int64)
        run = self._step(EVt, D, np.ascontiguousarray(states, dtype=np.float64),
                         np.ascontiguousarray(rows, dtype=np.int64), order, prev,
                         None if guess is None else np.ascontiguousarray(guess, dtype=np.float64),
                         bool(restricted and self.hints.concave), False, out_v, out_a, out_r, out_j)
        run(0, count)
        return out_v, (np.column_stack([out_a, out_j.astype(np.float64)]) if self.others else out_a)

    def solve_endogenous_grid(self, initial: np.ndarray, solve_from: Any, **options: Any) -> Any:
        """``solver.method: endogenous_grid`` (:mod:`worker.continuous.egm`); ``initial`` is the start of Howard's
        search when the problem is not concave (the method's own rounds start from the last period's policy)."""
        from worker.continuous.egm import endogenous_grid

        found, c_slope = self.egm_form
        return endogenous_grid(self, found, c_slope, solve_from, start=initial, **options)

    def policy_rule(self, v: np.ndarray, policy: np.ndarray) -> Any:
        """``rule(k) -> x``: the choice at states ``k`` (m,) of the one state, at every shock point, (m, shocks);
        None with several states or other choices (:func:`worker.euler_states.search_rule` and
        :mod:`worker.continuous.mixed_euler` search at points there).

        The fitted problem's own search at those points, with the final ``v``
        (seeded with the grid policy interpolated linearly): what the solved
        policy is between grid points.  For :func:`worker.euler.euler_errors`.
        """
        if self.egm_rule is not None:
            return self.egm_rule
        data = self._data
        if len(data.states) != 1 or self.others:
            return None
        grid = data.state_grids[0]
        n_z = data.n_shocks
        values = np.asarray(policy, dtype=np.float64).reshape(grid.size, n_z)

        def rule(k: np.ndarray) -> np.ndarray:
            k = np.asarray(k, dtype=np.float64).reshape(-1)
            guess = np.column_stack([np.interp(k, grid, values[:, z]) for z in range(n_z)]).reshape(-1)
            states = np.repeat(k, n_z)[:, None]
            rows = np.tile(np.arange(n_z, dtype=np.int64), k.size)
            _, chosen = self.choose_at(v, states, rows, guess)
            return chosen.reshape(k.size, n_z)

        return rule

    def nodes(self, policy: np.ndarray) -> tuple[np.ndarray, ...]:
        """``(reward, tomorrow, clamped (n,), index (n, K·2^d), weight (n, K·2^d), lower (n, K, d), share (n, K, d),
        mass (n, K))`` of a policy (cached): per combination of the draws after the choice (K = 1, probability 1
        without them; ``tomorrow`` (n, d) then, (n, K, d) with them) its multilinear nodes, their weights
        times its probability, and where it lies on each grid with its probability (the monotone cubic's);
        see :func:`~worker.continuous.drawnodes.draw_nodes`."""
        a, jc = self.split_policy(policy)
        key = np.asarray(policy, dtype=np.float64)
        if self._nodes_for is not None and np.array_equal(self._nodes_for, key):
            return self._nodes
        data = self._data
        reward = np.empty(self.n)
        tomorrow = self._tomorrow(self.n)
        ok = np.empty(self.n, dtype=np.bool_)
        probs = np.zeros((self.n, self._draw_count))
        self._k.policy_at(self._params, self._sgrid, self._meta, data.shock_table, self._svals, self._piz, a,
                          self.combos, jc, reward, tomorrow, ok, probs)
        if not ok.all():
            i = int(np.flatnonzero(~ok)[0])
            raise ValueError(
                f"the policy picks a choice that is not allowed at {data.describe_state(i)} ({self.choice} = "
                f"{a[i]:.6g})"
            )
        if data.draws is not None:
            check_at_policy(data, self.choice_values(policy))
            found = draw_nodes(data.state_grids, self._strides, tomorrow, probs)
        else:
            found = draw_nodes(data.state_grids, self._strides, tomorrow[:, None, :], np.ones((self.n, 1)))
        self._nodes_for = key.copy()
        self._nodes = (reward, tomorrow, *found)
        return self._nodes

    def policy_steps(
        self, v: np.ndarray, policy: np.ndarray, steps: int, span_stop: float = -np.inf
    ) -> tuple[np.ndarray, int, float]:
        """Howard evaluation steps under the model's interpolation; see :data:`worker.problem.PolicySteps`."""
        reward, _, _, index, weight, lower, share, mass = self.nodes(policy)
        out = np.array(v, dtype=np.float64).reshape(self.n)
        if self.cubic:
            done, span = cubic_policy_steps(reward, lower, share, mass, self._sgrid, self._meta, self._data.transition,
                                            self.discount, out, int(steps), float(span_stop))
        else:
            EVt, spare = self._scratch
            done, span = kernels.policy_steps(reward, index, weight, self._data.transition, self.discount, out,
                                              int(steps), float(span_stop), EVt, spare)
        return out, int(done), float(span)

    def policy_step(self, v: np.ndarray, policy: np.ndarray) -> np.ndarray:
        """``r_σ + β EV_σ`` under the model's interpolation; (n,) → (n,)."""
        return self.policy_steps(v, policy, 1)[0]

    def policy_reward(self, policy: np.ndarray) -> np.ndarray:
        return self.nodes(policy)[0].copy()

    def policy_matrix(self, policy: np.ndarray) -> sp.csr_matrix:
        """``P_σ`` with each next state's mass on its neighbouring grid points in proportion (Young 2010)."""
        _, _, _, index, weight, _, _, _ = self.nodes(policy)
        indptr, indices, values = kernels.policy_csr(index, weight, self._data.transition)
        matrix = sp.csr_matrix((values, indices, indptr), shape=(self.n, self.n))
        if self._draw_count:
            matrix.sum_duplicates()  # two draws' nodes may meet at one grid point
        return matrix

    def describe_policy(self, policy: np.ndarray) -> tuple[dict[str, Any], dict[str, Any] | None]:
        """``policy`` (the chosen values, nested to ``shape``) and ``policy_index``: grid indices of the other
        choices, none for the continuous one (None when it is the only choice)."""
        values = {name: chosen.reshape(self.shape).tolist() for name, chosen in self.choice_values(policy).items()}
        if not self.others:
            return values, None
        _, jc = self.split_policy(policy)
        sizes = tuple(grid.size for grid in self._other_grids)
        indices = np.unravel_index(jc, sizes)
        return values, {name: index.reshape(self.shape).tolist() for name, index in zip(self.others, indices)}

    def choice_values(self, policy: np.ndarray) -> dict[str, np.ndarray]:
        """Per choice (in the model's order), the (n,) chosen value."""
        a, jc = self.split_policy(policy)
        found = {self.choice: a}
        found.update((name, self.combos[jc, k]) for k, name in enumerate(self.others))
        return {name: found[name] for name in self._data.choices}

    def state_values(self) -> dict[str, np.ndarray]:
        env = self._data.state_env(np.arange(self.n, dtype=np.int64))
        return {name: np.ascontiguousarray(env[name][:, 0]) for name in self.axes}

    def diagnostics(self, policy: np.ndarray) -> dict[str, Any]:
        """The continuous choice's search and interpolation, clamped next values, and notes."""
        _, tomorrow, clamped, _, _, _, _, _ = self.nodes(policy)
        a, _ = self.split_policy(policy)
        warnings: list[str] = []
        if clamped.any():
            warnings.append(
                f"at {int(clamped.sum())} of {self.n} points tomorrow's state under the policy lies outside its grid "
                "and was moved to the nearer end; widen the grid"
            )
        notes = list(self.notes)
        if self.cubic:
            notes.append("monotone_cubic interpolation: the error bound is computed as for linear interpolation, but "
                         "the cubic interpolant is not linear in the value function, so the bound is not a proof")
        if not self.hints.concave and self.bound_search:
            notes.append("without the concave hint each point's search skips runs of grid intervals that a bound "
                         "proves cannot beat the best choice found, and searches the others interval by interval; "
                         "inside one interval the search is local")
        elif not self.hints.concave:
            notes.append("without the concave hint each point's search scans the interval and refines the best "
                         "scanned choice; a maximum hidden between two scanned points can be missed")
        continuous = {
            "choice": self.choice,
            "interpolation": self.interpolation,
            "certified": not self.cubic,
            "search": ("brent_from_bracket" if self.hints.concave
                       else "branch_and_bound" if self.bound_search else "scan_and_refine"),
            "monotone_narrowing": self.hints.monotone,
            "clamped_next": int(clamped.sum()),
        }
        if self.others:
            continuous["searched_for_each"] = list(self.others)
            continuous["combinations"] = int(self.combos.shape[0])
        if self.target is not None:  # the ends of the chosen state's grid, warned as a grid choice's are
            grid, state = self._data.state_grids[self.target], self._data.states[self.target]
            low, high = int(np.count_nonzero(a <= grid[0])), int(np.count_nonzero(a >= grid[-1]))
            continuous.update(at_lower_end=low, at_upper_end=high)
            warnings += end_warnings(self.choice, grid, low / self.n, high / self.n, state,
                                     self.real_ends.get(state, ()))
        if self.egm_report is not None:
            continuous["endogenous_grid"] = dict(self.egm_report)
        out: dict[str, Any] = {"continuous_choice": continuous, "warnings": warnings, "timings": dict(self.timings)}
        if notes:
            out["notes"] = notes
        return out
