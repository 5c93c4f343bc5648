"""A continuous choice with draws after it through a finite horizon: each period's params and probability checks.

Backward induction (:mod:`worker.solvers.backward`) takes each period's step by the continuous search, whose
generated kernel takes the expectation over the draws at every candidate it tries, with the period's params
(:meth:`worker.continuous.problem.ContinuousProblem.use_period`).  The draws' probabilities are checked in
every period as the infinite horizon checks them once (:mod:`worker.continuous.drawnodes`):

* at the period's scanned candidates before its step — once per period, and only when the model changes with
  the period (otherwise the compiler's check of period 0 holds for all);
* at the period's policy after its step (:func:`check_period_policy`, the plan's ``check_policy``).

An offending probability is named at its field, the message starting with the period.  The cohort pass and
the simulation enter each period again (its params, its policy's Young lotteries per draw).
"""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any

import numpy as np

from worker.continuous.drawnodes import check_at_policy, check_at_scan
from worker.errors import InvalidDocument

__all__ = ["PeriodEntry", "check_period_policy"]


class PeriodEntry:
    """``enter(t)`` of a continuous-choice model that changes with the period: its params, and with draws after
    the choice the scanned candidates' probabilities checked the first time each period is entered."""

    def __init__(self, problem: Any, model: Any) -> None:
        self.problem = problem
        self.model = model
        self.scanned = {0}  # the compiler checked period 0's

    def __call__(self, t: int) -> None:
        from worker.feasibility import period_params

        problem = self.problem
        problem.use_period(period_params(self.model, t))
        if problem.model_data.draws is not None and t not in self.scanned:
            with in_period(t):
                check_at_scan(problem.model_data)
            self.scanned.add(t)


def check_period_policy(problem: Any, t: int, policy: np.ndarray) -> None:
    """The draws' probabilities at period ``t``'s policy (the problem has entered period ``t``)."""
    with in_period(t):
        check_at_policy(problem.model_data, problem.choice_values(policy))


@contextmanager
def in_period(t: int) -> Iterator[None]:
    """Re-raise an :class:`~worker.errors.InvalidDocument` with each message starting ``in period t:``."""
    try:
        yield
    except InvalidDocument as exc:
        raise type(exc)([{**error, "message": f"in period {t}: {error['message']}"} for error in exc.errors],
                        **exc.context) from None
