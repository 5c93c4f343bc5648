"""Per-key limits of a shared queue: how much one key may hold at once.

Three caps, each a setting that a key may override with its own value
(``fixq keys add NAME --max-active-jobs N ...``, see ``service.keys``):

* ``max_active_jobs`` — jobs ``queued`` or ``running`` at once (count);
  refused with **429** and ``Retry-After``, since waiting is the remedy;
* ``max_active_high_jobs`` — the same for ``priority: high`` jobs, which
  workers take before every other queue (count); **429**;
* ``key_max_problem_mb`` — the estimated memory of one job (MiB); **413**,
  like the workers' own cap ``max_problem_mb``, which applies as well.

A cap of 0 for a count means no cap.  With auth off everyone is
``anonymous`` and the caps apply to that one owner.  Every refusal is
problem+json naming the limit (``limit``), its value (``limit_value``) and
the key's current usage (``usage``).

Counting without races
----------------------
Each owner has a sorted set ``fixq:active:{owner}`` (and
``fixq:active-high:{owner}`` for high-priority jobs) of job ids, plus
*reservations* ``r:{token}:{n}`` scored by their expiry (ms).  One Lua script
(:meth:`ActiveJobs.reserve`) drops the ids whose job is no longer queued or
running and the lapsed reservations, counts the rest, and — only if the new
jobs fit — adds a reservation; Redis runs scripts one at a time, so twenty
concurrent submissions against a cap of 5 take exactly 5 slots.  Once the job
exists, :meth:`ActiveJobs.bind` swaps the reservation for its id; a
submission that fails calls :meth:`ActiveJobs.release`, and one whose API
process died is forgotten when its reservation lapses (``RESERVATION_S``).
Finished jobs need no bookkeeping: the next count notices their state.  (The
script reads job records by computed key names, which a single Redis server
allows; fixq, like RQ, does not run on Redis Cluster.)
"""

from __future__ import annotations

import secrets
import time
from dataclasses import dataclass
from typing import Any

import redis

from service.keys import ApiKey
from service.problems import Problem
from service.settings import Settings

__all__ = ["RESERVATION_S", "RETRY_AFTER_S", "ActiveJobs", "Quota", "Reservation", "check_problem_size", "quota_for"]

RETRY_AFTER_S = 30
"""``Retry-After`` of a 429, in seconds: a hint to back off, not a promise (common practice)."""
RESERVATION_S = 60.0
"""Seconds a slot taken for a job being created counts without the job's id (covers an API dying mid-way)."""

_MIB = 2**20


@dataclass(frozen=True)
class Quota:
    """The caps that apply to one key (0 for a count: no cap); ``own`` names those the key carries itself."""

    owner: str
    max_active_jobs: int
    max_active_high_jobs: int
    key_max_problem_mb: float
    own: frozenset[str] = frozenset()

    @property
    def tracked(self) -> bool:
        """False when neither count is capped: then active jobs are not counted at all."""
        return self.max_active_jobs > 0 or self.max_active_high_jobs > 0


def quota_for(settings: Settings, owner: str, key: ApiKey | None = None) -> Quota:
    """The settings' caps, with those ``key`` carries of its own in their place."""
    own = dict(key.limits) if key is not None else {}
    return Quota(
        owner=owner,
        max_active_jobs=int(own.get("max_active_jobs", settings.max_active_jobs)),
        max_active_high_jobs=int(own.get("max_active_high_jobs", settings.max_active_high_jobs)),
        key_max_problem_mb=float(own.get("max_problem_mb", settings.key_max_problem_mb)),
        own=frozenset(own),
    )


def check_problem_size(quota: Quota, estimate: dict[str, Any]) -> None:
    """Refuse (413) a job whose estimated memory is over the key's cap."""
    needed_mb = float(estimate.get("bytes", 0)) / _MIB
    if needed_mb <= quota.key_max_problem_mb:
        return
    whose = "this key's own cap" if "max_problem_mb" in quota.own else "the per-key cap key_max_problem_mb"
    message = (
        f"this problem needs about {needed_mb:,.1f} MiB ({estimate.get('states', 0):,} states × "
        f"{estimate.get('choices', 0):,} choices), over {whose} of {quota.key_max_problem_mb:g} MiB for key "
        f"{quota.owner!r}; use coarser grids or fewer choices, or ask the operator for a larger cap"
    )
    raise Problem(
        413,
        "too-large",
        message,
        title="problem too large",
        errors=[{"path": "model", "message": message}],
        limit="key_max_problem_mb",
        limit_value=quota.key_max_problem_mb,
        usage=round(needed_mb, 3),
        estimate=estimate,
    )


@dataclass(frozen=True)
class Reservation:
    """Slots taken by :meth:`ActiveJobs.reserve`; ``member`` is None when nothing is counted."""

    owner: str
    high: bool
    member: str | None


# KEYS 1 active zset, 2 active-high zset.  ARGV 1 job-hash key prefix, 2 now ms,
# 3 cap (0 none), 4 high cap (0 none), 5 '1' if the new jobs are high, 6 count,
# 7 reservation member ('' = only count), 8 reservation expiry ms.
_RESERVE = """
local now = tonumber(ARGV[2])
local function live(key)
  local n = 0
  local members = redis.call('ZRANGE', key, 0, -1, 'WITHSCORES')
  for i = 1, #members, 2 do
    local member, score = members[i], tonumber(members[i + 1])
    local weight = 0
    if string.sub(member, 1, 2) == 'r:' then
      if score > now then weight = tonumber(string.match(member, ':(%d+)$')) or 1 end
    else
      local state = redis.call('HGET', ARGV[1] .. member, 'state')
      if state == 'queued' or state == 'running' then weight = 1 end
    end
    if weight > 0 then n = n + weight else redis.call('ZREM', key, member) end
  end
  return n
end
local active, high = live(KEYS[1]), live(KEYS[2])
if ARGV[7] == '' then return {'usage', active, high} end
local count, cap, cap_high = tonumber(ARGV[6]), tonumber(ARGV[3]), tonumber(ARGV[4])
if cap > 0 and active + count > cap then return {'max_active_jobs', active, high} end
if ARGV[5] == '1' and cap_high > 0 and high + count > cap_high then
  return {'max_active_high_jobs', active, high}
end
redis.call('ZADD', KEYS[1], ARGV[8], ARGV[7])
if ARGV[5] == '1' then redis.call('ZADD', KEYS[2], ARGV[8], ARGV[7]) end
return {'ok', active, high}
"""


class ActiveJobs:
    """Race-safe counts of each owner's queued and running jobs (see the module docstring)."""

    def __init__(self, redis_client: redis.Redis, prefix: str = "fixq") -> None:
        self.redis = redis_client
        self.prefix = prefix
        self._reserve = redis_client.register_script(_RESERVE)

    def active_key(self, owner: str) -> str:
        return f"{self.prefix}:active:{owner}"

    def high_key(self, owner: str) -> str:
        return f"{self.prefix}:active-high:{owner}"

    def usage(self, owner: str) -> tuple[int, int]:
        """(queued and running jobs, of which priority high) of ``owner``, counting live reservations."""
        _, active, high = self._run(owner, cap=0, cap_high=0, high=False, count=0, member="", expiry_ms=0)
        return active, high

    def reserve(self, quota: Quota, *, high: bool, count: int = 1) -> Reservation:
        """Take ``count`` slots of ``quota.owner`` or raise the 429 :class:`~service.problems.Problem`."""
        if not quota.tracked:
            return Reservation(quota.owner, high, None)
        member = f"r:{secrets.token_hex(8)}:{int(count)}"
        expiry_ms = int((time.time() + RESERVATION_S) * 1000)
        outcome, active, high_active = self._run(
            quota.owner, cap=quota.max_active_jobs, cap_high=quota.max_active_high_jobs, high=high,
            count=count, member=member, expiry_ms=expiry_ms,
        )  # fmt: skip
        if outcome == "ok":
            return Reservation(quota.owner, high, member)
        raise _too_many(quota, outcome, active if outcome == "max_active_jobs" else high_active, count)

    def bind(self, reservation: Reservation, job_ids: list[str]) -> None:
        """Count ``job_ids`` in place of the reservation (in one transaction)."""
        if reservation.member is None:
            return
        keys = [self.active_key(reservation.owner)] + ([self.high_key(reservation.owner)] if reservation.high else [])
        with self.redis.pipeline(transaction=True) as pipe:
            for key in keys:
                if job_ids:
                    pipe.zadd(key, {job_id: 0 for job_id in job_ids})
                pipe.zrem(key, reservation.member)
            pipe.execute()

    def release(self, reservation: Reservation) -> None:
        """Give the slots back (the submission created no job)."""
        self.bind(reservation, [])

    def _run(
        self, owner: str, *, cap: int, cap_high: int, high: bool, count: int, member: str, expiry_ms: int
    ) -> tuple[str, int, int]:
        outcome, active, high_active = self._reserve(
            keys=[self.active_key(owner), self.high_key(owner)],
            args=[f"{self.prefix}:job:", int(time.time() * 1000), cap, cap_high, "1" if high else "0",
                  count, member, expiry_ms],
        )  # fmt: skip
        return (outcome.decode() if isinstance(outcome, bytes) else outcome), int(active), int(high_active)


def _too_many(quota: Quota, limit: str, usage: int, count: int) -> Problem:
    cap = quota.max_active_jobs if limit == "max_active_jobs" else quota.max_active_high_jobs
    whose = f"this key's own cap {limit}" if limit in quota.own else f"the per-key cap {limit}"
    what = "jobs" if limit == "max_active_jobs" else "priority-high jobs"
    asked = "a job" if count == 1 else f"{count} jobs"
    remedy = "wait for some to finish or cancel some, then submit again"
    if limit == "max_active_high_jobs":
        remedy += ", or submit with priority normal"
    never = count > cap  # a sweep larger than the cap: no wait makes it fit, so no Retry-After
    if never:
        remedy = (f"no wait makes {count} jobs at once fit a cap of {cap}: split the sweep, or chain it (\"chain\": "
                  "its jobs are then made one after another as slots free)")
    return Problem(
        429,
        "too-many-jobs",
        f"key {quota.owner!r} has {usage} {what} queued or running, and {whose} is {cap}: {asked} more would "
        f"exceed it; {remedy}",
        title="too many active jobs",
        headers=None if never else {"Retry-After": str(RETRY_AFTER_S)},
        limit=limit,
        limit_value=cap,
        usage=usage,
    )
