"""Policy evaluation of a grid model with draws after the choice: merged nodes, one continuation row, a reduced solve.

With draws after the choice (:mod:`worker.draws`) a policy's row holds every
draw's interpolation corners, ``K · 2^m`` nodes with the draw's probability
folded into their weights (:meth:`worker._codegen.writer.KernelWriter.nodes`).
Many of them coincide (a separation that does not move the wage, draws whose
next values fall on one grid point) and many weigh nothing (a value on a grid
point has a zero upper weight).  :func:`merge_nodes` turns each row into its
distinct nodes, weights summed, zero weights dropped, once per policy, so an
evaluation step reads each distinct node once.

The continuation ``EVt[z, x'] = Σ_z' P[z, z'] v[x', z']`` is the other half of
a step.  When every row of the shocks' chain is the same (the shocks before
the choice are iid, or there are none), every ``z`` gets the same row:
:func:`draw_policy_steps` computes it once instead of ``n_shocks`` times (on
the job-search benchmark, 40 offers, a step went from about 40 µs to 7 µs).

With such a chain, policy iteration's exact evaluation needs no system over
every point: the value is ``v = r + β W e`` with ``e`` the expected value of
each grid state, which solves a system of the grid states' size
(:func:`reduced_policy_value`, and :func:`dense_reduced_value` compiled whole
for a dense one, offered to the solvers as ``exact_policy_value``; 80 × 80 on the benchmark where the full system is
3,200 × 3,200 with 40 entries per node).  It reads each policy's nodes
unmerged: one solve per policy does not repay the merging.

The merged sums are not the Bellman kernels' sums node by node, so a step may
differ from :meth:`~worker.gridproblem.GridProblem.policy_step` in the last
bits; the Bellman step that follows every evaluation phase certifies the
value whatever the steps did (see :mod:`worker.solvers`), so the error bound
is unchanged in kind.  The threaded evaluation (from
``threadpool.THREAD_MIN_STEP_POINTS`` points) stays that of the parent class.
The count of clamped next values at the policy reads the flags the compiled
fill of the tables made (:mod:`worker.drawkernel`).
"""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla
from numba import njit

from worker import threadpool
from worker.costs import DIRECT_SOLVE_MAX_POINTS
from worker.gridproblem import GridProblem

DENSE_SOLVE_MAX_GRID = 400
"""Grid states up to which the reduced policy system is solved dense (LAPACK), above it by sparse LU (count;
80 grid states took about 0.1 ms dense here; a dense solve grows with the cube)."""

__all__ = [
    "DENSE_SOLVE_MAX_GRID", "DrawGridProblem", "dense_reduced_value", "draw_policy_steps", "expand_value",
    "identical_rows", "merge_nodes",
    "merged_rows", "reduced_policy_value", "reduced_system",
]


def merged_rows(index: np.ndarray, weight: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """CSR ``(indptr, node index, node weight)`` of rows of nodes ``(n, K)``, each row's nodes merged by
    :func:`merge_nodes`, in arrays of the exact size (a first pass counts: memory the size of the nodes'
    table, fresh for each policy, cost more in page faults than the counting)."""
    n = index.shape[0]
    indptr = np.empty(n + 1, dtype=np.int64)
    merge_nodes(index, weight, indptr, np.empty(0, dtype=np.int64), np.empty(0), False)
    used = int(indptr[n])
    out_index = np.empty(used, dtype=np.int64)
    out_weight = np.empty(used)
    merge_nodes(index, weight, indptr, out_index, out_weight, True)
    return indptr, out_index, out_weight


def identical_rows(P: np.ndarray) -> bool:
    """True when every row of the chain ``P`` equals the first, bit for bit (an iid chain, or one shock state)."""
    return bool(P.shape[0] <= 1 or (P == P[:1]).all())


@njit(cache=True, nogil=True, error_model="numpy")
def merge_nodes(
    node_index: np.ndarray, node_weight: np.ndarray, indptr: np.ndarray, out_index: np.ndarray,
    out_weight: np.ndarray, fill: bool,
) -> None:
    """Each row's distinct nodes, weights summed (in the order the nodes first appear), zero weights dropped, as
    CSR rows ``indptr[i]:indptr[i + 1]`` of ``out_index``, ``out_weight``; without ``fill`` only ``indptr``.

    Parameters
    ----------
    node_index, node_weight : (n, K) int64, float64
    indptr : (n + 1,) int64, written
    out_index, out_weight : (indptr[n],) int64, float64, written when ``fill``
    fill : bool
    """
    n, nodes = node_index.shape
    used = 0
    indptr[0] = 0
    for i in range(n):
        first = used
        for k in range(nodes):
            w = node_weight[i, k]
            if w == 0.0:
                continue
            x = node_index[i, k]
            seen = False
            for kk in range(k):
                if node_weight[i, kk] != 0.0 and node_index[i, kk] == x:
                    seen = True
                    break
            if seen:
                if fill:
                    j = first
                    while out_index[j] != x:
                        j += 1
                    out_weight[j] += w
            else:
                if fill:
                    out_index[used] = x
                    out_weight[used] = w
                used += 1
        indptr[i + 1] = used


@njit(cache=True, nogil=True, error_model="numpy")
def reduced_system(
    reward: np.ndarray, indptr: np.ndarray, index: np.ndarray, weight: np.ndarray, q: np.ndarray, M: np.ndarray,
    b: np.ndarray,
) -> None:
    """``M = Q W`` (dense, zeroed first) and ``b = Q r`` of :func:`reduced_policy_value`, summed over the shock
    states in order."""
    n_shocks = q.shape[0]
    M[:, :] = 0.0
    b[:] = 0.0
    for i in range(reward.shape[0]):
        x = i // n_shocks
        qz = q[i - x * n_shocks]
        b[x] += qz * reward[i]
        for k in range(indptr[i], indptr[i + 1]):
            w = weight[k]
            if w != 0.0:  # unmerged nodes: a zero weight adds nothing
                M[x, index[k]] += qz * w


@njit(cache=True, nogil=True, error_model="numpy")
def expand_value(
    reward: np.ndarray, indptr: np.ndarray, index: np.ndarray, weight: np.ndarray, e: np.ndarray, beta: float,
    out: np.ndarray,
) -> None:
    """``out = r + β W e``: each point's merged nodes read from the grid states' continuation ``e``."""
    for i in range(reward.shape[0]):
        total = 0.0
        for k in range(indptr[i], indptr[i + 1]):
            w = weight[k]
            if w != 0.0:  # unmerged nodes: a zero weight adds nothing
                total += w * e[index[k]]
        out[i] = reward[i] + beta * total


@njit(cache=True, nogil=True, error_model="numpy")
def dense_reduced_value(
    reward: np.ndarray, node_index: np.ndarray, node_weight: np.ndarray, q: np.ndarray, beta: float, out: np.ndarray,
) -> None:
    """``out = v_σ`` by the dense reduced system in one compiled call, from a policy's unmerged nodes ``(n, K)``.

    The sums of :func:`reduced_system` in the same order (points in order, each row's nodes in order, zero
    weights skipped), ``I − β M`` as :func:`reduced_policy_value` forms it, LAPACK's ``gesv`` on it (numba's
    ``np.linalg.solve``), then :func:`expand_value`'s sums: no node arrays flattened, no row pointers, no Python
    between the three (on the job-search benchmark's 80 grid states, about 20 µs a solve less)."""
    n_shocks = q.shape[0]
    n, nodes = node_index.shape
    n_grid = n // n_shocks
    A = np.zeros((n_grid, n_grid))
    b = np.zeros(n_grid)
    for x in range(n_grid):
        row = A[x]
        for z in range(n_shocks):
            i = x * n_shocks + z
            qz = q[z]
            b[x] += qz * reward[i]
            for k in range(nodes):
                w = node_weight[i, k]
                if w != 0.0:
                    row[node_index[i, k]] += qz * w
    for x in range(n_grid):
        for y in range(n_grid):
            A[x, y] = A[x, y] * -beta
        A[x, x] += 1.0
    e = np.linalg.solve(A, b)
    for i in range(n):
        total = 0.0
        for k in range(nodes):
            w = node_weight[i, k]
            if w != 0.0:
                total += w * e[node_index[i, k]]
        out[i] = reward[i] + beta * total


@njit(cache=True, nogil=True, error_model="numpy")
def draw_policy_steps(
    reward: np.ndarray,
    indptr: np.ndarray,
    node_index: np.ndarray,
    node_weight: np.ndarray,
    P: np.ndarray,
    same_rows: bool,
    beta: float,
    v: np.ndarray,
    steps: int,
    span_stop: float,
    EVt: np.ndarray,
    spare: np.ndarray,
) -> tuple[int, float]:
    """Up to ``steps`` evaluation steps ``v ← r_σ + β P_σ v`` in place, over merged nodes.

    As :func:`worker.kernels.policy_steps` (the span stop, the two buffers, the
    result in ``v``), with row ``i`` reading its merged nodes ``indptr[i]:indptr[i + 1]`` (:func:`merged_rows`), and
    with ``same_rows`` (every row of ``P`` the same) one continuation row,
    ``EVt[0]``, for every shock state.
    """
    n_shocks = P.shape[0]
    n_grid = reward.shape[0] // n_shocks
    rows = 1 if same_rows else n_shocks
    flat = EVt.reshape(-1)
    done = 0
    span = np.inf
    source = v
    target = spare
    while done < steps:
        for z in range(rows):
            row = EVt[z]
            for x in range(n_grid):
                # Contiguous in z': the sum over tomorrow's shocks in order, from 0.0, zero probabilities skipped.
                total = 0.0
                start = x * n_shocks
                for zz in range(n_shocks):
                    p = P[z, zz]
                    if p != 0.0:
                        total += p * source[start + zz]
                row[x] = total
        low = np.inf
        high = -np.inf
        for i in range(reward.shape[0]):
            offset = 0 if same_rows else (i % n_shocks) * n_grid
            expected = 0.0
            for k in range(indptr[i], indptr[i + 1]):
                expected += node_weight[k] * flat[offset + node_index[k]]
            value = reward[i] + beta * expected
            step = value - source[i]
            if step < low:
                low = step
            if step > high:
                high = step
            target[i] = value
        span = high - low
        source, target = target, source
        done += 1
        if span <= span_stop:
            break
    if done % 2 == 1:
        for i in range(v.shape[0]):
            v[i] = spare[i]
    return done, span


def reduced_policy_value(
    reward: np.ndarray, indptr: np.ndarray, index: np.ndarray, weight: np.ndarray, q: np.ndarray, beta: float,
) -> np.ndarray | None:
    """``v_σ``, the solution of ``(I − β P_σ) v = r_σ``, through a system over the grid states, when the shocks'
    chain has identical rows ``q`` (None when that system is too large for a direct solve).

    Row ``i = x · n_shocks + z`` of ``P_σ`` is ``Σ_k w_ik · [x'_ik] ⊗ q``: tomorrow's grid state by the merged
    nodes (CSR ``indptr, index, weight`` over flat grid states), tomorrow's shock by ``q`` whatever ``z``.  So
    ``v = r + β W e`` with ``e = Q v``, ``e[x] = Σ_z q[z] v[x, z]``, and ``e`` solves the ``n_grid``-square system
    ``(I − β Q W) e = Q r``; then ``v = r + β W e``.  The Bellman step that follows certifies the value.
    """
    n_shocks = q.size
    n = reward.size
    n_grid = n // n_shocks
    if n_grid > DIRECT_SOLVE_MAX_POINTS:
        return None
    if n_grid <= DENSE_SOLVE_MAX_GRID:
        M = np.empty((n_grid, n_grid))
        b = np.empty(n_grid)
        reduced_system(reward, indptr, index, weight, q, M, b)
        np.multiply(M, -beta, out=M)
        M[np.diag_indices(n_grid)] += 1.0
        e = np.linalg.solve(M, b)
    else:
        points = np.repeat(np.arange(n, dtype=np.int64), np.diff(indptr))
        rows = points // n_shocks
        mixed = weight * q[points % n_shocks]
        b = reward.reshape(n_grid, n_shocks) @ q
        M = sp.csr_matrix((mixed, (rows, index)), shape=(n_grid, n_grid))
        e = spla.spsolve((sp.identity(n_grid, format="csr") - beta * M).tocsc(), b)
    out = np.empty(n)
    expand_value(reward, indptr, index, weight, np.ascontiguousarray(e, dtype=np.float64).reshape(n_grid), beta, out)
    return out


class DrawGridProblem(GridProblem):
    """A :class:`~worker.gridproblem.GridProblem` with draws after the choice: evaluation steps over merged nodes."""

    _merged: tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray] | None = None
    _node_rows: tuple[tuple[int, int], np.ndarray] | None = None
    """``((n, K), CSR row starts of unmerged nodes, K a row)`` (``exact_policy_value``)."""
    _same_rows: tuple[np.ndarray, bool] | None = None
    """``(the chain, whether its rows are identical)``, checked once per chain (:meth:`_identical_rows`)."""

    def _identical_rows(self) -> bool:
        """:func:`identical_rows` of the shocks' chain, compared once for each chain object the problem holds."""
        transition = self._data.transition
        same = self._same_rows
        if same is None or same[0] is not transition:
            same = self._same_rows = (transition, identical_rows(transition))
        return same[1]

    def _merged_nodes(self, policy: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """``(r_σ, indptr, node index, node weight)`` of ``policy``, nodes merged (CSR); cached for the last policy."""
        reward, index, weight = self._evaluated(policy)
        flat = np.ascontiguousarray(policy, dtype=np.int64).reshape(self.n)
        merged = self._merged
        if merged is not None and np.array_equal(merged[0], flat):
            return reward, merged[1], merged[2], merged[3]
        merged = merged_rows(index, weight)
        self._merged = (flat.copy(), *merged)
        return (reward, *merged)

    def policy_steps(
        self, v: np.ndarray, policy: np.ndarray, steps: int, span_stop: float = -np.inf
    ) -> tuple[np.ndarray, int, float]:
        """As :meth:`GridProblem.policy_steps`, over merged nodes and, for an iid chain, one continuation row."""
        if self.threads > 1 and self.n >= threadpool.THREAD_MIN_STEP_POINTS:
            return GridProblem.policy_steps(self, v, policy, steps, span_stop)
        reward, indptr, index, weight = self._merged_nodes(policy)
        out = np.array(v, dtype=np.float64).reshape(self.n)
        if self._step_scratch is None:
            self._step_scratch = (np.empty((self._data.n_shocks, self._data.n_grid)), np.empty(self.n))
        EVt, spare = self._step_scratch
        transition = self._data.transition
        done, span = draw_policy_steps(
            reward, indptr, index, weight, transition, self._identical_rows(), self.discount, out, int(steps),
            float(span_stop), EVt, spare,
        )
        return out, int(done), float(span)

    def exact_policy_value(self, policy: np.ndarray) -> np.ndarray | None:
        """``v_σ`` by the reduced system when the shocks' chain has identical rows, else None (policy iteration
        then solves the full system): up to ``DENSE_SOLVE_MAX_GRID`` grid states in one compiled call
        (:func:`dense_reduced_value`), above it by :func:`reduced_policy_value`'s sparse LU."""
        transition = self._data.transition
        if not self._identical_rows():
            return None
        # Each policy is solved once: its nodes are summed into the system as they are, unmerged (every row K
        # nodes, zero weights adding nothing), for merging them cost more than the sums it saves.
        reward, index, weight = self._evaluated(policy)
        n, nodes = index.shape
        if n // transition.shape[1] <= DENSE_SOLVE_MAX_GRID:
            out = np.empty(n)
            dense_reduced_value(reward, index, weight, transition[0], float(self.discount), out)
            return out
        if self._node_rows is None or self._node_rows[0] != (n, nodes):
            self._node_rows = ((n, nodes), np.arange(0, n * nodes + 1, nodes, dtype=np.int64))
        return reduced_policy_value(reward, self._node_rows[1], index.reshape(-1), weight.reshape(-1), transition[0],
                                    self.discount)

    def _clamped_at_policy_numpy(self, policy: np.ndarray) -> int:
        """Points whose policy's next value leaves a grid for some draw that can happen: read from the tables'
        flags when the compiled fill (:mod:`worker.drawkernel`) made them, else evaluated with numpy."""
        pairs = self._counts.get("clamped_pairs")
        if pairs is None:
            return super()._clamped_at_policy_numpy(policy)
        flat = np.asarray(policy, dtype=np.int64).reshape(self.n)
        return int(np.count_nonzero(pairs[np.arange(self.n), flat]))

    def _warm_up(self) -> None:
        super()._warm_up()
        nodes = self._layout.nodes
        index, weight = np.empty((0, nodes), dtype=np.int64), np.empty((0, nodes))
        indptr, flat_index, flat_weight = merged_rows(index, weight)  # compiles merge_nodes
        empty = np.empty(0)
        reduced_system(empty, indptr, flat_index, flat_weight, np.ones(1), np.empty((0, 0)), empty)
        expand_value(empty, indptr, flat_index, flat_weight, empty, self.discount, empty)
        dense_reduced_value(empty, index, weight, np.ones(1), float(self.discount), empty)
        EVt = np.zeros((self._data.n_shocks, 0))
        draw_policy_steps(empty, indptr, flat_index, flat_weight, self._data.transition, True, self.discount, empty, 1,
                          -np.inf, EVt, empty)
