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
