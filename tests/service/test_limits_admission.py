"""The door refuses grid models whose kernels would be too large to compile, before anything is queued."""

from __future__ import annotations

import httpx
import pytest

from service.store import JobStore
from tests._documents import drifting
from tests.service._http import assert_problem
from worker.kernel_limits import MAX_INTERPOLATION_CORNERS


@pytest.mark.parametrize("route", ["/v1/check", "/v1/jobs"])
def test_too_many_interpolation_corners_are_refused_at_the_door(
    client: httpx.Client, store: JobStore, route: str
) -> None:
    body = assert_problem(client.post(route, json=drifting(12, 2)), 413)
    error = body["errors"][0]
    assert error["path"] == "model.next"
    assert "4,096 grid points at every (point, choice point) pair" in error["message"]
    assert f"at most {MAX_INTERPOLATION_CORNERS}" in error["message"]
    assert store.counts_by_state()["queued"] == 0


def test_the_estimate_reports_the_compile_cost(client: httpx.Client) -> None:
    response = client.post("/v1/check", json=drifting(3, 4))
    assert response.status_code == 200
    estimate = response.json()["estimate"]
    assert estimate["compile_bytes"] > 0 and estimate["compile_seconds"] > 0


@pytest.mark.parametrize("route", ["/v1/check", "/v1/jobs"])
def test_taste_shock_tables_over_the_budget_are_refused_at_the_door(
    client: httpx.Client, store: JobStore, route: str
) -> None:
    # 40,000 points x 1,000 choices: every pair's value is needed with taste shocks, far over any budget.
    document = {
        "version": 1,
        "discount": 0.9,
        "model": {
            "kind": "grid",
            "states": {"stock": {"min": 0.0, "max": 1.0, "points": 40_000}},
            "choices": {"order": {"min": 0.0, "max": 1.0, "points": 1_000}},
            "next": {"stock": "0.5 * stock + 0.5 * order"},
            "reward": "stock - order",
            "taste_shocks": {"scale": 0.1},
        },
    }
    body = assert_problem(client.post(route, json=document), 413)
    assert body["errors"][0]["path"] == "model.taste_shocks"
    assert "40,000,000 (point, choice) pairs" in body["errors"][0]["message"]
    assert store.counts_by_state()["queued"] == 0
