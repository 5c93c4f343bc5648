"""``STOPPING``: set once the API process is told to stop, so that long responses end at once.

Uvicorn answers SIGTERM and SIGINT by closing its sockets and then waiting,
up to its graceful timeout, for open responses to finish; a live log (SSE)
never finishes on its own.  :func:`watch_stop_signals`, entered by the app's
lifespan, puts a handler in front of uvicorn's on those signals that sets
:data:`STOPPING` and then calls uvicorn's, and live streams end when they see
it.  It does so only in the main thread (the only one that may set signal
handlers); elsewhere, as in tests, it does nothing.
"""

from __future__ import annotations

import signal
import threading
from collections.abc import Iterator
from contextlib import contextmanager
from types import FrameType

__all__ = ["STOPPING", "STOP_SIGNALS", "watch_stop_signals"]

STOPPING = threading.Event()
"""Set when the serving process has been asked to stop; streams end when they see it."""
STOP_SIGNALS = (signal.SIGINT, signal.SIGTERM)
"""The signals that stop ``fixq api``."""


@contextmanager
def watch_stop_signals() -> Iterator[None]:
    """Chain a handler that sets :data:`STOPPING` before the current one of each stop signal; restore on exit."""
    STOPPING.clear()
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    previous = {sig: signal.getsignal(sig) for sig in STOP_SIGNALS}

    def handle(sig: int, frame: FrameType | None) -> None:
        STOPPING.set()
        chained = previous[signal.Signals(sig)]
        if callable(chained):
            chained(sig, frame)
        elif chained == signal.SIG_DFL:
            signal.signal(sig, signal.SIG_DFL)
            signal.raise_signal(sig)

    for sig in STOP_SIGNALS:
        signal.signal(sig, handle)
    try:
        yield
    finally:
        for sig, handler in previous.items():
            signal.signal(sig, handler)
