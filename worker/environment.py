"""The worker's ``FIXQ_*`` environment variables, each read in one place, with its unit.

The numerics run with no service around them (``from worker import solve``),
so the few settings they honour are read here rather than from the service's
settings class; :mod:`service.settings` takes its defaults for the same
variables from this module, and the README's settings reference lists both.
"""

from __future__ import annotations

import os
import pathlib

__all__ = [
    "COLD_BRIDGE",
    "DEFAULT_MAX_PROBLEM_MB",
    "DEFAULT_KERNEL_CACHE_MB",
    "DEFAULT_MAX_LOADED_STRUCTURES",
    "KERNEL_CACHE",
    "KERNEL_CACHE_MB",
    "MALLOC_TUNING",
    "MAX_LOADED_STRUCTURES",
    "MAX_PROBLEM_MB",
    "SOLVE_THREADS",
    "available_cpus",
    "cold_bridge_enabled",
    "kernel_cache_bytes",
    "kernel_cache_setting",
    "malloc_tuning_enabled",
    "max_loaded_structures",
    "max_problem_bytes",
    "solve_threads",
]

MAX_PROBLEM_MB = "FIXQ_MAX_PROBLEM_MB"
"""Memory cap of one problem (MiB, 2**20 bytes); larger estimates are refused as too large."""

DEFAULT_MAX_PROBLEM_MB = 4096
"""Default of ``FIXQ_MAX_PROBLEM_MB`` (MiB)."""

COLD_BRIDGE = "FIXQ_COLD_BRIDGE"
"""``on`` (default) or ``off``: a model structure's first solve by numpy table scans while its
kernels compile in the background (see :mod:`worker.bridge`)."""

KERNEL_CACHE = "FIXQ_KERNEL_CACHE"
"""Folder of the compiled kernels (default ``~/.cache/fixq/kernels``): it must be the worker user's
own, writable by no one else (group and other access is removed), else the worker refuses it."""

KERNEL_CACHE_MB = "FIXQ_KERNEL_CACHE_MB"
"""Size limit of the compiled-kernel folder in MiB (default ``512``): past it, the least recently used
model structures' kernels are deleted (and compiled again if needed)."""

DEFAULT_KERNEL_CACHE_MB = 512
"""Default of ``FIXQ_KERNEL_CACHE_MB`` (MiB)."""

MAX_LOADED_STRUCTURES = "FIXQ_MAX_LOADED_STRUCTURES"
"""Model structures whose kernels a worker process loads before it is replaced by a fresh one, a
count (default ``64``): compiled code is never freed, so this bounds a worker's memory."""

DEFAULT_MAX_LOADED_STRUCTURES = 64
"""Default of ``FIXQ_MAX_LOADED_STRUCTURES`` (count)."""

SOLVE_THREADS = "FIXQ_SOLVE_THREADS"
"""Threads one large solve may use, a count (default ``all``), ``all`` meaning every CPU this process may
run on; ``1`` turns threading off.  Problems below ``worker.threadpool.THREAD_MIN_PAIRS`` (points ×
choice points) always run on one thread, so a node running many small jobs keeps one job per core."""

MALLOC_TUNING = "FIXQ_MALLOC_TUNING"
"""``on`` (default) or ``off``: raise glibc's malloc thresholds once per worker process (mapping 4 MiB,
trim 64 MiB), so that repeated small solves reuse freed memory instead of page-faulting on fresh pages;
a process then keeps at most 64 MiB of free memory at the top of each malloc arena (see
:mod:`worker.allocator`).  No effect where the C library is not glibc."""

_MIB = 2**20
_OFF = ("off", "0", "false", "no")


def max_problem_bytes() -> int:
    """The memory cap in bytes: ``FIXQ_MAX_PROBLEM_MB`` (MiB), default ``DEFAULT_MAX_PROBLEM_MB``."""
    raw = os.environ.get(MAX_PROBLEM_MB, "").strip()
    try:
        megabytes = float(raw) if raw else float(DEFAULT_MAX_PROBLEM_MB)
    except ValueError:
        megabytes = float(DEFAULT_MAX_PROBLEM_MB)
    return int(megabytes * _MIB)


def _number(variable: str, default: float) -> float:
    raw = os.environ.get(variable, "").strip()
    try:
        return float(raw) if raw else float(default)
    except ValueError:
        return float(default)


def kernel_cache_bytes() -> int:
    """The kernel folder's size limit in bytes: ``FIXQ_KERNEL_CACHE_MB`` (MiB), default ``DEFAULT_KERNEL_CACHE_MB``."""
    return int(max(_number(KERNEL_CACHE_MB, DEFAULT_KERNEL_CACHE_MB), 0.0) * _MIB)


def max_loaded_structures() -> int:
    """``FIXQ_MAX_LOADED_STRUCTURES`` (count, at least 1), default ``DEFAULT_MAX_LOADED_STRUCTURES``."""
    return max(int(_number(MAX_LOADED_STRUCTURES, DEFAULT_MAX_LOADED_STRUCTURES)), 1)


def cold_bridge_enabled() -> bool:
    """Whether ``FIXQ_COLD_BRIDGE`` leaves the cold-start bridge on (the default)."""
    return os.environ.get(COLD_BRIDGE, "on").strip().lower() not in _OFF


def malloc_tuning_enabled() -> bool:
    """Whether ``FIXQ_MALLOC_TUNING`` leaves the malloc thresholds' tuning on (the default)."""
    return os.environ.get(MALLOC_TUNING, "on").strip().lower() not in _OFF


def kernel_cache_setting() -> pathlib.Path | None:
    """The folder ``FIXQ_KERNEL_CACHE`` names, or None when it is unset or empty."""
    configured = os.environ.get(KERNEL_CACHE, "").strip()
    return pathlib.Path(configured).expanduser() if configured else None


def available_cpus() -> int:
    """CPUs this process may run on (its affinity mask where the platform has one), at least 1."""
    try:
        return max(len(os.sched_getaffinity(0)), 1)
    except AttributeError:  # platforms without affinity masks
        return max(os.cpu_count() or 1, 1)


def solve_threads() -> int:
    """``FIXQ_SOLVE_THREADS`` (count, at least 1); unset, ``all`` or unreadable: :func:`available_cpus`."""
    raw = os.environ.get(SOLVE_THREADS, "").strip().lower()
    if raw in ("", "all"):
        return available_cpus()
    try:
        threads = int(raw)
    except ValueError:
        threads = available_cpus()
    return max(threads, 1)
