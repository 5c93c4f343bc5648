"""Jobs in Redis: the records, documents, results, logs and checkpoints of fixq.

This package is the public entry: import ``JobStore`` and friends from
``service.store``.  Inside, ``layout`` names the keys and states, ``scripts``
holds the Lua transitions, ``jobs`` the records and listings, and
``execution`` the writes an execution makes under its lease.

Public API (for the HTTP layer, the CLI and the dashboard)
----------------------------------------------------------
``JobStore(redis, settings)`` — ``redis`` a ``redis.Redis`` with
``decode_responses=False`` (``connect(settings)`` makes one;
``JobStore.from_settings()`` both).  Every method taking a job id answers
``None`` (or an empty list) for an id that is not 16 lowercase hex characters
without touching Redis.

* ``create_job(raw_document, *, owner, estimate, document_hash, priority=None,
  idempotency_key=None, enqueue=True, job_id=None) -> record`` stores the record
  and the document and enqueues the first execution (``service.queue``); the
  job gets ``job_id`` if given (an ``Idempotency-Key`` claim names it in
  advance), else a fresh id.  ``label``,
  ``tags`` and ``priority`` are read from the document (``priority`` argument
  wins; default ``normal``).  With an ``idempotency_key`` already used by the
  same owner within ``idempotency_ttl_s``, nothing is created and that earlier
  job's record is returned.
* ``get_job(id) -> record | None``; ``get_document(id) -> dict | None``;
  ``get_result(id) -> dict | None`` (``None`` until ``done``, and after
  ``result_ttl_s``); ``get_log(id, start=0, limit=1000) -> list[dict]``,
  ``log_length(id) -> int`` and ``log_dropped(id) -> int`` (iterations the
  bounded log no longer holds; see ``worker.convergence_log``).
* ``list_jobs(*, owner=None, state=None, tag=None, label=None, cursor=None,
  limit=50) -> (records, next_cursor)``: newest first.  ``owner=None`` lists
  every owner's jobs; ``state`` is one state or a list of them; ``tag`` (composed, NFC) must
  be among the job's tags; ``label`` must equal the job's label.  ``cursor``
  is the opaque ``next_cursor`` of the previous page (``ValueError`` if
  malformed); ``next_cursor`` is ``None`` after the last page.  A page may hold
  fewer than ``limit`` records while ``next_cursor`` is not ``None`` (at most
  ``LIST_SCAN_LIMIT`` jobs are examined per call).
* ``request_cancel(id) -> {"outcome", "job"} | None``: ``outcome`` is
  ``"canceled"`` (the job was queued: it left its RQ queue and is ``canceled``
  now), ``"cancel_requested"`` (it is running: the solver stops at its next
  iteration, then the job is ``canceled``), or ``"unchanged"`` (it was already
  ``done``, ``failed`` or ``canceled``); ``job`` is the record after the call.
* ``counts_by_state() -> {state: n}``, ``queue_depths() -> {priority: n}``,
  ``solve_histograms() -> {"seconds"|"iterations": {"buckets": [(upper_bound,
  cumulative_count), ..., (inf, count)], "sum", "count"}}`` (Prometheus
  shape; recorded once per ``done`` job by the worker), ``ping() -> bool``.
* ``key(*parts) -> str``: a key under the fixq prefix, for other resources.
* ``forget_expired(now=None) -> [id]``: drops jobs whose record expired from
  the listings and the state sets (the reaper calls it).

A write Redis refuses at ``maxmemory`` raises ``redis.exceptions.OutOfMemoryError``,
from a Lua script as from a plain command (``layout.register_script``).

Lifetimes: a queued or running job never expires.  When a job ends (``done``,
``failed`` or ``canceled``, whichever script ends it) its record, document
and log get a TTL of ``job_ttl_s``, its result one of ``result_ttl_s``; its
checkpoint, lease and cancel flag are deleted.  ``forget_expired`` then
removes it from ``fixq:jobs``, the owner's listing and the state sets.

The job record (JSON)::

    {"id", "state", "label", "tags", "owner", "priority",
     "submitted_at", "started_at", "finished_at",      # ISO-8601 UTC or null
     "attempts", "progress": {"iteration", "distance", "error_bound", "seconds"} | null,
     "estimate", "status", "iterations", "error_bound",
     "search": {"status", "unknowns", "residuals", "trials"} | null,   # a search's summary
     "error": {"title", "detail", "errors"} | null,
     "links": {"self", "result", "log"}}

States: ``queued → running → done | failed | canceled``; ``running → queued``
when the reaper requeues a job whose execution died; ``queued → canceled``.

Keys (prefix ``fixq``, setting ``FIXQ_REDIS_PREFIX``)
---------------------------------------------------
==========================  ======  ==================================================
``fixq:job:{id}``           hash    the record; JSON-encoded where not a string, plus
                                    ``worker`` (host:pid of the last execution),
                                    ``rq_job`` (its ticket, ``service.dispatch``), ``enqueues``,
                                    ``enqueued_at`` (ms), ``document_hash``,
                                    ``log_dropped`` and ``log_stride`` (the log's
                                    bound); TTL ``job_ttl_s`` once the job is finished
``fixq:doc:{id}``           string  the submitted document, zlib-compressed JSON;
                                    TTL ``job_ttl_s`` once the job is finished
``fixq:result:{id}``        string  the result, zlib-compressed JSON, ``SET NX`` once,
                                    TTL ``result_ttl_s``
``fixq:log:{id}``           list    log entries (JSON), at most one per iteration, in
                                    order, bounded as ``worker.convergence_log``
                                    says; TTL ``job_ttl_s`` once the job is finished
``fixq:ckpt:{id}``          string  ``fixq-ckpt:{iteration}\\n`` + the checkpoint
                                    payload; TTL ``checkpoint_ttl_s``
``fixq:lease:{id}``         string  token of the execution owning the job, TTL ``lease_s``
``fixq:cancel:{id}``        string  present when a cancel was requested
``fixq:jobs``               zset    every job id scored by submission time (ms)
``fixq:jobs:owner:{owner}`` zset    the same per owner
``fixq:owners``             set     every owner that submitted a job
``fixq:state:{state}``      set     the job ids in each state
``fixq:idem:{owner}:{h}``   string  job id of an Idempotency-Key (``h`` its SHA-256);
                                    TTL ``idempotency_ttl_s``
``fixq:metrics:solve_*``    hash    histogram buckets (``seconds``, ``iterations``)
``fixq:reaper:lock``        string  the reaper's pass lock
==========================  ======  ==================================================

Execution API (for ``service.task`` and ``service.reaper`` only)
---------------------------------------------------------------
Writes made on behalf of an execution take its lease ``token`` and are Lua
scripts that do nothing unless the lease still holds that token: ``claim``,
``renew_lease``, ``release_lease``, ``stop_signals``, ``write_log``,
``save_checkpoint``, ``load_checkpoint``, ``finish``.  The reaper's
transitions, ``requeue_abandoned`` and ``rescue_lost``, are compare-and-set
scripts that act only on a job whose lease has lapsed.
"""

from service.store.jobs import JobStore
from service.store.layout import (
    JOB_STATES,
    LIST_SCAN_LIMIT,
    SOLVE_ITERATION_BUCKETS,
    SOLVE_SECONDS_BUCKETS,
    TERMINAL_STATES,
    Keys,
    connect,
    is_job_id,
)

__all__ = [
    "JOB_STATES",
    "LIST_SCAN_LIMIT",
    "SOLVE_ITERATION_BUCKETS",
    "SOLVE_SECONDS_BUCKETS",
    "TERMINAL_STATES",
    "JobStore",
    "Keys",
    "connect",
    "is_job_id",
]
