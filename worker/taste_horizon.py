"""Taste shocks through a finite horizon: the choice probabilities of every period, and life paths that draw them.

Backward induction with taste shocks needs nothing new: each period's step is the problem's smoothed
Bellman step (:mod:`worker.taste`), ``V_t = s · log Σ_a exp((r_t(x, a) + β_t E[V_{t+1} | x, a]) / s)``,
which :func:`worker.solvers.backward.backward_induction` takes like any other.  What depends on the
period is the logit probabilities ``π_t(a | x) = exp((Q_t(x, a) − V_t(x)) / s)``: the problem keeps
those of its last step only.  :func:`with_probabilities` wraps a period plan so that entering period
``t`` also takes that period's step again from ``V_{t+1}`` (the same inputs give the same bits, so
the most probable choice is the solve's policy of period ``t``); after it the problem's
``choice_probabilities``, ``policy_matrix`` (every choice's law mixed by its probability) and
``choice_values`` (expected chosen values) are period ``t``'s, which is what the cohort's forward pass
needs.  Nothing is stored per period beyond the values, so checkpoints and resumes are unchanged.

With location-zero shocks each period adds ``s·γ`` (Euler's constant) to that period's expected reward,
so period ``t``'s value would be higher by ``o_t = s·γ + β_t · o_{t+1}``, ``o_{T−1} = s·γ`` (the terminal
value carries no shock): ``diagnostics.taste_shocks.location_zero_offset`` lists ``o_t`` by period.
"""

from __future__ import annotations

import dataclasses
from typing import Any

import numpy as np

from worker.report import _draw_from, _start_state, _summarise
from worker.solvers.backward import HorizonOutcome, PeriodPlan
from worker.taste import EULER_GAMMA, diagnostics, shocked_choices

__all__ = ["probabilities_by_period", "taste_horizon_simulation", "with_probabilities"]


def with_probabilities(plan: PeriodPlan, problem: Any, outcome: HorizonOutcome) -> PeriodPlan:
    """``plan`` whose ``enter(t)`` also retakes period ``t``'s smoothed step, so the problem's probabilities are
    period ``t``'s (a period entered twice in a row is not retaken)."""
    first, entered = outcome.first_period, [None]

    def enter(t: int) -> None:
        if entered[0] == t:
            return
        plan.enter(t)
        after = plan.terminal if t == plan.periods - 1 else outcome.values[t + 1 - first]
        _, policy = problem.bellman_step(np.asarray(after, dtype=np.float64))
        if not np.array_equal(np.asarray(policy), outcome.policies[t - first]):
            raise RuntimeError(f"period {t}'s smoothed step did not reproduce the solve's most probable choices")
        entered[0] = t

    return dataclasses.replace(plan, enter=enter)


def probabilities_by_period(problem: Any, plan: PeriodPlan, outcome: HorizonOutcome) -> tuple[dict[str, Any],
                                                                                              np.ndarray]:
    """``(diagnostics.taste_shocks, choice probabilities)`` of the periods solved.

    ``plan`` is a :func:`with_probabilities` plan.  The probabilities have shape ``(periods solved,
    *problem.shape, *choice sizes)``: the period axis first, then the value's axes, then each choice's
    values.  The periods are entered from the last to the first solved, so the problem is left in the
    first (whose policy the result's diagnostics describe).
    """
    first, periods = outcome.first_period, plan.periods
    axes = problem.choice_axes()
    shape = (*problem.shape, *(len(values) for values in axes.values()))
    probabilities = np.empty((periods - first, *shape))
    for t in range(periods - 1, first - 1, -1):
        plan.enter(t)
        probabilities[t - first] = problem.choice_probabilities(outcome.policies[t - first]).reshape(shape)
    scale = float(problem.taste_scale)
    offsets = np.empty(periods)
    following = 0.0
    for t in range(periods - 1, -1, -1):
        following = scale * EULER_GAMMA + (plan.discounts[t] * following if t < periods - 1 else 0.0)
        offsets[t] = following
    notes = {
        **diagnostics(scale, 0.0, shocked_choices(problem)),
        "location_zero_offset": offsets[first:].tolist(),
        "note": (
            "the value is the expected discounted reward with centred taste shocks; with location-zero shocks "
            "add location_zero_offset[t] (scale × Euler's constant in this and every later period, discounted) to "
            "period t's value"
        ),
        "choices": axes,
        "probabilities_at": "each period's choice-specific values at the next period's value (the terminal value "
                            "after the last)",
    }
    return notes, probabilities


def taste_horizon_simulation(
    problem: Any, plan: PeriodPlan, outcome: HorizonOutcome, spec: Any, cohort: Any, where: str
) -> dict[str, Any]:
    """Paths from period 0 that draw each period's choice from its probabilities, then tomorrow's point from
    that choice's law (the row ``x·A + a`` of ``pair_transition()``); the keys of
    :func:`worker.cohort.horizon_simulation`.  ``plan`` is a :func:`with_probabilities` plan."""
    from worker.cohort import initial_distribution

    periods, paths = int(spec.periods), int(spec.paths)
    rng = np.random.default_rng(spec.seed)
    if spec.start is not None:
        first = np.full(paths, _start_state(problem, spec.start, f"{where}.start"), dtype=np.int64)
    else:
        first = _draw_from(np.cumsum(initial_distribution(problem, cohort)), rng.random(paths))
    states = np.empty((paths, periods), dtype=np.int64)
    choices = np.empty((paths, periods), dtype=np.int64)
    states[:, 0] = first
    for t in range(periods):
        plan.enter(t)
        rows = np.cumsum(problem.choice_probabilities(outcome.policies[t]), axis=1)[states[:, t]]
        drawn = (rows < rng.random(paths)[:, None] * rows[:, -1:]).sum(axis=1)
        choices[:, t] = np.minimum(drawn, rows.shape[1] - 1)
        if t + 1 == periods:
            break
        pairs = problem.pair_transition().tocsr()
        pairs.sum_duplicates()
        row = states[:, t] * rows.shape[1] + choices[:, t]
        cumulative = np.cumsum(pairs.data)
        padded = np.concatenate([[0.0], cumulative])
        base = padded[pairs.indptr[row]]
        target = base + rng.random(paths) * (padded[pairs.indptr[row + 1]] - base)
        entry = np.clip(np.searchsorted(cumulative, target, side="right"), pairs.indptr[row], pairs.indptr[row + 1] - 1)
        states[:, t + 1] = pairs.indices[entry]
    series = {name: np.asarray(values, dtype=np.float64)[states] for name, values in problem.state_values().items()}
    axes = problem.choice_axes()
    parts = np.unravel_index(choices, tuple(len(values) for values in axes.values()))
    for k, (name, values) in enumerate(axes.items()):
        numeric = all(isinstance(x, (int, float)) and not isinstance(x, bool) for x in values)
        numbers = np.asarray(values, dtype=np.float64) if numeric else np.arange(len(values), dtype=np.float64)
        series[name] = numbers[parts[k]]
    return {
        "periods": periods, "paths": paths, "seed": spec.seed,
        "summary": {name: _summarise(drawn.reshape(-1)) for name, drawn in series.items()},
        "by_period": {name: drawn.mean(axis=0).tolist() for name, drawn in series.items()},
        "first_path": {name: drawn[0].tolist() for name, drawn in series.items()},
        "warnings": [],
    }
