"""The first solve of a new model structure, while its kernels compile in the background.

Grid models run generated numba kernels, compiled once per model *structure*
and machine and then loaded from the on-disk cache (:mod:`worker._codegen`).
Compiling them takes several seconds (measured 4–9 s on a shared 2-core
machine for the hinted growth model), far longer than solving a small model.
A practitioner trying out model variants would wait on the compiler every
time, so when a structure's kernels are not yet known to be in the cache and
the problem is small, the solve does not wait:

* it tabulates every (point, choice) pair with numpy (the ``tables`` reward
  storage's own tables) and runs every Bellman step as the plain numpy
  reference of the kernels (:class:`worker.reference.ReferenceProblem`) — no
  hints, no block search, nothing to compile;
* it starts a background process (``python -m worker._compile_later``,
  niced) that compiles the kernels the regular path would use (by a solve of
  three iterations), so the next solve of the structure, in any process on
  the machine, loads them.

The reference step is exact, so the answer is certified exactly as on the
regular path; it can differ from the regular path's in the last bits, as
the two reward storages already may (numpy's vectorised ``log``/``exp``/``**``
are not the C library's).  It applies only when the tables fit within the
precompute budget and :data:`BRIDGE_MAX_BYTES`, and have at most
:data:`BRIDGE_MAX_PAIRS` pairs, and never when a caller forces a reward
storage.  :mod:`worker.gridmodel` makes that decision; this module keeps the
readiness markers and starts the background compiles.
``FIXQ_COLD_BRIDGE=off`` turns it off (the test suite does, except where it
tests this module).

Readiness is a marker file beside the kernels (``<module>.<tag>.ready``),
written after a successful warm-up in any process; ``tag`` covers
``NUMBA_CACHE_DIR``, Python and numba versions, since the compiled code lives
where those say.  Lock files (``.compiling``) keep two background compiles of one
structure from running at once, and more than :data:`MAX_BACKGROUND` of any
structures; a lock older than :data:`STALE_LOCK_S` is ignored (its process
died).
"""

from __future__ import annotations

import functools
import hashlib
import json
import os
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

from worker import _codegen
from worker.environment import COLD_BRIDGE, cold_bridge_enabled

__all__ = [
    "BRIDGE_MAX_BYTES",
    "BRIDGE_MAX_PAIRS",
    "compile_later",
    "enabled",
    "is_warm",
    "mark_warm",
    "release",
    "wait_idle",
]

BRIDGE_MAX_PAIRS = 12_000_000
"""Largest number of (point, choice) pairs solved by numpy table scans while kernels compile (count).
A scan costs about 5 ns a pair here, so some 30 iterations of the largest take about as long as
compiling the kernels would."""
BRIDGE_MAX_BYTES = 256 << 20
"""Most memory the bridge's tables and scans may take (bytes, the precompute estimate): a first solve
admitted on the smaller on-the-fly estimate stays within a few hundred MiB more than it."""
MAX_BACKGROUND = 1
"""Background compiles that may run at once per kernel folder (count): a queue fed many new
structures at once (a hostile or a careless user) starts no more than this, and the rest of those
first solves take the bridge again until their turn comes."""
STALE_LOCK_S = 900.0
"""Age after which a background compile's lock file is ignored (seconds)."""

_BACKGROUND: list[subprocess.Popen] = []


def enabled() -> bool:
    """Whether ``FIXQ_COLD_BRIDGE`` leaves the bridge on."""
    return cold_bridge_enabled()


def _tag() -> str:
    return _tag_for(os.environ.get("NUMBA_CACHE_DIR", ""))


@functools.lru_cache(maxsize=8)
def _tag_for(numba_cache_dir: str) -> str:
    import numba

    text = "|".join([numba_cache_dir, sys.version, numba.__version__])
    return hashlib.sha256(text.encode()).hexdigest()[:10]


def _path(module_name: str, suffix: str) -> Path:
    return _codegen.kernel_cache_dir() / f"{module_name}.{_tag()}.{suffix}"


def is_warm(module_name: str) -> bool:
    """Whether some process finished warming up this module's kernels (with this numba cache)."""
    return _path(module_name, "ready").exists()


def mark_warm(module_name: str) -> None:
    """Record that this module's kernels are compiled and cached (for every process on the machine)."""
    try:
        _path(module_name, "ready").touch()
    except OSError:
        pass  # a read-only cache only means the next process takes the bridge again


def _locked(module_name: str) -> bool:
    lock = _path(module_name, "compiling")
    try:
        return time.time() - lock.stat().st_mtime < STALE_LOCK_S
    except FileNotFoundError:
        return False


def compile_later(
    document: dict[str, Any], module_name: str, *, reward_storage: str, limits: dict[str, Any] | None = None
) -> bool:
    """Start the background compile of a document's kernels; False when one already runs (or cannot start)."""
    for process in list(_BACKGROUND):
        if process.poll() is not None:
            _BACKGROUND.remove(process)
    if _locked(module_name) or len(_active_locks()) >= MAX_BACKGROUND:
        return False
    lock = _path(module_name, "compiling")
    try:
        lock.unlink(missing_ok=True)  # stale
        descriptor = os.open(lock, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
    except OSError:
        return False
    os.close(descriptor)
    payload = json.dumps(
        {"document": document, "module": module_name, "reward_storage": reward_storage, "limits": limits,
         "lock": str(lock)}
    )
    env = {**os.environ, COLD_BRIDGE: "off"}
    root = str(Path(__file__).resolve().parents[1])
    env["PYTHONPATH"] = root + (os.pathsep + env["PYTHONPATH"] if env.get("PYTHONPATH") else "")
    try:
        process = subprocess.Popen(
            [sys.executable, "-m", "worker._compile_later"], stdin=subprocess.PIPE, stdout=subprocess.DEVNULL,
            stderr=subprocess.DEVNULL, start_new_session=True, env=env, cwd=root,
        )
        process.stdin.write(payload.encode())
        process.stdin.close()
    except OSError:
        lock.unlink(missing_ok=True)
        return False
    _BACKGROUND.append(process)
    return True


def _active_locks() -> list[Path]:
    found = []
    for lock in _codegen.kernel_cache_dir().glob(f"*.{_tag()}.compiling"):
        try:
            if time.time() - lock.stat().st_mtime < STALE_LOCK_S:
                found.append(lock)
        except FileNotFoundError:
            continue
    return found


def wait_idle(timeout: float = 120.0) -> bool:
    """Wait until no background compile holds a lock (benchmarks and tests); True when idle."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if not _active_locks():
            _reap(deadline)
            return True
        time.sleep(0.05)
    return False


def _reap(deadline: float) -> None:
    """Collect this process's finished background compiles (a lock is dropped just before its process exits)."""
    for process in list(_BACKGROUND):
        try:
            process.wait(timeout=max(0.0, deadline - time.monotonic()))
        except subprocess.TimeoutExpired:
            continue
        _BACKGROUND.remove(process)


def release(lock: str | Path) -> None:
    """Drop a background compile's lock (its process calls this when done, successful or not)."""
    Path(lock).unlink(missing_ok=True)
