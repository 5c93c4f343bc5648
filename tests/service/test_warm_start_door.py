"""A warm start whose earlier job's axes do not fit is refused at the door (422 at ``solver.initial.job``),
for a job and once for a sweep, with nothing queued; the starts the solve accepts still pass and solve.

Executions are the real ``service.task.run_job`` in the test process (``tests.service._http.run_inline``).
"""

from __future__ import annotations

import copy

import httpx
import pytest

from service.store import JobStore
from service.store import execution as store_execution
from tests._documents import LQ, grid_document, machine_shop
from tests.service._http import assert_problem, run_inline

PATH = "solver.initial.job"

LQ_Y = {**LQ, "states": {"y": LQ["states"]["x"]}, "next": {"y": "a * y + b * u"}, "reward": "-(q * y**2 + r * u**2)"}
"""The linear–quadratic test model with its state called y (invented)."""


def done_job(client: httpx.Client, document: dict) -> str:
    response = client.post("/v1/jobs", json=document)
    assert response.status_code == 202, response.text
    job_id = response.json()["id"]
    assert run_inline(job_id)["outcome"] == "done"
    return job_id


def queued(store: JobStore) -> int:
    return sum(store.queue_depths().values())


def test_another_state_name_is_refused_at_the_door_and_nothing_is_queued(client: httpx.Client,
                                                                          store: JobStore) -> None:
    earlier = done_job(client, grid_document(LQ))
    body = assert_problem(client.post("/v1/jobs", json=grid_document(LQ_Y, initial={"job": earlier})), 422)
    assert [error["path"] for error in body["errors"]] == [PATH]
    assert "lacks axes ['y']" in body["errors"][0]["message"]
    assert "has axes ['x']" in body["errors"][0]["message"]
    assert queued(store) == 0 and store.counts_by_state().get("queued", 0) == 0


def test_a_start_from_a_reused_job_is_checked_as_from_the_earlier_one(client: httpx.Client, store: JobStore) -> None:
    # The same document again is answered from the solved one (a reused job, no execution of its own): its record
    # copies the axes summary, so a warm start from it is refused at the door too.
    earlier = done_job(client, grid_document(LQ))
    again = client.post("/v1/jobs", json=grid_document(LQ))
    assert again.status_code in (200, 201), again.text
    reused = again.json()["id"]
    assert reused != earlier and again.json().get("reused_from") == earlier
    body = assert_problem(client.post("/v1/jobs", json=grid_document(LQ_Y, initial={"job": reused})), 422)
    assert [error["path"] for error in body["errors"]] == [PATH] and "lacks axes ['y']" in body["errors"][0]["message"]


def test_a_sweep_whose_base_starts_from_another_state_name_is_refused_once(client: httpx.Client,
                                                                          store: JobStore) -> None:
    earlier = done_job(client, grid_document(LQ))
    sweep = {"base": grid_document(LQ_Y, initial={"job": earlier}), "vary": {"model.params.a": [0.9, 0.95]}}
    body = assert_problem(client.post("/v1/sweeps", json=sweep), 422)
    assert [error["path"] for error in body["errors"]] == [f"base.{PATH}"]
    assert "lacks axes ['y']" in body["errors"][0]["message"]
    assert queued(store) == 0


def test_a_missing_tabular_label_is_refused_at_the_door(client: httpx.Client, store: JobStore) -> None:
    earlier = done_job(client, machine_shop())
    later = machine_shop(solver={"initial": {"job": earlier}})
    later["model"]["states"] = ["new", "worn", "scrapped"]
    body = assert_problem(client.post("/v1/jobs", json=later), 422)
    assert [error["path"] for error in body["errors"]] == [PATH]
    assert "has no entry for ['scrapped']" in body["errors"][0]["message"]
    assert queued(store) == 0


def test_starts_the_solve_accepts_still_pass_and_solve(client: httpx.Client, store: JobStore) -> None:
    earlier = done_job(client, grid_document(LQ))
    finer = copy.deepcopy(LQ)
    finer["states"]["x"]["points"] = 21
    finer["params"]["a"] = 0.9
    warm = done_job(client, grid_document(finer, initial={"job": earlier}))
    assert store.get_result(warm)["status"] == "converged"
    sweep = {"base": grid_document(LQ, initial={"job": earlier}), "vary": {"model.params.r": [0.4, 0.6]}}
    response = client.post("/v1/sweeps", json=sweep)
    assert response.status_code == 202, response.text
    rows = client.get(f"/v1/sweeps/{response.json()['id']}", params={"limit": 100}).json()["rows"]["data"]
    assert len(rows) == 2 and all(run_inline(row["job"])["outcome"] == "done" for row in rows)
    shop = done_job(client, machine_shop())
    reordered = machine_shop(solver={"initial": {"job": shop}})
    reordered["model"]["states"] = ["broken", "new", "worn"]
    assert store.get_result(done_job(client, reordered))["status"] == "converged"


def test_a_job_without_a_kept_summary_is_left_to_the_worker(client: httpx.Client, store: JobStore,
                                                             monkeypatch: pytest.MonkeyPatch) -> None:
    # A summary over the cap is not kept (as for jobs finished before summaries were kept): the door lets
    # the start through and the run refuses it with the same words.
    monkeypatch.setattr(store_execution, "RESULT_AXES_MAX_BYTES", 10)
    earlier = done_job(client, machine_shop())
    assert store.result_axes(earlier) is None
    later = machine_shop(solver={"initial": {"job": earlier}})
    later["model"]["states"] = ["new", "worn", "scrapped"]
    response = client.post("/v1/jobs", json=later)
    assert response.status_code == 202, response.text
    assert run_inline(response.json()["id"])["outcome"] == "failed"
    error = store.get_job(response.json()["id"])["error"]["errors"][0]
    assert error["path"] == PATH and "has no entry for ['scrapped']" in error["message"]
