"""How fast a tabular model's chains mix, read from its document: the step count of value iteration.

Value iteration stops on its bracket (:mod:`worker.solvers.loop`): ``β/(1 − β) · span(Tv − v)`` within
``2 · tolerance``.  From ``v = 0`` the first span is that of the best reward (with taste shocks, of their
smoothed maximum), and each step multiplies it by about ``β · ρ``, where ``ρ ≤ 1`` is the rate at which the
chain of the policy being followed shrinks spans (the second eigenvalue modulus, asymptotically; MacQueen's
bounds, 1966, cited from memory).  ``ρ = 1`` gives the steps at rate β, the upper figure; a chain that mixes in
a few steps takes far fewer (18 steps where the rate β needs 400 on a random 500-state chain of the estimate
set).

The policy is not known before solving, but a tabular model's chains are in the document:
:func:`value_iteration_mixing` measures each action's rate by a few steps of the power method on spans
(``RATE_STEPS`` products with the action's rows) and takes the slowest, since the optimal policy may take it
everywhere; with taste shocks every allowed action carries some probability, so it takes the rate of their
average chain.  That is a guess, not a bound (a policy mixing two actions state by state has its own rate), and
it costs ``RATE_STEPS`` sparse products, so it runs up to ``RATE_MAX_ENTRIES`` stored transitions; above that,
and for grid models (whose chains depend on the policy through the next states), the estimate keeps
``worker.costs.VALUE_SPAN_SHARE``.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import scipy.sparse as sp

__all__ = ["RATE_MAX_ENTRIES", "RATE_STEPS", "span_rate", "value_iteration_mixing"]

RATE_STEPS = 30
"""Products of the power method on spans per chain (count): the first half settles, the rate is the geometric
mean of the second half's span ratios (a periodic chain's ratios alternate)."""
RATE_MAX_ENTRIES = 1_000_000
"""Most stored transitions whose rates are measured (count): at a million, 10 actions of a random chain, the
rates took 0.09 s here, less than reading such a document; above it the estimate keeps the share of the steps at
rate β."""
_SEED = 20261205


def span_rate(chain: sp.csr_matrix, rows: np.ndarray) -> float:
    """The rate at which ``chain`` shrinks the span of a vector, over its ``rows`` (where the action is
    allowed): the geometric mean of ``span(P x) / span(x)`` over the second half of ``RATE_STEPS`` power steps
    from a random ``x``, each ``P x`` centred and scaled to span 1 (dimensionless, in [0, 1])."""
    x = np.random.default_rng(_SEED).standard_normal(chain.shape[1])
    x /= np.ptp(x)
    ratios = []
    for _ in range(RATE_STEPS):
        y = chain @ x
        spread = float(np.ptp(y[rows])) if rows.any() else 0.0
        ratios.append(min(spread, 1.0))
        if spread <= 0.0:
            return 0.0
        centre = float(y[rows].mean())
        y[~rows] = centre  # a state where the action is not allowed: the policy takes another there
        x = (y - centre) / spread
    tail = np.asarray(ratios[RATE_STEPS // 2:])
    return float(np.exp(np.log(tail).mean()))


def _pairs(model: Any) -> sp.csr_matrix:
    """The transitions as a (state · action, state) CSR matrix (one row per pair, duplicates summed)."""
    n, actions = int(model.n_states), int(model.n_actions)
    transition = model.transition
    if isinstance(transition, np.ndarray):
        return sp.csr_matrix(transition.reshape(n * actions, n))
    entries = np.asarray(transition.entries)
    pair = entries[:, 0].astype(np.int64) * actions + entries[:, 1].astype(np.int64)
    matrix = sp.csr_matrix((entries[:, 3], (pair, entries[:, 2].astype(np.int64))), shape=(n * actions, n))
    matrix.sum_duplicates()
    return matrix


def value_iteration_mixing(model: Any) -> tuple[float, float, str] | None:
    """``(rate ρ, first span, words)`` of a tabular model without a horizon (see the module), or None when its
    stored transitions exceed ``RATE_MAX_ENTRIES``."""
    transition = model.transition
    stored = transition.size if isinstance(transition, np.ndarray) else int(transition.entries.shape[0])
    if stored > RATE_MAX_ENTRIES:
        return None
    n, actions = int(model.n_states), int(model.n_actions)
    reward = np.asarray(model.reward, dtype=np.float64)
    allowed = ~np.isnan(reward)
    pairs = _pairs(model)
    taste = getattr(model, "taste_shocks", None)
    if taste is not None:
        scale = float(taste.scale)
        shifted = np.where(allowed, reward, -np.inf) / scale
        top = shifted.max(axis=1, keepdims=True)
        first = scale * (top[:, 0] + np.log(np.exp(shifted - top).sum(axis=1)))
        weights = (allowed / np.maximum(allowed.sum(axis=1, keepdims=True), 1)).ravel()
        mixer = sp.csr_matrix((weights, np.arange(n * actions), np.arange(0, n * actions + 1, actions)),
                              shape=(n, n * actions))
        rate = span_rate(sp.csr_matrix(mixer @ pairs), np.ones(n, dtype=bool))
        words = "the rate of the allowed actions' average chain (taste shocks give every action some probability)"
    else:
        first = np.where(allowed, reward, -np.inf).max(axis=1)
        rate = max(span_rate(pairs[a::actions], allowed[:, a]) for a in range(actions))
        words = "the rate of the slowest action's chain"
    return rate, float(np.ptp(first)), words
