"""A checkpoint store in memory, for the solver tests that kill a solve and resume it."""

from __future__ import annotations

import copy


class Crash(Exception):
    """Stands in for a worker killed mid-solve."""


class MemoryCheckpoint:
    """A checkpoint store in memory that keeps deep copies (as a store that serialises would) and records every
    save in ``saves``; after ``crash_after`` saves it raises :class:`Crash` once."""

    def __init__(self, crash_after: int | None = None) -> None:
        self.state: dict | None = None
        self.saves: list[dict] = []
        self.crash_after = crash_after

    def load(self) -> dict | None:
        return copy.deepcopy(self.state)

    def save(self, state: dict) -> None:
        self.state = copy.deepcopy(state)
        self.saves.append(self.state)
        if self.crash_after is not None and len(self.saves) >= self.crash_after:
            self.crash_after = None
            raise Crash
