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
    "KERNEL_CACHE",
    "MAX_PROBLEM_MB",
    "cold_bridge_enabled",
    "kernel_cache_setting",
    "max_problem_bytes",
]

MAX_PROBLEM_MB = "FIXQ_MAX_PROBLEM_MB"
"""Memory cap of one problem (MiB, 2**20 bytes); larger estimates are refused as too large."""

DEFAULT_MAX_PROBLEM_MB = 4096
"""Default of ``FIXQ_MAX_PROBLEM_MB`` (MiB)."""

COLD_BRIDGE = "FIXQ_COLD_BRIDGE"
"""``on`` (default) or ``off``: a model structure's first solve by numpy table scans while its
kernels compile in the background (see :mod:`worker.bridge`)."""

KERNEL_CACHE = "FIXQ_KERNEL_CACHE"
"""Folder of the compiled kernels (default ``~/.cache/fixq/kernels``)."""

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


def cold_bridge_enabled() -> bool:
    """Whether ``FIXQ_COLD_BRIDGE`` leaves the cold-start bridge on (the default)."""
    return os.environ.get(COLD_BRIDGE, "on").strip().lower() not in _OFF


def kernel_cache_setting() -> pathlib.Path | None:
    """The folder ``FIXQ_KERNEL_CACHE`` names, or None when it is unset or empty."""
    configured = os.environ.get(KERNEL_CACHE, "").strip()
    return pathlib.Path(configured).expanduser() if configured else None
