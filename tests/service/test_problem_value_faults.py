"""A 422 problem lists a bad state value, an unknown name in the reward and a bad shock spec at once (before,
the bad value hid the unknown name: `POST /v1/check` and `POST /v1/jobs` named two faults; this test failed)."""

from __future__ import annotations

import httpx
import pytest

from service.store import JobStore
from tests._documents import plant_capacity
from tests.service._http import assert_problem


@pytest.mark.parametrize("route", ["/v1/check", "/v1/jobs"])
def test_a_bad_state_value_hides_no_unknown_name(client: httpx.Client, store: JobStore, route: str) -> None:
    document = plant_capacity()
    document["model"]["states"]["capacity"]["min"] = 20.0
    document["model"]["reward"] += " * gama"
    document["model"]["shocks"]["demand"]["ar1"]["sigma"] = -0.1
    body = assert_problem(client.post(route, json=document), 422)
    paths = [error["path"] for error in body["errors"]]
    assert sorted(paths) == ["model.reward", "model.shocks.demand.ar1.sigma", "model.states.capacity.max"], paths
    by_path = {error["path"]: error["message"] for error in body["errors"]}
    assert by_path["model.reward"].startswith("unknown name `gama`")
    assert store.queue_depths()["normal"] == 0
