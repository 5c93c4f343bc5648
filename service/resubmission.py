"""Resubmission without waste: ``Idempotency-Key``, and reuse of identical solves.

Idempotency keys
----------------
A client that resends ``POST /v1/jobs`` with the same ``Idempotency-Key``
(after a timeout, a crash, a retry loop) gets the job its first request made:

* same key, same body (equal as JSON) → that job's record, ``202`` with
  ``Idempotent-Replayed: true``; nothing new is queued;
* same key, another body → ``422`` naming the ``Idempotency-Key`` header;
* a second request while the first is still being admitted waits up to
  :data:`IDEMPOTENCY_WAIT_S` for it, then answers ``409``.

Keys are per owner and remembered ``idempotency_ttl_s``.  A request *claims*
its key (``SET NX`` of a pending marker) before it admits the document; the
marker already names the id the job will be created with
(:attr:`IdempotencyClaim.job_id`) and when it was claimed.  The request turns
the claim into the bare job id once the job exists, and drops it if the
document is refused, so a refused body does not burn the key.  An API that
dies between creating the job and that last step leaves a marker naming a
job that exists: a retry answers that job, so a crash never makes a second
job.  A marker whose job does not exist :data:`CLAIM_S` after the claim
belongs to a request that died before creating it, and a retry takes the
key over.

Reuse of identical solves
-------------------------
Nightly pipelines resubmit the same document whenever nothing upstream
changed.  Before it queues anything, ``POST /v1/jobs`` looks for a ``done``
job of the *same owner* whose document has the same
``worker.document.document_hash`` (the validated problem; label, tags,
priority and notify left out) and whose result is still stored.  If there
is one, the new job is created already ``done``:

* it is a job of its own — its id, label, tags and owner, listed and shown
  like any other — with ``reused: true`` and ``reused_from`` naming the job
  whose result it carries (answered ``201``, not ``202``: nothing is pending);
* its result and convergence log are server-side copies (Redis ``COPY``) of
  that job's, the result kept ``result_ttl_s`` from now and the log, like the
  record and the document, ``job_ttl_s``; nothing travels through the API;
* it never reaches a queue, so it costs no worker time and takes no slot of
  the owner's ``max_active_jobs``.

A result is reused only when it is a function of the document alone: status
``converged`` or ``max_iterations``, not ``time_limit`` (how far a timed-out
solve got depends on the machine's load).  ``?fresh=true`` skips the lookup.

A document that differs from a solved one only in its starting values
(``solver.initial``) is answered from it too, when that job ``converged``: the
fixed point does not depend on where the iteration starts.  Such twins share
:func:`start_free_hash`, the hash of the canonical document without
``solver.initial``.  A model with a finite horizon has none: there
``solver.initial`` is the value after the last period, part of the problem.

Keys in Redis (prefix ``fixq``)
-------------------------------
=======================================  ======  ===============================
``fixq:idempotency:{owner}:{sha256}``    string  ``pending:{job id}:{unix s}``
                                                 while a request is admitted,
                                                 then the job id (TTL
                                                 ``idempotency_ttl_s``)
``fixq:solved:{owner}:{document_hash}``  list    the newest :data:`REUSE_CANDIDATES`
                                                 job ids submitted with that
                                                 hash, kept ``result_ttl_s +
                                                 job_timeout_s`` after the latest
``fixq:solved:{owner}:start:{hash}``     list    the same, by :func:`start_free_hash`
=======================================  ======  ===============================
"""

from __future__ import annotations

import hashlib
import secrets
import time
from dataclasses import dataclass
from typing import Any

import orjson
import redis

from service import queue as rq_queues
from service._formats import iso_utc
from service.problems import Problem
from service.store import JobStore
from service.store.execution import RESULT_AXES_FIELD
from worker.document import DEFAULT_PRIORITY, ProblemDocument
from worker.document.canonical import canonical_json

__all__ = [
    "CLAIM_S",
    "IDEMPOTENCY_WAIT_S",
    "REUSABLE_STATUSES",
    "REUSE_CANDIDATES",
    "IdempotencyClaim",
    "IdempotencyKeys",
    "SolvedJobs",
    "start_free_hash",
    "with_reuse_fields",
]

CLAIM_S = 60
"""Seconds after which a pending claim whose job was never created may be taken over (an API that died
before creating it)."""
IDEMPOTENCY_WAIT_S = 5.0
"""Seconds a request waits for a concurrent one with the same key to create its job, before 409."""
IDEMPOTENCY_POLL_S = 0.02
"""Seconds between two looks at a pending idempotency key."""
REUSE_CANDIDATES = 8
"""Job ids remembered per (owner, document hash), newest first (count)."""
REUSABLE_STATUSES = frozenset({"converged", "max_iterations"})
"""Result statuses that depend on the document alone, so a resubmission may reuse them."""

HEADER_PATH = "header.Idempotency-Key"
"""Error path naming the header (the ``{path, message}`` of a 422)."""
_PENDING = b"pending:"

# KEYS 1 idempotency key.  ARGV 1 expected value, 2 new value ('' = delete), 3 ttl s.
_SWAP = """
if redis.call('GET', KEYS[1]) ~= ARGV[1] then return 0 end
if ARGV[2] == '' then return redis.call('DEL', KEYS[1]) end
redis.call('SET', KEYS[1], ARGV[2], 'EX', ARGV[3])
return 1
"""

# KEYS 1..5 the state sets (queued, running, done, failed, canceled), 6 new job
# hash, 7 new result, 8 earlier result, 9 new log, 10 earlier log, 11 new document.
# ARGV 1 new id, 2 result ttl s, 3 job ttl s, 4.. field/value pairs.
_MARK_REUSED = """
if redis.call('HGET', KEYS[6], 'state') ~= 'queued' then return 0 end
if redis.call('EXISTS', KEYS[8]) == 0 then return 0 end
redis.call('COPY', KEYS[8], KEYS[7], 'REPLACE')
redis.call('EXPIRE', KEYS[7], ARGV[2])
if redis.call('EXISTS', KEYS[10]) == 1 then
  redis.call('COPY', KEYS[10], KEYS[9], 'REPLACE')
  redis.call('EXPIRE', KEYS[9], ARGV[3])
end
redis.call('HSET', KEYS[6], unpack(ARGV, 4))
redis.call('EXPIRE', KEYS[6], ARGV[3])
redis.call('EXPIRE', KEYS[11], ARGV[3])
redis.call('SREM', KEYS[1], ARGV[1])
redis.call('SADD', KEYS[3], ARGV[1])
redis.call('HSET', KEYS[6], 'state', 'done')
return 1
"""

_COPIED_FIELDS = ("status", "iterations", "error_bound", "search", "progress", "log_dropped", RESULT_AXES_FIELD)
"""The earlier record's fields a reused job copies (its result's axes summary too, so a warm start from the reused
job is checked at the door as from the earlier one)."""


@dataclass(frozen=True)
class IdempotencyClaim:
    """A request's hold on an idempotency key until its job exists."""

    redis_key: str
    marker: bytes
    job_id: str
    """The id the request must create its job with (``JobStore.create_job(job_id=...)``)."""


class IdempotencyKeys:
    """The ``Idempotency-Key`` of ``POST /v1/jobs`` (see the module docstring)."""

    def __init__(self, store: JobStore) -> None:
        self.store = store
        self._swap = store.redis.register_script(_SWAP)

    def redis_key(self, owner: str, key: str) -> str:
        return self.store.key("idempotency", owner, hashlib.sha256(key.encode("utf-8")).hexdigest())

    def begin(self, owner: str, key: str, raw_document: dict[str, Any]) -> dict[str, Any] | IdempotencyClaim:
        """The job record ``key`` already names (same body), or a claim on a fresh key.

        Raises the 422 :class:`Problem` when the key names a job made from
        another body, and 409 when a concurrent request holds it longer than
        :data:`IDEMPOTENCY_WAIT_S`.
        """
        redis_key = self.redis_key(owner, key)
        job_id = secrets.token_hex(8)
        marker = b"%s%s:%d" % (_PENDING, job_id.encode(), int(time.time()))
        claim = IdempotencyClaim(redis_key, marker, job_id)
        ttl_s = self.store.settings.idempotency_ttl_s
        deadline = time.monotonic() + IDEMPOTENCY_WAIT_S
        redis = self.store.redis
        while True:
            if redis.set(redis_key, marker, nx=True, ex=ttl_s):
                return claim
            value = redis.get(redis_key)
            if value is not None and not value.startswith(_PENDING):
                record = self._replay(key, value.decode(), raw_document)
                if record is not None:
                    return record
                # The key named a job that no longer exists: take the key over.
                if self._swap(keys=[redis_key], args=[value, marker, ttl_s]):
                    return claim
            elif value is not None:
                pending_job, claimed_at = _pending(value)
                record = self._replay(key, pending_job, raw_document)
                if record is not None:
                    # Its request created the job and died before naming it here.
                    self._swap(keys=[redis_key], args=[value, pending_job, ttl_s])
                    return record
                if time.time() - claimed_at > CLAIM_S and self._swap(keys=[redis_key], args=[value, marker, ttl_s]):
                    return claim
            if time.monotonic() >= deadline:
                raise Problem(
                    409,
                    "idempotency-key-in-use",
                    f"another request with Idempotency-Key {key!r} is still being handled; retry in a moment",
                    title="idempotency key in use",
                    errors=[{"path": HEADER_PATH, "message": "a request with this key is in progress"}],
                    headers={"Retry-After": "1"},
                )
            time.sleep(IDEMPOTENCY_POLL_S)

    def _replay(self, key: str, job_id: str, raw_document: dict[str, Any]) -> dict[str, Any] | None:
        record = self.store.get_job(job_id)
        if record is None:
            return None
        if self.store.get_document(job_id) != raw_document:
            message = (
                f"Idempotency-Key {key!r} was used for job {job_id} with a different body; send that body "
                "again to get that job, or use a new key for a new job"
            )
            raise Problem(
                422,
                "idempotency-key-reused",
                message,
                title="idempotency key reused with another body",
                errors=[{"path": HEADER_PATH, "message": message}],
                job=job_id,
            )
        return record

    def complete(self, claim: IdempotencyClaim, job_id: str) -> None:
        """Make the key name ``job_id`` for ``idempotency_ttl_s``."""
        self._swap(keys=[claim.redis_key], args=[claim.marker, job_id, self.store.settings.idempotency_ttl_s])

    def abandon(self, claim: IdempotencyClaim) -> None:
        """Free the key (the request created no job), or name the job if it was created and lives on."""
        state = self.store.redis.hget(self.store.keys.job(claim.job_id), "state")
        if state is not None and state != b"canceled":
            # The request failed after creating its job: a retry must get that job, not a second one.
            self.complete(claim, claim.job_id)
            return
        self._swap(keys=[claim.redis_key], args=[claim.marker, "", 0])


def _pending(marker: bytes) -> tuple[str, float]:
    """(job id, unix seconds of the claim) of a pending marker."""
    job_id, _, claimed_at = marker[len(_PENDING) :].decode().partition(":")
    try:
        return job_id, float(claimed_at)
    except ValueError:
        return job_id, 0.0


class SolvedJobs:
    """Finds an owner's solved twin of a document and makes reused jobs from it."""

    def __init__(self, store: JobStore) -> None:
        self.store = store
        self._mark_reused = store.redis.register_script(_MARK_REUSED)

    def index_key(self, owner: str, document_hash: str) -> str:
        return self.store.key("solved", owner, document_hash)

    def start_free_key(self, owner: str, start_free: str) -> str:
        return self.store.key("solved", owner, "start", start_free)

    def remember_start_free(self, owner: str, start_free: str | None, job_id: str) -> None:
        """Note that ``owner`` submitted ``job_id`` with this :func:`start_free_hash` (None: nothing to note)."""
        if start_free is not None:
            self._remember(self.start_free_key(owner, start_free), job_id)

    def find_start_free(self, owner: str, start_free: str | None) -> str | None:
        """The newest ``converged`` job of ``owner`` with this :func:`start_free_hash` and a stored result."""
        if start_free is None:
            return None
        return self._find(self.start_free_key(owner, start_free), owner, None, frozenset({"converged"}))

    def remember(self, owner: str, document_hash: str, job_id: str) -> None:
        """Note that ``owner`` submitted ``job_id`` with ``document_hash``."""
        self._remember(self.index_key(owner, document_hash), job_id)

    def _remember(self, key: str, job_id: str) -> None:
        settings = self.store.settings
        with self.store.redis.pipeline(transaction=True) as pipe:
            pipe.lpush(key, job_id)
            pipe.ltrim(key, 0, REUSE_CANDIDATES - 1)
            pipe.expire(key, settings.result_ttl_s + settings.job_timeout_s)
            pipe.execute()

    def find(self, owner: str, document_hash: str) -> str | None:
        """The newest ``done`` job of ``owner`` with this hash, a reusable status and a stored result."""
        return self._find(self.index_key(owner, document_hash), owner, document_hash, REUSABLE_STATUSES)

    def _find(self, key: str, owner: str, document_hash: str | None, statuses: frozenset[str]) -> str | None:
        """The newest job listed at ``key`` that is ``owner``'s, ``done`` with a status in ``statuses`` and a
        stored result (and of ``document_hash``, unless None)."""
        store = self.store
        candidates = [member.decode() for member in store.redis.lrange(key, 0, -1)]
        if not candidates:
            return None
        with store.redis.pipeline(transaction=False) as pipe:
            for job_id in candidates:
                pipe.hmget(store.keys.job(job_id), "state", "owner", "document_hash", "status")
                pipe.exists(store.keys.result(job_id))
            replies = pipe.execute()
        for job_id, fields, has_result in zip(candidates, replies[::2], replies[1::2]):
            state, job_owner, job_hash, status = (value.decode() if value is not None else None for value in fields)
            if (
                state == "done"
                and has_result
                and job_owner == owner
                and (document_hash is None or job_hash == document_hash)
                and status in statuses
            ):
                return job_id
        return None

    def create_reused(
        self, raw_document: dict[str, Any], earlier_id: str, *, owner: str, estimate: dict[str, Any],
        document_hash: str, job_id: str | None = None,
    ) -> tuple[dict[str, Any], bool]:  # fmt: skip
        """A new job carrying ``earlier_id``'s result; (record, reused).

        ``job_id``: the id to create it with (an idempotency claim's), else a fresh one.

        The job is created unqueued and turned ``done`` by one script.  When
        that fails — the earlier result expired a moment ago — the job is
        left ``queued`` but in no queue, ``reused`` is False, and the caller
        must :meth:`enqueue` it or cancel it.  (Were the API to die in
        between, the reaper finds the unqueued job after ``lease_s`` and
        queues it: it is then solved afresh, never lost.)
        """
        store = self.store
        record = store.create_job(
            raw_document, owner=owner, estimate=estimate, document_hash=document_hash, enqueue=False, job_id=job_id
        )
        job_id = record["id"]
        copied = store.redis.hmget(store.keys.job(earlier_id), *_COPIED_FIELDS)
        now = iso_utc()
        fields: dict[str, bytes | str] = {"started_at": now, "finished_at": now, "reused": "true",
                                          "reused_from": earlier_id}  # fmt: skip
        fields.update({name: value for name, value in zip(_COPIED_FIELDS, copied) if value is not None})
        marked = self._mark_reused(
            keys=[*store.keys.states, store.keys.job(job_id), store.keys.result(job_id), store.keys.result(earlier_id),
                  store.keys.log(job_id), store.keys.log(earlier_id), store.keys.doc(job_id)],
            args=[job_id, store.settings.result_ttl_s, store.settings.job_ttl_s,
                  *(item for pair in fields.items() for item in pair)],
        )  # fmt: skip
        if not marked:
            return record, False
        self.remember(owner, document_hash, job_id)
        reused = store.get_job(job_id)
        assert reused is not None
        return reused, True

    def enqueue(self, record: dict[str, Any]) -> None:
        """Queue the first execution of a job :meth:`create_reused` could not finish."""
        job_id = record["id"]
        try:
            rq_queues.enqueue_execution(
                self.store.redis, self.store.settings, job_id, rq_queues.execution_id(job_id, 1),
                record.get("priority") or DEFAULT_PRIORITY,
            )  # fmt: skip
        except redis.RedisError:
            # As in JobStore.create_job: the record says `queued`, and the
            # reaper enqueues a queued job that sits in no RQ queue.
            pass


def with_reuse_fields(store: JobStore, records: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """The records with ``reused`` (bool) and ``reused_from`` (job id or None) filled in, one round trip."""
    if not records:
        return records
    with store.redis.pipeline(transaction=False) as pipe:
        for record in records:
            pipe.hmget(store.keys.job(record["id"]), "reused", "reused_from")
        rows = pipe.execute()
    for record, (reused, reused_from) in zip(records, rows):
        record["reused"] = reused == b"true"
        record["reused_from"] = reused_from.decode() if reused_from is not None else None
    return records


def start_free_hash(document: ProblemDocument) -> str | None:
    """SHA-256 (hex) of the canonical document without ``solver.initial``: equal for documents that pose the
    same fixed point from any start.  None for a finite horizon, whose ``solver.initial`` is part of the problem
    (the value after the last period)."""
    if getattr(document.model, "horizon", None) is not None:
        return None
    data = orjson.loads(canonical_json(document))
    (data.get("solver") or {}).pop("initial", None)
    return hashlib.sha256(orjson.dumps(data)).hexdigest()
