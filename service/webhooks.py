"""Webhooks: a signed ``POST`` to a submission's ``notify.url`` when its job finishes.

Who may be called
-----------------
:func:`check_target` runs at the door (``POST /v1/jobs`` and ``/v1/sweeps``,
error path ``notify.url``) and again before every delivery attempt, so that a
name that resolved to a public address at submission and to an internal one
later (DNS rebinding) is still refused.  A target must

* be ``http://`` or ``https://`` with a host and no user name or password;
* match ``notify_allow_hosts`` (comma-separated): an exact host name
  (``hooks.lab.example``), a suffix with a leading dot (``.lab.example``
  matches ``a.lab.example``, not ``lab.example``; ``*.lab.example`` is the
  same), or IP addresses / CIDR blocks (``192.0.2.0/24``), which admit an IP
  literal inside them or a host name all of whose addresses lie inside them.
  The setting is empty by default: then every webhook is refused;
* resolve, and none of its addresses may be loopback, private or otherwise not
  globally routable, unless ``notify_allow_private`` is on; link-local
  (169.254/16 and fe80::/10, where cloud metadata services live), the known
  metadata addresses, multicast, unspecified, "this network" (0/8) and
  reserved addresses are refused even then.  IPv4 addresses inside IPv6
  (``::ffff:a.b.c.d``, 6to4 ``2002::/16``, and both the server's and the
  client's address of Teredo ``2001::/32``) are judged by the IPv4 address.

A delivery connects to the address that was checked (the host name travels
in ``Host`` and, for https, in TLS SNI and certificate checks), so the check
and the connection cannot see two different answers from DNS.  Redirects are
not followed (a 3xx answer is a failed attempt); proxies from the environment
are not used; the answer's body is never read.

The request
-----------
::

    POST {notify.url}
    Content-Type: application/json
    User-Agent: fixq-webhooks/1
    Fixq-Event: job.finished
    Fixq-Delivery: {job id}        the same on every attempt: drop repeats by it
    Fixq-Attempt: {1, 2, ...}
    Fixq-Timestamp: {T}            Unix time in whole seconds of this attempt
    Fixq-Signature: sha256={hex}   only when notify.secret is set

    {"event": "job.finished", "job": {the job record}, "timestamp": T}

The body is compact UTF-8 JSON; ``job`` is the record of ``GET
/v1/jobs/{id}`` at the moment the job finished (``state`` done, failed or
canceled).  The signature is::

    hex(HMAC-SHA256(key = secret as UTF-8, message = f"{T}." as ASCII + body bytes))

To verify, recompute it over the raw body bytes exactly as received, compare
with ``hmac.compare_digest``, and refuse timestamps far from your clock (five
minutes is common practice) so that a captured request cannot be replayed
later.  :func:`verify` does that.  Delivery is at least once: a receiver
that answers slowly or crashes may see the same ``Fixq-Delivery`` again.
A sweep's ``sweep.finished`` (``service.sweeps.notify``) is sent the same
way, with ``Fixq-Delivery: sweep:{id}`` and ``"sweep"`` in place of ``"job"``.

Delivery
--------
:func:`schedule` is called once a job has reached a terminal state
(``service.lifecycle``).  It reads ``notify`` from the stored document and
writes the delivery ``fixq:notify:{job id}`` (a hash, kept ``result_ttl_s``)
with its due time in the zset ``fixq:notify:due``: that zset, not an RQ
queue, is the delivery queue, because RQ 3.0 schedules delayed retries only
in workers started with its scheduler.  Each worker process is to run one
:class:`service.notifier.Notifier` thread beside its reaper (started in
``service.task.run_worker``; any number may run).  A notifier claims due
deliveries (a Lua script moves the due time ahead by :data:`CLAIM_S`, so a
delivery whose notifier died becomes due again) and makes one attempt each,
a few at once with a small cap per target (``notify_workers``,
``notify_per_target``); on a connection error, a timeout or a non-2xx answer
it schedules the next attempt ``notify_retry_delays_s[n - 1]`` seconds
later, up to ``notify_max_attempts`` attempts.  A target refused by
:func:`check_target` at delivery is not retried.  Deliveries never run on the
solve path: the worker's executions only write the Redis entry.
"""

from __future__ import annotations

import hashlib
import hmac
import ipaddress
import logging
import socket
import time
import urllib.parse
import zlib
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import orjson

from service._formats import iso_utc
from service.webhook_post import post
from worker.errors import InvalidDocument

if TYPE_CHECKING:
    from service.settings import Settings
    from service.store import JobStore

__all__ = [
    "CLAIM_S",
    "EVENT",
    "METADATA_ADDRESSES",
    "SIGNATURE_TOLERANCE_S",
    "Target",
    "address_refusal",
    "check_target",
    "claim_due",
    "defer",
    "deliver",
    "deliver_due",
    "delivery_status",
    "queue_delivery",
    "resolve_host",
    "schedule",
    "sign",
    "target_of",
    "verify",
]

EVENT = "job.finished"
"""The ``event`` of a job's notification (a sweep's: ``service.sweeps.notify``)."""
USER_AGENT = "fixq-webhooks/1"
"""The ``User-Agent`` of every delivery."""
SIGNATURE_TOLERANCE_S = 300
"""Default largest age (and clock skew), in seconds, that :func:`verify` accepts (common practice)."""
CLAIM_S = 120.0
"""Seconds a notifier owns a claimed delivery before another may take it; more than one
attempt can take (connect, send and answer each bounded by ``notify_timeout_s``)."""
DUE_BATCH = 100
"""Most deliveries one :func:`deliver_due` call attempts (count)."""

ADDRESS = ipaddress.IPv4Address | ipaddress.IPv6Address

METADATA_ADDRESSES: frozenset[ADDRESS] = frozenset(
    ipaddress.ip_address(a) for a in ("169.254.169.254", "169.254.170.2", "fd00:ec2::254", "100.100.100.200")
)
"""Cloud instance-metadata services, refused whatever the settings say."""
_THIS_NETWORK = ipaddress.ip_network("0.0.0.0/8")

logger = logging.getLogger("fixq.webhooks")


def resolve_host(host: str, port: int) -> list[ADDRESS]:
    """The addresses ``host`` resolves to (an IP literal is its own), in resolver order."""
    try:
        return [ipaddress.ip_address(host)]
    except ValueError:
        pass
    infos = socket.getaddrinfo(host, port, type=socket.SOCK_STREAM)
    addresses: list[ADDRESS] = []
    for _, _, _, _, sockaddr in infos:
        address = ipaddress.ip_address(str(sockaddr[0]).split("%", 1)[0])
        if address not in addresses:
            addresses.append(address)
    return addresses


def address_refusal(address: ADDRESS, *, allow_private: bool = False) -> str | None:
    """Why a webhook may not be sent to ``address`` (None: it may)."""
    if isinstance(address, ipaddress.IPv6Address):
        embedded = address.ipv4_mapped or address.sixtofour
        if embedded is not None:
            return address_refusal(embedded, allow_private=allow_private)
        # Teredo (2001::/32) carries the server's IPv4 address and the
        # client's (inverted); traffic to it may reach either, so both are
        # judged, and then the IPv6 address itself.
        for inner in address.teredo or ():
            reason = address_refusal(inner, allow_private=allow_private)
            if reason is not None:
                return f"{reason} (inside the Teredo address {address})"
    if address in METADATA_ADDRESSES:
        return "a cloud metadata address"
    if address.is_unspecified:
        return "the unspecified address"
    if address.is_multicast:
        return "a multicast address"
    if address.is_link_local:
        return "link-local (the range of cloud metadata services)"
    if isinstance(address, ipaddress.IPv4Address) and address in _THIS_NETWORK:
        return 'in 0.0.0.0/8 ("this network")'
    if address.is_loopback:
        return None if allow_private else "loopback"
    if address.is_reserved:
        return "reserved"
    if address.is_private:
        return None if allow_private else "private"
    if not address.is_global:
        return None if allow_private else "not globally routable"
    return None


@dataclass(frozen=True)
class Target:
    """A checked webhook URL: its host, port and the addresses a delivery may connect to."""

    url: str
    host: str
    port: int
    addresses: tuple[ADDRESS, ...]


@dataclass(frozen=True)
class _Allowlist:
    names: frozenset[str]
    suffixes: tuple[str, ...]
    networks: tuple[ipaddress.IPv4Network | ipaddress.IPv6Network, ...]

    @classmethod
    def parse(cls, text: str) -> _Allowlist:
        names: set[str] = set()
        suffixes: list[str] = []
        networks = []
        for entry in (part.strip().lower().rstrip(".") for part in text.split(",")):
            if not entry:
                continue
            try:
                networks.append(ipaddress.ip_network(entry, strict=False))
                continue
            except ValueError:
                pass
            if entry.startswith("*."):
                entry = entry[1:]
            if entry.startswith("."):
                suffixes.append(entry)
            else:
                names.add(entry)
        return cls(frozenset(names), tuple(suffixes), tuple(networks))

    def __bool__(self) -> bool:
        return bool(self.names or self.suffixes or self.networks)

    def admits_name(self, host: str) -> bool:
        return host in self.names or any(host.endswith(suffix) for suffix in self.suffixes)

    def admits_addresses(self, addresses: Sequence[ADDRESS]) -> bool:
        return bool(addresses) and all(any(a in network for network in self.networks) for a in addresses)


def check_target(url: str, settings: Settings, *, path: str = "notify.url") -> Target:
    """Check that a webhook may be sent to ``url`` (see the module docstring).

    Raises ``InvalidDocument`` at ``path`` saying why not.  Resolves the host
    name (with the system resolver, which may block for its own timeout).
    """

    def refuse(message: str) -> InvalidDocument:
        return InvalidDocument.at(path, message)

    parts = urllib.parse.urlsplit(url) if isinstance(url, str) else None
    if parts is None or parts.scheme not in ("http", "https") or not parts.hostname:
        raise refuse("expected an http:// or https:// URL with a host name")
    if parts.username is not None or parts.password is not None:
        raise refuse("a webhook URL may not carry a user name or password; sign with notify.secret instead")
    try:
        port = parts.port or (443 if parts.scheme == "https" else 80)
    except ValueError:
        raise refuse("the URL's port is not a number from 0 to 65535") from None
    host = parts.hostname.rstrip(".")
    allowlist = _Allowlist.parse(settings.notify_allow_hosts)
    if not allowlist:
        raise refuse(
            "webhooks are not enabled on this server: its allowlist notify_allow_hosts is empty "
            "(an administrator sets FIXQ_NOTIFY_ALLOW_HOSTS to the hosts that may receive them)"
        )
    unlisted = refuse(f"the host {host!r} is not on this server's allowlist for webhooks (notify_allow_hosts)")
    by_name = allowlist.admits_name(host)
    if not by_name and not allowlist.networks:
        raise unlisted  # without resolving: the door must not look up arbitrary names
    try:
        addresses = resolve_host(host, port)
    except (OSError, UnicodeError) as exc:
        raise refuse(f"the host {host!r} does not resolve ({exc})") from None
    if not addresses:
        raise refuse(f"the host {host!r} does not resolve to any address")
    if not (by_name or allowlist.admits_addresses(addresses)):
        raise unlisted
    for address in addresses:
        reason = address_refusal(address, allow_private=settings.notify_allow_private)
        if reason is not None:
            shown = host if str(address) == host else f"{host!r} resolves to {address}, which"
            raise refuse(f"{shown} is {reason}; webhooks are not sent to such addresses")
    return Target(url, host, port, tuple(addresses))


def sign(secret: str, timestamp: int, body: bytes) -> str:
    """The ``Fixq-Signature`` header value of ``body`` sent at ``timestamp``."""
    message = f"{int(timestamp)}.".encode("ascii") + body
    return "sha256=" + hmac.new(secret.encode("utf-8"), message, hashlib.sha256).hexdigest()


def verify(
    secret: str,
    timestamp: str | int,
    signature: str,
    body: bytes,
    *,
    tolerance_s: float = SIGNATURE_TOLERANCE_S,
    now: float | None = None,
) -> bool:
    """True when ``signature`` signs ``body`` at ``timestamp`` with ``secret`` and the timestamp is recent."""
    try:
        sent = int(timestamp)
    except (TypeError, ValueError):
        return False
    if abs((time.time() if now is None else now) - sent) > tolerance_s:
        return False
    return hmac.compare_digest(sign(secret, sent, body), signature)


def _key(store: JobStore, job_id: str) -> str:
    return store.key("notify", job_id)


def _due_key(store: JobStore) -> str:
    return store.key("notify", "due")


# KEYS 1 delivery hash, 2 due zset.  ARGV 1 job id, 2 due ms, 3 ttl s, 4.. field/value pairs.
_SCHEDULE = """
if redis.call('EXISTS', KEYS[1]) == 1 then return 0 end
redis.call('HSET', KEYS[1], unpack(ARGV, 4))
redis.call('EXPIRE', KEYS[1], ARGV[3])
redis.call('ZADD', KEYS[2], ARGV[2], ARGV[1])
return 1
"""

# KEYS 1 due zset.  ARGV 1 now ms, 2 claim ms.
_CLAIM = """
local due = redis.call('ZRANGEBYSCORE', KEYS[1], '-inf', ARGV[1], 'LIMIT', 0, 1)
if #due == 0 then return false end
redis.call('ZADD', KEYS[1], tonumber(ARGV[1]) + tonumber(ARGV[2]), due[1])
return due[1]
"""


def schedule(store: JobStore, job_id: str) -> bool:
    """Queue the notification of a finished job whose document asks for one; True if queued.

    Idempotent: a job is notified at most once however often this is called.
    """
    blob = store.redis.get(store.keys.doc(job_id))
    text = zlib.decompress(blob) if blob is not None else b""
    if b'"notify"' not in text:
        return False  # most jobs: no need to parse a possibly large document
    document = orjson.loads(text)
    notify = document.get("notify") if isinstance(document, dict) else None
    if not isinstance(notify, dict) or not isinstance(notify.get("url"), str):
        return False
    record = store.get_job(job_id)
    return record is not None and queue_delivery(store, job_id, notify, EVENT, "job", record)


def queue_delivery(store: JobStore, delivery: str, notify: dict[str, Any], event: str, subject: str,
                   payload: dict[str, Any]) -> bool:
    """Queue the delivery ``delivery`` (its ``Fixq-Delivery``) of ``{"event": event, subject: payload}`` to
    ``notify`` (``url``, ``secret``), due now; True if queued, False if it exists already (one Lua script)."""
    fields = {"url": notify["url"], "secret": notify.get("secret") or "", "event": event, "subject": subject,
              subject: orjson.dumps(payload).decode(), "state": "pending", "attempts": "0", "scheduled_at": iso_utc()}
    script = store.redis.register_script(_SCHEDULE)
    queued = script(
        keys=[_key(store, delivery), _due_key(store)],
        args=[delivery, int(time.time() * 1000), store.settings.result_ttl_s,
              *(item for pair in fields.items() for item in pair)],
    )  # fmt: skip
    return bool(queued)


def delivery_status(store: JobStore, job_id: str) -> dict[str, Any] | None:
    """A delivery's ``state`` (pending, delivered, failed, refused), ``attempts``,
    ``last_status``, ``last_error``, ``next_attempt_at`` and times; None if there is none."""
    raw = store.redis.hgetall(_key(store, job_id))
    if not raw:
        return None
    fields = {k.decode(): v.decode() for k, v in raw.items()}
    due = store.redis.zscore(_due_key(store), job_id)
    return {
        "job": job_id,
        "url": fields.get("url"),
        "state": fields.get("state"),
        "attempts": int(fields.get("attempts") or 0),
        "last_status": int(fields["last_status"]) if fields.get("last_status") else None,
        "last_error": fields.get("last_error") or None,
        "scheduled_at": fields.get("scheduled_at"),
        "delivered_at": fields.get("delivered_at"),
        "next_attempt_at": iso_utc(due / 1000) if due is not None and fields.get("state") == "pending" else None,
    }


def deliver_due(store: JobStore, *, limit: int = DUE_BATCH) -> int:
    """Claim and attempt up to ``limit`` due deliveries one after another; how many were attempted."""
    attempted = 0
    while attempted < limit:
        job_id = claim_due(store)
        if job_id is None:
            break
        deliver(store, job_id)
        attempted += 1
    return attempted


def claim_due(store: JobStore) -> str | None:
    """Claim the earliest due delivery for :data:`CLAIM_S` seconds; its job id (None: nothing is due)."""
    claim = store.redis.register_script(_CLAIM)
    member = claim(keys=[_due_key(store)], args=[int(time.time() * 1000), int(CLAIM_S * 1000)])
    return None if member is None else member.decode()


def defer(store: JobStore, job_id: str, delay_s: float) -> None:
    """Make a claimed, unattempted delivery due again ``delay_s`` seconds from now."""
    store.redis.zadd(_due_key(store), {job_id: int((time.time() + delay_s) * 1000)}, xx=True)


def target_of(store: JobStore, job_id: str) -> str:
    """The target (``host:port``) a delivery goes to; a malformed URL is a target of its own."""
    url = store.redis.hget(_key(store, job_id), "url")
    text = url.decode(errors="replace") if url else ""
    try:
        parts = urllib.parse.urlsplit(text)
        return f"{(parts.hostname or '').lower()}:{parts.port or parts.scheme}"
    except ValueError:
        return text


def deliver(store: JobStore, job_id: str, *, now: Callable[[], float] = time.time) -> str:
    """Make one attempt at a claimed delivery and record it.

    Returns ``"delivered"``, ``"retry"`` (scheduled again), ``"failed"``
    (``notify_max_attempts`` used up), ``"refused"`` (the target no longer
    passes :func:`check_target`) or ``"missing"``.
    """
    settings = store.settings
    key, due = _key(store, job_id), _due_key(store)
    raw = store.redis.hgetall(key)
    fields = {k.decode(): v.decode() for k, v in raw.items()}
    if not fields or fields.get("state") != "pending":
        store.redis.zrem(due, job_id)
        return "missing"
    attempt = int(fields.get("attempts") or 0) + 1
    timestamp = int(now())
    event, subject = fields.get("event") or EVENT, fields.get("subject") or "job"
    body = orjson.dumps({"event": event, subject: orjson.loads(fields[subject]), "timestamp": timestamp})
    headers = {
        "Content-Type": "application/json",
        "User-Agent": USER_AGENT,
        "Fixq-Event": event,
        "Fixq-Delivery": job_id,
        "Fixq-Attempt": str(attempt),
        "Fixq-Timestamp": str(timestamp),
    }
    if fields.get("secret"):
        headers["Fixq-Signature"] = sign(fields["secret"], timestamp, body)
    try:
        target = check_target(fields["url"], settings)
    except InvalidDocument as exc:
        logger.warning("webhook %s refused at delivery: %s", job_id, exc.detail)
        _record(store, job_id, {"state": "refused", "attempts": attempt, "last_error": exc.errors[0]["message"]})
        return "refused"
    status, error = post(target.url, target.host, target.port, target.addresses, body, headers,
                         settings.notify_timeout_s)
    if status is not None and 200 <= status < 300:
        _record(store, job_id, {"state": "delivered", "attempts": attempt, "last_status": status,
                                "last_error": "", "delivered_at": iso_utc()})  # fmt: skip
        return "delivered"
    update: dict[str, Any] = {"attempts": attempt, "last_status": status if status is not None else "",
                              "last_error": error or f"the receiver answered {status}"}  # fmt: skip
    if attempt >= settings.notify_max_attempts:
        logger.warning("webhook %s given up after %d attempts: %s", job_id, attempt, update["last_error"])
        _record(store, job_id, {**update, "state": "failed"})
        return "failed"
    delays = settings.notify_retry_delays_s
    delay_s = delays[min(attempt, len(delays)) - 1]
    _record(store, job_id, update, due_ms=int((now() + delay_s) * 1000))
    return "retry"


def _record(store: JobStore, job_id: str, fields: dict[str, Any], *, due_ms: int | None = None) -> None:
    with store.redis.pipeline(transaction=True) as pipe:
        pipe.hset(_key(store, job_id), mapping={k: str(v) for k, v in fields.items()})
        if due_ms is None:
            pipe.zrem(_due_key(store), job_id)
        else:
            pipe.zadd(_due_key(store), {job_id: due_ms})
        pipe.execute()
