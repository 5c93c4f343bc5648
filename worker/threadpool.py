"""One large solve on several cores: row blocks of its heavy steps run on a small thread pool.

The compiled kernels release the GIL (``nogil``), so blocks of rows run on
threads truly in parallel.  Every row is computed by the same code with the
same operands whatever block it falls in, and the only reductions (the
minimum and maximum of an evaluation step's increment) are combined with
``min`` and ``max``, which are exact: a threaded solve gives the bits of a
single-threaded one.

Threads pay only on large problems; a small one stays on its own thread
(:func:`threads_for`), so a node running many small jobs keeps one job per
core.  The pool is created on first use and reused by every later solve of
the process (a forked child starts without it).
"""

from __future__ import annotations

import os
import threading
from collections.abc import Callable, Sequence
from concurrent.futures import ThreadPoolExecutor, wait
from typing import TypeVar

from worker import environment

__all__ = [
    "BLOCKS_PER_THREAD",
    "TABLE_CHUNKS_AT_ONCE",
    "THREAD_MIN_PAIRS",
    "THREAD_MIN_STEP_POINTS",
    "row_blocks",
    "run_blocks",
    "threads_for",
]

THREAD_MIN_PAIRS = 1_000_000
"""Points × choice points from which a solve uses several threads (count).  Measured on this 2-core
machine, an exact Bellman step of the growth model without tables on 2 threads against 1: slower at
70,000 pairs (0.3 ms against 0.2 ms), 1.3× at 630,000 pairs and 1.8× at 7 million."""

THREAD_MIN_STEP_POINTS = 1_000_000
"""Points from which a threaded solve also splits its evaluation steps (count).  A step costs about
5 ns a point and is bound by memory traffic, and a split step makes two rounds of the pool (about
0.2 ms together): on this shared 2-core machine two threads were 0.3–0.4 ms a step slower at 140,000
points and no faster at 700,000 (measured), so only larger problems split them."""

TABLE_CHUNKS_AT_ONCE = 4
"""Chunks of a threaded solve's reward tables evaluated at once, at most (count): each holds
``worker.costs.CHUNK_TEMPORARIES`` temporaries of a chunk, so this bounds the memory threads add
while the tables are filled (three chunks' temporaries beyond the estimate, 192 MiB at most)."""

BLOCKS_PER_THREAD = 4
"""Row blocks per thread of a Bellman step (count): more blocks than threads even out rows of
unequal cost (the block search prunes some rows far more than others), at a few microseconds each."""

_T = TypeVar("_T")

_lock = threading.Lock()
_pool: ThreadPoolExecutor | None = None
_pool_threads = 0


def threads_for(points: int, choice_points: int) -> int:
    """Threads for a problem of ``points`` × ``choice_points``: ``FIXQ_SOLVE_THREADS``, or 1 below the threshold."""
    threads = environment.solve_threads()
    if threads <= 1 or points * choice_points < THREAD_MIN_PAIRS:
        return 1
    return min(threads, max(points, 1))


def row_blocks(rows: int, blocks: int) -> list[tuple[int, int]]:
    """``[start, stop)`` of about ``blocks`` nearly equal, consecutive blocks covering ``range(rows)``."""
    blocks = max(1, min(blocks, rows))
    edges = [rows * b // blocks for b in range(blocks + 1)]
    return [(edges[b], edges[b + 1]) for b in range(blocks) if edges[b + 1] > edges[b]]


def run_blocks(task: Callable[[int, int], _T], blocks: Sequence[tuple[int, int]], threads: int) -> list[_T]:
    """``task(start, stop)`` for every block, on up to ``threads`` threads; results in block order.

    With one thread (or one block) the blocks run here, in order.  An
    exception in any block is raised here once every block has ended.
    """
    if threads <= 1 or len(blocks) <= 1:
        return [task(start, stop) for start, stop in blocks]
    pool = _pool_of(threads)
    futures = [pool.submit(task, start, stop) for start, stop in blocks]
    wait(futures)
    return [future.result() for future in futures]


def _pool_of(threads: int) -> ThreadPoolExecutor:
    """The process's pool, grown to ``threads`` workers when it has fewer."""
    global _pool, _pool_threads
    with _lock:
        if _pool is None or _pool_threads < threads:
            if _pool is not None:
                _pool.shutdown(wait=False)  # running blocks finish; new ones go to the larger pool
            _pool = ThreadPoolExecutor(max_workers=threads, thread_name_prefix="fixq-solve")
            _pool_threads = threads
        return _pool


def _forget_pool() -> None:
    """In a forked child: the parent's pool threads do not exist here."""
    global _pool, _pool_threads, _lock
    _pool, _pool_threads, _lock = None, 0, threading.Lock()


if hasattr(os, "register_at_fork"):
    os.register_at_fork(after_in_child=_forget_pool)
