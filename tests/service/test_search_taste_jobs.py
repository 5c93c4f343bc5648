"""A search on a model with taste shocks through ``/v1/jobs``: the job record carries its summary.

The execution is the real ``service.task.run_job`` in the test process (``run_inline``), on the private Redis
server of the fixtures.  The model is an invented dock worker (written again here: test modules do not import
each other; ``tests/worker/test_search_taste.py`` checks its numbers against plain numpy and scipy's brentq).
"""

from __future__ import annotations

import httpx

from tests.service._http import run_inline
from worker import solve

DOCK = {
    "kind": "grid",
    "params": {"effort": 0.5, "cost": 0.3, "benefit": 0.6},
    "states": {"h": {"min": 0, "max": 4, "points": 5}, "was": {"min": 0, "max": 1, "points": 2}},
    "shocks": {"z": {"markov": {"values": [0.8, 1.4], "matrix": [[0.7, 0.3], [0.4, 0.6]]}, "transform": "none"}},
    "choices": {"work": {"values": [0, 1]}},
    "next": {"h": "where(work > 0, min(h + 1, 4), max(h - 1, 0))", "was": "work"},
    "define": {"switch": "abs(work - was)", "income": "where(work > 0, (1 + 0.25 * h) * z, benefit)"},
    "reward": "income - effort * work - cost * switch",
    "taste_shocks": {"scale": 0.5},
}
"""Invented: a dock worker who works (or not) each day, with a cost of changing yesterday's choice."""


def test_a_taste_shock_search_job_records_its_answer_in_the_job_record(client: httpx.Client) -> None:
    search = {"unknowns": {"cost": {"min": 0.0, "max": 3.0}}, "conditions": ["mass(switch > 0) - 0.15"],
              "tolerance": 1e-9}
    document = {"version": 1, "discount": 0.9, "solver": {"method": "howard", "tolerance": 1e-10},
                "model": {**DOCK, "params": {**DOCK["params"], "effort": 0.4}}, "search": search}
    response = client.post("/v1/jobs", json=document)
    assert response.status_code == 202, response.text
    job_id = response.json()["id"]
    assert run_inline(job_id)["outcome"] == "done"
    record = client.get(f"/v1/jobs/{job_id}").json()
    result = client.get(f"/v1/jobs/{job_id}/result").json()
    # The HTTP answer is the in-process front door's answer (worker.solve).
    expected = solve(document)["search"]
    assert expected["status"] == "converged"
    assert result["search"]["unknowns"] == expected["unknowns"]
    assert record["search"] == {"status": "converged", "unknowns": expected["unknowns"],
                                "residuals": expected["residuals"], "trials": len(expected["trials"])}
    # The stationary report's mean of the define is the condition's mass (a 0/1 define: the same pairs).
    assert abs(result["stationary"]["means"]["switch"] - 0.15) <= 1e-9
    assert "choice_probabilities" in result
