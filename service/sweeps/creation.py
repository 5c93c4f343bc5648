"""Creating a sweep's jobs: the door of ``POST /v1/sweeps``, the chain's next jobs, the rescue, and cancel.

Each row's job has one creator at a time.  :func:`ensure_job` takes the row's
claim (``SET NX PX``), creates the job without enqueueing it, and records it
in the sweep's jobs hash in one Lua script (``HSETNX``, the link back from the
job, the claim released) before the job is enqueued; a creator that finds the
row recorded does nothing.  The creators are the door (the first jobs), the
lifecycle hook once a job finished (:func:`job_finished`, its chain
successors) and the reaper (:func:`rescue_pending`, rows whose creator died);
reading a sweep creates nothing.
"""

from __future__ import annotations

import hashlib
import itertools
import secrets
from dataclasses import dataclass, field
from typing import Any

import orjson
import redis

from service import webhooks
from service._formats import iso_utc
from service.keys import KeyStore
from service.limits import ActiveJobs, Quota, Reservation, check_problem_size, quota_for
from service.problems import Problem
from service.settings import Settings
from service.store import TERMINAL_STATES, JobStore
from service.submission import Submitter, admit_submission, admitted_summary, create_submitted_job
from service.sweeps.notify import notify_quietly, rescue_notifications, twin_answered
from service.sweeps.records import CLAIM_MS, Sweep, load_sweep, pending_key, replayed_sweep, row_states, store_sweep
from service.sweeps.request import VALUE_IN_LABEL_CHARS, SweepRequest, parse_request
from service.sweeps.reuse import record_means, remember_row, reserve_first_rows, reused_row
from worker.errors import FixqError, InvalidDocument, TooLarge, join_path

__all__ = ["cancel_sweep", "create_sweep", "ensure_job", "job_finished", "rescue_pending"]

DOOR_RENEW_EVERY = 200
"""Jobs the door creates between two renewals of its marker ``fixq:sweep:{id}:door`` (count), which
lasts ``CLAIM_MS``: while it lives, the reaper leaves the first jobs to the door."""
MAX_REPORTED = 100
"""Most distinct faults listed when combinations are refused (count)."""

# KEYS 1 claim, 2 jobs hash, 3 job's link to its row, 4 sweep hash.
# ARGV 1 claim token, 2 row index, 3 job id, 4 "{sweep id}:{index}".
_RECORD_JOB = """
local recorded = redis.call('HSETNX', KEYS[2], ARGV[2], ARGV[3])
if recorded == 1 then redis.call('SET', KEYS[3], ARGV[4]) end
if redis.call('GET', KEYS[1]) == ARGV[1] then redis.call('DEL', KEYS[1]) end
if recorded == 0 then return 'taken' end
if redis.call('HEXISTS', KEYS[4], 'canceled_at') == 1 then return 'canceled' end
return 'recorded'
"""

# KEYS 1 claim, 2 jobs hash, 3 errors hash.  ARGV 1 claim token, 2 row index, 3 error JSON ('' = none).
_SETTLE_WITHOUT_JOB = """
if ARGV[3] ~= '' and redis.call('HEXISTS', KEYS[2], ARGV[2]) == 0 then
  redis.call('HSET', KEYS[3], ARGV[2], ARGV[3])
end
if redis.call('GET', KEYS[1]) == ARGV[1] then redis.call('DEL', KEYS[1]) end
return 1
"""


@dataclass
class _Faults:
    """Faults of refused combinations, each kept once with the combinations it hit."""

    request: SweepRequest
    seen: dict[tuple[str, str, str], list[int]] = field(default_factory=dict)
    too_large_only: bool = True

    def add(self, index: int, exc: FixqError) -> None:
        self.too_large_only &= isinstance(exc, TooLarge)
        picks = self.request.value_indices(index)
        for error in exc.errors:
            inner = error["path"]
            outer = next(
                (f"vary.{p}[{i}]" for p, i in zip(self.request.paths, picks)
                 if inner == p or inner.startswith((p + ".", p + "["))),
                join_path("base", inner),
            )  # fmt: skip
            self.seen.setdefault((outer, inner, error["message"]), []).append(index)

    def add_base(self, exc: FixqError) -> None:
        self.too_large_only = False
        for error in exc.errors:
            self.seen.setdefault((join_path("base", error["path"]), "", error["message"]), []).append(-1)

    def raise_if_any(self) -> None:
        if not self.seen:
            return
        faults = []
        for (outer, inner, message), hits in itertools.islice(self.seen.items(), MAX_REPORTED):
            text = f"{inner}: {message}" if inner and outer.startswith("vary.") else message
            if hits != [-1]:
                first = self.request.values_of(hits[0])
                shown = ", ".join(f"{p}={orjson.dumps(v).decode()[:VALUE_IN_LABEL_CHARS]}" for p, v in first.items())
                text += f" (in {len(hits)} of {self.request.count} combinations; first #{hits[0]}: {shown})"
            faults.append({"path": outer, "message": text})
        if len(self.seen) > MAX_REPORTED:
            faults.append({"path": "", "message": f"and {len(self.seen) - MAX_REPORTED} more faults"})
        raise (TooLarge if self.too_large_only else InvalidDocument)(faults)


def create_sweep(
    body: dict[str, Any],
    caller: Submitter,
    store: JobStore,
    settings: Settings,
    *,
    idempotency_key: str | None = None,
    quota: Quota | None = None,
    fresh: bool = False,
) -> Sweep:
    """Check and admit every combination, store the sweep, and create its first jobs.

    With a ``quota`` (the caller's per-key caps), the jobs created now take slots of its active-job caps
    (429) before any combination is validated, and every combination must fit the key's memory cap (413),
    exactly as single submissions do.  Jobs a chain creates later, when their predecessor finishes, take
    their slots then (:func:`ensure_job`).  Each combination is validated like the first one admitted,
    reusing the parts it shares with it (``service.submission.admit_submission``).

    A row whose document its owner solved already is answered from that job, as a submission is
    (``service.resubmission``), unless ``fresh``.

    Raises ``InvalidDocument`` or ``TooLarge`` (nothing stored) when any part is refused.
    With an ``idempotency_key`` the same owner already used within
    ``idempotency_ttl_s``, that earlier sweep is returned and nothing is created.
    """
    idem = None
    body_hash = hashlib.sha256(orjson.dumps(body, option=orjson.OPT_SORT_KEYS)).hexdigest()
    if idempotency_key is not None:
        idem = store.key("sweepidem", caller.owner, hashlib.sha256(idempotency_key.encode()).hexdigest())
        earlier = replayed_sweep(store, idem, idempotency_key, body_hash)
        if earlier is not None:
            return earlier
    request = parse_request(body, settings)
    sweep_id = secrets.token_hex(8)
    faults = _Faults(request)
    notify = request.base.get("notify")
    if isinstance(notify, dict) and isinstance(notify.get("url"), str):
        try:
            webhooks.check_target(notify["url"], settings, path="notify.url")
        except InvalidDocument as exc:
            faults.add_base(exc)
    first_jobs = range(request.count) if not request.chain else [0]
    # Priority cannot vary, so the caps are known before any combination is validated.
    high = (request.priority or request.base.get("priority")) == "high"
    active = ActiveJobs(store.redis, settings.redis_prefix)
    reservation = None
    if quota is not None:
        reservation = reserve_first_rows(active, quota, high, request, sweep_id, store, first_jobs, fresh)
    try:
        prepared, stationary = _admit_combinations(request, sweep_id, faults, caller, store, settings, quota)
    except BaseException:
        if reservation is not None:
            active.release(reservation)
        raise
    if idem is not None:
        if not store.redis.set(idem, f"{sweep_id} {body_hash}", nx=True, ex=settings.idempotency_ttl_s):
            try:
                earlier = replayed_sweep(store, idem, idempotency_key or "", body_hash)
            except Problem:
                if reservation is not None:
                    active.release(reservation)
                raise
            if earlier is not None:
                if reservation is not None:
                    active.release(reservation)
                return earlier
    sweep = store_sweep(store, sweep_id, caller.owner, request, stationary, fresh)
    created: list[str] = []
    try:
        for index in first_jobs:
            if index and index % DOOR_RENEW_EVERY == 0:
                store.redis.set(sweep.keys.door, "1", px=CLAIM_MS)
            job_id = ensure_job(sweep, index, prepared=prepared.get(index), counted=True)
            if job_id is not None:
                created.append(job_id)
        store.redis.delete(sweep.keys.door)
        if reservation is not None:
            active.bind(reservation, created)
        notify_quietly(sweep)  # every first row may have been answered from a solved twin
    except redis.RedisError:
        # Nothing half-done: what was created is canceled, then the 503 is answered.
        try:
            cancel_sweep(sweep)
        except redis.RedisError:
            pass
        raise
    return sweep


def _admit_combinations(
    request: SweepRequest, sweep_id: str, faults: _Faults, caller: Submitter, store: JobStore, settings: Settings,
    quota: Quota | None,
) -> tuple[dict[int, dict[str, Any]], bool]:  # fmt: skip
    """Admit every combination (raising the refusal of any); the admitted summaries of the first jobs,
    and whether any asks for the stationary distribution (report.stationary, or a search)."""
    prepared: dict[int, dict[str, Any]] = {}
    stationary = False
    like: tuple[dict[str, Any], Any] | None = None
    for index in range(request.count):
        raw = request.document(index, sweep_id=sweep_id)
        try:
            admitted = admit_submission(raw, settings, store, may_see=caller.may_see, check_notify=False, like=like)
        except FixqError as exc:
            faults.add(index, exc)
            continue
        if like is None:
            like = (raw, admitted)
        # A search's result always carries the stationary distribution at its point (its conditions use it).
        stationary = stationary or admitted.document.report.stationary or admitted.document.search is not None
        if quota is not None:
            check_problem_size(quota, admitted.estimate)
        if not faults.seen and (not request.chain or index == 0):
            prepared[index] = admitted_summary(admitted)
    faults.raise_if_any()
    return prepared, stationary


class AtCap(Exception):
    """Raised by :func:`ensure_job` when the owner's active-job caps leave no slot for the row's job."""


def ensure_job(
    sweep: Sweep, index: int, *, prepared: dict[str, Any] | None = None, counted: bool = False
) -> str | None:
    """Create and record the job of row ``index`` (see :func:`_ensure_one`); a row answered from a solved
    twin is finished at once, and so are its chain successors answered the same way (in a loop, not by
    recursion: a chain of thousands of solved rows is followed in one call)."""
    job_id, reused = _ensure_one(sweep, index, prepared=prepared, counted=counted)
    due = [index] if reused else []
    while due:
        done = due.pop()
        record_means(sweep, done_job := sweep.store.redis.hget(sweep.keys.jobs, done).decode(), done)
        twin_answered(sweep, done, done_job)
        if not sweep.plan.chain or sweep.canceled_at is not None:
            continue
        for successor in sweep.plan.successors(done):
            try:
                if _ensure_one(sweep, successor)[1]:
                    due.append(successor)
            except AtCap:
                pass  # created once one of the owner's jobs finishes
    return job_id


def _ensure_one(
    sweep: Sweep, index: int, *, prepared: dict[str, Any] | None = None, counted: bool = False
) -> tuple[str | None, bool]:
    """Create and record the job of row ``index`` unless it exists or another creator holds the claim.

    The claim is held until the job id is in the sweep's jobs hash, and the
    job is enqueued only after that, so its own finish always finds its row.
    ``prepared`` is the door's admitted summary of the row's document.
    Unless ``counted`` (the door reserved the slots of its first jobs), the
    job takes a slot of the owner's active-job caps as a submission would; when
    there is none, :class:`AtCap` is raised, nothing is created, and the sweep
    is remembered among the owner's sweeps waiting for a slot (the row is
    created when one of the owner's jobs finishes, or by the reaper).
    Unless the sweep is ``fresh``, a row whose document the owner solved already
    gets a job that is done at once (``reused``), which takes no slot.
    Returns (the new job id or None when nothing was created, whether it was reused).
    """
    store, keys = sweep.store, sweep.keys
    if store.redis.hexists(keys.jobs, index):
        return None, False
    token = secrets.token_hex(8)
    if not store.redis.set(keys.claim(index), token, nx=True, px=CLAIM_MS):
        return None, False
    settle = store.redis.register_script(_SETTLE_WITHOUT_JOB)
    settle_keys = [keys.claim(index), keys.jobs, keys.errors]
    active = ActiveJobs(store.redis, store.settings.redis_prefix)
    high = sweep.record.get("priority") == "high"
    reservation = Reservation(sweep.owner, high, member="")
    try:
        if store.redis.hexists(keys.jobs, index) or store.redis.hexists(keys.errors, index):
            settle(keys=settle_keys, args=[token, index, ""])
            return None, False
        raw, prepared = _document_of(sweep, index, prepared)
        record, reused, start_free = reused_row(sweep, raw, prepared)
        if not reused:
            if not counted:
                reservation = _take_slot(sweep, active, high)
            if record is None:
                record = create_submitted_job(raw, store, owner=sweep.owner, enqueue=False, **prepared)
    except FixqError as exc:
        active.release(reservation)
        error = {"title": exc.title, "detail": exc.detail, "errors": exc.errors}
        settle(keys=settle_keys, args=[token, index, orjson.dumps(error)])
        return None, False
    except BaseException:
        try:
            active.release(reservation)
            settle(keys=settle_keys, args=[token, index, ""])
        except redis.RedisError:
            pass  # the claim lapses after CLAIM_MS, the reservation after RESERVATION_S
        raise
    job_id = record["id"]
    outcome = store.redis.register_script(_RECORD_JOB)(
        keys=[keys.claim(index), keys.jobs, keys.job_link(job_id), keys.sweep],
        args=[token, index, job_id, f"{sweep.id}:{index}"],
    ).decode()
    if outcome == "taken":
        # Another creator recorded the row after this one's claim lapsed: this job never runs.
        store.request_cancel(job_id)
        active.release(reservation)
        return None, False
    if reused:
        active.release(reservation)
        return job_id, True
    # Counted among the owner's active jobs, so later submissions see it under their caps.
    active.bind(reservation, [job_id])
    remember_row(sweep, prepared, start_free, job_id)
    if outcome == "canceled":
        # The sweep was canceled while this job was being created.
        _cancel_job(store, job_id)
    else:
        store.enqueue_created(record)
    return job_id, False


def _take_slot(sweep: Sweep, active: ActiveJobs, high: bool) -> Reservation:
    """One slot of the owner's active-job caps for a row's job, or :class:`AtCap`."""
    store = sweep.store
    key = KeyStore(store.redis, store.settings.redis_prefix).get(sweep.owner)
    try:
        reservation = active.reserve(quota_for(store.settings, sweep.owner, key), high=high)
    except Problem:
        store.redis.sadd(_waiting_for_slot_key(store, sweep.owner), sweep.id)
        raise AtCap(sweep.owner) from None
    # Uncapped keys are not counted by reserve; the job is still listed among the owner's active ones.
    return reservation if reservation.member is not None else Reservation(sweep.owner, high, member="")


def _waiting_for_slot_key(store: JobStore, owner: str) -> str:
    """The set of ``owner``'s sweeps with a row due but held back by the owner's caps."""
    return store.key("sweeps", "capped", owner)


def _document_of(sweep: Sweep, index: int, prepared: dict[str, Any] | None) -> tuple[dict[str, Any], dict[str, Any]]:
    """Row ``index``'s document and its admitted summary, warm-started from its predecessor when chained."""
    request = sweep.request()
    initial = _warm_start_from(sweep, index)
    raw = request.document(index, sweep_id=sweep.id, initial=initial)
    if prepared is not None and initial is None:
        return raw, prepared
    try:
        return raw, _readmit(sweep, raw)
    except FixqError:
        if initial is None:
            raise
    # The predecessor's result is gone: start as the base says instead.
    raw = request.document(index, sweep_id=sweep.id)
    return raw, _readmit(sweep, raw)


def _readmit(sweep: Sweep, raw: dict[str, Any]) -> dict[str, Any]:
    settings = sweep.store.settings
    admitted = admit_submission(raw, settings, sweep.store, may_see=sweep.may_see, check_notify=False)
    return admitted_summary(admitted)


def _warm_start_from(sweep: Sweep, index: int) -> dict[str, str] | None:
    if not sweep.plan.chain:
        return None
    before = sweep.plan.predecessor(index)
    if before is None:
        return None
    store = sweep.store
    job_id = store.redis.hget(sweep.keys.jobs, before)
    if job_id is None:
        return None
    state = store.redis.hget(store.keys.job(job_id.decode()), "state")
    return {"job": job_id.decode()} if state == b"done" else None


def _cancel_job(store: JobStore, job_id: str) -> str | None:
    outcome = store.request_cancel(job_id)
    if outcome is None:
        return None
    if outcome["outcome"] == "canceled":
        # Canceled in its queue, so no worker will see it finish: notify here.
        webhooks.schedule(store, job_id)
    return outcome["outcome"]


def job_finished(store: JobStore, job_id: str) -> None:
    """Bookkeeping once a job reached a terminal state: a sweep job's means and chain successors, then
    the rows of its owner's sweeps that waited for the slot it freed."""
    link = store.redis.get(store.key("sweepjob", job_id))
    if link is not None:
        sweep_id, _, index_text = link.decode().partition(":")
        sweep = load_sweep(store, sweep_id)
        if sweep is not None:
            _sweep_job_finished(sweep, job_id, int(index_text))
    owner = store.redis.hget(store.keys.job(job_id), "owner")
    if owner is not None:
        _create_held_back(store, owner.decode())


def _sweep_job_finished(sweep: Sweep, job_id: str, index: int) -> None:
    record_means(sweep, job_id, index)
    if sweep.plan.chain and sweep.canceled_at is None:
        try:
            for successor in sweep.plan.successors(index):
                ensure_job(sweep, successor)
        except AtCap:
            pass  # created once one of the owner's jobs finishes


def _create_held_back(store: JobStore, owner: str) -> list[str]:
    """Create the due rows of ``owner``'s sweeps that waited for a slot; the ids of the jobs created."""
    key = _waiting_for_slot_key(store, owner)
    created: list[str] = []
    for member in store.redis.smembers(key):
        sweep = load_sweep(store, member.decode())
        store.redis.srem(key, member)
        if sweep is not None and sweep.canceled_at is None:
            try:
                created += _create_due_rows(sweep)
            except AtCap:
                break
    return created


def rescue_pending(store: JobStore) -> list[str]:
    """Create the rows of pending sweeps that no living creator will: the reaper's sweep pass.

    A row is due when it has no job and no error and, in a chain, its
    predecessor has finished; a sweep whose door marker lives is left to its
    door.  A sweep leaves the pending set once every row has a job or an
    error, or it was canceled.  Then due ``sweep.finished`` are queued
    (``notify.rescue_notifications``).  Returns the ids of the jobs created.
    """
    created: list[str] = []
    key = pending_key(store)
    for member in store.redis.smembers(key):
        sweep = load_sweep(store, member.decode())
        if sweep is None or sweep.canceled_at is not None:
            store.redis.srem(key, member)
            continue
        if store.redis.exists(sweep.keys.door):
            continue
        try:
            created += _create_due_rows(sweep)
        except AtCap:
            continue
    rescue_notifications(store)
    return created


def _create_due_rows(sweep: Sweep) -> list[str]:
    """Create every due row of ``sweep`` until its owner's caps refuse one (:class:`AtCap`); the new job ids.

    A row is due when it has no job and no error and, in a chain, its
    predecessor has finished.  A sweep with every row settled leaves the pending set.
    """
    store, plan = sweep.store, sweep.plan
    jobs, states = row_states(sweep)
    errors = {int(k) for k in store.redis.hkeys(sweep.keys.errors)}
    if len(jobs) + len(errors) >= plan.count:
        store.redis.srem(pending_key(store), sweep.id)
        return []
    created: list[str] = []
    for index in range(plan.count):
        if index in jobs or index in errors:
            continue
        before = plan.predecessor(index) if plan.chain else None
        if before is None or states.get(before) in TERMINAL_STATES:
            job_id = ensure_job(sweep, index)
            if job_id is not None:
                created.append(job_id)
    return created


def cancel_sweep(sweep: Sweep) -> dict[str, int]:
    """Cancel every unfinished job of the sweep and create no more; counts of what happened.

    Returns ``{"canceled": n, "cancel_requested": n}``: jobs canceled in their
    queue, and running jobs asked to stop at their next iteration.
    """
    store = sweep.store
    now = iso_utc()
    store.redis.hsetnx(sweep.keys.sweep, "canceled_at", now)
    sweep.canceled_at = (store.redis.hget(sweep.keys.sweep, "canceled_at") or now.encode()).decode()
    jobs, states = row_states(sweep)
    outcomes = {"canceled": 0, "cancel_requested": 0}
    for index, job_id in jobs.items():
        if states[index] in TERMINAL_STATES:
            continue
        outcome = _cancel_job(store, job_id)
        if outcome in outcomes:
            outcomes[outcome] += 1
    notify_quietly(sweep)
    return outcomes
