"""An API that dies between creating a job and naming it under its Idempotency-Key makes no second job.

The crash is simulated in process: the step that turns the key's pending
claim into the job id raises, as if the API process died right there, and
the claim is then left older than ``CLAIM_S`` (the time after which a claim
whose request died may be taken over).  A retry with the same key and body
must answer the first job, and nothing may be queued twice.
"""

from __future__ import annotations

import time
import types

import httpx
import pytest

from service import resubmission
from service.store import JobStore
from tests._documents import print_shop


class Crash(Exception):
    """Stands for the API process dying."""


def crash(*args: object, **kwargs: object) -> None:
    raise Crash


def later(store: JobStore, monkeypatch: pytest.MonkeyPatch, seconds: float) -> None:
    """Make it ``seconds`` later for the idempotency keys: their Redis TTLs and the clock resubmission reads."""
    for key in store.redis.scan_iter(match=store.key("idempotency", "*")):
        if 0 <= store.redis.ttl(key) <= seconds:
            store.redis.delete(key)
    clock = types.SimpleNamespace(time=lambda: time.time() + seconds, monotonic=time.monotonic, sleep=time.sleep)
    monkeypatch.setattr(resubmission, "time", clock)


def queued_tickets(store: JobStore) -> int:
    return sum(store.queue_depths().values())


def test_a_crash_before_the_key_names_the_job_makes_no_second_job(
    client: httpx.Client, store: JobStore, monkeypatch: pytest.MonkeyPatch
) -> None:
    headers = {"Idempotency-Key": "nightly-2026-12-04"}
    with monkeypatch.context() as patch:
        patch.setattr(resubmission.IdempotencyKeys, "complete", crash)
        # The request never answers its client (here: a 500).
        assert client.post("/v1/jobs", json=print_shop(), headers=headers).status_code == 500
    created = store.job_ids_in_state("queued")
    assert len(created) == 1
    tickets = queued_tickets(store)
    # The client retries after the dead request's claim is older than CLAIM_S.
    later(store, monkeypatch, resubmission.CLAIM_S + 1)

    retry = client.post("/v1/jobs", json=print_shop(), headers=headers)

    assert retry.status_code == 202, retry.text
    assert retry.json()["id"] == created[0]
    assert retry.headers["Idempotent-Replayed"] == "true"
    assert store.counts_by_state()["queued"] == 1 and sum(store.counts_by_state().values()) == 1
    assert queued_tickets(store) == tickets
    again = client.post("/v1/jobs", json=print_shop(), headers=headers)
    assert again.json()["id"] == created[0]


def test_a_request_that_failed_after_creating_its_job_leaves_the_key_naming_it(
    client: httpx.Client, store: JobStore, monkeypatch: pytest.MonkeyPatch
) -> None:
    headers = {"Idempotency-Key": "nightly-2026-12-05"}
    with monkeypatch.context() as patch:
        # Creation succeeded, then a later step of the request failed (and the key was "abandoned").
        patch.setattr(resubmission.SolvedJobs, "remember", crash)
        assert client.post("/v1/jobs", json=print_shop(), headers=headers).status_code == 500
    created = store.job_ids_in_state("queued")
    assert len(created) == 1
    retry = client.post("/v1/jobs", json=print_shop(), headers=headers)
    assert retry.status_code == 202 and retry.json()["id"] == created[0]
    assert sum(store.counts_by_state().values()) == 1


def test_a_claim_whose_request_died_before_creating_a_job_is_taken_over(
    client: httpx.Client, store: JobStore, monkeypatch: pytest.MonkeyPatch
) -> None:
    headers = {"Idempotency-Key": "nightly-2026-12-06"}
    with monkeypatch.context() as patch:
        patch.setattr(resubmission.SolvedJobs, "find", crash)
        patch.setattr(resubmission.IdempotencyKeys, "abandon", lambda self, claim: None)
        assert client.post("/v1/jobs", json=print_shop(), headers=headers).status_code == 500
    assert sum(store.counts_by_state().values()) == 0
    later(store, monkeypatch, resubmission.CLAIM_S + 1)
    retry = client.post("/v1/jobs", json=print_shop(), headers=headers)
    assert retry.status_code == 202 and "Idempotent-Replayed" not in retry.headers
    assert store.job_ids_in_state("queued") == [retry.json()["id"]]
