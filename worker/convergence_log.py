"""Which entries a convergence log keeps, so that a long solve's log stays small.

A log has one entry per iteration.  Up to ``KEEP_FIRST`` iterations it keeps
them all.  Past that it keeps every ``k``-th later iteration, ``k`` a power of
two that doubles whenever more than ``KEEP_SAMPLED`` of them would be kept,
and always the ``KEEP_LATEST`` latest iterations (consecutive, so the rate of
the last iterations stays measurable).  A log therefore never holds more than
``KEEP_FIRST + KEEP_SAMPLED + KEEP_LATEST`` entries, and the kept entries
still show how the distance fell over the whole solve.

Whether iteration ``i`` is kept depends only on ``i`` and the last iteration
``n`` (:func:`kept`), and an entry dropped once is never kept again, so the
solver's log, its checkpoints, the result and the log stored by the service
agree whichever of them trims the log and however often a solve resumes.
The entries dropped are ``n - len(log)``: every iteration is logged once.
"""

from __future__ import annotations

from collections.abc import Iterable
from typing import Any

__all__ = ["KEEP_FIRST", "KEEP_LATEST", "KEEP_SAMPLED", "ConvergenceLog", "dropped", "kept", "stride"]

KEEP_FIRST = 1000
"""Iterations 1 .. KEEP_FIRST are all kept (count)."""
KEEP_SAMPLED = 1000
"""Most entries kept after ``KEEP_FIRST`` on the every-``k``-th grid (count)."""
KEEP_LATEST = 20
"""The latest iterations, always kept (count; at least the observed-rate window plus one)."""


def stride(last: int) -> int:
    """The sampling step ``k`` once iteration ``last`` is logged: the least power of two keeping at most
    ``KEEP_SAMPLED`` of the iterations after ``KEEP_FIRST``."""
    k = 1
    while (last - KEEP_FIRST) // k > KEEP_SAMPLED:
        k *= 2
    return k


def kept(iteration: int, last: int, k: int | None = None) -> bool:
    """Whether the entry of ``iteration`` stays once iteration ``last`` is logged (``k``: ``stride(last)``)."""
    if iteration <= KEEP_FIRST or iteration > last - KEEP_LATEST:
        return True
    return (iteration - KEEP_FIRST) % (stride(last) if k is None else k) == 0


def iteration_of(entry: dict[str, Any]) -> int | None:
    """The entry's iteration, or None when it has none (such entries are always kept)."""
    value = entry.get("iteration")
    return value if isinstance(value, int) and not isinstance(value, bool) else None


def dropped(log: list[dict[str, Any]]) -> int:
    """How many iterations up to the log's last one it does not hold (count)."""
    last = iteration_of(log[-1]) if log else None
    return max(0, last - len(log)) if last is not None else 0


class ConvergenceLog(list):  # type: ignore[type-arg]
    """A list of log entries that drops, on ``append``, what :func:`kept` says to drop.

    It is a plain ``list`` otherwise (``list(log)``, ``log[-1]``, ``len``), so
    it is copied, checkpointed and returned like one.
    """

    def __init__(self, entries: Iterable[dict[str, Any]] = ()) -> None:
        super().__init__(entries)
        self._stride = 0
        self._prune()

    @property
    def dropped(self) -> int:
        """Iterations not held, up to the last one (count)."""
        return dropped(self)

    def append(self, entry: dict[str, Any]) -> None:
        super().append(entry)
        last = iteration_of(entry)
        if last is None:
            return
        k = stride(last)
        if k != self._stride:
            self._prune()
            return
        # Only the iteration that just left the window of the latest ones can
        # have become droppable; it sits just before that window.
        if len(self) > KEEP_LATEST:
            leaving = iteration_of(self[-KEEP_LATEST - 1])
            if leaving is not None and not kept(leaving, last, k):
                del self[-KEEP_LATEST - 1]

    def _prune(self) -> None:
        last = iteration_of(self[-1]) if self else None
        if last is None:
            return
        k = self._stride = stride(last)
        self[:] = [entry for entry in self if (i := iteration_of(entry)) is None or kept(i, last, k)]
