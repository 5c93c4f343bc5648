"""A cap on request bodies: ``max_body_mb``, answered 413 problem+json.

A request whose ``Content-Length`` is over the cap is refused before any of
its body is read; one sent without a length (chunked) is counted as it
streams, and the read that crosses the cap raises :class:`~service.problems.Problem`
inside the route, where the one exception handler answers it.
"""

from __future__ import annotations

from starlette.requests import Request
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from service.problems import Problem, handle_error

__all__ = ["BodyLimit", "body_too_large"]

_MIB = 2**20


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
