"""A grid model with taste shocks: the smoothed Bellman operator on the full reward tables.

Every combination of the choices carries its own extreme-value shock (see
:mod:`worker.taste`), so every allowed choice has a probability and enters the
value: no hinted search, no block search that skips choices, and no static
choice maximised out within the period applies.  With
``model.taste_shocks.choices`` the shocks are on the combinations ``d`` of the
listed choices only, and the other choices ``a`` are maximised exactly given
``d`` (:func:`worker.taste.partial_smoothed_max`): a pair that is not the best
``a`` of its ``d`` has probability 0, so everything below reads the
probabilities as before.  Every step therefore scans
the tables of every (point, choice) pair (:func:`worker.gridtables.precompute_tables`,
the same tables the ``tables`` reward storage and the numpy reference use) with
numpy: the choice-specific values ``Q = R + β·EV`` and their log-sum-exp.
Tables over the precompute budget are refused (``TooLarge`` at
``model.taste_shocks``), since no other storage can give every choice's value.

Evaluation (Howard's method, policy iteration), the stationary distribution
and simulation use the logit probabilities of the last Bellman step, as for
tabular models: ``P_π`` mixes every pair's interpolation nodes by its
probability, and ``r_π`` carries the entropy term.  Written as the nodes of
one point (every pair's nodes, weighted by the pair's probability), the
mixture runs through the same compiled fixed-policy kernels
(:mod:`worker.kernels`) as a grid model's policy, fused and threaded alike.

With draws after the choice (:mod:`worker.draws`) the tables are those of
:func:`~worker.gridtables.precompute_tables` with a draw axis: ``R`` is the
expected reward and each pair's nodes are every draw's interpolation
corners, the draw's probability folded into their weights
(:meth:`TasteGridProblem._nodes_of_pairs`), so ``EV(x, c)`` is the
expectation over the draws and every use of the pairs' nodes above (the
mixture, ``pair_transition``) mixes the draws too.
"""

from __future__ import annotations

import time
from typing import Any

import numpy as np
import scipy.sparse as sp

from worker import _codegen, kernels
from worker.estimate import grid_plan
from worker.feasibility import infeasible, model_data
from worker.gridproblem import GridProblem
from worker.gridtables import precompute_tables
from worker.reference import CHUNK_PAIRS, ReferenceProblem, _corner, _interpolated_expected
from worker.taste import check_scale, entropy_reward, partial_smoothed_max
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
    # With draws after the choice the tables hold one node set per draw with its probability (worker.draws).
    draws = data.draws.size if data.draws is not None else 0
    layout = _codegen.layout_for(data.setter, len(data.shocks), len(data.choices), "table", False, draws=draws)
    ctx = _codegen.context(data.param_values, data.state_grids, data.shock_table, data.choice_grids, tables)
    shocks = doc.model.taste_shocks
    problem = TasteGridProblem(
        doc, data, plan, layout, None, ctx, "tables", counts, full=data, taste_scale=shocks.scale,
        taste_choices=None if shocks.choices is None else [name for name in data.choices if name in shocks.choices],
    )
    prepared = time.perf_counter()
    problem._warm_up()
    problem.timings = {"prepare_s": prepared - started, "compile_s": time.perf_counter() - prepared}
    return problem


class TasteGridProblem(ReferenceProblem):
    """A grid problem with taste shocks; implements :class:`worker.problem.CompiledProblem`.

    Policies are the most probable choice (flat C-order index over the
    choices); ``choice_probabilities(policy)`` gives the (n, C) logit
    probabilities of the last Bellman step, which ``policy_matrix``,
    ``policy_reward`` and ``choice_values`` use.  ``taste_choices`` names the
    choices that carry the shocks (in the model's order), or is None: every
    choice, the smoothed maximum over all pairs.
    """

    def __init__(self, *args: Any, taste_scale: float, taste_choices: list[str] | None = None,
                 **kwargs: Any) -> None:
        super().__init__(*args, **kwargs)
        self.taste_scale = check_scale(taste_scale)
        shocked = tuple(taste_choices is None or name in taste_choices for name in self._data.choices)
        self.taste_choices = None if all(shocked) else list(taste_choices or ())
        self._shocked = shocked
        self._probabilities: np.ndarray | None = None
        self._most_probable: np.ndarray | None = None
        self._pair_nodes: tuple[np.ndarray, np.ndarray] | None = None
        self._mixed: tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray] | None = None

    def _choice_expected(self, v: np.ndarray) -> np.ndarray:
        """(n, C): ``EV(x, c) = Σ_k w_k EVt[z, node_k(x, c)]``, the expected value of tomorrow after each choice."""
        EVt = self._continuation(v)
        R, next_base = self._tables[0], self._tables[1]
        n, n_choices = R.shape
        if len(self._tables) == 5:
            return self._drawn_expected(EVt)
        if not self._interpolated_strides:
            n_shocks = EVt.shape[0]
            per_shock = EVt[:, next_base]
            return np.broadcast_to(per_shock[None], (n // n_shocks, n_shocks, n_choices)).reshape(n, n_choices)
        return _interpolated_expected(self._tables, EVt, self._interpolated_strides, 0, n)

    def _drawn_expected(self, EVt: np.ndarray) -> np.ndarray:
        """(n, C) ``EV(x, c)`` with draws after the choice: every draw's nodes, its probability folded into their
        weights (:meth:`_nodes_of_pairs`), summed in chunks of rows."""
        index, weight = self._nodes_of_pairs()
        n, n_choices, nodes = weight.shape
        n_shocks = EVt.shape[0]
        out = np.empty((n, n_choices))
        rows_per_chunk = max(1, CHUNK_PAIRS // max(n_choices * nodes, 1))
        for start in range(0, n, rows_per_chunk):
            stop = min(n, start + rows_per_chunk)
            z = (np.arange(start, stop) % n_shocks)[:, None, None]
            terms = EVt[z, index[start:stop]]
            terms *= weight[start:stop]
            out[start:stop] = terms.sum(axis=2)
        return out

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
        Tv : (n,) float64, ``s·log Σ_c exp(Q(x, c)/s)`` (shocks on some choices: ``s·log Σ_d exp(max_a Q/s)``)
        policy : (n,) int64, the most probable choice
        """
        sizes = tuple(int(size) for size in self._data.choice_sizes)
        value, self._probabilities, policy = partial_smoothed_max(
            self.choice_specific_values(v), self.taste_scale, sizes, self._shocked
        )
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
        R, next_base, lower, weight = self._tables[:4]
        n, n_choices = R.shape
        strides = self._interpolated_strides
        nodes = self._layout.nodes
        index = np.empty((n, n_choices, nodes), dtype=np.int64)
        node_weight = np.empty((n, n_choices, nodes))
        if not strides:
            index[:, :, 0] = next_base[None, :]
            node_weight[:, :, 0] = 1.0
        else:
            # With draws after the choice ``lower`` and ``weight`` carry a draw axis (n, C, K, m): draw k's corners
            # are nodes k·2^m .. (k + 1)·2^m − 1, weighted by the draw's probability.
            drawn = len(self._tables) == 5
            corners = 2 ** len(strides)
            per_draw = [(lower[:, :, k], weight[:, :, k]) for k in range(lower.shape[2])] if drawn else [
                (lower, weight)]
            for k, (low, w) in enumerate(per_draw):
                for corner in range(corners):
                    bits, wk = _corner(w, corner, len(strides))
                    node_weight[:, :, k * corners + corner] = wk * self._tables[4][:, :, k] if drawn else wk
                    index[:, :, k * corners + corner] = next_base[None, :] + sum(
                        stride * (low[:, :, j].astype(np.int64) + bits[j]) for j, stride in enumerate(strides)
                    )
        allowed = R != -np.inf
        node_weight[~allowed] = 0.0
        # A zero-weight corner beyond the grid's last point is never read: keep its index in range.
        np.clip(index, 0, self._data.n_grid - 1, out=index)
        self._pair_nodes = (index, node_weight)
        return self._pair_nodes

    def _mixture(self, policy: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """``(r_π, index, weight)`` of the last Bellman step's probabilities, built once per step: every
        pair's nodes as the nodes of one point, ``index`` (n, C·nodes) and ``weight = π(c|x)·w_k`` — the
        form of a policy's nodes, so the compiled fixed-policy kernels evaluate the probabilities."""
        probabilities = self.choice_probabilities(policy)
        if self._mixed is None or self._mixed[0] is not probabilities:
            index, weight = self._nodes_of_pairs()
            n = index.shape[0]
            mixed = (probabilities[:, :, None] * weight).reshape(n, -1)
            reward = entropy_reward(self._tables[0], probabilities, self.taste_scale)
            self._mixed = (probabilities, reward, index.reshape(n, -1), mixed)
        return self._mixed[1], self._mixed[2], self._mixed[3]

    def pair_transition(self) -> sp.csr_matrix:
        """(n·C, n) CSR: row ``x·C + c`` is tomorrow's law after choice ``c`` at ``x`` (zero when not allowed)."""
        index, weight = self._nodes_of_pairs()
        n, n_choices, nodes = weight.shape
        transition = self._data.transition
        n_shocks = transition.shape[0]
        shock = np.repeat(np.arange(n) % n_shocks, n_choices * nodes)
        data = (weight.reshape(-1)[:, None] * transition[shock]).reshape(-1)
        indices = (index.reshape(-1)[:, None] * n_shocks + np.arange(n_shocks)).reshape(-1)
        indptr = np.arange(0, data.size + 1, nodes * n_shocks, dtype=np.int64)
        return sp.csr_matrix((data, indices, indptr), shape=(n * n_choices, self.n))

    _evaluated = _mixture

    def policy_matrix(self, policy: np.ndarray) -> sp.csr_matrix:
        """``P_π`` (n, n) CSR with each row's columns summed once: several pairs of a point may reach the same
        node (working or not, then the same assets), and a row with repeated columns misleads the
        strongly-connected-class search of :func:`worker.shocks.stationary_distribution`."""
        matrix = super().policy_matrix(policy)
        matrix.sum_duplicates()
        return matrix

    def policy_steps(  # type: ignore[override]
        self, v: np.ndarray, policy: np.ndarray, steps: int, span_stop: float = -np.inf
    ) -> tuple[np.ndarray, int, float]:
        """Compiled, threaded evaluation steps of the probabilities (the reference problem has none)."""
        return GridProblem.policy_steps(self, v, policy, steps, span_stop)

    def _warm_up(self) -> None:
        """Load (or compile once per machine) the fixed-policy kernel the evaluation steps use."""
        node_index, node_weight = np.empty((0, 1), dtype=np.int64), np.empty((0, 1))
        empty = np.empty(0)
        kernels.policy_steps(empty, node_index, node_weight, self._data.transition, self.discount, empty, 1,
                             -np.inf, np.zeros((self._data.n_shocks, 0)), empty)

    def choice_values(self, policy: np.ndarray) -> dict[str, np.ndarray]:
        """Per choice, the (n,) expected chosen value under the probabilities."""
        probabilities = self.choice_probabilities(policy)
        return {name: probabilities @ values for name, values in self.combination_values().items()}

    def combination_values(self) -> dict[str, np.ndarray]:
        """Per choice, its (C,) value in each combination of the choices (the columns of the probabilities)."""
        parts = np.unravel_index(np.arange(self._data.n_choices), self._data.choice_sizes)
        return {name: grid[parts[j]] for j, (name, grid) in enumerate(zip(self._data.choices, self._data.choice_grids))}
