"""The on-disk cache of generated modules: where it is, and loading from it.

Generated source is written to ``FIXQ_KERNEL_CACHE`` (default
``~/.cache/fixq/kernels``) under a name made of its hash and imported from
there, so numba's ``cache=True`` keeps the machine code beside it: a second
process, or a second solve of the same structure, loads the kernels instead
of compiling them.
"""

from __future__ import annotations

import hashlib
import importlib.util
import os
import pathlib
import sys
import tempfile
from types import ModuleType

from worker.environment import kernel_cache_setting

__all__ = ["kernel_cache_dir", "load", "module_name"]


def kernel_cache_dir() -> pathlib.Path:
    """``FIXQ_KERNEL_CACHE``, else ``~/.cache/fixq/kernels``; a temp folder when neither is writable."""
    configured = kernel_cache_setting()
    candidates = [configured] if configured else []
    candidates.append(pathlib.Path.home() / ".cache" / "fixq" / "kernels")
    candidates.append(pathlib.Path(tempfile.gettempdir()) / f"fixq-kernels-{os.getuid()}")
    for directory in candidates:
        try:
            directory.mkdir(parents=True, exist_ok=True)
            if os.access(directory, os.W_OK):
                return directory
        except OSError:
            continue
    raise OSError("no writable folder for compiled kernels; set FIXQ_KERNEL_CACHE")


def module_name(source: str) -> str:
    """The module (and file) name generated ``source`` is imported under: a hash of it."""
    return f"fixq_kernels_{hashlib.sha256(source.encode()).hexdigest()[:24]}"


def load(source: str) -> ModuleType:
    """Import generated source from the kernel cache (writing it first if new)."""
    name = module_name(source)
    if name in sys.modules:
        return sys.modules[name]
    directory = kernel_cache_dir()
    path = directory / f"{name}.py"
    if not path.exists():
        # Never rewrite an existing file: a new mtime would invalidate numba's cache of it.
        handle, scratch = tempfile.mkstemp(dir=directory, prefix=f".{name}.", suffix=".tmp")
        with os.fdopen(handle, "w") as out:
            out.write(source)
        try:
            os.link(scratch, path)
        except FileExistsError:
            pass
        finally:
            os.unlink(scratch)
    spec = importlib.util.spec_from_file_location(name, path)
    module = importlib.util.module_from_spec(spec)
    sys.modules[name] = module
    try:
        spec.loader.exec_module(module)
    except BaseException:
        del sys.modules[name]
        raise
    return module
