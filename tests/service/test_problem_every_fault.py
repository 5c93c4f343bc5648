"""A 422 problem lists every fault at once: an unknown key no longer hides an unknown name in an expression
elsewhere (before, `POST /v1/check` and `POST /v1/jobs` named only the typo; this test failed)."""

from __future__ import annotations

import httpx
import pytest

from service.store import JobStore
from tests._documents import plant_capacity
from tests.service._http import assert_problem


@pytest.mark.parametrize("route", ["/v1/check", "/v1/jobs"])
def test_a_typo_and_an_unknown_name_come_back_in_one_problem(
    client: httpx.Client, store: JobStore, route: str
) -> None:
    document = plant_capacity()
    document["model"]["statez"] = document["model"].pop("states")
    document["model"]["reward"] += " * gama"
    document["model"]["define"]["sales"] = "min(capacity, demand) +"
    body = assert_problem(client.post(route, json=document), 422)
    by_path = {error["path"]: error["message"] for error in body["errors"]}
    assert "did you mean `states`?" in by_path["model.statez"]
    assert by_path["model.reward"].startswith("unknown name `gama`")
    assert by_path["model.define.sales"].startswith("syntax error at column 23: the expression ends with `+`")
    assert store.queue_depths()["normal"] == 0
