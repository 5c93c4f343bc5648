"""Stored sweeps: their Redis keys, loading one, storing a new one, listing them and forgetting old ones."""

from __future__ import annotations

import functools
import time
import zlib
from dataclasses import dataclass
from typing import Any

import orjson

from service._formats import decode_cursor, encode_cursor, iso_utc
from service.problems import Problem
from service.resubmission import HEADER_PATH
from service.store import JobStore, is_job_id
from service.sweeps.request import SweepRequest, sweep_tag
from worker.errors import InvalidDocument

__all__ = [
    "replayed_sweep",
    "CLAIM_MS",
    "Sweep",
    "SweepKeys",
    "forget_expired_sweeps",
    "list_sweeps",
    "load_sweep",
    "notify_key",
    "row_states",
    "store_sweep",
]

CLAIM_MS = 60_000
"""Milliseconds a claim on creating one row's job lasts, and the door's marker between renewals;
a creator that died loses it then."""
BASE_ZLIB_LEVEL = 1
"""zlib level of the stored base document (0-9): speed over size, as for job documents."""


class SweepKeys:
    """Names of one sweep's Redis keys (see the ``service.sweeps`` package docstring)."""

    def __init__(self, store: JobStore, sweep_id: str) -> None:
        self.sweep = store.key("sweep", sweep_id)
        self.base = f"{self.sweep}:base"
        self.jobs = f"{self.sweep}:jobs"
        self.means = f"{self.sweep}:means"
        self.errors = f"{self.sweep}:errors"
        self.door = f"{self.sweep}:door"
        self.ended = f"{self.sweep}:ended"
        self.rescan = f"{self.sweep}:rescan"
        self._store = store

    def claim(self, index: int) -> str:
        return f"{self.sweep}:claim:{index}"

    def job_link(self, job_id: str) -> str:
        return self._store.key("sweepjob", job_id)


def index_key(store: JobStore, owner: str | None) -> str:
    """The zset of every sweep (``owner=None``) or of one owner's, scored by submission time (ms)."""
    return store.key("sweeps", "owner", owner) if owner is not None else store.key("sweeps")


def notify_key(store: JobStore) -> str:
    """The set of sweeps with a ``notify`` target whose ``sweep.finished`` is not queued yet."""
    return store.key("sweeps", "notify")


def pending_key(store: JobStore) -> str:
    """The set of sweeps some of whose rows have neither a job nor an error yet."""
    return store.key("sweeps", "pending")


@dataclass
class Sweep:
    """A stored sweep: its public record and what bookkeeping needs."""

    store: JobStore
    record: dict[str, Any]
    stationary: bool
    canceled_at: str | None
    _request: SweepRequest | None = None

    @property
    def id(self) -> str:
        return self.record["id"]

    @property
    def owner(self) -> str:
        return self.record["owner"]

    @property
    def fresh(self) -> bool:
        """Whether every row is solved afresh (``?fresh=true``), not answered from an owner's solved twin."""
        return bool(self.record.get("fresh"))

    @property
    def keys(self) -> SweepKeys:
        return SweepKeys(self.store, self.id)

    @functools.cached_property
    def plan(self) -> SweepRequest:
        """The request without its base document: values, combinations and chains."""
        return self._request or SweepRequest.from_record(self.record, {})

    def request(self) -> SweepRequest:
        """The whole request, the base document read from Redis on first use."""
        if self._request is None:
            blob = self.store.redis.get(self.keys.base)
            if blob is None:
                raise InvalidDocument.at("base", f"the base document of sweep {self.id} is missing from Redis")
            self._request = SweepRequest.from_record(self.record, orjson.loads(zlib.decompress(blob)))
        return self._request

    def may_see(self, record: dict[str, Any]) -> bool:
        """True for the records of this sweep's owner (the warm starts its chains may use)."""
        return record.get("owner") == self.owner

    def public(self) -> dict[str, Any]:
        """The record as the API shows it (without rows)."""
        out = {k: v for k, v in self.record.items() if not k.startswith("sweep_")}
        out["canceled_at"] = self.canceled_at
        return out


def load_sweep(store: JobStore, sweep_id: str) -> Sweep | None:
    """The stored sweep ``sweep_id``, or None (also for a malformed id, without touching Redis)."""
    if not is_job_id(sweep_id):
        return None
    raw = store.redis.hmget(store.key("sweep", sweep_id), "record", "stationary", "canceled_at")
    if raw[0] is None:
        return None
    return Sweep(store, orjson.loads(raw[0]), raw[1] == b"1", raw[2].decode() if raw[2] else None)


def store_sweep(store: JobStore, sweep_id: str, owner: str, request: SweepRequest, stationary: bool,
                fresh: bool = False) -> Sweep:
    """Store a new sweep, its door marker set, and mark it pending until every row has a job or an error."""
    now_ms = int(time.time() * 1000)
    record = {
        "id": sweep_id,
        "owner": owner,
        **request.record_fields(),
        "tag": sweep_tag(sweep_id),
        "submitted_at": iso_utc(now_ms / 1000),
        "links": {
            "self": f"/v1/sweeps/{sweep_id}",
            "csv": f"/v1/sweeps/{sweep_id}?format=csv",
            "jobs": f"/v1/jobs?tag=sweep:{sweep_id}",
        },
        "sweep_label": request.label,
        "sweep_priority": request.priority,
        "fresh": fresh,
    }
    keys = SweepKeys(store, sweep_id)
    with store.redis.pipeline(transaction=True) as pipe:
        pipe.set(keys.door, "1", px=CLAIM_MS)
        pipe.set(keys.base, zlib.compress(orjson.dumps(request.base), BASE_ZLIB_LEVEL))
        pipe.hset(keys.sweep, mapping={"record": orjson.dumps(record), "owner": owner, "stationary": int(stationary)})
        pipe.zadd(index_key(store, None), {sweep_id: now_ms})
        pipe.zadd(index_key(store, owner), {sweep_id: now_ms})
        pipe.sadd(pending_key(store), sweep_id)
        if isinstance(request.base.get("notify"), dict):
            pipe.sadd(notify_key(store), sweep_id)
        pipe.execute()
    return Sweep(store, record, stationary, None, request)


def row_states(sweep: Sweep) -> tuple[dict[int, str], dict[int, str]]:
    """(index → job id, index → job state) of the rows that have a job."""
    store = sweep.store
    jobs = {int(k): v.decode() for k, v in store.redis.hgetall(sweep.keys.jobs).items()}
    order = list(jobs)
    with store.redis.pipeline(transaction=False) as pipe:
        for index in order:
            pipe.hget(store.keys.job(jobs[index]), "state")
        states = pipe.execute()
    return jobs, {index: (s.decode() if s else "failed") for index, s in zip(order, states)}


def list_sweeps(
    store: JobStore, *, owner: str | None = None, cursor: str | None = None, limit: int = 50
) -> tuple[list[dict[str, Any]], str | None]:
    """A page of sweep records (without rows), newest first, and the cursor of the next page.

    ``owner=None`` lists every owner's sweeps.  ``ValueError`` for a malformed cursor.
    """
    index = index_key(store, owner)
    max_score: float | str = "+inf"
    skip: bytes | None = None
    after = decode_cursor(cursor)
    if after is not None:
        max_score, skip = after
    page: list[tuple[bytes, float]] = []
    offset = 0
    while len(page) <= limit:
        batch = store.redis.zrevrangebyscore(index, max_score, "-inf", start=offset, num=limit + 1, withscores=True)
        if not batch:
            break
        offset += len(batch)
        for member, score in batch:
            # Ties come in reverse member order; skip those the last page already gave.
            if skip is not None and score == max_score and member >= skip:
                continue
            page.append((member, score))
    more = len(page) > limit
    page = page[:limit]
    records = []
    for member, _ in page:
        sweep = load_sweep(store, member.decode())
        if sweep is not None:
            records.append(sweep.public())
    return records, encode_cursor(*page[-1]) if more and page else None


def forget_expired_sweeps(store: JobStore, now: float | None = None, *, scan_limit: int = 500) -> list[str]:
    """Delete the sweeps whose jobs have all expired, with every key of theirs; their ids.

    A sweep lives as long as its last job: once it is no longer pending (every
    row has a job or an error) and none of its jobs' records is left
    (``job_ttl_s`` after each job's end), its keys go and it leaves the
    listings.  Only sweeps submitted at least ``job_ttl_s`` before ``now``
    (seconds since the epoch; default the current time) can qualify; at most
    ``scan_limit`` of them, oldest first, are examined per call.  The reaper
    calls this on its passes.
    """
    horizon_ms = int(((time.time() if now is None else now) - store.settings.job_ttl_s) * 1000)
    redis = store.redis
    candidates = [m.decode() for m in redis.zrangebyscore(index_key(store, None), "-inf", horizon_ms, 0, scan_limit)]
    pending = {m.decode() for m in redis.smembers(pending_key(store))}
    forgotten = []
    for sweep_id in candidates:
        if sweep_id in pending:
            continue
        keys = SweepKeys(store, sweep_id)
        owner = redis.hget(keys.sweep, "owner")
        job_ids = [v.decode() for v in redis.hvals(keys.jobs)]
        with redis.pipeline(transaction=False) as pipe:
            for job_id in job_ids:
                pipe.exists(store.keys.job(job_id))
            alive = pipe.execute()
        if any(alive):
            continue
        with redis.pipeline(transaction=True) as pipe:
            pipe.delete(keys.sweep, keys.base, keys.jobs, keys.means, keys.errors, keys.door, keys.ended, keys.rescan)
            pipe.srem(notify_key(store), sweep_id)
            for job_id in job_ids:
                pipe.delete(keys.job_link(job_id))
            pipe.zrem(index_key(store, None), sweep_id)
            if owner is not None:
                pipe.zrem(index_key(store, owner.decode()), sweep_id)
            pipe.execute()
        forgotten.append(sweep_id)
    return forgotten


def replayed_sweep(store: JobStore, idem: str, key: str, body_hash: str) -> Sweep | None:
    """The sweep an ``Idempotency-Key`` already names when it was made from the same body (equal as JSON);
    422 at the header when it was made from another body, as for a job (``service.resubmission``)."""
    sweep_id, _, made_from = (store.redis.get(idem) or b"").decode().partition(" ")
    earlier = load_sweep(store, sweep_id)
    if earlier is not None and made_from and made_from != body_hash:
        message = (f"Idempotency-Key {key!r} was used for sweep {sweep_id} with a different body; send that body "
                   "again to get that sweep, or use a new key for a new sweep")  # fmt: skip
        raise Problem(422, "idempotency-key-reused", message, title="idempotency key reused with another body",
                      errors=[{"path": HEADER_PATH, "message": message}], sweep=sweep_id)  # fmt: skip
    return earlier
