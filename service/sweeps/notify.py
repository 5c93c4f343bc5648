"""A sweep's ``sweep.finished`` webhook: one signed ``POST`` to its base's ``notify`` target once every row ended.

A row has *ended* when its job is done, failed or canceled (a row answered
from a solved twin is done at once), when it has an error instead of a job,
or, in a canceled sweep, when it has no job (none will be created).  The
delivery goes through ``service.webhooks`` (the same signing, retries and
delivery record as a job's ``job.finished``) with ``Fixq-Event:
sweep.finished``, ``Fixq-Delivery: sweep:{id}`` and the body
``{"event": "sweep.finished", "sweep": VIEW, "timestamp": T}``, where VIEW is
what ``GET /v1/sweeps/{id}`` answers at that moment (``state`` done or
canceled, ``counts``, ``rows``) with the first :data:`ROWS_LISTED` rows; past
them ``rows.next`` is the index of the next row (``GET
/v1/sweeps/{id}?cursor=N``, or ``links.csv`` for every row).  Each row's job
still sends its own ``job.finished``.

Exactly once
------------
Wherever a row's job ends its index is added to the set
``fixq:sweep:{id}:ended``: the lifecycle step :func:`member_finished` (after
a worker's execution, or the reaper giving up on an abandoned job) and
:func:`twin_answered` (a row answered at its creation).  Adding an index
twice adds it once, so a job that ends twice (two executions of one job) or
a hook run again counts once.  When that set and the rows with errors cover
every row (in a canceled sweep: always), :func:`notify_if_finished` reads
every row's state and, if all ended, queues the delivery with
``service.webhooks.queue_delivery``, which creates it only if it does not
exist (one Lua script): two workers ending the last two rows at once may
both get this far, and one delivery is made.  Then the sweep gets
``notified_at`` (never notified again, even after the delivery record
expired) and leaves ``fixq:sweeps:notify``.  A process that dies between
ending the last row and queuing, or a job canceled in its queue that no
worker sees end, leaves the sweep in that set: the reaper's pass
(:func:`rescue_notifications`) reads the rows of every sweep there, adds the
ended ones the set missed, and queues what is due.
"""

from __future__ import annotations

import logging

from service import webhooks
from service._formats import iso_utc
from service.store import TERMINAL_STATES, JobStore
from service.sweeps.records import Sweep, load_sweep, notify_key, row_states
from service.sweeps.view import sweep_view

__all__ = [
    "EVENT",
    "RESCAN_S",
    "ROWS_LISTED",
    "member_finished",
    "notify_if_finished",
    "notify_quietly",
    "rescue_notifications",
    "twin_answered",
]

EVENT = "sweep.finished"
"""The ``event`` (and ``Fixq-Event``) of a sweep's notification."""
ROWS_LISTED = 500
"""Most rows a ``sweep.finished`` body lists (count); about 0.2 kB each (more with means or an error)."""

RESCAN_S = 60
"""Seconds between two reads of one sweep's rows by the reapers' passes (:func:`rescue_notifications`): the
longest a notification lost between a row's end and its count waits beyond the reaper's interval."""

logger = logging.getLogger("fixq.webhooks")


def member_finished(store: JobStore, job_id: str) -> None:
    """Lifecycle step once a job reached a terminal state: when it is a sweep's, count its row ended and
    notify the sweep if that was the last."""
    link = store.redis.get(store.key("sweepjob", job_id))
    if link is None:
        return
    sweep_id, _, index = link.decode().partition(":")
    sweep = load_sweep(store, sweep_id)
    if sweep is not None:
        store.redis.sadd(sweep.keys.ended, int(index))
        notify_if_finished(sweep)


def twin_answered(sweep: Sweep, index: int, job_id: str) -> None:
    """A row answered from its owner's solved twin at creation: it ended at once, and its job is notified
    as a resubmitted job answered the same way is (``job.finished``)."""
    sweep.store.redis.sadd(sweep.keys.ended, index)
    webhooks.schedule(sweep.store, job_id)


def notify_if_finished(sweep: Sweep, *, check_all: bool = False) -> bool:
    """Queue the sweep's ``sweep.finished`` when it asks for one, has not had it, and every row ended;
    True if queued now.  Unless ``check_all`` (or the sweep was canceled), rows are read only once the
    ended set and the error rows cover every row."""
    store, keys = sweep.store, sweep.keys
    if not store.redis.sismember(notify_key(store), sweep.id):
        return False
    if sweep.canceled_at is None and not check_all:
        with store.redis.pipeline(transaction=False) as pipe:
            pipe.scard(keys.ended)
            pipe.hlen(keys.errors)
            ended, errors = pipe.execute()
        if ended + errors < sweep.plan.count:
            return False
    if store.redis.hexists(keys.sweep, "notified_at"):
        store.redis.srem(notify_key(store), sweep.id)
        return False
    view = sweep_view(sweep, limit=ROWS_LISTED)
    counts = view["counts"]
    if counts["waiting"] + counts["queued"] + counts["running"]:
        return False
    notify = sweep.request().base.get("notify")
    queued = isinstance(notify, dict) and webhooks.queue_delivery(store, f"sweep:{sweep.id}", notify, EVENT, "sweep",
                                                                  view)  # fmt: skip
    with store.redis.pipeline(transaction=True) as pipe:
        pipe.hsetnx(keys.sweep, "notified_at", iso_utc())
        pipe.srem(notify_key(store), sweep.id)
        pipe.execute()
    return bool(queued)


def rescue_notifications(store: JobStore) -> list[str]:
    """The reaper's pass: for every sweep still to be notified, queue its ``sweep.finished`` when due; where
    rows may have ended without being counted, read them (at most once every :data:`RESCAN_S` per sweep) and
    count them first.  The ids of the sweeps queued."""
    queued: list[str] = []
    key = notify_key(store)
    for member in store.redis.smembers(key):
        sweep = load_sweep(store, member.decode())
        if sweep is None:
            store.redis.srem(key, member)
            continue
        if store.redis.exists(sweep.keys.door):
            continue  # the door notifies once it created the first rows
        if sweep.canceled_at is None and notify_if_finished(sweep):  # every row counted ended: no rows read
            queued.append(sweep.id)
            continue
        if not store.redis.set(sweep.keys.rescan, b"1", nx=True, ex=RESCAN_S):
            continue  # its rows were read within the last RESCAN_S
        _, states = row_states(sweep)
        ended = [index for index, state in states.items() if state in TERMINAL_STATES]
        if ended:
            store.redis.sadd(sweep.keys.ended, *ended)
        if notify_if_finished(sweep, check_all=True):
            queued.append(sweep.id)
    return queued


def notify_quietly(sweep: Sweep) -> None:
    """:func:`notify_if_finished`, logging instead of raising: where a failure must not undo the caller's
    work (the door, a cancel); the reaper's pass queues it instead."""
    try:
        notify_if_finished(sweep)
    except Exception:
        logger.exception("sweep %s: queuing sweep.finished failed; the reaper retries", sweep.id)
