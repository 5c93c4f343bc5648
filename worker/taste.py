"""Taste shocks: the smoothed maximum over a point's choices and the evaluation of choice probabilities.

With ``model.taste_shocks: {"scale": s}`` every choice ``a`` at a point ``x``
carries an additive shock ``s·ε_a``, the ``ε_a`` independent, extreme-value
type I (Gumbel) and centred (mean zero), seen by the decision-maker before the
choice and by nobody else.  With choice-specific values
``Q(x, a) = r(x, a) + β EV(x, a)`` the expected value of the best choice is the
smoothed maximum

    (Tv)(x) = s · log Σ_a exp(Q(x, a) / s)

(McFadden 1973 for the expected maximum of extreme-value utilities; the Euler
constant ``s·γ`` of a location-zero Gumbel is *not* in the value because the
shocks are centred: with location-zero shocks every value would be
``s·γ/(1 − β)`` higher, the figure :func:`diagnostics` reports as
``location_zero_offset``).  The probability of choosing ``a`` is the logit
``π(a|x) = exp(Q(x, a)/s) / Σ_b exp(Q(x, b)/s)``.

Why the error bound still holds
-------------------------------
The MacQueen–Porteus bracket (:mod:`worker.solvers`) needs two properties
of ``T``: monotone (``v ≤ w`` ⇒ ``Tv ≤ Tw``) and ``T(v + c) = Tv + βc`` for a
constant ``c``.  Both hold here: ``Q`` is monotone in ``v`` (transition
probabilities are non-negative) and log-sum-exp is increasing in every
argument; adding ``c`` to ``v`` adds ``βc`` to every ``Q(x, a)`` (rows sum to
one) and log-sum-exp passes a common constant through.  So ``T`` is a
β-contraction and ``Tv + k·min(Tv − v) ≤ v* ≤ Tv + k·max(Tv − v)`` as before.

Evaluation of choice probabilities (Howard's method, policy iteration)
---------------------------------------------------------------------
Choosing ``a`` whenever ``Q(x, a) + s·ε_a`` is largest among the choices with
probabilities ``π`` (that is, against values ``u_a`` with
``π(a) = softmax(u/s)``) gives the shock an expected value
``E[s·ε_a | a chosen] = −s·log π(a)`` (centred Gumbel).  So the value of
following the probabilities ``π`` forever solves the linear equation

    v_π(x) = Σ_a π(a|x) [r(x, a) − s·log π(a|x) + β Σ_x' P(x'|x, a) v_π(x')],

``v = r_π + β P_π v`` with ``r_π = Σ_a π (r − s·log π)`` (the entropy term)
and ``P_π = Σ_a π P_a``.  At ``π = softmax(Q(v)/s)`` one evaluation step from
``v`` gives exactly ``Tv`` (``Q − s·log π = s·log Σ exp(Q/s)`` for every ``a``),
and ``Tv = max_π (r_π + β P_π v)`` (the Gibbs variational principle), so
``T`` is the upper envelope of the affine operators of the probabilities,
each maximised by the logit of its own ``Q``: the convergence arguments of
Howard's method and policy iteration go through unchanged.

Shocks on some of the choices (``model.taste_shocks.choices``)
--------------------------------------------------------------
With the shocks on the listed choices only, ``d`` runs over the combinations
of the listed choices and ``a`` over those of the others, maximised exactly
once ``d`` (and its shock) is known:

    (Tv)(x) = s · log Σ_d exp(max_a Q(x, d, a) / s)

(:func:`partial_smoothed_max`).  The choice rule is: for each ``d`` its best
``a`` (ties: lowest index), and ``d`` with the logit probabilities of those
maxima.  Written over every ``(d, a)`` pair, a pair that is not the best
``a`` of its ``d`` has probability 0, so the evaluation above is unchanged:
its entropy term skips pairs of probability 0, so it is ``−s·log π(d|x)`` of
the chosen ``d`` only.  Monotonicity and the constant shift still hold (a
maximum has both), and ``T`` is the upper envelope of the affine operators of
the rules (a probability over ``d``, an ``a`` for each ``d``), so the bound
and the three methods carry over.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from worker.drawnames import draw_table_bytes

__all__ = [
    "EULER_GAMMA", "SMOOTHED_PAIR_NS", "check_scale", "diagnostics", "entropy_reward", "partial_smoothed_max",
    "shocked_choices", "smoothed_max", "taste_storage_words", "taste_table_bytes",
]

EULER_GAMMA = 0.5772156649015329
"""The Euler–Mascheroni constant γ, the mean of a location-zero standard Gumbel variable (unitless)."""
SMOOTHED_PAIR_NS = 15.0
"""Cost of one (point, choice) pair in a smoothed Bellman step by numpy (nanoseconds; measured 12 to 20 ns on
grid models of 0.6 to 1 million pairs on a 2-core x86 machine): the choice value, its exponential, the sums."""


def smoothed_max(q: np.ndarray, scale: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The smoothed maximum of each row of ``q`` and its logit probabilities, computed stably.

    Parameters
    ----------
    q : (n, A) float64
        Choice-specific values; ``-inf`` marks a choice that is not allowed
        (every row has at least one finite entry).
    scale : float
        ``s > 0``, the scale of the taste shocks (units of the reward).

    Returns
    -------
    value : (n,) float64
        ``s·log Σ_a exp(q/s)``, computed as ``m + s·log Σ_a exp((q − m)/s)``
        with ``m`` the row maximum, so nothing overflows.
    probabilities : (n, A) float64
        ``exp((q − value)/s)``, rows summing to one (0 where not allowed).
    most_probable : (n,) int64
        The row's largest entry (ties: lowest index).
    """
    most_probable = q.argmax(axis=1)
    top = np.take_along_axis(q, most_probable[:, None], axis=1)
    weights = q - top
    weights /= scale
    np.exp(weights, out=weights)
    total = weights.sum(axis=1)
    value = top[:, 0] + scale * np.log(total)
    weights /= total[:, None]
    return value, weights, most_probable.astype(np.int64, copy=False)


def partial_smoothed_max(
    q: np.ndarray, scale: float, sizes: tuple[int, ...], shocked: tuple[bool, ...]
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The smoothed maximum over the shocked choices of the exact maximum over the others, for each row of ``q``.

    Parameters
    ----------
    q : (n, C) float64
        Choice-specific values over the flat C-order product of the choices (sizes ``sizes``); ``-inf``
        marks a pair that is not allowed (every row has at least one finite entry).
    scale : float
        ``s > 0``.
    sizes : the number of values of each choice, in the order of the flat index
    shocked : per choice, whether it carries the taste shocks (at least one does)

    Returns
    -------
    value : (n,) float64
        ``s·log Σ_d exp(max_a q(d, a)/s)``, ``d`` the combinations of the shocked choices, ``a`` of the others.
    probabilities : (n, C) float64
        The logit probability of ``d`` at the pair ``(d, best a of d)``; 0 at every other pair.
    most_probable : (n,) int64
        The flat index of the most probable ``d`` with its best ``a`` (ties: lowest index).

    With every choice shocked this is :func:`smoothed_max`, to the bit.
    """
    if all(shocked):
        return smoothed_max(q, scale)
    n, n_pairs = q.shape
    d_axes = [j for j, on in enumerate(shocked) if on]
    a_axes = [j for j, on in enumerate(shocked) if not on]
    n_d = math.prod(sizes[j] for j in d_axes)
    order = d_axes + a_axes
    grouped = q.reshape(n, *sizes).transpose(0, *(1 + j for j in order)).reshape(n, n_d, -1)
    best = grouped.argmax(axis=2)
    top = np.take_along_axis(grouped, best[:, :, None], axis=2)[:, :, 0]
    value, by_d, likeliest = smoothed_max(top, scale)
    flat = np.arange(n_pairs).reshape(sizes).transpose(order).reshape(n_d, -1)
    chosen = flat[np.arange(n_d)[None, :], best]
    probabilities = np.zeros_like(q)
    np.put_along_axis(probabilities, chosen, by_d, axis=1)
    most_probable = np.take_along_axis(chosen, likeliest[:, None], axis=1)[:, 0]
    return value, probabilities, most_probable.astype(np.int64, copy=False)


def entropy_reward(reward: np.ndarray, probabilities: np.ndarray, scale: float) -> np.ndarray:
    """``r_π(x) = Σ_a π(a|x)·(r(x, a) − s·log π(a|x))``, choices of probability zero left out.

    Parameters
    ----------
    reward : (n, A) float64, ``-inf`` where not allowed
    probabilities : (n, A) float64, rows summing to one
    scale : float

    Returns
    -------
    (n,) float64
    """
    used = probabilities > 0.0
    terms = np.zeros_like(probabilities)
    safe = np.where(used, probabilities, 1.0)
    np.subtract(reward, scale * np.log(safe), out=terms, where=used)
    terms *= probabilities
    return terms.sum(axis=1)


def shocked_choices(problem: Any) -> list[str]:
    """The names of the choices that carry the taste shocks: ``problem.taste_choices`` or every choice."""
    named = getattr(problem, "taste_choices", None)
    return list(named) if named is not None else list(problem.choice_axes())


def diagnostics(scale: float, discount: float, shocked: list[str]) -> dict[str, Any]:
    """``diagnostics.taste_shocks`` of a result: the scale, the choices that carry it and what the value includes."""
    return {
        "scale": float(scale),
        "shocked_choices": list(shocked),
        "distribution": "extreme value type I (Gumbel), centred, independent across choices and periods",
        "euler_constant_included": False,
        "location_zero_offset": float(scale) * EULER_GAMMA / (1.0 - float(discount)),
        "note": (
            "the value is the expected discounted reward with centred taste shocks; with location-zero shocks "
            "add location_zero_offset (scale × Euler's constant / (1 − discount)) to every value"
        ),
    }


def check_scale(scale: float) -> float:
    """The scale as a float (a document check made sure it is finite and positive)."""
    value = float(scale)
    if not (value > 0.0 and math.isfinite(value)):
        raise ValueError(f"the taste-shock scale must be a positive number, got {scale!r}")
    return value


def taste_storage_words(pairs: int, table_bytes: int, budget: int, hints_requested: bool) -> tuple[str, str | None]:
    """``(reason, hint note)`` of a grid model's reward storage with taste shocks (always ``tables``).

    The smoothed maximum needs every allowed choice's value at every point, so neither a hinted search nor
    a block search that skips choices applies: every step scans the full tables.  Tables over the budget
    are refused when the model is compiled (:mod:`worker.tastegrid`).
    """
    mib = 2**20
    place = "within" if table_bytes <= budget else "over"
    reason = (
        f"taste shocks give every allowed choice a probability, so every step scans the tables of all {pairs:,} "
        f"(state, choice) pairs ({table_bytes / mib:,.0f} MiB with the choice probabilities, {place} the "
        f"precompute budget of {budget / mib:,.0f} MiB)"
    )
    note = (
        "the monotone and concave hints do not apply with taste shocks (every choice has a probability, so every "
        "choice is evaluated); they were not used"
        if hints_requested
        else None
    )
    return reason, note


def taste_table_bytes(pairs: int, interpolated: int, nodes: int) -> int:
    """Bytes of a grid model's tables with taste shocks: the rewards and nodes of every pair (8 + 12 per
    interpolated state; with draws after the choice, ``nodes / 2^interpolated`` of them, each node set with its
    probability, :func:`worker.drawnames.draw_table_bytes`), the choice values, probabilities and a temporary
    (3 × 8), and every pair's interpolation nodes with their weights, twice while the mixed transition is built
    (2 × 16 per node)."""
    draws = nodes >> interpolated if interpolated else 1
    tables = draw_table_bytes(pairs, draws, interpolated) if draws > 1 else pairs * (8 + 12 * interpolated)
    return tables + 3 * 8 * pairs + 2 * 16 * pairs * nodes
