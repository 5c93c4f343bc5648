"""The plain data of one solve: a Bellman step with its bracket, and the settings the methods receive.

Used by the loop every method shares (:mod:`worker.solvers.loop`, which exports both again).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np

from worker.defaults import DEFAULT_CHECKPOINT_S
from worker.solvers.outcome import Checkpoint, Entry

__all__ = ["Options", "Step", "options"]


@dataclass
class Step:
    """One Bellman step ``v → Tv`` and its bracket."""

    tv: np.ndarray
    policy: np.ndarray
    distance: float
    lower: float
    upper: float
    rounding: float
    changes: int
    restricted: bool
    origin: np.ndarray | None = None
    """The ``v`` the step was taken from (kept for problems with taste shocks, whose evaluation uses the
    choice probabilities of this step)."""

    @property
    def error_bound(self) -> float:
        return 0.5 * (self.upper - self.lower) + self.rounding

    @property
    def improves(self) -> bool:
        """True when ``Tv`` beats ``v`` somewhere by more than rounding."""
        return self.upper > self.rounding


@dataclass
class Options:
    """The settings of one solve, as the methods receive them."""

    tolerance: float
    max_iterations: int
    time_limit_s: float | None
    checkpoint_s: float
    evaluation_steps: int
    on_progress: Callable[[Entry], None] | None
    checkpoint: Checkpoint | None
    should_stop: Callable[[], bool] | None
    fingerprint: str
    trust_hints: bool = False
    """Skip the unrestricted step that verifies the hints at the end (a search's guiding trials, whose
    answers are never returned: the trial that is returned is solved again with it)."""


def options(
    tolerance: float,
    max_iterations: int,
    time_limit_s: float | None,
    checkpoint_s: float | None,
    evaluation_steps: int,
    on_progress: Callable[[Entry], None] | None,
    checkpoint: Checkpoint | None,
    should_stop: Callable[[], bool] | None,
    fingerprint: str,
    *,
    trust_hints: bool = False,
) -> Options:
    """The :class:`Options` of a method's keyword arguments, normalised."""
    return Options(
        tolerance=float(tolerance),
        max_iterations=max(1, int(max_iterations)),
        time_limit_s=None if time_limit_s is None else float(time_limit_s),
        checkpoint_s=DEFAULT_CHECKPOINT_S if checkpoint_s is None else float(checkpoint_s),
        evaluation_steps=max(0, int(evaluation_steps)),
        on_progress=on_progress,
        checkpoint=checkpoint,
        should_stop=should_stop,
        fingerprint=fingerprint,
        trust_hints=bool(trust_hints),
    )
