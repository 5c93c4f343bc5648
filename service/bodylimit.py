"""Caps on request bodies: ``max_body_mb`` and ``max_inline_elements``, answered 413 problem+json.

A request whose ``Content-Length`` is over ``max_body_mb`` is refused before
any of its body is read; one sent without a length (chunked) is counted as it
streams, and the read that crosses the cap raises :class:`~service.problems.Problem`
inside the route, where the one exception handler answers it.

A JSON body may write at most ``max_inline_elements`` values inline (counted
as the commas, ``[`` and ``{`` outside strings, :func:`inline_values`);
larger arrays must come packed.  The count is taken on the raw bytes, before any Python object
is built: parsed, every inline number costs some 30 bytes or more of Python
objects for its 2 to 20 bytes of text, and validation several times that,
so this cap, not ``max_body_mb``, is what bounds the memory a body costs.
"""

from __future__ import annotations

from starlette.requests import Request
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from service.problems import Problem, handle_error

__all__ = ["BodyLimit", "body_too_large", "check_inline_values", "inline_values"]

_MIB = 2**20
SCAN_SLICE = _MIB
"""Bytes counted per step of :func:`inline_values` (each step holds the interpreter for well under a millisecond)."""


def body_too_large(max_bytes: int) -> Problem:
    """The 413 answered for a body over ``max_bytes``."""
    return Problem(
        413,
        "body-too-large",
        f"the request body is larger than max_body_mb = {max_bytes / _MIB:g} MiB; "
        "send large arrays packed ({dtype, shape, base64}) or ask the operator for a higher cap",
        title="request body too large",
        max_body_bytes=max_bytes,
    )


def inline_values(body: bytes) -> int:
    """The commas, ``[`` and ``{`` outside JSON strings in ``body``: about the values and containers
    it writes inline (a container costs a Python object too, so nesting cannot hide values)."""
    total = _separators(body)
    if not total or b'"' not in body:
        return total
    if b"\\" in body:
        # Escapes are dropped first so that every remaining quote opens or
        # closes a string; the pieces between quotes then alternate outside
        # and inside.
        pieces = body.replace(b"\\\\", b"").replace(b'\\"', b"").split(b'"')
        return sum(_separators(piece) for piece in pieces[::2])
    # Without escapes, string by string and without copies: each step is
    # short, so the thread doing this lets the event loop run in between.
    outside, start = 0, 0
    while (opening := body.find(b'"', start)) >= 0:
        outside += _separators(body, start, opening)
        closing = body.find(b'"', opening + 1)
        if closing < 0:
            return outside
        start = closing + 1
    return outside + _separators(body, start, len(body))


def _separators(body: bytes, start: int = 0, end: int | None = None) -> int:
    # In slices of SCAN_SLICE bytes: one count holds the GIL throughout, and
    # the event loop waits for it.
    end = len(body) if end is None else end
    return sum(
        body.count(mark, at, min(at + SCAN_SLICE, end)) for at in range(start, end, SCAN_SLICE) for mark in b",[{"
    )


def check_inline_values(body: bytes, max_values: int) -> None:
    """Raise the 413 :class:`Problem` when ``body`` writes more than ``max_values`` values inline."""
    if len(body) <= max_values or _separators(body) <= max_values:
        return  # the cheap bounds: a separator is a byte, and strings only take separators away
    found = inline_values(body)
    if found > max_values:
        raise Problem(
            413,
            "too-many-inline-values",
            f"the request body writes about {found:,} values and arrays inline, more than max_inline_elements = "
            f"{max_values:,}; send arrays over {max_values:,} elements packed ({{dtype, shape, base64}}): "
            'see the README section "The problem document", packed arrays',
            title="too many inline values",
            inline_values=found,
            max_inline_elements=max_values,
        )


class BodyLimit:
    """Pure ASGI middleware enforcing ``max_bytes`` on every HTTP request body."""

    def __init__(self, app: ASGIApp, max_bytes: int) -> None:
        self.app = app
        self.max_bytes = max_bytes

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        declared = _content_length(scope)
        if declared is not None and declared > self.max_bytes:
            request = Request(scope, receive)
            response = await handle_error(request, body_too_large(self.max_bytes))
            response.headers["Connection"] = "close"
            await response(scope, receive, send)
            return
        received = 0

        async def counting_receive() -> Message:
            nonlocal received
            message = await receive()
            if message["type"] == "http.request":
                received += len(message.get("body", b""))
                if received > self.max_bytes:
                    raise body_too_large(self.max_bytes)
            return message

        await self.app(scope, counting_receive, send)


def _content_length(scope: Scope) -> int | None:
    for name, value in scope.get("headers", ()):
        if name == b"content-length":
            try:
                return int(value)
            except ValueError:
                return None
    return None
