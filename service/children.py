"""The child processes of ``fixq run``: starting them, and stopping them in order.

``fixq run`` starts the API and one worker as children in sessions of their
own; a signal to ``fixq run`` becomes :class:`Stop`, after which it stops each
child with :func:`stop_child`.
"""

from __future__ import annotations

import signal
import subprocess
import sys

__all__ = ["STOP_GRACE_S", "WARM_STOP_S", "Stop", "raise_stop", "spawn", "stop_child"]

STOP_GRACE_S = 10.0
"""Seconds a child of ``fixq run`` gets to stop after SIGTERM before SIGKILL."""
WARM_STOP_S = 2.0
"""Seconds a worker of ``fixq run`` gets to finish its job before it is told to drop it."""


class Stop(Exception):
    """SIGTERM or SIGINT reached ``fixq run``."""


def raise_stop(signum: int, frame: object) -> None:
    """A signal handler that turns SIGTERM or SIGINT into :class:`Stop`."""
    raise Stop


def spawn(command: list[str], env: dict[str, str]) -> subprocess.Popen[bytes]:
    """Start one child of ``fixq run`` that stops when ``fixq run`` dies."""
    # Own session: a Ctrl-C on the terminal reaches only `fixq run`, which then
    # stops its children in order; the parent-death signal stops them too if
    # `fixq run` itself is killed.
    return subprocess.Popen(command, env=env, start_new_session=True, preexec_fn=_die_with_parent)


def _die_with_parent() -> None:
    if sys.platform.startswith("linux"):
        import ctypes

        pr_set_pdeathsig = 1
        ctypes.CDLL("libc.so.6", use_errno=True).prctl(pr_set_pdeathsig, signal.SIGTERM)


def stop_child(child: subprocess.Popen[bytes], *, repeat_after_s: float | None = None) -> None:
    """SIGTERM, optionally a second SIGTERM, then SIGKILL after ``STOP_GRACE_S``.

    An RQ worker treats the first SIGTERM as "finish the current job" and a
    second one (at least a second later) as "kill the work-horse and exit";
    the interrupted job resumes from its checkpoint on the next start.
    """
    if child.poll() is not None:
        return
    child.send_signal(signal.SIGTERM)
    if repeat_after_s is not None:
        try:
            child.wait(repeat_after_s)
            return
        except subprocess.TimeoutExpired:
            child.send_signal(signal.SIGTERM)
    try:
        child.wait(STOP_GRACE_S)
    except subprocess.TimeoutExpired:
        child.kill()
        child.wait()
