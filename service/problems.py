"""RFC 9457 problem details: the one place where errors become HTTP answers.

Every error the API answers is ``application/problem+json`` with ``type``,
``title``, ``status`` and ``detail``; documents that break the schema also
carry ``errors``, a list of ``{"path", "message"}``.  Routes never build error
responses themselves: they raise, and :func:`handle_error` translates

* ``worker.errors.FixqError`` subclasses (invalid document 422, too large 413),
* :class:`Problem`, the HTTP-level errors of the routes (unknown job 404,
  result not ready 409, result expired 410 (``/result`` and ``/plots``
  alike), missing key 401, malformed JSON 400, ...),
* FastAPI's ``RequestValidationError`` (a bad query parameter or header, 400),
* Starlette's ``HTTPException`` (no such route 404, wrong method 405, ...),
* Redis being full (a write refused at ``maxmemory``, by a plain command or
  inside a Lua script: 503 ``redis-full``), unreachable or read-only (503),
* anything else (500, logged with its traceback; never caused by input).

``type`` is a URN naming the kind of problem (``urn:fixq:problem:not-found``);
it identifies, it is not a link.
"""

from __future__ import annotations

import logging
from http import HTTPStatus
from typing import Any

import redis.exceptions
from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import JSONResponse
from starlette.exceptions import HTTPException

from worker.errors import FixqError, join_path

__all__ = ["PROBLEM_JSON", "STORE_UNAVAILABLE", "UNAVAILABLE_DETAIL", "Problem", "handle_error", "install",
           "problem_response"]

PROBLEM_JSON = "application/problem+json"
TYPE_PREFIX = "urn:fixq:problem:"

logger = logging.getLogger("fixq.service")


class Problem(HTTPException):
    """An HTTP-level error raised by a route or dependency.

    ``kind`` becomes the ``type`` URN; ``extensions`` are extra members of the
    body (``state`` for a result that is not ready, ``line``/``column`` for
    malformed JSON).  It is a Starlette ``HTTPException``, so FastAPI passes it
    through unchanged even when raised while it reads a request body.
    """

    def __init__(
        self,
        status: int,
        kind: str,
        detail: str,
        *,
        title: str | None = None,
        errors: list[dict[str, str]] | None = None,
        headers: dict[str, str] | None = None,
        **extensions: Any,
    ) -> None:
        super().__init__(status, detail, headers)
        self.status = status
        self.kind = kind
        self.title = title or HTTPStatus(status).phrase.lower()
        self.detail = detail
        self.errors = errors
        self.headers = headers
        self.extensions = extensions


def problem_response(
    status: int,
    kind: str,
    title: str,
    detail: str,
    *,
    errors: list[dict[str, str]] | None = None,
    headers: dict[str, str] | None = None,
    **extensions: Any,
) -> JSONResponse:
    """Build one ``application/problem+json`` response."""
    body: dict[str, Any] = {"type": TYPE_PREFIX + kind, "title": title, "status": status, "detail": detail}
    if errors is not None:
        body["errors"] = errors
    body.update(extensions)
    return JSONResponse(body, status_code=status, headers=headers, media_type=PROBLEM_JSON)


STORE_UNAVAILABLE = (
    redis.exceptions.ConnectionError,
    redis.exceptions.TimeoutError,
    redis.exceptions.OutOfMemoryError,
    redis.exceptions.ReadOnlyError,
)
"""Redis failures that are the store's state, not a bug: answered 503 with Retry-After."""
UNAVAILABLE_DETAIL = "the job store (Redis) is unavailable; try again shortly"
"""The ``detail`` of the 503 for an unreachable Redis (a response's, or a live log's ``event: error``)."""

def _redis_full(exc: Exception) -> bool:
    """True when Redis refused a write at ``maxmemory``: a plain command's error, or a Lua script's."""
    if isinstance(exc, redis.exceptions.OutOfMemoryError):
        return True
    return isinstance(exc, redis.exceptions.ResponseError) and "OOM command not allowed" in str(exc)


_FIXQ_KINDS = {422: "invalid-document", 413: "too-large", 409: "canceled"}


def _from_fixq(exc: FixqError) -> JSONResponse:
    kind = "infeasible-model" if exc.title == "infeasible model" else _FIXQ_KINDS.get(exc.status, "fixq-error")
    extensions = {}
    if "estimate" in exc.context:
        extensions["estimate"] = exc.context["estimate"]
    return problem_response(exc.status, kind, exc.title, exc.detail, errors=exc.errors, **extensions)


def _from_validation(exc: RequestValidationError) -> JSONResponse:
    errors = [{"path": join_path(*err.get("loc", ())), "message": err.get("msg", "invalid")} for err in exc.errors()]
    detail = "; ".join(f"{e['path']}: {e['message']}" for e in errors[:5]) or "invalid request"
    return problem_response(400, "invalid-request", "invalid request", detail, errors=errors)


def _from_http(request: Request, exc: HTTPException) -> JSONResponse:
    status = exc.status_code
    phrase = HTTPStatus(status).phrase
    kind = {404: "not-found", 405: "method-not-allowed", 413: "body-too-large"}.get(
        status, phrase.lower().replace(" ", "-")
    )
    detail = exc.detail if isinstance(exc.detail, str) else phrase
    if status == 404 and detail == phrase:
        detail = f"there is nothing at {request.url.path}"
    elif status == 405 and detail == phrase:
        allowed = (exc.headers or {}).get("Allow", "")
        detail = f"{request.method} is not allowed on {request.url.path}" + (f"; allowed: {allowed}" if allowed else "")
    return problem_response(status, kind, phrase.lower(), detail, headers=exc.headers)


async def handle_error(request: Request, exc: Exception) -> JSONResponse:
    """The one exception handler of the API (see the module docstring)."""
    if isinstance(exc, Problem):
        return problem_response(
            exc.status, exc.kind, exc.title, exc.detail, errors=exc.errors, headers=exc.headers, **exc.extensions
        )
    if isinstance(exc, FixqError):
        return _from_fixq(exc)
    if isinstance(exc, RequestValidationError):
        return _from_validation(exc)
    if isinstance(exc, HTTPException):
        return _from_http(request, exc)
    if _redis_full(exc):
        logger.warning("redis is full (maxmemory) while answering %s %s: %s", request.method, request.url.path, exc)
        return problem_response(
            503,
            "redis-full",
            "service unavailable",
            "the job store (Redis) is full: it refused a write at its maxmemory limit, so the request was not "
            "carried out; try again later (an operator must raise maxmemory or let finished jobs expire)",
            headers={"Retry-After": "30"},
        )
    if isinstance(exc, STORE_UNAVAILABLE):
        logger.warning("redis unavailable while answering %s %s: %s", request.method, request.url.path, exc)
        return problem_response(
            503,
            "unavailable",
            "service unavailable",
            UNAVAILABLE_DETAIL,
            headers={"Retry-After": "5"},
        )
    logger.error("unexpected error answering %s %s", request.method, request.url.path, exc_info=exc)
    return problem_response(
        500, "internal-error", "internal server error", "an unexpected error occurred; it was logged"
    )


def install(app: FastAPI) -> None:
    """Route every error class the API can meet to :func:`handle_error`."""
    for exc_class in (
        Problem,
        FixqError,
        RequestValidationError,
        HTTPException,
        *STORE_UNAVAILABLE,
        Exception,
    ):
        app.add_exception_handler(exc_class, handle_error)
