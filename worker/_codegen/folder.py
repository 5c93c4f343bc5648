"""The kernel folder: where generated modules live, kept private to the worker's user.

A module in the folder is imported, and numba's cache beside it unpickled,
as the worker's user, so anyone who can write into the folder can run code
as that user.  `kernel_cache_dir` therefore accepts only a folder owned by
the process's uid and writable by no one else, and never follows a symbolic
link at its last component; a folder it accepts loses any group and other
read or search bits too (``chmod 700``), and one it creates is made with
mode 0700 (``os.mkdir``, then checked through a descriptor opened without
following links, so nothing can be swapped in between).

The folder is ``FIXQ_KERNEL_CACHE``, else ``~/.cache/fixq/kernels``, else
(no usable home, as for a system user without one)
``<temp dir>/fixq-kernels-<uid>``.  A folder that exists but fails the
checks is refused with an `OSError` naming it, never passed over for the
next candidate.
"""

from __future__ import annotations

import errno
import os
import pathlib
import stat
import tempfile

from worker.environment import KERNEL_CACHE, kernel_cache_setting

__all__ = ["UnsafeFolder", "kernel_cache_dir", "numba_cache_dir", "private_folder"]

_VERIFIED: dict[pathlib.Path, tuple[int, int]] = {}
"""Folders checked by this process, with their (device, inode): a folder replaced since is checked again."""


class UnsafeFolder(OSError):
    """A kernel folder that others could write into (or that is not a plain folder of this user)."""


_CHOSEN: dict[tuple[str | None, str | None, str | None], pathlib.Path] = {}
"""The folder chosen last for each ``(FIXQ_KERNEL_CACHE, HOME, tempfile.tempdir)``: a solve loads its kernels
several times, and the choice's path handling took about 0.1 ms each; the folder is still checked (an
``lstat`` against its verified device and inode) at each call, so one replaced since is checked anew."""

_CHOSEN_KEPT = 16
"""Settings remembered in ``_CHOSEN`` (count; more only in tests that change the environment)."""


def kernel_cache_dir() -> pathlib.Path:
    """The private kernel folder (see the module docstring), created if missing.

    Raises
    ------
    UnsafeFolder
        The folder exists but is not this user's own private folder.
    OSError
        No candidate folder could be created.
    """
    key = (os.environ.get(KERNEL_CACHE), os.environ.get("HOME"), tempfile.tempdir)
    chosen = _CHOSEN.get(key)
    if chosen is not None and _still_verified(chosen):
        return chosen
    chosen = _choose()
    if len(_CHOSEN) >= _CHOSEN_KEPT:
        _CHOSEN.clear()
    _CHOSEN[key] = chosen
    return chosen


def _still_verified(path: pathlib.Path) -> bool:
    """Whether ``path`` is the folder `private_folder` accepted, the same device and inode, still a folder."""
    try:
        now = os.lstat(path)
    except OSError:
        return False
    return _VERIFIED.get(path) == (now.st_dev, now.st_ino) and stat.S_ISDIR(now.st_mode)


def _choose() -> pathlib.Path:
    configured = kernel_cache_setting()
    if configured is not None:
        return private_folder(configured)
    failures = []
    for directory in (_home_folder(), pathlib.Path(tempfile.gettempdir()) / f"fixq-kernels-{os.getuid()}"):
        if directory is None:
            continue
        try:
            return private_folder(directory)
        except UnsafeFolder:
            raise
        except OSError as exc:
            failures.append(f"{directory}: {exc.strerror or exc}")
    raise OSError(f"no folder for compiled kernels could be made ({'; '.join(failures)}); set {KERNEL_CACHE}")


def _home_folder() -> pathlib.Path | None:
    try:
        return pathlib.Path.home() / ".cache" / "fixq" / "kernels"
    except RuntimeError:
        return None  # no home directory at all


def private_folder(path: pathlib.Path) -> pathlib.Path:
    """``path`` as a folder of this user that no one else may write into, created with mode 0700 if missing.

    Parents that are missing are created with the default mode; the folder
    itself is checked through a descriptor opened without following a link.
    """
    path = pathlib.Path(os.path.abspath(path))
    try:
        now = os.lstat(path)
    except FileNotFoundError:
        now = None
    if now is not None and _VERIFIED.get(path) == (now.st_dev, now.st_ino) and stat.S_ISDIR(now.st_mode):
        return path
    if now is None:
        path.parent.mkdir(parents=True, exist_ok=True)
        try:
            os.mkdir(path, 0o700)
        except FileExistsError:
            pass
    if stat.S_ISLNK(os.lstat(path).st_mode):
        raise _refused(path, "it is a symbolic link")
    try:
        descriptor = os.open(path, os.O_RDONLY | os.O_DIRECTORY | os.O_NOFOLLOW | os.O_CLOEXEC)
    except NotADirectoryError:
        raise _refused(path, "it is not a folder") from None
    except OSError as exc:
        if exc.errno == errno.ELOOP:
            raise _refused(path, "it is a symbolic link") from None
        raise
    try:
        found = os.fstat(descriptor)
        if found.st_uid != os.getuid():
            raise _refused(path, f"it belongs to uid {found.st_uid}, not to this process's uid {os.getuid()}")
        if found.st_mode & (stat.S_IWGRP | stat.S_IWOTH):
            raise _refused(path, f"its group or others may write into it (mode {stat.filemode(found.st_mode)})")
        if stat.S_IMODE(found.st_mode) != 0o700:
            os.fchmod(descriptor, 0o700)
    finally:
        os.close(descriptor)
    _VERIFIED[path] = (found.st_dev, found.st_ino)
    return path


def _refused(path: pathlib.Path, reason: str) -> UnsafeFolder:
    return UnsafeFolder(
        f"refusing the kernel folder {path}: {reason}. Its modules run as this user, so it must be a folder "
        f"of uid {os.getuid()} that no one else can write into; point {KERNEL_CACHE} at such a folder "
        "(or fix this one's owner and run chmod 700 on it)"
    )


def numba_cache_dir(directory: pathlib.Path) -> pathlib.Path:
    """Where numba keeps the machine code of the modules in ``directory``, checked private like it.

    Beside the modules (``__pycache__``) unless ``NUMBA_CACHE_DIR`` is set;
    then a folder under it, which is as much a way to run code as the
    kernel folder and gets the same checks.
    """
    from numba.core import config
    from numba.core.caching import UserProvidedCacheLocator

    if config.CACHE_DIR:
        subpath = UserProvidedCacheLocator.get_suitable_cache_subpath(str(directory / "probe.py"))
        return private_folder(pathlib.Path(config.CACHE_DIR) / subpath)
    return private_folder(directory / "__pycache__")
