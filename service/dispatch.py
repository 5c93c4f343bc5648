"""Fair shares of the workers: which queued job a free worker takes next.

RQ's queues hand out work first in, first out, so one key's long backlog
would keep every other key waiting behind it.  fixq therefore keeps its own
order of pending jobs and lets the RQ queues carry *tickets*:

* per priority, a list of pending job ids per owner, oldest first
  (``fixq:dispatch:pending:{priority}:{owner}``), and a *ring* of the owners
  with pending jobs in the order of their turns (``fixq:dispatch:ring:{priority}``);
* enqueueing a job (:func:`enqueue`) appends it to its owner's list, puts
  the owner in the ring if absent, and puts one ticket on the RQ queue of the
  job's priority: an RQ job ``service.task.run_next`` with the id
  ``{job_id}-{n}`` (``service.queue.execution_id``).  One ticket per pending
  job keeps RQ's counts right;
* a worker that takes a ticket runs one Lua script (:func:`pick`) which goes
  through the priorities, high first, and within each through the ring: the
  first owner whose running count is under its cap gives up its oldest job
  that is still ``queued`` (entries of jobs canceled or already taken are
  dropped on the way), and goes to the back of the ring.  The job is recorded
  as the owner's (``fixq:dispatch:picked:{owner}``) and the worker claims it
  as ``service.task.run_job`` would (lease, fencing, resume from checkpoint);
* when every owner with pending work is at its cap, the worker waits on a
  wake-up list that every enqueue and every finished job pushes to (so it
  polls at most once a second), and after ``dispatch_wait_s`` puts the
  ticket back on its queue and returns to RQ.

The cap on one owner's running jobs is ``key_max_running_jobs`` or the
key's own ``max_running_jobs`` (``service.keys``); 0 means half the live
workers (``service.liveness``), rounded up.  With auth off every job belongs to the one
anonymous owner, who is not capped: a cap would only leave workers idle.  An owner's running count is its picked jobs
that are ``running``, plus those picked within the last ``lease_s`` that are
still ``queued`` (taken, about to be claimed); the others drop out as the
count is taken.

Which job a ticket stands for: each queued job's ``rq_job`` names a ticket
waiting for it, and ``fixq:dispatch:tickets`` maps each ticket back to its job.
A ticket that picks another job than its own hands its job the picked job's
ticket, so the reaper (``service.reaper``) can keep telling a job whose
ticket was lost (it enqueues it again) from one that is merely waiting.
"""

from __future__ import annotations

import logging
import math
import time
from typing import TYPE_CHECKING

import redis

from service.keys import ANONYMOUS, KeyStore
from service.liveness import live_workers
from service.queue import PRIORITIES, WAKE_BACKLOG, DispatchKeys, enqueue_execution

if TYPE_CHECKING:
    from service.store import JobStore

__all__ = [
    "half_the_workers",
    "next_job",
    "pick",
    "prune_tickets",
    "running_cap",
    "wake",
]

logger = logging.getLogger("fixq.dispatch")

_WAKE_POLL_S = 1.0
"""Longest a worker waiting on capped owners goes without looking again (s), should a wake-up be lost."""

# ARGV 1 ticket, 2 now ms, 3 grace ms, 4 cap of an owner without its own, 5 half the workers (a key's
# own 0), 6 job-hash prefix, 7 lease prefix, 8 picked prefix, 9 api key index, 10 api key record
# prefix, 11 tickets hash, 12 ring prefix, 13 pending prefix, 14 the anonymous owner (uncapped),
# 15.. priorities in order.
# Returns {'job', id} | {'capped'} | {'empty'}.
_PICK = """
local ticket, now, grace = ARGV[1], tonumber(ARGV[2]), tonumber(ARGV[3])
local function cap_of(owner)
  -- With auth off every job is the one anonymous owner's: a cap would only idle workers.
  if owner == ARGV[14] then return math.huge end
  local digest = redis.call('HGET', ARGV[9], owner)
  local own = digest and tonumber(redis.call('HGET', ARGV[10] .. digest, 'max_running_jobs'))
  if not own then return tonumber(ARGV[4]) end
  if own <= 0 then return tonumber(ARGV[5]) end
  return own
end
local function running(owner)
  local key = ARGV[8] .. owner
  local members = redis.call('ZRANGE', key, 0, -1, 'WITHSCORES')
  local n = 0
  for i = 1, #members, 2 do
    local state = redis.call('HGET', ARGV[6] .. members[i], 'state')
    if state == 'running' or (state == 'queued' and now - tonumber(members[i + 1]) < grace) then
      n = n + 1
    else
      redis.call('ZREM', key, members[i])
    end
  end
  return n
end
local function take(id, owner)
  redis.call('ZADD', ARGV[8] .. owner, now, id)
  local holder = redis.call('HGET', ARGV[11], ticket)
  redis.call('HDEL', ARGV[11], ticket)
  local own_ticket = redis.call('HGET', ARGV[6] .. id, 'rq_job')
  if own_ticket and redis.call('HGET', ARGV[11], own_ticket) == id then
    -- The job's own ticket still waits in a queue: it now stands for the job this ticket stood for.
    if holder and holder ~= id and redis.call('HGET', ARGV[6] .. holder, 'rq_job') == ticket then
      redis.call('HSET', ARGV[11], own_ticket, holder)
      redis.call('HSET', ARGV[6] .. holder, 'rq_job', own_ticket)
    else
      redis.call('HDEL', ARGV[11], own_ticket)
    end
  end
  redis.call('HSET', ARGV[6] .. id, 'rq_job', ticket)
  return {'job', id}
end
local capped = false
for p = 15, #ARGV do
  local ring = ARGV[12] .. ARGV[p]
  for _, owner in ipairs(redis.call('LRANGE', ring, 0, -1)) do
    local pending = ARGV[13] .. ARGV[p] .. ':' .. owner
    if running(owner) >= cap_of(owner) then
      if redis.call('LLEN', pending) > 0 then capped = true end
    else
      while true do
        local id = redis.call('LPOP', pending)
        if not id then break end
        if redis.call('HGET', ARGV[6] .. id, 'state') == 'queued' and redis.call('EXISTS', ARGV[7] .. id) == 0 then
          redis.call('LREM', ring, 1, owner)
          if redis.call('LLEN', pending) > 0 then redis.call('RPUSH', ring, owner) end
          return take(id, owner)
        end
      end
      redis.call('LREM', ring, 0, owner)
    end
  end
end
if capped then return {'capped'} end
redis.call('HDEL', ARGV[11], ticket)
return {'empty'}
"""

# ARGV 1 job-hash key prefix.  Drops the entries of tickets whose job is no longer queued.
_PRUNE = """
local entries = redis.call('HGETALL', KEYS[1])
local dropped = 0
for i = 1, #entries, 2 do
  if redis.call('HGET', ARGV[1] .. entries[i + 1], 'state') ~= 'queued' then
    redis.call('HDEL', KEYS[1], entries[i])
    dropped = dropped + 1
  end
end
return dropped
"""


def running_cap(store: JobStore) -> tuple[int, int]:
    """(cap of an owner without its own, half the live workers rounded up, at least 1).

    The first is ``key_max_running_jobs``, or the second when that is 0.
    """
    half = half_the_workers(live_workers(store))
    return store.settings.key_max_running_jobs or half, half


def pick(store: JobStore, ticket: str) -> tuple[str, str | None]:
    """Take the next job in turn for ``ticket``: ``("job", id)``, ``("capped", None)`` or ``("empty", None)``.

    ``capped``: every owner with pending work is at its cap; ``empty``:
    nothing is pending.  The job returned is still ``queued``; the caller
    claims it (``JobStore.claim``).
    """
    keys = DispatchKeys(store.keys.prefix)
    cap, half = running_cap(store)
    api_keys = KeyStore(store.redis, store.keys.prefix)
    reply = store.redis.register_script(_PICK)(
        args=[ticket, int(time.time() * 1000), int(store.settings.lease_s * 1000), cap, half,
              store.keys.job(""), store.keys.lease(""), keys.picked_prefix, api_keys.index, api_keys.record_key(""),
              keys.tickets, keys.ring_prefix, keys.pending_prefix, ANONYMOUS, *PRIORITIES],
    )  # fmt: skip
    outcome = reply[0].decode()
    return outcome, (reply[1].decode() if outcome == "job" else None)


def next_job(store: JobStore, ticket: str) -> str | None:
    """The job a worker holding ``ticket`` runs next, or None.

    While every owner with pending work is at its cap, waits for a wake-up
    (at most a second at a time); after ``dispatch_wait_s`` (at most half of
    ``lease_s``, so the reaper never takes a waiting ticket for a lost one)
    the ticket goes back on its queue and None is returned.
    """
    deadline = time.monotonic() + min(store.settings.dispatch_wait_s, store.settings.lease_s / 2)
    while True:
        outcome, picked = pick(store, ticket)
        if outcome == "job":
            return picked
        if outcome == "empty":
            return None
        remaining = deadline - time.monotonic()
        if remaining <= 0:
            _put_back(store, ticket)
            return None
        store.redis.blpop([DispatchKeys(store.keys.prefix).wake], timeout=max(0.01, min(_WAKE_POLL_S, remaining)))


def _put_back(store: JobStore, ticket: str) -> None:
    """Issue a new ticket for the job ``ticket`` stands for, if it still waits for one."""
    tickets = DispatchKeys(store.keys.prefix).tickets
    holder = store.redis.hget(tickets, ticket)
    if holder is None:
        return
    job_id = holder.decode()
    rescued = store.rescue_lost(job_id, ticket)
    store.redis.hdel(tickets, ticket)
    if rescued is not None:
        new_ticket, priority = rescued
        enqueue_execution(store.redis, store.settings, job_id, new_ticket, priority)


def wake(store: JobStore) -> None:
    """Tell a worker waiting on capped owners to look again (a running job finished)."""
    wake_key = DispatchKeys(store.keys.prefix).wake
    try:
        with store.redis.pipeline(transaction=False) as pipe:
            pipe.rpush(wake_key, "1")
            pipe.ltrim(wake_key, -WAKE_BACKLOG, -1)
            pipe.execute()
    except redis.RedisError:
        logger.warning("could not wake waiting workers; they look again within %.0f s", _WAKE_POLL_S)


def prune_tickets(store: JobStore) -> int:
    """Forget the tickets of jobs no longer queued (canceled in their queue, or run directly); how many."""
    tickets = DispatchKeys(store.keys.prefix).tickets
    return int(store.redis.register_script(_PRUNE)(keys=[tickets], args=[store.keys.job("")]))


def half_the_workers(workers: int) -> int:
    """The default cap for ``workers`` live workers: half of them, rounded up, at least 1."""
    return max(1, math.ceil(workers / 2))
