"""A grid model with taste shocks: the smoothed Bellman operator on the full reward tables.

Every combination of the choices carries its own extreme-value shock (see
:mod:`worker.taste`), so every allowed choice has a probability and enters the
value: no hinted search, no block search that skips choices, and no static
choice maximised out within the period applies.  Every step therefore scans
the tables of every (point, choice) pair (:func:`worker.gridtables.precompute_tables`,
the same tables the ``tables`` reward storage and the numpy reference use) with
numpy: the choice-specific values ``Q = R + β·EV`` and their log-sum-exp.
Tables over the precompute budget are refused (``TooLarge`` at
``model.taste_shocks``), since no other storage can give every choice's value.

Evaluation (Howard's method, policy iteration), the stationary distribution
and simulation use the logit probabilities of the last Bellman step, as for
tabular models: ``P_π`` mixes every pair's interpolation nodes by its
probability, and ``r_π`` carries the entropy term.
"""

from __future__ import annotations

import time
from typing import Any

import numpy as np
import scipy.sparse as sp

from worker import _codegen
from worker.estimate import grid_plan
from worker.feasibility import infeasible, model_data
from worker.gridtables import precompute_tables
from worker.reference import ReferenceProblem, _corner, _interpolated_expected
from worker.taste import check_scale, entropy_reward, smoothed_max
from worker.tastecheck import check_taste_tables

__all__ = ["TasteGridProblem", "compile_taste_grid"]


def compile_taste_grid(doc: Any, *, limits: dict[str, Any] | None = None) -> TasteGridProblem:
    """Compile a grid document with ``model.taste_shocks`` (grid-restricted choices only).

    Raises
    ------
    TooLarge
        The tables of every (point, choice) pair, with the choice probabilities, exceed the precompute budget.
    InfeasibleModel
        Some point has no allowed choice.
    """
    started = time.perf_counter()
    check_taste_tables(doc, limits=limits)
    plan = grid_plan(doc.model, limits=limits, method=doc.solver.method)
    data = model_data(doc)
    tables, counts = precompute_tables(data)
    stuck = np.flatnonzero(~counts["any_allowed"])
    if stuck.size:
        raise infeasible(data, stuck, counts["any_feasible"])
    layout = _codegen.layout_for(data.setter, len(data.shocks), len(data.choices), "table", False)
    ctx = _codegen.context(data.param_values, data.state_grids, data.shock_table, data.choice_grids, tables)
    problem = TasteGridProblem(
        doc, data, plan, layout, None, ctx, "tables", counts, full=data, taste_scale=doc.model.taste_shocks.scale
    )
    problem.timings = {"prepare_s": time.perf_counter() - started, "compile_s": 0.0}
    return problem


class TasteGridProblem(ReferenceProblem):
    """A grid problem with taste shocks; implements :class:`worker.problem.CompiledProblem`.

    Policies are the most probable choice (flat C-order index over the
    choices); ``choice_probabilities(policy)`` gives the (n, C) logit
    probabilities of the last Bellman step, which ``policy_matrix``,
    ``policy_reward`` and ``choice_values`` use.
    """

    def __init__(self, *args: Any, taste_scale: float, **kwargs: Any) -> None:
        super().__init__(*args, **kwargs)
        self.taste_scale = check_scale(taste_scale)
        self._probabilities: np.ndarray | None = None
        self._most_probable: np.ndarray | None = None
        self._pair_nodes: tuple[np.ndarray, np.ndarray] | None = None
        self._mixed: tuple[np.ndarray, sp.csr_matrix, np.ndarray] | None = None
        self._grouped: sp.csr_matrix | None = None

    def _choice_expected(self, v: np.ndarray) -> np.ndarray:
        """(n, C): ``EV(x, c) = Σ_k w_k EVt[z, node_k(x, c)]``, the expected value of tomorrow after each choice."""
        EVt = self._continuation(v)
        R, next_base = self._tables[0], self._tables[1]
        n, n_choices = R.shape
        if not self._interpolated_strides:
            n_shocks = EVt.shape[0]
            per_shock = EVt[:, next_base]
            return np.broadcast_to(per_shock[None], (n // n_shocks, n_shocks, n_choices)).reshape(n, n_choices)
        return _interpolated_expected(self._tables, EVt, self._interpolated_strides, 0, n)

    def choice_specific_values(self, v: np.ndarray) -> np.ndarray:
        """(n, C) ``Q(x, c) = r(x, c) + β EV(x, c)`` at ``v``; ``-inf`` where a choice is not allowed."""
        R = self._tables[0]
        q = R + self.discount * self._choice_expected(v)
        q[R == -np.inf] = -np.inf
        return q

    def bellman_step(
        self,
        v: np.ndarray,
        *,
        restricted: bool = False,
        policy_guess: np.ndarray | None = None,
        exhaustive: bool = False,
    ) -> tuple[np.ndarray, np.ndarray]:
        """The smoothed step over every allowed choice; keeps its probabilities for evaluation.

        Returns
        -------
        Tv : (n,) float64, ``s·log Σ_c exp(Q(x, c)/s)``
        policy : (n,) int64, the most probable choice
        """
        value, self._probabilities, policy = smoothed_max(self.choice_specific_values(v), self.taste_scale)
        self._most_probable = policy
        self._mixed = None
        return value, policy

    def choice_probabilities(self, policy: np.ndarray) -> np.ndarray:
        """(n, C) logit probabilities of the last Bellman step, whose most probable choices are ``policy``."""
        if self._probabilities is None or self._most_probable is None:
            raise ValueError("choice probabilities exist only after a Bellman step")
        if not np.array_equal(self._most_probable, np.asarray(policy).reshape(-1)):
            raise ValueError("the policy is not the most probable choice of the last Bellman step")
        return self._probabilities

    def choice_axes(self) -> dict[str, list[float]]:
        """The choice axes of ``choice_probabilities``: per choice, its grid values."""
        return {name: grid.tolist() for name, grid in zip(self._data.choices, self._data.choice_grids)}

    def _nodes_of_pairs(self) -> tuple[np.ndarray, np.ndarray]:
        """``(index, weight)``, each (n, C, nodes): tomorrow's flat grid states of every pair and their weights
        (0 where a pair is not allowed); computed once."""
        if self._pair_nodes is not None:
            return self._pair_nodes
        R, next_base, lower, weight = self._tables
        n, n_choices = R.shape
        strides = self._interpolated_strides
        nodes = self._layout.nodes
        index = np.empty((n, n_choices, nodes), dtype=np.int64)
        node_weight = np.empty((n, n_choices, nodes))
        if not strides:
            index[:, :, 0] = next_base[None, :]
            node_weight[:, :, 0] = 1.0
        else:
            for corner in range(nodes):
                bits, wk = _corner(weight, corner, len(strides))
                node_weight[:, :, corner] = wk
                index[:, :, corner] = next_base[None, :] + sum(
                    stride * (lower[:, :, k].astype(np.int64) + bits[k]) for k, stride in enumerate(strides)
                )
        allowed = R != -np.inf
        node_weight[~allowed] = 0.0
        # A zero-weight corner beyond the grid's last point is never read: keep its index in range.
        np.clip(index, 0, self._data.n_grid - 1, out=index)
        self._pair_nodes = (index, node_weight)
        return self._pair_nodes

    def _grid_rows(self, weights: np.ndarray, per_row: int) -> sp.csr_matrix:
        """CSR (rows, n_grid) straight from every pair's nodes: ``per_row`` consecutive (pair, node) entries
        make one row, weighted by ``weights`` (flat, one per entry).  Built without sorting: repeated columns
        stay separate entries, which every product adds up."""
        index, _ = self._nodes_of_pairs()
        entries = index.size
        indptr = np.arange(0, entries + 1, per_row, dtype=np.int64)
        return sp.csr_matrix((weights, index.reshape(-1), indptr), shape=(entries // per_row, self._data.n_grid))

    def _mixed_grid(self, probabilities: np.ndarray) -> sp.csr_matrix:
        """CSR (n, n_grid): ``G[x, x'] = Σ_c π(c|x) Σ_k w_k(x, c) [node_k(x, c) = x']`` (tomorrow's grid state)."""
        _, weight = self._nodes_of_pairs()
        n, n_choices, nodes = weight.shape
        return self._grid_rows((probabilities[:, :, None] * weight).reshape(-1), n_choices * nodes)

    def _with_shocks(self, grid_rows: sp.csr_matrix, points: np.ndarray) -> sp.csr_matrix:
        """CSR (rows, n): each entry ``(row, x')`` of ``grid_rows`` becomes ``(row, x'·S + z')`` with weight times
        ``P[z, z']``, ``z`` the shock of the row's point ``points[row]``; built without sorting."""
        transition = self._data.transition
        n_shocks = transition.shape[0]
        counts = np.diff(grid_rows.indptr)
        shock_of_entry = np.repeat(points % n_shocks, counts)
        data = (grid_rows.data[:, None] * transition[shock_of_entry]).reshape(-1)
        indices = (grid_rows.indices.astype(np.int64)[:, None] * n_shocks + np.arange(n_shocks)).reshape(-1)
        indptr = grid_rows.indptr.astype(np.int64) * n_shocks
        return sp.csr_matrix((data, indices, indptr), shape=(grid_rows.shape[0], self.n))

    def _phase(self, policy: np.ndarray) -> tuple[np.ndarray, sp.csr_matrix, np.ndarray]:
        """``(probabilities, G, r_π)`` of the last Bellman step, built once per step."""
        probabilities = self.choice_probabilities(policy)
        if self._mixed is None or self._mixed[0] is not probabilities:
            reward = entropy_reward(self._tables[0], probabilities, self.taste_scale)
            self._mixed = (probabilities, self._mixed_grid(probabilities), reward)
            self._grouped = None
        return self._mixed

    def _grouped_phase(self, policy: np.ndarray) -> tuple[sp.csr_matrix, np.ndarray]:
        """``(G grouped by shock, r_π)`` for evaluation steps, built once per step."""
        _, grid_rows, reward = self._phase(policy)
        if self._grouped is None:
            self._grouped = self._by_shock(grid_rows)
        return self._grouped, reward

    def policy_matrix(self, policy: np.ndarray) -> sp.csr_matrix:
        """``P_π`` (n, n) CSR: every pair's nodes weighted by the pair's probability, times the shock chain."""
        _, grid_rows, _ = self._phase(policy)
        return self._with_shocks(grid_rows, np.arange(self.n))

    def pair_transition(self) -> sp.csr_matrix:
        """(n·C, n) CSR: row ``x·C + c`` is tomorrow's law after choice ``c`` at ``x`` (zero when not allowed)."""
        _, weight = self._nodes_of_pairs()
        n, n_choices, nodes = weight.shape
        grid_rows = self._grid_rows(weight.reshape(-1), nodes)
        return self._with_shocks(grid_rows, np.arange(n * n_choices) // n_choices)

    def policy_reward(self, policy: np.ndarray) -> np.ndarray:
        """``r_π = Σ_c π(c|x)·(r(x, c) − s·log π(c|x))``, shape (n,)."""
        return self._phase(policy)[2].copy()

    def policy_step(self, v: np.ndarray, policy: np.ndarray) -> np.ndarray:
        """``r_π + β P_π v``; (n,) → (n,)."""
        grid_rows, reward = self._grouped_phase(policy)
        return self._evaluate(grid_rows, reward, np.asarray(v, dtype=np.float64).reshape(self.n))

    def _evaluate(self, grid_rows: sp.csr_matrix, reward: np.ndarray, v: np.ndarray) -> np.ndarray:
        """One evaluation step: ``r_π(x) + β Σ_x' G[x, x'] EVt[z(x), x']`` (no (n, n) matrix).

        ``grid_rows`` is ``G`` with its rows grouped by shock (see :meth:`_by_shock`)."""
        EVt = self._continuation(v)
        n_shocks = EVt.shape[0]
        out = np.empty(self.n)
        per_shock = self.n // n_shocks
        for z in range(n_shocks):
            out[z::n_shocks] = grid_rows[z * per_shock : (z + 1) * per_shock] @ EVt[z]
        out *= self.discount
        out += reward
        return out

    def _by_shock(self, grid_rows: sp.csr_matrix) -> sp.csr_matrix:
        """``G`` with its rows reordered shock by shock (points z, z + S, z + 2S, … for each z in turn), so
        that each shock's rows are one contiguous block whose product reads one row of ``EVt``."""
        n_shocks = self._data.n_shocks
        order = np.arange(self.n).reshape(-1, n_shocks).T.reshape(-1)
        return sp.csr_matrix(grid_rows[order])

    def policy_steps(  # type: ignore[override]
        self, v: np.ndarray, policy: np.ndarray, steps: int, span_stop: float = -np.inf
    ) -> tuple[np.ndarray, int, float]:
        """Up to ``steps`` evaluation steps ``v ← r_π + β P_π v`` (see :data:`worker.problem.PolicySteps`)."""
        grid_rows, reward = self._grouped_phase(policy)
        current = np.array(v, dtype=np.float64).reshape(self.n)
        done, span = 0, np.inf
        while done < steps:
            new = self._evaluate(grid_rows, reward, current)
            increment = new - current
            span = float(increment.max() - increment.min())
            current = new
            done += 1
            if span <= span_stop:
                break
        return current, done, span

    def choice_values(self, policy: np.ndarray) -> dict[str, np.ndarray]:
        """Per choice, the (n,) expected chosen value under the probabilities."""
        probabilities = self.choice_probabilities(policy)
        parts = np.unravel_index(np.arange(self._data.n_choices), self._data.choice_sizes)
        return {
            name: probabilities @ grid[parts[j]]
            for j, (name, grid) in enumerate(zip(self._data.choices, self._data.choice_grids))
        }
