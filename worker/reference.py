"""The plain numpy Bellman step of a grid model: the reference of the compiled kernels.

:func:`bellman_step_reference` scans the reward tables of every
(point, choice) pair (:func:`worker.gridtables.precompute_tables`) with numpy:
no hints, no block search, nothing compiled.  It performs the same
floating-point operations in the same order as the generated ``tables``
kernels (``bellman_full`` of :mod:`worker._codegen`), the first of equal
values winning, so the two agree bit for bit; the tests compare the
compiled kernels of both reward storages against it.  The ``on_the_fly``
kernels evaluate the model's expressions in compiled code, whose ``log``,
``exp`` and ``**`` may differ from numpy's vectorised ones in the last bits,
so against them the tests allow a stated tolerance (models without such
functions agree bit for bit).

:class:`ReferenceProblem` is a whole :class:`~worker.problem.CompiledProblem`
on this step.  The cold-start bridge (:mod:`worker.bridge`) solves with it
while a new model structure's kernels compile; it reads in one sitting what
the kernels compute.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from worker.gridproblem import GridProblem
from worker.gridtables import RewardTables
from worker.problem import Hints, PolicySteps

__all__ = ["CHUNK_PAIRS", "ReferenceProblem", "bellman_step_reference"]

CHUNK_PAIRS = 2_000_000
"""Pairs per chunk of a numpy table scan (bounds its temporaries to some 50 MB)."""


def _corner(w: np.ndarray, corner: int, m: int) -> tuple[list[int], np.ndarray]:
    """The bits of interpolation corner ``corner`` and its weights ``Π_k (w_k or 1 − w_k)``, left to right
    as the kernels multiply them (``w``: upper weights, last axis of length ``m``)."""
    bits = [(corner >> k) & 1 for k in range(m)]
    weight = w[..., 0] if bits[0] else (1.0 - w[..., 0])
    for k in range(1, m):
        weight = weight * (w[..., k] if bits[k] else (1.0 - w[..., k]))
    return bits, weight


def _interpolated_expected(
    tables: RewardTables, EVt: np.ndarray, strides: list[int], start: int, stop: int
) -> np.ndarray:
    """``Σ_k w_k EVt[z, node_k]`` for points ``[start, stop)`` × every choice, corners in the kernels' order."""
    _, next_base, lower, weight = tables
    z = np.arange(start, stop) % EVt.shape[0]
    lo, w = lower[start:stop], weight[start:stop]
    expected = np.zeros(lo.shape[:2])
    for corner in range(2 ** len(strides)):
        bits, wk = _corner(w, corner, len(strides))
        index = next_base[None, :].astype(np.int64)
        for k, stride in enumerate(strides):
            index = index + stride * (lo[..., k].astype(np.int64) + bits[k])
        # Zero weights add nothing (the kernels skip them; ``e + 0.0`` is ``e`` for e ≥ +0.0 sums).
        term = wk * EVt[z[:, None], np.minimum(index, EVt.shape[1] - 1)]
        expected += np.where(wk != 0.0, term, 0.0)
    return expected


def bellman_step_reference(
    tables: RewardTables, EVt: np.ndarray, discount: float, strides: list[int]
) -> tuple[np.ndarray, np.ndarray]:
    """One exact Bellman step by numpy scans of the reward tables.

    Parameters
    ----------
    tables : RewardTables
        ``(R, next_base, node_lower, node_weight)`` of
        :func:`~worker.gridtables.precompute_tables`; ``R`` is (n, C) with
        ``-inf`` where a choice is not allowed.
    EVt : (n_shocks, n_grid) float64
        The continuation ``EVt[z, x'] = Σ_z' P[z, z'] v[x', z']``.
    discount : float
        β.
    strides : list of int
        Per state variable whose tomorrow comes from a ``next`` expression
        (interpolated), its stride in the flat grid index; empty when every
        state variable is ``next_of`` a choice.

    Returns
    -------
    Tv : (n,) float64
    policy : (n,) int64, the first maximising choice per point.
    """
    R, next_base = tables[0], tables[1]
    n = R.shape[0]
    out_v = np.empty(n)
    out_policy = np.empty(n, dtype=np.int64)
    rows_per_chunk = max(1, CHUNK_PAIRS // max(R.shape[1], 1))
    if not strides:
        # Every pair lands on a grid point: per shock, one row of EV values serves all its points.
        n_shocks = EVt.shape[0]
        per_shock = n // n_shocks
        step = max(1, min(per_shock, rows_per_chunk))
        buffer = np.empty((step, R.shape[1]))
        for z in range(n_shocks):
            expected = discount * EVt[z, next_base]
            for start in range(0, per_shock, step):
                stop = min(per_shock, start + step)
                # Points x·n_shocks + z for x in [start, stop): a strided view, no gather.
                view = R[start * n_shocks + z : stop * n_shocks : n_shocks]
                values = np.add(view, expected, out=buffer[: stop - start])
                best = np.argmax(values, axis=1)
                out_policy[start * n_shocks + z : stop * n_shocks : n_shocks] = best
                out_v[start * n_shocks + z : stop * n_shocks : n_shocks] = values[np.arange(stop - start), best]
        return out_v, out_policy
    for start in range(0, n, rows_per_chunk):
        stop = min(n, start + rows_per_chunk)
        reward = R[start:stop]
        values = reward + discount * _interpolated_expected(tables, EVt, strides, start, stop)
        values[reward == -np.inf] = -np.inf
        best = np.argmax(values, axis=1)
        out_policy[start:stop] = best
        out_v[start:stop] = values[np.arange(stop - start), best]
    return out_v, out_policy


class ReferenceProblem(GridProblem):
    """A grid problem solved by :func:`bellman_step_reference`; nothing is compiled.

    Same protocol as :class:`~worker.gridproblem.GridProblem` and the same
    tables, so :meth:`bellman_step` gives the same bits as the ``tables``
    kernels.  It uses no hints (every step is exact), and evaluation steps
    use the sparse ``P_σ`` (``policy_steps`` is None).
    """

    policy_steps: PolicySteps | None = None  # type: ignore[assignment]

    def __init__(self, *args: Any, **kwargs: Any) -> None:
        super().__init__(*args, **kwargs)
        self.hints = Hints()
        self._monotone = self._concave = False
        self.hints_active = False
        # The tables without ``meta``; with draws after the choice (taste shocks only) the fifth is their probability.
        self._tables: RewardTables = tuple(self._ctx[:-1])
        self._interpolated_strides = [self._strides[t] for t in self._layout.interpolated]

    def _warm_up(self) -> None:
        """Nothing to compile."""

    def bellman_step(
        self,
        v: np.ndarray,
        *,
        restricted: bool = False,
        policy_guess: np.ndarray | None = None,
        exhaustive: bool = False,
    ) -> tuple[np.ndarray, np.ndarray]:
        """An exact step: every allowed choice of every point (hints, guesses and ``exhaustive`` change nothing)."""
        return bellman_step_reference(self._tables, self._continuation(v), self.discount, self._interpolated_strides)

    def _nodes(self, policy: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """The table's reward and nodes at a policy (recomputed whenever the policy changes)."""
        policy, hit = self._cached_nodes(policy)
        if hit is not None:
            return hit
        R, next_base, lower, weight = self._tables
        rows = np.arange(self.n)
        reward = R[rows, policy]
        if not np.all(reward != -np.inf):
            raise self._not_allowed(policy, int(np.flatnonzero(reward == -np.inf)[0]))
        strides = self._interpolated_strides
        nodes = self._layout.nodes
        index = np.empty((self.n, nodes), dtype=np.int64)
        node_weight = np.empty((self.n, nodes))
        base = next_base[policy]
        if not strides:
            index[:, 0] = base
            node_weight[:, 0] = 1.0
        else:
            lo = lower[rows, policy].astype(np.int64)
            w = weight[rows, policy]
            for corner in range(nodes):
                bits, wk = _corner(w, corner, len(strides))
                node_weight[:, corner] = wk
                index[:, corner] = base + sum(stride * (lo[:, k] + bits[k]) for k, stride in enumerate(strides))
        clamped = np.zeros(self.n, dtype=np.bool_)
        self._policy_cache = (policy.copy(), reward, index, node_weight, clamped)
        return reward, index, node_weight, clamped
