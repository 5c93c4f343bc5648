"""Dependencies of the routes, as ``Annotated`` aliases: settings, Redis, the job store, the caller.

``Owner`` is the one place authentication happens: every route that touches
jobs takes it.  :func:`current_owner` reads the key (``Authorization: Bearer
KEY``, else the dashboard's session cookie), looks it up in
:class:`service.keys.KeyStore` and answers the :class:`Caller`; the key's
record stays on ``request.state.api_key`` for the per-key limits.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Annotated, Any

import anyio
import orjson
import redis
from fastapi import Depends, Request

from service.bodylimit import check_inline_values
from service.keys import ANONYMOUS, ApiKey, KeyStore
from service.problems import Problem
from service.settings import Settings
from service.store import JobStore
from worker.errors import InvalidDocument

__all__ = [
    "ANONYMOUS",
    "SESSION_COOKIE",
    "Caller",
    "JsonObject",
    "Owner",
    "RedisDep",
    "SettingsDep",
    "StoreDep",
    "api_key_of",
    "current_owner",
    "key_store",
    "read_json_object",
]

SESSION_COOKIE = "fixq_session"
"""Cookie in which the dashboard keeps a signed-in browser's key (HttpOnly, SameSite=Strict)."""


@dataclass(frozen=True)
class Caller:
    """Who is asking: the owner recorded on their jobs, and whether they see everyone's."""

    owner: str
    admin: bool = False

    def may_see(self, record: dict[str, Any]) -> bool:
        """True when this caller may read and cancel the job ``record``."""
        return self.admin or record.get("owner") == self.owner

    @property
    def listed_owner(self) -> str | None:
        """The owner filter of this caller's job list (None: every owner)."""
        return None if self.admin else self.owner


def _settings(request: Request) -> Settings:
    return request.app.state.settings


def _redis(request: Request) -> redis.Redis:
    return request.app.state.redis


def _store(request: Request) -> JobStore:
    return request.app.state.store


SettingsDep = Annotated[Settings, Depends(_settings)]
RedisDep = Annotated[redis.Redis, Depends(_redis)]
StoreDep = Annotated[JobStore, Depends(_store)]


def key_store(request: Request, settings: Settings) -> KeyStore:
    """The app's API keys (one :class:`~service.keys.KeyStore` per app, made on first use)."""
    keys = getattr(request.app.state, "keys", None)
    if keys is None:
        keys = request.app.state.keys = KeyStore(request.app.state.redis, settings.redis_prefix)
    return keys


def current_owner(request: Request, settings: SettingsDep) -> Caller:
    """The caller.  With auth off everyone is ``anonymous`` and sees every job.

    With auth on, a request needs a key: ``Authorization: Bearer KEY``, or,
    when no Bearer header is sent, the dashboard's session cookie.  A missing,
    unknown or revoked key is answered 401; a key in a URL is never read.
    """
    if not settings.auth:
        return Caller(ANONYMOUS, admin=True)
    scheme, _, key = request.headers.get("authorization", "").partition(" ")
    if scheme.lower() != "bearer":
        key = request.cookies.get(SESSION_COOKIE, "")
    key = key.strip()
    if not key:
        raise Problem(
            401,
            "unauthorized",
            "this API needs a key: send Authorization: Bearer KEY (an operator makes one with `fixq keys add NAME`)",
            headers={"WWW-Authenticate": 'Bearer realm="fixq"'},
        )
    record = key_store(request, settings).authenticate(key)
    if record is None:
        raise Problem(
            401,
            "unauthorized",
            "the key is not valid: it is unknown or has been revoked",
            headers={"WWW-Authenticate": 'Bearer realm="fixq", error="invalid_token"'},
        )
    request.state.api_key = record
    return Caller(record.name, admin=record.admin)


def api_key_of(request: Request) -> ApiKey | None:
    """The key record :func:`current_owner` accepted for this request (None with auth off)."""
    return getattr(request.state, "api_key", None)


Owner = Annotated[Caller, Depends(current_owner)]


async def read_json_object(request: Request, settings: SettingsDep) -> dict[str, Any]:
    """The request body parsed as one JSON object (strict JSON: no NaN, no trailing commas).

    A body writing more than ``max_inline_elements`` values inline is refused
    (413) before it is parsed; counting and parsing run in a worker thread,
    so a large body never holds the event loop.
    """
    body = await request.body()
    if not body.strip():
        raise Problem(400, "malformed-json", "the request body is empty; send a JSON object", title="malformed JSON")
    return await anyio.to_thread.run_sync(_parse_object, body, settings.max_inline_elements)


def _parse_object(body: bytes, max_inline_elements: int) -> dict[str, Any]:
    check_inline_values(body, max_inline_elements)
    try:
        value = orjson.loads(body)
    except orjson.JSONDecodeError as exc:
        raise Problem(
            400,
            "malformed-json",
            f"the request body is not valid JSON: {exc.msg} at line {exc.lineno} column {exc.colno} "
            f"(character {exc.pos})",
            title="malformed JSON",
            line=exc.lineno,
            column=exc.colno,
            position=exc.pos,
        ) from None
    if not isinstance(value, dict):
        raise InvalidDocument.at("", f"a problem document is a JSON object, not {_json_kind(value)}")
    return value


def _json_kind(value: Any) -> str:
    if isinstance(value, list):
        return "an array"
    if isinstance(value, str):
        return "a string"
    if isinstance(value, bool) or value is None:
        return orjson.dumps(value).decode()
    return "a number"


JsonObject = Annotated[dict[str, Any], Depends(read_json_object)]
