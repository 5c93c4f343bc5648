"""API keys: who may use a shared fixq, stored in Redis as hashes only.

A key is ``fxq_`` followed by 43 characters of ``secrets.token_urlsafe(32)``:
256 bits from the operating system's CSPRNG.  Redis holds, per key, the
SHA-256 of the key and what the key is (its name, the admin flag, when it was
made, its own limits) — never the key itself, so a copy of the database (an
append-only file, a backup, ``MONITOR``) lets nobody in.

Why plain SHA-256 and not a password hash (bcrypt, scrypt, Argon2): those are
slow on purpose, so that guessing a *low-entropy* human password from its
hash costs years.  A fixq key is not guessable to begin with — there are
2**256 of them — so slowing each guess down buys nothing, while a fast,
deterministic digest lets the API find a key's record with one ``GET`` by
digest instead of trying every stored salt.  The digest is also what is
compared: the lookup goes by it (an attacker cannot steer the digest of their
guess towards a stored one, so lookup timing tells them nothing), and the
record found is checked against it once more with ``hmac.compare_digest``.

Keys in Redis (prefix ``fixq``)
-------------------------------
=============================  ======  ==========================================
``fixq:apikey:{sha256 hex}``   hash    ``name digest admin created_at`` and the
                                       key's own limits, if any
``fixq:apikeys``               hash    name → digest (one key per name)
=============================  ======  ==========================================

The name is the *owner* written on every job the key submits.  Revoking a key
deletes its record at once (its next request is answered 401) and leaves its
jobs alone; a new key made later under the same name owns them again.

The operator manages keys with ``fixq keys add NAME [--admin]``, ``fixq keys
list`` and ``fixq keys revoke NAME``, which talk to Redis directly.
"""

from __future__ import annotations

import hashlib
import hmac
import re
import secrets
from dataclasses import dataclass, field

import redis

from service._formats import iso_utc

__all__ = [
    "ANONYMOUS",
    "KEY_LIMITS",
    "KEY_PREFIX",
    "RESERVED_NAMES",
    "ApiKey",
    "KeyNameError",
    "KeyStore",
    "key_digest",
    "looks_like_key",
    "new_key",
]

KEY_PREFIX = "fxq_"
"""What every fixq key starts with, so that one pasted into the wrong place is recognisable."""
KEY_TOKEN_BYTES = 32
"""Random bytes in a key (256 bits)."""
ANONYMOUS = "anonymous"
"""Owner name of every job submitted while auth is off (no key can take it)."""

RESERVED_NAMES = frozenset({ANONYMOUS})
"""Names no key may take: ``anonymous`` owns the jobs submitted while auth was off."""
KEY_LIMITS: dict[str, type] = {
    "max_active_jobs": int,
    "max_active_high_jobs": int,
    "max_problem_mb": float,
    "max_running_jobs": int,
}
"""The limits a key may carry of its own (each overrides the setting of the same meaning)."""

_NAME = re.compile(r"[A-Za-z0-9][A-Za-z0-9_.@-]{0,63}")
# Generous bounds so a longer key format later still looks up; anything else
# is refused before it is hashed or sent to Redis.
_KEY = re.compile(re.escape(KEY_PREFIX) + r"[A-Za-z0-9_-]{32,128}")


class KeyNameError(ValueError):
    """Raised by :meth:`KeyStore.add` for a malformed, reserved or already used name."""


@dataclass(frozen=True)
class ApiKey:
    """What a key is: its owner name, whether it sees every job, when it was made, its own limits."""

    name: str
    admin: bool = False
    created_at: str | None = None
    limits: dict[str, float] = field(default_factory=dict)


def new_key() -> str:
    """A fresh random key (``fxq_`` + 43 URL-safe characters)."""
    return KEY_PREFIX + secrets.token_urlsafe(KEY_TOKEN_BYTES)


def key_digest(key: str) -> str:
    """SHA-256 of a key, hex: what Redis stores in its place (see the module docstring)."""
    return hashlib.sha256(key.encode("utf-8")).hexdigest()


def looks_like_key(text: str) -> bool:
    """True when ``text`` has the shape of a fixq key (it may still be unknown or revoked)."""
    return _KEY.fullmatch(text) is not None




# KEYS 1 name index, 2 record.  ARGV 1 name, 2 digest, 3.. field/value pairs.
_ADD = """
if redis.call('HEXISTS', KEYS[1], ARGV[1]) == 1 then return 0 end
redis.call('HSET', KEYS[1], ARGV[1], ARGV[2])
redis.call('HSET', KEYS[2], unpack(ARGV, 3))
return 1
"""

# KEYS 1 name index, 2 record.  ARGV 1 name, 2 digest the caller read for the name.
_REVOKE = """
if redis.call('HGET', KEYS[1], ARGV[1]) ~= ARGV[2] then return 0 end
redis.call('HDEL', KEYS[1], ARGV[1])
redis.call('DEL', KEYS[2])
return 1
"""


class KeyStore:
    """The API keys of one fixq installation (``redis`` in bytes or text mode)."""

    def __init__(self, redis_client: redis.Redis, prefix: str = "fixq") -> None:
        self.redis = redis_client
        self.prefix = prefix
        self.index = f"{prefix}:apikeys"
        self._add = redis_client.register_script(_ADD)
        self._revoke = redis_client.register_script(_REVOKE)

    def record_key(self, digest: str) -> str:
        """The Redis hash holding the record of the key with SHA-256 ``digest``."""
        return f"{self.prefix}:apikey:{digest}"

    def add(self, name: str, *, admin: bool = False, limits: dict[str, float] | None = None) -> str:
        """Make a key for ``name`` and return it; only its digest is stored.

        Raises
        ------
        KeyNameError
            ``name`` is malformed, reserved, or already has a key (revoke it first).
        ValueError
            ``limits`` names an unknown limit or a negative value.
        """
        if _NAME.fullmatch(name) is None:
            raise KeyNameError(
                f"key name {name!r} is not allowed: 1 to 64 characters, ASCII letters (A-Z, a-z), digits and _ . @ -, "
                "starting with a letter or digit (a name such as Müller is refused: write it in ASCII)"
            )
        if name in RESERVED_NAMES:
            raise KeyNameError(f"key name {name!r} is reserved (it owns the jobs submitted while auth was off)")
        created_at = iso_utc(timespec="seconds")
        fields: dict[str, str] = {"name": name, "admin": "1" if admin else "0", "created_at": created_at}
        for limit, value in (limits or {}).items():
            if limit not in KEY_LIMITS:
                raise ValueError(f"unknown key limit {limit!r}; expected one of {', '.join(KEY_LIMITS)}")
            if value is None:
                continue
            if value < 0:
                raise ValueError(f"key limit {limit} must not be negative, not {value}")
            fields[limit] = repr(KEY_LIMITS[limit](value))
        key = new_key()
        digest = key_digest(key)
        fields["digest"] = digest
        created = self._add(
            keys=[self.index, self.record_key(digest)],
            args=[name, digest, *(item for pair in fields.items() for item in pair)],
        )
        if not created:
            raise KeyNameError(f"there is a key named {name!r} already; revoke it first (fixq keys revoke {name})")
        return key

    def authenticate(self, key: str) -> ApiKey | None:
        """The record of a valid key, or None (malformed, unknown or revoked)."""
        if not looks_like_key(key):
            return None
        digest = key_digest(key)
        raw = self.redis.hgetall(self.record_key(digest))
        if not raw:
            return None
        fields = _text(raw)
        if not hmac.compare_digest(fields.get("digest", ""), digest):
            return None
        return _api_key(fields)

    def get(self, name: str) -> ApiKey | None:
        """The record of the key named ``name``, or None."""
        digest = self.redis.hget(self.index, name)
        if digest is None:
            return None
        raw = self.redis.hgetall(self.record_key(_str(digest)))
        return _api_key(_text(raw)) if raw else None

    def list_keys(self) -> list[ApiKey]:
        """Every key's record (never the key or its digest), by name."""
        digests = {_str(name): _str(digest) for name, digest in self.redis.hgetall(self.index).items()}
        names = sorted(digests)
        with self.redis.pipeline(transaction=False) as pipe:
            for name in names:
                pipe.hgetall(self.record_key(digests[name]))
            rows = pipe.execute()
        return [_api_key(_text(row)) if row else ApiKey(name) for name, row in zip(names, rows)]

    def revoke(self, name: str) -> bool:
        """Delete the key named ``name`` (its next request is refused); False if there was none."""
        digest = self.redis.hget(self.index, name)
        if digest is None:
            return False
        digest_text = _str(digest)
        return bool(self._revoke(keys=[self.index, self.record_key(digest_text)], args=[name, digest_text]))


def _str(value: bytes | str) -> str:
    return value.decode() if isinstance(value, bytes) else value


def _text(raw: dict[bytes, bytes] | dict[str, str]) -> dict[str, str]:
    return {_str(name): _str(value) for name, value in raw.items()}


def _api_key(fields: dict[str, str]) -> ApiKey:
    limits = {name: kind(fields[name]) for name, kind in KEY_LIMITS.items() if fields.get(name)}
    return ApiKey(
        name=fields.get("name", ""),
        admin=fields.get("admin") == "1",
        created_at=fields.get("created_at"),
        limits=limits,
    )
