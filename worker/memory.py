"""A per-job memory limit: the promise of the size estimate, enforced while a job runs.

:func:`memory_limit` lowers the process's soft ``RLIMIT_DATA`` for the
duration of a ``with`` block.  Since Linux 4.7 that limit counts private
writable mappings, so it caps numpy's and numba's large allocations (which
``mmap`` them) as well as the heap; an allocation past it fails, numpy raises
``MemoryError``, and the block turns that into :class:`~worker.errors.TooLarge`
naming what ran out, the estimate and the measured figure.  The process
survives: the failed job's arrays are released as the error unwinds, the
limit is restored, and the next job runs as usual.

The limit is ``current data size + SAFETY_FACTOR × promised bytes +
MARGIN_BYTES``: the margin covers what the estimate does not count on
purpose (compiling a new model structure, the interpreter's temporaries, a
thread's stack), the factor the estimate's roughness.  The limit is
process-wide, so threads started inside the block (a heartbeat, a notifier)
share it; they allocate little.  A child process started inside the block
inherits the lowered limit; the background compile of :mod:`worker.bridge`
lifts it (:func:`release_inherited_limit`), since the structure limits of
:mod:`worker.kernel_limits` bound what compiling takes, not the job's estimate.

Elsewhere than on Linux, or when the limit cannot be set, the block only
converts ``MemoryError``.
"""

from __future__ import annotations

import resource
import sys
import traceback
from types import TracebackType
from typing import Any

from worker.errors import TooLarge

__all__ = [
    "MARGIN_BYTES",
    "SAFETY_FACTOR",
    "MemoryLimit",
    "data_bytes",
    "memory_limit",
    "peak_rss_bytes",
    "release_inherited_limit",
]

SAFETY_FACTOR = 2.0
"""The limit allows this many times the promised bytes (dimensionless)."""
MARGIN_BYTES = 512 * 2**20
"""Bytes allowed on top of the promise (512 MiB): a cold compile of a new model structure grows the data
size by about 40 MiB, and by up to about 200 MiB at the largest structures :mod:`worker.kernel_limits` admits
(measured on this machine: 99 MiB at 64 interpolation corners, 198 MiB at 962 expression parts), plus the
libraries a solve loads on first use (about 60 MiB) and thread stacks (8 MiB each)."""

_MIB = 2**20
_STATUS = "/proc/self/status"


def _status_kib(field: str) -> int | None:
    try:
        with open(_STATUS, encoding="ascii") as status:
            for line in status:
                if line.startswith(field + ":"):
                    return int(line.split()[1])
    except (OSError, ValueError, IndexError):
        return None
    return None


def data_bytes() -> int | None:
    """The process's data size (``VmData``: heap and private writable mappings) in bytes; None off Linux."""
    kib = _status_kib("VmData")
    return None if kib is None else kib * 1024


def peak_rss_bytes() -> int:
    """Peak resident memory in bytes: ``VmHWM`` since the last reset on Linux, else the process's ``ru_maxrss``."""
    kib = _status_kib("VmHWM")
    if kib is not None:
        return kib * 1024
    scale = 1 if sys.platform == "darwin" else 1024
    return int(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss) * scale


def release_inherited_limit() -> None:
    """Raise the soft ``RLIMIT_DATA`` a child process inherited from a job back to the hard limit."""
    try:
        _, hard = resource.getrlimit(resource.RLIMIT_DATA)
        resource.setrlimit(resource.RLIMIT_DATA, (hard, hard))
    except (OSError, ValueError):
        pass


def _reset_peak() -> None:
    """Reset ``VmHWM`` to the current resident size (Linux ≥ 4.0), so the peak is this job's."""
    try:
        with open("/proc/self/clear_refs", "w", encoding="ascii") as clear:
            clear.write("5")
    except OSError:
        pass


class MemoryLimit:
    """The context manager :func:`memory_limit` returns; ``limit`` is the soft limit set (None: not set)."""

    def __init__(
        self,
        max_bytes: int,
        *,
        estimate_bytes: int | None = None,
        what: str = "this solve",
        context: dict[str, Any] | None = None,
    ) -> None:
        self.context = dict(context or {})
        self.max_bytes = int(max_bytes)
        self.estimate_bytes = self.max_bytes if estimate_bytes is None else int(estimate_bytes)
        self.what = what
        self.limit: int | None = None
        self._previous: tuple[int, int] | None = None

    def __enter__(self) -> "MemoryLimit":
        _reset_peak()
        current = data_bytes()
        if current is None or not sys.platform.startswith("linux"):
            return self
        try:
            soft, hard = resource.getrlimit(resource.RLIMIT_DATA)
        except (OSError, ValueError):
            return self
        wanted = current + int(SAFETY_FACTOR * self.max_bytes) + MARGIN_BYTES
        if hard != resource.RLIM_INFINITY:
            wanted = min(wanted, hard)
        if soft != resource.RLIM_INFINITY and soft <= wanted:
            return self  # an outer limit is tighter already
        try:
            resource.setrlimit(resource.RLIMIT_DATA, (wanted, hard))
        except (OSError, ValueError):
            return self
        self._previous = (soft, hard)
        self.limit = wanted
        return self

    def __exit__(
        self, kind: type[BaseException] | None, error: BaseException | None, tb: TracebackType | None
    ) -> bool:
        if self._previous is not None:
            resource.setrlimit(resource.RLIMIT_DATA, self._previous)
            self._previous = None
        if error is None or not isinstance(error, MemoryError):
            return False
        # The frames of the failed job hold its arrays: clear them so the memory returns before the next job.
        if tb is not None:
            traceback.clear_frames(tb)
        error.__traceback__ = None
        raise self.too_large() from None

    def too_large(self) -> TooLarge:
        """The error of a job that ran out of its memory."""
        peak = peak_rss_bytes()
        limit = (
            f"its memory limit of {self.limit / _MIB:,.0f} MiB of data (the data size when the job started plus "
            f"{SAFETY_FACTOR:g} × {self.max_bytes / _MIB:,.0f} MiB + {MARGIN_BYTES / _MIB:,.0f} MiB)"
            if self.limit is not None
            else "the memory available to the worker"
        )
        return TooLarge.at(
            "model",
            f"{self.what} ran out of memory: an allocation failed past {limit}; the size estimate was "
            f"{self.estimate_bytes / _MIB:,.0f} MiB and the worker's peak resident memory reached "
            f"{peak / _MIB:,.0f} MiB; use coarser grids or fewer choices",
            estimate_bytes=self.estimate_bytes,
            limit_bytes=self.limit,
            peak_rss_bytes=peak,
            **self.context,
        )


def memory_limit(
    max_bytes: int,
    *,
    estimate_bytes: int | None = None,
    what: str = "this solve",
    context: dict[str, Any] | None = None,
) -> MemoryLimit:
    """Cap the process's data size at its current size plus ``SAFETY_FACTOR · max_bytes + MARGIN_BYTES``.

    Parameters
    ----------
    max_bytes : int
        The promised bytes (the estimate a job was admitted with).
    estimate_bytes : int, optional
        The estimate to quote in the error (default ``max_bytes``).
    what : str
        What ran out, for the message.
    context : dict, optional
        More context for the error (``worker.solve`` passes ``estimate``, the estimate dict).

    Raises
    ------
    TooLarge
        On a ``MemoryError`` inside the block; ``context`` has ``estimate_bytes``,
        ``limit_bytes`` and ``peak_rss_bytes``.

    Examples
    --------
    >>> with memory_limit(2**20) as cap:
    ...     _ = bytearray(10)
    """
    return MemoryLimit(max_bytes, estimate_bytes=estimate_bytes, what=what, context=context)

