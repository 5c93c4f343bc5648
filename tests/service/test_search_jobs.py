"""A search through ``/v1/jobs``: the job record carries its summary; a bracket with no root fails saying so.

The executions are the real ``service.task.run_job`` in the test process (``run_inline``), on the private
Redis server of the fixtures.  The document is the invented economy of ``tests/worker/test_search.py``
(written again here: test modules do not import each other).
"""

from __future__ import annotations

import threading
import time
from typing import Any

import httpx
import pytest

from tests._documents import savings_market
from tests.service._http import run_inline
from worker import search_trials, solve

MARKET = {"unknowns": {"r": {"min": 0.0, "max": 0.05}}, "conditions": ["mean(a) - capital_demand"],
          "tolerance": 1e-6}


def _document(search: dict) -> dict:
    """Invented: households saving in `a` (continuous choice), income from a two-state chain, a Cobb-Douglas
    firm's wage and capital demand as params given as expressions of r."""
    return {
        "version": 1, "discount": 0.95, "solver": {"method": "howard", "tolerance": 1e-10}, "search": search,
        "model": savings_market(),
    }


def _submit(client: httpx.Client, document: dict) -> str:
    response = client.post("/v1/jobs", json=document)
    assert response.status_code == 202, response.text
    return response.json()["id"]


def test_a_search_job_records_its_answer_in_the_job_record(client: httpx.Client) -> None:
    document = _document(MARKET)
    job_id = _submit(client, document)
    assert run_inline(job_id)["outcome"] == "done"
    record = client.get(f"/v1/jobs/{job_id}").json()
    result = client.get(f"/v1/jobs/{job_id}/result").json()
    # The HTTP answer is the in-process front door's answer (worker.solve).
    expected = solve(document)["search"]
    assert result["search"]["unknowns"] == expected["unknowns"]
    assert record["search"] == {"status": "converged", "unknowns": expected["unknowns"],
                                "residuals": expected["residuals"], "trials": len(expected["trials"])}
    entries = client.get(f"/v1/jobs/{job_id}/log", params={"limit": 100}).json()["data"]
    assert [entry["search_trial"]["unknowns"] for entry in entries] == [row["unknowns"] for row in expected["trials"]]


def test_a_search_without_a_root_fails_naming_the_ends(client: httpx.Client) -> None:
    job_id = _submit(client, _document({**MARKET, "unknowns": {"r": {"min": 0.0, "max": 0.02}}}))
    assert run_inline(job_id)["outcome"] == "failed"
    record = client.get(f"/v1/jobs/{job_id}").json()
    (error,) = record["error"]["errors"]
    assert error["path"] == "search.unknowns.r" and "no root in the bracket" in error["message"]
    # The record carries the search's summary too: the trials made (from the document's r towards the root,
    # then the bracket's two ends) and the last one.
    entries = client.get(f"/v1/jobs/{job_id}/log", params={"limit": 100}).json()["data"]
    rows = [entry["search_trial"] for entry in entries]
    assert rows[0]["unknowns"]["r"] == 0.01  # the document's r, 0.02, is an end of the bracket: its midpoint
    assert [row["unknowns"]["r"] for row in rows[-2:]] == [0.0, 0.02]
    assert all(0.0 <= row["unknowns"]["r"] <= 0.02 for row in rows)
    assert record["search"] == {"status": "no_root", "unknowns": rows[-1]["unknowns"],
                                "residuals": rows[-1]["residuals"], "trials": len(rows)}


def test_a_canceled_search_keeps_its_trials_in_the_job_record(client: httpx.Client,
                                                               monkeypatch: pytest.MonkeyPatch) -> None:
    """DELETE on a running search: the job ends ``canceled`` and its record carries the trials made so far
    (status ``canceled``, never ``converged``; the last trial's unknowns and residuals), as the log holds them.
    The third trial waits until the cancel is sent, so the test does not race the search."""
    original = search_trials.TrialModels.solve
    calls: list[tuple[float, ...]] = []
    third, canceled = threading.Event(), threading.Event()

    def held(self: Any, xs: tuple[float, ...], *args: Any, **kwargs: Any) -> Any:
        calls.append(xs)
        if len(calls) == 3:
            third.set()
            assert canceled.wait(30)
            time.sleep(0.2)  # past stop_check_interval_s (0.1 s), so that the next check asks Redis
        return original(self, xs, *args, **kwargs)

    monkeypatch.setattr(search_trials.TrialModels, "solve", held)
    job_id = _submit(client, _document(MARKET))
    outcome: dict[str, Any] = {}
    runner = threading.Thread(target=lambda: outcome.update(run_inline(job_id)))
    runner.start()
    try:
        assert third.wait(60)
        assert client.delete(f"/v1/jobs/{job_id}").status_code == 202
    finally:
        canceled.set()
        runner.join(60)
    assert outcome["outcome"] == "canceled"
    record = client.get(f"/v1/jobs/{job_id}").json()
    assert record["state"] == "canceled"
    rows = [entry["search_trial"] for entry in
            client.get(f"/v1/jobs/{job_id}/log", params={"limit": 100}).json()["data"]]
    assert len(rows) == 2 and [row["unknowns"]["r"] for row in rows] == [xs[0] for xs in calls[:2]]
    assert record["search"] == {"status": "canceled", "unknowns": rows[-1]["unknowns"],
                                "residuals": rows[-1]["residuals"], "trials": 2}
