"""fixq's settings: one class, read from ``FIXQ_*`` environment variables.

Every field names its unit (``_s`` seconds, ``_mb`` mebibytes) or says it in
its description.  ``get_settings()`` builds the object once per process; tests
that change the environment call ``get_settings.cache_clear()``.
"""

from __future__ import annotations

from functools import lru_cache
from pathlib import Path
from typing import Literal

from pydantic import Field
from pydantic_settings import BaseSettings, SettingsConfigDict

from worker.environment import DEFAULT_MAX_PROBLEM_MB

__all__ = ["Settings", "get_settings"]


class Settings(BaseSettings):
    """Configuration of the API, the workers and the embedded Redis server."""

    model_config = SettingsConfigDict(env_prefix="FIXQ_", extra="ignore")

    redis_url: str | None = Field(
        None,
        description="Redis URL, e.g. redis://host:6379/0. None: `fixq run` starts an embedded server.",
    )
    redis_prefix: str = Field("fixq", description="Prefix of every fixq key in Redis.", pattern=r"^[A-Za-z0-9_.-]+$")
    embedded_redis_dir: Path = Field(
        Path(".fixq/redis"), description="Data directory (append-only file, log) of the embedded Redis server."
    )
    embedded_redis_port: int | None = Field(
        None, ge=1, le=65535, description="Loopback port of the embedded Redis server; None picks a free one."
    )
    result_ttl_s: int = Field(
        604_800, gt=0, description="Lifetime of a stored result in seconds (7 days), from the job's end."
    )
    checkpoint_ttl_s: int = Field(
        172_800, gt=0, description="Lifetime of a checkpoint after its last save, in seconds (2 days)."
    )
    job_ttl_s: int = Field(
        2_592_000,
        gt=0,
        description="Lifetime of a finished job (done, failed or canceled) in seconds (30 days): its record, "
        "document and log, then its place in the listings; a sweep goes once all its jobs have. Queued and "
        "running jobs never expire. Keep it at least result_ttl_s: a result outliving its record is unreachable.",
    )
    lease_s: float = Field(
        15.0,
        gt=0,
        description="Lifetime of an execution's lease in seconds; renewed every lease_s/3. A job whose lease "
        "lapsed is taken to have lost its worker. Must exceed the longest single iteration or evaluation "
        "step of the solver.",
    )
    reaper_interval_s: float = Field(5.0, gt=0, description="Seconds between two passes of each worker's reaper.")
    progress_interval_s: float = Field(
        0.25, gt=0, description="Least seconds between two writes of progress and log entries to Redis."
    )
    stop_check_interval_s: float = Field(
        0.1, gt=0, description="Least seconds between two Redis checks for a cancel flag or a lost lease."
    )
    max_attempts: int = Field(5, ge=1, description="Executions a job may start before the reaper fails it.")
    job_timeout_s: int = Field(86_400, gt=0, description="RQ's hard limit on one execution, in seconds (24 h).")
    max_solve_s: float = Field(
        21_600.0,
        gt=0,
        description="Longest solve of one job in seconds (6 h): a job stops with status time_limit at the smaller "
        "of this and its solver.time_limit_s, so it bounds jobs that ask for no time limit. Must be at most "
        "job_timeout_s (with room for compiling and storing the result), or RQ kills the job first.",
    )
    idempotency_ttl_s: int = Field(86_400, gt=0, description="How long an Idempotency-Key is remembered, in seconds.")
    max_problem_mb: float = Field(
        float(DEFAULT_MAX_PROBLEM_MB),
        gt=0,
        description="Memory cap of one solve in MiB (2**20 bytes); larger estimates are refused.",
    )
    worker_log_level: str = Field("INFO", description="Log level of worker processes (DEBUG, INFO, WARNING, ...).")

    # Fields of the HTTP layer, the CLI and the dashboard are appended below.
    auth: bool = Field(
        True,
        description="Require an API key (Authorization: Bearer). FIXQ_AUTH=off turns it off; `fixq run` on "
        "loopback does so by default.",
    )
    host: str = Field("127.0.0.1", description="Address that `fixq api` and `fixq run` listen on.")
    port: int = Field(8000, ge=1, le=65535, description="TCP port that `fixq api` and `fixq run` listen on.")
    max_body_mb: float = Field(
        128.0, gt=0, description="Largest accepted request body in MiB (2**20 bytes); larger ones get 413."
    )
    sse_poll_s: float = Field(
        0.2, gt=0, description="Seconds between two Redis reads of a live log stream (SSE) per open stream."
    )

    # Fields of sweeps and webhooks.
    sweep_max_combinations: int = Field(
        10_000, ge=1, description="Most combinations (one job each) that one sweep may expand to (count)."
    )
    sweep_max_documents_mb: float = Field(
        1024.0,
        gt=0,
        description="Most MiB (2**20 bytes) of documents one sweep may store: combinations × the JSON size of its "
        "base document; larger sweeps get 413.",
    )
    notify_allow_hosts: str = Field(
        "",
        description="Comma-separated hosts that notify.url may name: exact names (hooks.lab.example), suffixes "
        "with a leading dot (.lab.example: its subdomains), IP addresses or CIDR blocks (192.0.2.0/24, a "
        "host name whose addresses all lie inside them). Empty (the default): no webhooks are allowed.",
    )
    notify_allow_private: bool = Field(
        False,
        description="Also allow webhook targets whose addresses are loopback, private or not globally routable "
        "(tests, closed lab networks). Link-local (cloud metadata), multicast, unspecified and reserved "
        "addresses stay refused.",
    )
    notify_timeout_s: float = Field(
        5.0,
        gt=0,
        description="Seconds one webhook attempt may spend on each of connecting, sending and waiting for the answer.",
    )
    notify_retry_delays_s: list[float] = Field(
        [1.0, 5.0, 30.0, 120.0, 600.0],
        min_length=1,
        description="Seconds to wait before each retry of a failed webhook delivery, in order (the last one "
        "repeats); JSON in the environment, e.g. FIXQ_NOTIFY_RETRY_DELAYS_S='[1, 5, 30]'.",
    )
    notify_max_attempts: int = Field(
        6,
        ge=1,
        description="Attempts at delivering one webhook (the first and its retries) before it is given up (count).",
    )
    notify_poll_s: float = Field(
        0.5, gt=0, description="Seconds an idle notifier thread waits before it looks again for due webhook deliveries."
    )

    # Fields of API keys and the per-key limits of a shared queue.
    worker_class: Literal["simple", "forking"] = Field(
        "simple",
        description="How `fixq worker` runs jobs: `simple` runs each job in the worker process itself, so "
        "compiled kernels stay loaded between jobs (fast for many small jobs; a crash in a job ends the worker "
        "and the reaper requeues its job); `forking` runs each job in a forked work-horse (RQ's default; a "
        "crash ends only the work-horse, but every job pays the fork and the kernel loading).",
    )
    allow_open_network: bool = Field(
        False,
        description="Let `fixq api` serve with auth off on an address that is not loopback: the second "
        "confirmation FIXQ_AUTH=off needs there (the same as its --allow-open-network flag).",
    )
    max_active_jobs: int = Field(
        1000,
        ge=0,
        description="Most jobs one key may have queued or running at once (count; 0: no cap); more are refused "
        "with 429. A key may carry its own cap (`fixq keys add NAME --max-active-jobs N`).",
    )
    max_active_high_jobs: int = Field(
        20,
        ge=0,
        description="Most `priority: high` jobs one key may have queued or running at once (count; 0: no cap); "
        "more are refused with 429. A key may carry its own cap (`--max-active-high-jobs N`).",
    )
    key_max_problem_mb: float = Field(
        1024.0,
        gt=0,
        description="Memory cap of one job of one key in MiB (2**20 bytes), on the admission estimate; larger "
        "ones get 413. A key may carry its own cap (`--max-problem-mb MB`); max_problem_mb, the workers' "
        "cap, applies to every key as well.",
    )
    key_max_running_jobs: int = Field(
        0,
        ge=0,
        description="Most jobs of one key that workers run at once (count; 0: half the live workers, "
        "rounded up; not applied with auth off, where every job is one owner's); the key's other jobs wait while "
        "workers serve the other keys in turn. A key may carry "
        "its own cap (`fixq keys add NAME --max-running-jobs N`).",
    )
    dispatch_wait_s: float = Field(
        5.0,
        gt=0,
        description="Seconds a free worker waits for a slot when every key with queued jobs is at its "
        "key_max_running_jobs, before it puts its ticket back on the queue (at most lease_s/2).",
    )

    # Fields of request bodies and webhook delivery concurrency.
    max_inline_elements: int = Field(
        1_000_000,
        ge=1,
        description="Most values one request body may write out inline in JSON arrays and objects (count, "
        "measured as the commas, [ and { outside strings); larger arrays must come packed ({dtype, shape, "
        "base64}). More get 413 before the body is parsed.",
    )
    notify_workers: int = Field(
        8, ge=1, description="Most webhook deliveries one notifier thread makes at once, over all targets (count)."
    )
    notify_per_target: int = Field(
        2,
        ge=1,
        description="Most webhook deliveries one notifier makes at once to one target (host and port; count), "
        "so a slow or dead receiver delays only its own deliveries.",
    )

    # Fields of workers riding out a Redis outage, and their liveness.
    redis_retry_s: float = Field(
        600.0,
        gt=0,
        description="Seconds a worker keeps retrying, with backoff, the final writes of a finished solve "
        "(its result or state) while Redis is unreachable, before it leaves the job to the reaper.",
    )
    worker_restart_max_s: float = Field(
        10.0,
        gt=0,
        description="Longest wait in seconds before `fixq worker` restarts its RQ worker process after it "
        "exited unexpectedly (the wait doubles from 0.5 s up to this); a recycled process restarts at once.",
    )
    worker_beacon_s: float = Field(
        5.0,
        gt=0,
        description="Seconds between two liveness beacons of a worker process; /healthz counts the workers "
        "heard from within the last three intervals.",
    )


@lru_cache(maxsize=1)
def get_settings() -> Settings:
    """The process-wide settings, read from the environment on first use."""
    return Settings()
