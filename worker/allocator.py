"""Keep freed memory in the process for the next solve: glibc's malloc thresholds, set once per process.

A solve allocates its tables and vectors (a few MB for a small model) and frees them at its end.  With
glibc's defaults the freed top of the heap above 128 KiB goes back to the system (``M_TRIM_THRESHOLD``)
and blocks above 128 KiB are mapped fresh each time (``M_MMAP_THRESHOLD``), so the next solve touches
new pages and takes a minor page fault per 4 KiB page: about 680 faults, 1.2–1.5 ms, of a 4.5 ms solve
of 3,200 points × 10 choices (``bench/bench_draws.py``).  :func:`keep_freed_memory`, called by every
:func:`worker.solve.solve`, raises both thresholds once, so that repeated small solves reuse the pages
they touched before.

Why these values (measured on the shared 2-core test machine, glibc 2.36): blocks of
:data:`MMAP_THRESHOLD_BYTES` (4 MiB) or more are still mapped on their own and unmapped when freed.
numpy asks the kernel for transparent huge pages on arrays of 4 MiB or more, so such a block costs
one fault per 2 MiB page when it is mapped fresh, and keeping it in the heap instead did worse where a
solve's passing use outgrew the trim threshold (a 300-state dense tabular model: 1,900 faults and
14.7 ms a solve with a 32 MiB mapping threshold, 470 faults and 12 ms with 4 MiB, 450 and 11.6 ms with
glibc's defaults).  The separation benchmark goes from 680 faults and 4.4 ms to none and 3.2 ms with
either; a 28,800-point variant from 3,600 faults and 30 ms to 300 and 23 ms.

The bound on what is kept: an arena returns the free top of its heap once it exceeds
:data:`TRIM_THRESHOLD_BYTES` (64 MiB).  So after a big job a worker keeps at most 64 MiB of free
memory at the top of each malloc arena (one per thread that allocated, at most 8 per core by glibc's
rule), beside what fragmentation keeps below the top, which glibc's defaults keep too (they raise the
mapping threshold themselves, up to 32 MiB, after a mapped block is freed, and the trim threshold to
twice that).  ``FIXQ_MALLOC_TUNING=off`` leaves the allocator at its defaults.

Elsewhere than glibc (macOS, musl) nothing is done: those allocators have no such settings to call.
"""

from __future__ import annotations

import ctypes
import os
from typing import Callable

from worker.environment import malloc_tuning_enabled

__all__ = ["MMAP_THRESHOLD_BYTES", "TRIM_THRESHOLD_BYTES", "keep_freed_memory"]

MMAP_THRESHOLD_BYTES = 4 * 2**20
"""Blocks at least this large are mapped on their own and unmapped when freed (bytes; glibc's
``M_MMAP_THRESHOLD``): numpy's threshold for asking for transparent huge pages."""

TRIM_THRESHOLD_BYTES = 64 * 2**20
"""An arena returns the free top of its heap to the system once it exceeds this (bytes; glibc's
``M_TRIM_THRESHOLD``): the most free memory an arena keeps at its top."""

_M_TRIM_THRESHOLD = -1
_M_MMAP_THRESHOLD = -3
"""glibc's ``mallopt`` parameter numbers (``<malloc.h>``)."""

_applied: list[bool] = []
"""Empty until the thresholds were tried in this process; then ``[whether they were set]``."""


def _glibc_mallopt() -> Callable[[int, int], int] | None:
    """glibc's ``mallopt``, or None when the C library is not glibc."""
    try:
        version = os.confstr("CS_GNU_LIBC_VERSION")
    except (AttributeError, ValueError, OSError):
        return None  # no confstr, or a C library that does not know the name: not glibc
    if not version or not version.startswith("glibc"):
        return None
    try:
        mallopt = ctypes.CDLL(None).mallopt
    except (OSError, AttributeError):
        return None
    mallopt.argtypes = (ctypes.c_int, ctypes.c_int)
    mallopt.restype = ctypes.c_int
    return mallopt


def keep_freed_memory() -> bool:
    """Raise glibc's mapping and trim thresholds, once per process; whether they are set.

    A no-op returning False when ``FIXQ_MALLOC_TUNING`` is ``off`` (read at each call until the
    thresholds are set) or the C library is not glibc.  Later calls after the first attempt cost a
    list lookup.
    """
    if _applied:
        return _applied[0]
    if not malloc_tuning_enabled():
        return False
    mallopt = _glibc_mallopt()
    ok = (mallopt is not None and mallopt(_M_MMAP_THRESHOLD, MMAP_THRESHOLD_BYTES) == 1
          and mallopt(_M_TRIM_THRESHOLD, TRIM_THRESHOLD_BYTES) == 1)
    _applied.append(ok)
    return ok
