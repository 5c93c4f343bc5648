"""What a solve returns and keeps: the outcome, the checkpoint protocol, the observed rate."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Protocol

import numpy as np

__all__ = [
    "EPS",
    "RATE_FLOOR_ULPS",
    "RATE_WINDOW",
    "ROUNDING_ULPS",
    "Checkpoint",
    "Entry",
    "SolveOutcome",
    "observed_rate",
]

ROUNDING_ULPS = 16.0
"""Rounding allowance of one Bellman step, in ulps of ``max(‖Tv‖∞, ‖v‖∞)``
(before the ``1/(1 − β)`` factor).  Common practice: a handful of ulps covers
a row sum, the reward addition and the midpoint shift."""
RATE_WINDOW = 10
"""``observed_rate`` uses at most this many successive distance ratios."""
RATE_FLOOR_ULPS = 1e6
"""Distances below this many ulps of ``‖value‖∞`` are rounding noise and
are left out of ``observed_rate``."""

EPS = float(np.finfo(np.float64).eps)
"""The float64 machine epsilon."""

Entry = dict[str, Any]
"""One convergence-log entry (see :func:`worker.solvers.loop.iterate`)."""


class Checkpoint(Protocol):
    """Where a solve keeps its state (see DEVELOPERS.md, "The solve front door").

    A saved state holds ``fingerprint`` (str), ``method`` (str), ``value``
    ((n,) float64, the iterate), ``iteration``, ``evaluation_steps``,
    ``linear_solves`` (ints), ``log`` (list of entries, ``iteration`` of
    them), ``policy`` ((n,) int64, the last greedy policy, or None),
    ``evaluation_steps_done`` (int: Howard evaluation steps of the current phase
    already applied to ``value``; None at a phase boundary), ``evaluation_origin``
    (taste shocks, within a phase only: the (n,) value the phase's Bellman step
    started from, which a resumed solve steps from again to get the same choice
    probabilities), ``restricted``
    (bool: hints still in use), ``verification`` (dict or None: the hint
    verification, once made), ``warnings`` (list of str) and ``seconds``
    (float, solving time so far).  A state whose fingerprint, method or
    value shape does not match is ignored.
    """

    def load(self) -> dict[str, Any] | None: ...

    def save(self, state: dict[str, Any]) -> None: ...


@dataclass
class SolveOutcome:
    """What every method returns.

    Attributes
    ----------
    value : (n,) float64
        The MacQueen–Porteus midpoint of the last Bellman step.
    policy : (n,) int64
        The greedy policy of the last Bellman step.
    status : str
        ``converged``, ``max_iterations`` or ``time_limit``.
    iterations : int
        Iterations (Bellman steps that improve the policy), counted across
        resumes; the hint verification is not one.
    evaluation_steps : int
        Howard: evaluation steps ``v ← r_σ + β P_σ v`` applied in all;
        the other methods: 0.
    linear_solves : int
        Policy iteration: exact evaluations (sparse linear solves); the other
        methods: 0.
    log : list of dict
        One entry per iteration (see :func:`worker.solvers.loop.iterate`).
    error_bound : float
        Certified ``‖value − v*‖∞``: half the bracket width plus the rounding
        allowance, always from an unrestricted (hint-free) Bellman step.
    bracket : dict
        ``lower``, ``upper``: ``v* − Tv`` lies in ``[lower, upper]`` at every
        state for the last step's ``Tv``; ``shift = (lower + upper)/2`` was
        added to ``Tv`` to give ``value``; ``standard_bound`` is
        ``β/(1−β)·‖Tv − v‖∞`` plus the allowance (the error bound ``Tv``
        alone would have); ``rounding_allowance`` is the allowance included
        in both.
    observed_rate : float or None
        See :func:`observed_rate`.
    warnings : list of str
        Plain-English notes (e.g. a broken hint).
    resumed_from_iteration : int or None
        The checkpoint's iteration when the solve resumed from one.
    seconds : float
        Solving time, counted across resumes.
    verification : dict or None
        With hints: the unrestricted Bellman step, at the value of the last
        hinted iteration, that checks the hints' promise — ``distance``,
        ``error_bound``, ``policy_changes`` (against that iteration's
        policy), ``seconds`` (cumulative solving time when it ended) and
        ``hints_held``.  Not an iteration, unless the hints failed and the
        solve went on from it (then it is also the next log entry).  None
        without hints.
    """

    value: np.ndarray
    policy: np.ndarray
    status: str
    iterations: int
    evaluation_steps: int
    log: list[Entry]
    error_bound: float
    bracket: dict[str, float]
    observed_rate: float | None
    warnings: list[str] = field(default_factory=list)
    resumed_from_iteration: int | None = None
    seconds: float = 0.0
    linear_solves: int = 0
    verification: dict[str, Any] | None = None


def observed_rate(log: list[Entry], scale: float) -> float | None:
    """The measured contraction rate of successive iteration distances.

    With ``d_t`` the ``distance`` (``‖Tv_t − v_t‖∞``) of log entry ``t``, the
    rate is the geometric mean of ``d_{t+1} / d_t`` over the last
    ``RATE_WINDOW`` pairs of entries of consecutive iterations (a log that
    dropped entries, ``worker.convergence_log``, has gaps) whose distances are both
    above the rounding floor ``RATE_FLOOR_ULPS · ε · scale``.  For value
    iteration every ratio is at most β (contraction mapping theorem), so the
    rate is too; for Howard and policy iteration it is the rate per
    iteration, usually far below β.  ``None`` when no pair qualifies.

    Parameters
    ----------
    log : list of dict
    scale : float
        ``‖value‖∞`` of the result, to place the rounding floor.
    """
    floor = RATE_FLOOR_ULPS * EPS * scale
    distances = np.array([entry["distance"] for entry in log], dtype=np.float64)
    if distances.size < 2:
        return None
    above = distances > floor
    iterations = np.array([entry.get("iteration", t) for t, entry in enumerate(log)], dtype=np.float64)
    consecutive = np.diff(iterations) == 1
    pairs = np.flatnonzero(above[:-1] & above[1:] & consecutive)[-RATE_WINDOW:]
    if not pairs.size:
        return None
    ratios = distances[pairs + 1] / distances[pairs]
    return float(np.exp(np.mean(np.log(ratios))))
