"""Loading generated modules from the kernel folder, and keeping the folder and the process bounded.

Generated source is written to the kernel folder (:mod:`worker._codegen.folder`)
under a name made of its hash and imported from there, so numba's
``cache=True`` keeps the machine code beside it: a second process, or a
second solve of the same structure, loads the kernels instead of compiling
them.

The files of module ``fixq_kernels_<hash>`` (its *name*): ``<name>.py``;
``<name>.used``, whose mtime is the module's last use (set on a load, at most
every `STAMP_EVERY_S` by one process, so the order does not depend on the
file system's access times); ``<name>.lock``;
the bridge's markers ``<name>.<tag>.ready`` and ``.compiling``; and, in
numba's cache folder, the bytecode and machine code ``<name>.*``.

Bounds
------
* The folder: `trim` deletes the least recently used modules until the
  modules take at most ``FIXQ_KERNEL_CACHE_MB``.  A process holds a shared
  ``flock`` on ``<name>.lock`` from before it writes or imports the module
  until it drops it from memory, and `trim` deletes a module only under an
  exclusive lock taken without waiting, so no module is deleted while any
  process loads or holds it; a deleted module is simply compiled again by the
  next process that needs it.  A loader that waited on the lock of a module
  deleted meanwhile sees that the lock file is gone and starts over.  The
  modules live processes hold (at most `LOADED_KEPT` each) may take the
  folder past the limit; `trim` runs after a structure's first load in a process
  (:func:`worker.gridmodel.compile_grid`).
* The process: numba never frees compiled code, so a worker's memory grows
  with every module it imports.  `loaded_structures` counts those imports
  and `recycle_due` says when the worker should be replaced by a fresh
  process (``FIXQ_MAX_LOADED_STRUCTURES``).  The last `LOADED_KEPT` modules
  stay imported, so a structure used again is not loaded again; older ones
  are dropped (their references, and their shared locks).
"""

from __future__ import annotations

import fcntl
import functools
import hashlib
import importlib.util
import os
import pathlib
import re
import sys
import tempfile
import threading
import time
from collections import OrderedDict
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from types import ModuleType

from worker._codegen.folder import kernel_cache_dir, numba_cache_dir
from worker.environment import kernel_cache_bytes, max_loaded_structures

__all__ = ["LOADED_KEPT", "is_held", "load", "loaded_structures", "module_name", "recycle_due", "trim", "warming"]

LOADED_KEPT = 16
"""Modules a process keeps imported (count); a module used again while kept costs no new load."""

_NAME = re.compile(r"(fixq_kernels_[0-9a-f]{24})\.")
_KEEP_SUFFIXES = (".compiling",)
"""Files of a module that `trim` leaves alone: the bridge's compile lock belongs to its compiling process."""


@dataclass
class _Held:
    module: ModuleType
    lock: int


_HELD: OrderedDict[str, _Held] = OrderedDict()
_IMPORTS = 0
_STAMPED: dict[str, float] = {}
"""When this process last set each module's ``.used`` mtime (``time.monotonic()``)."""
STAMP_EVERY_S = 10.0
"""Least time between two stamps of a module this process holds (seconds): a held module is never trimmed, so its
last use matters only for the order once it is released; a system call per load cost 4 µs of a 2 ms solve."""
_GUARD = threading.Lock()
"""Guards `_HELD` and `_IMPORTS` (a solve's threads may load at once)."""


@functools.lru_cache(maxsize=128)
def module_name(source: str) -> str:
    """The module (and file) name generated ``source`` is imported under: a hash of it (kept for the last 128
    texts: a solve names its modules several times, and kept texts are the same string objects)."""
    return f"fixq_kernels_{hashlib.sha256(source.encode()).hexdigest()[:24]}"


def loaded_structures() -> int:
    """How many generated modules this process has imported (a module imported again counts again)."""
    return _IMPORTS


def recycle_due() -> bool:
    """Whether this process has imported ``FIXQ_MAX_LOADED_STRUCTURES`` modules or more, and should be
    replaced by a fresh process after its current job (its compiled code is never freed)."""
    return _IMPORTS >= max_loaded_structures()


def load(source: str) -> ModuleType:
    """Import generated source from the kernel folder (writing it first if new).

    Raises
    ------
    OSError
        The folder is refused (see :mod:`worker._codegen.folder`), or the
        module's file there does not hold ``source``.
    """
    with _GUARD:
        return _load(source)


def is_held(source: str) -> bool:
    """Whether this process holds the module of ``source`` already (loading it again compiles nothing)."""
    with _GUARD:
        return module_name(source) in _HELD


def _load(source: str) -> ModuleType:
    global _IMPORTS
    name = module_name(source)
    directory = kernel_cache_dir()
    held = _HELD.get(name)
    if held is not None:
        _HELD.move_to_end(name)
        if time.monotonic() - _STAMPED.get(name, -STAMP_EVERY_S) >= STAMP_EVERY_S:
            _stamp(directory, name)
        return held.module
    numba_cache_dir(directory)
    lock = _shared_lock(directory / f"{name}.lock")
    try:
        path = directory / f"{name}.py"
        _write_once(path, source)
        module = _import(name, path)
    except BaseException:
        os.close(lock)
        raise
    _IMPORTS += 1
    _HELD[name] = _Held(module, lock)
    _stamp(directory, name)
    while len(_HELD) > LOADED_KEPT:
        dropped, old = _HELD.popitem(last=False)
        sys.modules.pop(dropped, None)
        os.close(old.lock)
    return module


@contextmanager
def warming(module: ModuleType) -> Iterator[None]:
    """Hold ``<name>.warming``'s exclusive lock while the block warms up (compiles) a loaded module's kernels.

    numba compiles a kernel at its first call and writes the machine code to its cache then, so a second
    process that warms up the same structure at the same time (two workers of a node taking a new sweep's
    members, two test processes solving one example) would compile it again beside the first.  Under this lock
    it waits instead, and its first calls then load what the first process wrote.  The lock is the operating
    system's (``flock``): it goes with its holder, even one killed mid-compile; the file stays beside the module
    and goes with it when :func:`trim` deletes the module (which it cannot while a process holds the module).
    Outside the kernel folder's modules (no such file can be made) the block runs unlocked."""
    name = module.__name__
    try:
        descriptor = os.open(kernel_cache_dir() / f"{name}.warming", os.O_RDWR | os.O_CREAT | os.O_NOFOLLOW
                             | os.O_CLOEXEC, 0o600)  # fmt: skip
    except OSError:
        yield
        return
    try:
        fcntl.flock(descriptor, fcntl.LOCK_EX)
        yield
    finally:
        os.close(descriptor)  # closing the descriptor drops the lock


def _shared_lock(path: pathlib.Path) -> int:
    """A descriptor holding a shared lock on ``path`` (the lock file in place now, not one deleted meanwhile)."""
    while True:
        descriptor = os.open(path, os.O_RDWR | os.O_CREAT | os.O_NOFOLLOW | os.O_CLOEXEC, 0o600)
        try:
            fcntl.flock(descriptor, fcntl.LOCK_SH)
            if _same_file(descriptor, path):
                return descriptor
        except BaseException:
            os.close(descriptor)
            raise
        os.close(descriptor)


def _same_file(descriptor: int, path: pathlib.Path) -> bool:
    held = os.fstat(descriptor)
    try:
        now = os.lstat(path)
    except FileNotFoundError:
        return False
    return (held.st_dev, held.st_ino) == (now.st_dev, now.st_ino)


def _write_once(path: pathlib.Path, source: str) -> None:
    """Write ``path`` unless it exists; an existing file must hold ``source`` (its name is its hash)."""
    try:
        descriptor = os.open(path, os.O_RDONLY | os.O_NOFOLLOW | os.O_CLOEXEC)
    except FileNotFoundError:
        # Written aside and linked into place: a reader never sees a partial file.
        handle, scratch = tempfile.mkstemp(dir=path.parent, prefix=f".{path.stem}.", suffix=".tmp")
        with os.fdopen(handle, "w") as out:
            out.write(source)
        try:
            os.link(scratch, path)
        except FileExistsError:
            pass
        finally:
            os.unlink(scratch)
        return
    with os.fdopen(descriptor, "rb") as existing:
        if existing.read() != source.encode():
            raise OSError(f"{path} does not hold the module its name is the hash of; delete it to compile it again")


def _import(name: str, path: pathlib.Path) -> ModuleType:
    spec = importlib.util.spec_from_file_location(name, path)
    module = importlib.util.module_from_spec(spec)
    sys.modules[name] = module
    try:
        spec.loader.exec_module(module)
    except BaseException:
        del sys.modules[name]
        raise
    return module


def _stamp(directory: pathlib.Path, name: str) -> None:
    """Record the module's last use: the mtime of ``<name>.used``."""
    if len(_STAMPED) > 4 * LOADED_KEPT:
        _STAMPED.clear()
    _STAMPED[name] = time.monotonic()
    marker = directory / f"{name}.used"
    try:
        os.utime(marker)
    except FileNotFoundError:
        try:
            marker.touch()
        except OSError:
            pass


@dataclass
class _Group:
    """One module's files and its last use."""

    files: list[pathlib.Path] = field(default_factory=list)
    size: int = 0
    used: float = 0.0
    stamped: bool = False


def _groups(directory: pathlib.Path) -> dict[str, _Group]:
    groups: dict[str, _Group] = {}
    folders = [directory, directory / "__pycache__", numba_cache_dir(directory)]
    for folder in dict.fromkeys(folders):
        try:
            entries = list(os.scandir(folder))
        except FileNotFoundError:
            continue
        for entry in entries:
            match = _NAME.match(entry.name)
            if not match or not entry.is_file(follow_symlinks=False):
                continue
            try:
                info = entry.stat(follow_symlinks=False)
            except FileNotFoundError:
                continue
            group = groups.setdefault(match.group(1), _Group())
            group.files.append(pathlib.Path(entry.path))
            group.size += info.st_size
            if entry.name.endswith(".used"):
                group.used, group.stamped = info.st_mtime, True
            elif not group.stamped:
                group.used = max(group.used, info.st_mtime)
    return groups


def trim(limit: int | None = None) -> int:
    """Delete the least recently used modules until the folder's modules take at most ``limit`` bytes.

    ``limit`` defaults to ``FIXQ_KERNEL_CACHE_MB``.  Modules that any process
    loads or holds are skipped (see the module docstring).  Returns the bytes
    deleted.
    """
    limit = kernel_cache_bytes() if limit is None else limit
    directory = kernel_cache_dir()
    groups = _groups(directory)
    excess = sum(group.size for group in groups.values()) - limit
    freed = 0
    for name, group in sorted(groups.items(), key=lambda item: item[1].used):
        if freed >= excess:
            break
        if name not in _HELD and _delete(directory, name, group):
            freed += group.size
    return freed


def _delete(directory: pathlib.Path, name: str, group: _Group) -> bool:
    """Delete one module's files under its exclusive lock; False when some process holds the lock."""
    lock = directory / f"{name}.lock"
    try:
        descriptor = os.open(lock, os.O_RDWR | os.O_CREAT | os.O_NOFOLLOW | os.O_CLOEXEC, 0o600)
    except OSError:
        return False
    try:
        try:
            fcntl.flock(descriptor, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            return False
        if not _same_file(descriptor, lock):
            return False
        try:
            for path in group.files:
                if path != lock and not path.name.endswith(_KEEP_SUFFIXES):
                    path.unlink(missing_ok=True)
            # Last, so a process waiting for this lock finds it gone and starts over.
            lock.unlink(missing_ok=True)
        except OSError:
            return False  # what is left is still a module's files, found and deleted by a later trim
        return True
    finally:
        os.close(descriptor)
