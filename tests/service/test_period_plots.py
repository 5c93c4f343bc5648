"""Pictures of a tabular model with a finite horizon (value and policy by period and state)."""

from __future__ import annotations

import xml.etree.ElementTree as ET
from collections.abc import Iterator

import httpx
import pytest

from service.store import JobStore
from service.task import run_job
from tests._documents import idle_busy_worn
from tests.service._plot_app import plots_app
from worker.document import document_hash, parse_document
from worker.estimate import estimate


@pytest.fixture
def plot_app(store: JobStore, monkeypatch: pytest.MonkeyPatch) -> Iterator[httpx.Client]:
    with plots_app(store, monkeypatch) as (client, _):
        yield client


@pytest.mark.parametrize("taste", [False, True])
def test_value_and_policy_of_a_tabular_horizon_are_drawn(plot_app: httpx.Client, store: JobStore,
                                                         taste: bool) -> None:
    # Before, the value picture answered 500 (a bar per state given a [period][state] array: a shape mismatch in
    # matplotlib), and the policy picture drew one bar per period labelled with a whole row of actions.
    document = idle_busy_worn()
    document["model"]["horizon"] = {"periods": 4, "terminal_value": 1.0}
    if taste:
        document["model"]["taste_shocks"] = {"scale": 0.5}
    record = store.create_job(document, owner="anonymous", estimate=estimate(parse_document(document)),
                              document_hash=document_hash(document), enqueue=False)
    assert run_job(record["id"])["outcome"] == "done"
    for picture in ("value", "policy"):
        for fmt in ("svg", "png"):
            answer = plot_app.get(f"/v1/jobs/{record['id']}/plots/{picture}.{fmt}")
            assert answer.status_code == 200, (picture, fmt, answer.text)
    svg = plot_app.get(f"/v1/jobs/{record['id']}/plots/policy.svg").content
    assert ET.fromstring(svg).tag == "{http://www.w3.org/2000/svg}svg"
    text = svg.decode()  # matplotlib writes each text as paths after a comment holding it
    actions = {str(a) for row in store.get_result(record["id"])["policy"]["action"] for a in row}
    assert actions and all(action in text for action in actions)
    assert "period" in text
    assert plot_app.get(f"/v1/jobs/{record['id']}/plots/policy.svg?choice=nope").status_code == 400
    if taste:
        assert plot_app.get(f"/v1/jobs/{record['id']}/plots/choice_probabilities.svg").status_code == 200
