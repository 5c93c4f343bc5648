"""A cohort through a finite horizon: its distribution by period, and simulated life paths.

With the policy ``σ_t`` of each period and ``P_t`` its transition matrix (in period ``t``'s params), a
cohort whose distribution over the points is ``μ_0`` in period 0 is distributed as
``μ_{t+1} = μ_t P_t`` in the next; the mean of a state, shock or choice in period ``t`` is its value
at each point weighted by ``μ_t`` (a choice's value is that of ``σ_t``).  Simulated paths draw each
successor from the row of ``P_t`` of their point, as :func:`worker.report.simulate_report` does for
one policy.  Both need the periods from 0 on: a solve stopped by its time limit has none of them.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import scipy.sparse as sp

from worker.problem import CompiledProblem
from worker.report import _draw_from, _start_state, _summarise
from worker.solvers.backward import HorizonOutcome, PeriodPlan

__all__ = ["cohort_report", "horizon_simulation", "initial_distribution"]


def initial_distribution(problem: CompiledProblem, spec: Any) -> np.ndarray:
    """``μ_0`` of ``report.cohort``: all mass on the start's nearest point, or the given distribution (rescaled)."""
    if spec.start is not None:
        mu = np.zeros(problem.n)
        mu[_start_state(problem, spec.start, "report.cohort.start")] = 1.0
        return mu
    mu = np.asarray(spec.distribution, dtype=np.float64).reshape(problem.n)
    return mu / mu.sum()


def _series(problem: CompiledProblem, policy: np.ndarray) -> dict[str, np.ndarray]:
    series = {name: np.asarray(values, dtype=np.float64) for name, values in problem.state_values().items()}
    series.update((name, np.asarray(values, dtype=np.float64)) for name, values in
                  problem.choice_values(policy).items())
    return series


def _matrix(problem: CompiledProblem, plan: PeriodPlan, t: int, policy: np.ndarray) -> sp.csr_matrix:
    plan.enter(t)
    matrix = sp.csr_matrix(problem.policy_matrix(policy), dtype=np.float64)
    matrix.sum_duplicates()
    return matrix


def cohort_report(problem: CompiledProblem, plan: PeriodPlan, outcome: HorizonOutcome, spec: Any) -> dict[str, Any]:
    """The cohort's distribution in every period and the means by period.

    Returns
    -------
    dict
        ``distribution``: nested lists of shape ``(periods, *problem.shape)``; ``means``: per state, shock and
        choice, a list with its mean in each period.
    """
    mu = initial_distribution(problem, spec)
    distributions = np.empty((plan.periods, problem.n))
    means: dict[str, list[float]] = {}
    for t in range(plan.periods):
        policy = outcome.policies[t]
        plan.enter(t)  # a choice's value may be the period's (taste shocks: expected under its probabilities)
        distributions[t] = mu
        for name, values in _series(problem, policy).items():
            means.setdefault(name, []).append(float(mu @ values))
        if t + 1 < plan.periods:
            mu = _matrix(problem, plan, t, policy).T @ mu
    return {"distribution": distributions.reshape((plan.periods, *problem.shape)).tolist(), "means": means}


def horizon_simulation(
    problem: CompiledProblem, plan: PeriodPlan, outcome: HorizonOutcome, spec: Any, cohort: Any, where: str
) -> dict[str, Any]:
    """Simulated paths from period 0 through ``spec.periods`` periods, each under that period's policy.

    Paths start at ``spec.start`` or, without one, at draws from ``report.cohort``'s period-0 distribution.
    Returns the keys of :func:`worker.report.simulate_report` (``summary`` pools every period of every path)
    and ``by_period``: per state, shock and choice, the mean over the paths in each period.
    """
    periods, paths = int(spec.periods), int(spec.paths)
    rng = np.random.default_rng(spec.seed)
    if spec.start is not None:
        first = np.full(paths, _start_state(problem, spec.start, f"{where}.start"), dtype=np.int64)
    else:
        first = _draw_from(np.cumsum(initial_distribution(problem, cohort)), rng.random(paths))
    states = np.empty((paths, periods), dtype=np.int64)
    states[:, 0] = first
    for t in range(1, periods):
        matrix = _matrix(problem, plan, t - 1, outcome.policies[t - 1])
        cumulative = np.cumsum(matrix.data)
        row_base = np.concatenate([[0.0], cumulative])[matrix.indptr[:-1]]
        row_total = np.concatenate([[0.0], cumulative])[matrix.indptr[1:]] - row_base
        here = states[:, t - 1]
        target = row_base[here] + rng.random(paths) * row_total[here]
        entry = np.searchsorted(cumulative, target, side="right")
        entry = np.clip(entry, matrix.indptr[here], matrix.indptr[here + 1] - 1)
        states[:, t] = matrix.indices[entry]
    pooled: dict[str, list[np.ndarray]] = {}
    by_period: dict[str, list[float]] = {}
    first_path: dict[str, list[Any]] = {}
    for t in range(periods):
        for name, values in _series(problem, outcome.policies[t]).items():
            drawn = values[states[:, t]]
            pooled.setdefault(name, []).append(drawn)
            by_period.setdefault(name, []).append(float(drawn.mean()))
            first_path.setdefault(name, []).append(float(drawn[0]))
    summary = {name: _summarise(np.concatenate(parts)) for name, parts in pooled.items()}
    return {"periods": periods, "paths": paths, "seed": spec.seed, "summary": summary, "by_period": by_period,
            "first_path": first_path, "warnings": []}
