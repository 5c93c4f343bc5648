"""A spy on :func:`worker.threadpool.run_blocks`, for the tests that check a solve's threads."""

from __future__ import annotations

import pytest

from worker import threadpool


def spy_run_blocks(monkeypatch: pytest.MonkeyPatch) -> list[tuple[int, int]]:
    """Record every :func:`worker.threadpool.run_blocks` call as ``(threads, blocks)`` (the list returned)."""
    calls: list[tuple[int, int]] = []
    real = threadpool.run_blocks

    def run_blocks(task, blocks, threads):  # type: ignore[no-untyped-def]
        calls.append((threads, len(blocks)))
        return real(task, blocks, threads)

    monkeypatch.setattr(threadpool, "run_blocks", run_blocks)
    return calls
