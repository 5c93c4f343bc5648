"""Draws revealed after a continuous choice: the policy's nodes over the draws, and the probabilities' checks.

The generated kernels (:mod:`worker.continuous.source`) take the expectation over the draws' combinations at
every candidate: ``Σ_k p_k(c) [r_k(c) + β EV(x'_k(c))]``, ``EV`` read by the model's interpolation.  A
policy's nodes (:meth:`worker.continuous.problem.ContinuousProblem.nodes`) then hold, per point, every
combination's ``2^d`` multilinear nodes with their weights multiplied by its probability, so Howard's linear
steps, the transition matrix (Young 2010 lotteries per draw, weighted by the probabilities) and the
certified bound follow without change; and every combination's place on the grids with its probability, from
which the monotone cubic's steps take the same expectation
(:func:`worker.continuous.interp_kernels.cubic_policy_steps`; its bound is computed the same way, not a proof).

The probabilities are checked by the rules of :func:`worker.draws.draw_probabilities` (finite, non-negative,
summing to one) where the model is evaluated with numpy: at every point's scanned candidates (the
choice's ``points`` spread over its interval, with every combination of the other choices) before the
solve, and at the final policy after it.  Between scanned candidates the search counts a candidate whose
probabilities break the rules as not allowed, so the policy never picks one.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from worker.costs import CHUNK_ELEMENTS
from worker.draws import draw_probabilities
from worker.expressions import evaluate
from worker.feasibility import ModelData, evaluate_pairs
from worker.grids import locate

__all__ = ["check_at_policy", "check_at_scan", "draw_nodes"]


def check_at_scan(data: ModelData) -> None:
    """Raise :class:`~worker.errors.InvalidDocument` at the first point and scanned candidate whose draw
    probabilities break the rules (where the candidate is feasible)."""
    if data.draws is None:
        return
    columns = np.arange(data.n_choices, dtype=np.int64)
    rows_per_chunk = max(1, CHUNK_ELEMENTS // (columns.size * data.draws.size))
    for start in range(0, data.n, rows_per_chunk):
        evaluate_pairs(data, np.arange(start, min(start + rows_per_chunk, data.n), dtype=np.int64), columns)


def check_at_policy(data: ModelData, choice_values: dict[str, np.ndarray]) -> None:
    """The same rules at the policy: ``choice_values`` per choice, (n,) each."""
    if data.draws is None:
        return
    rows = np.arange(data.n, dtype=np.int64)
    env: dict[str, Any] = dict(zip(data.params, data.param_values.tolist()))
    env.update(data.state_env(rows))
    env.update((name, np.asarray(values, dtype=np.float64)[:, None]) for name, values in choice_values.items())
    feasible = np.ones((data.n, 1), dtype=bool)
    with np.errstate(all="ignore"):
        for name, expr in data.source.defines:
            if name not in data.draws.dependent:
                env[name] = evaluate(expr, env)
        for expr in data.source.feasible:
            feasible &= evaluate(expr, env) != 0.0

    def describe(r: int, c: int) -> str:
        chosen = ", ".join(f"{name} = {float(values[r]):.6g}" for name, values in choice_values.items())
        return f"{data.describe_state(r)} with {chosen}"

    draw_probabilities(data.draws, env, (data.n, 1), feasible, describe)


def draw_nodes(
    grids: list[np.ndarray], strides: list[int], tomorrow: np.ndarray, probs: np.ndarray
) -> tuple[np.ndarray, ...]:
    """``(clamped (n,), index (n, K·2^d), weight (n, K·2^d), lower (n, K, d), share (n, K, d), mass (n, K))``:
    each combination's multilinear nodes with their weights times its probability, and where it lies on each
    state's grid (for the monotone cubic) with its probability; ``tomorrow`` (n, K, d), ``probs`` (n, K)
    (without draws K = 1 and probability 1).  A combination of probability 0 gets weight and mass 0 (its next
    value is not read)."""
    n, k_count, d = tomorrow.shape
    corners = 2**d
    index = np.zeros((n, k_count, corners), dtype=np.int64)
    weight = np.zeros((n, k_count, corners))
    clamped = np.zeros(n, dtype=bool)
    live = probs > 0.0
    mass = np.where(live, probs, 0.0)
    x = np.where(live[:, :, None], tomorrow, np.array([g[0] for g in grids])[None, None, :])
    lowers, shares = [], []
    for t, grid in enumerate(grids):
        lower, share, out = locate(grid, x[:, :, t].reshape(-1))
        lowers.append(lower.reshape(n, k_count))
        shares.append(share.reshape(n, k_count))
        clamped |= (out.reshape(n, k_count) & live).any(axis=1)
    for corner in range(corners):
        w = mass
        for t, (lower, share) in enumerate(zip(lowers, shares)):
            bit = (corner >> t) & 1
            index[:, :, corner] += strides[t] * (lower + bit)
            w = w * (share if bit else 1.0 - share)
        weight[:, :, corner] = w
    return (clamped, index.reshape(n, -1), weight.reshape(n, -1), np.ascontiguousarray(np.stack(lowers, axis=2)),
            np.ascontiguousarray(np.stack(shares, axis=2)), np.ascontiguousarray(mass))
