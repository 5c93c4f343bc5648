"""A tag such as "Zürich" is accepted at the API, stored and shown as written, and found again by
``GET /v1/jobs?tag=`` (the filter's value composed, as tags are); a sweep's tags follow the same rule.
Before, every request here carrying "Zürich" was refused with 422: these tests failed."""

from __future__ import annotations

import unicodedata

import httpx
import pytest

from service import sweeps
from service.settings import Settings
from tests._documents import machine_shop
from tests.service._http import assert_problem
from worker.errors import InvalidDocument


def test_a_job_tagged_zurich_is_listed_by_that_tag_however_the_query_is_written(client: httpx.Client) -> None:
    response = client.post("/v1/jobs", json=machine_shop(tags=["Zürich", "東京"]))
    assert response.status_code == 202, response.text
    job = response.json()
    assert job["tags"] == ["Zürich", "東京"]
    client.post("/v1/jobs", json=machine_shop(tags=["Zurich"]))
    for written in ("Zürich", unicodedata.normalize("NFD", "Zürich")):
        listed = client.get("/v1/jobs", params={"tag": written}).json()["data"]
        assert [record["id"] for record in listed] == [job["id"]]
    assert client.get(f"/v1/jobs/{job['id']}").json()["tags"] == ["Zürich", "東京"]


def test_a_refused_tag_is_a_422_naming_the_tag_and_the_rule(client: httpx.Client) -> None:
    body = assert_problem(client.post("/v1/jobs", json=machine_shop(tags=["Zürich tour"])), 422)
    [error] = body["errors"]
    assert error["path"] == "tags[0]"
    assert "letters of any alphabet" in error["message"] and "character 7 is U+0020 (space)" in error["message"]


def test_a_sweep_takes_the_same_tags(settings: Settings) -> None:
    request = sweeps.parse_request({"base": machine_shop(), "vary": {"discount": [0.8, 0.9]}, "tags": ["Zürich"]},
                                   settings)
    assert request.tags == ["Zürich"]
    with pytest.raises(InvalidDocument) as info:
        sweeps.parse_request({"base": machine_shop(), "vary": {"discount": [0.8]}, "tags": ["a b"]}, settings)
    [error] = info.value.errors
    assert error["path"] == "tags[0]" and "letters of any alphabet" in error["message"]
    assert "character 2 is U+0020 (space)" in error["message"]
