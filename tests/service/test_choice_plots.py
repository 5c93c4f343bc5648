"""The choice-probability picture of results with taste shocks, and its route."""

from __future__ import annotations

import xml.etree.ElementTree as ET
from collections.abc import Iterator
from typing import Any

import httpx
import pytest

from service.choice_plots import choice_probability_plot
from service.problems import Problem
from service.store import JobStore
from service.task import run_job
from tests._documents import grid_document, idle_busy_worn
from tests.service._plot_app import plots_app
from worker import solve
from worker.document import document_hash, parse_document
from worker.estimate import estimate


def svg_ids(svg: bytes) -> set[str]:
    root = ET.fromstring(svg)
    assert root.tag == "{http://www.w3.org/2000/svg}svg"
    return {node.get("id") for node in root.iter() if node.get("id")}


def taste_machine(**model: Any) -> dict[str, Any]:
    """An invented lathe with taste shocks on keep (0) or replace (1), as a grid model."""
    return grid_document(
        {
            "states": {"mileage": {"min": 0, "max": 19, "points": 20}},
            "shocks": {"wear": {"iid": {"values": [0, 1, 2], "probs": [0.35, 0.5, 0.15]}}},
            "choices": {"replace": {"values": [0, 1]}},
            "next": {"mileage": "(1 - replace) * min(mileage + wear, 19)"},
            "reward": "-(1 - replace) * 0.3 * mileage - replace * 4",
            "taste_shocks": {"scale": 0.7},
            **model,
        }
    )


def tabular_taste() -> dict[str, Any]:
    document = idle_busy_worn()
    document["model"]["taste_shocks"] = {"scale": 0.5}
    return document


def test_tabular_probabilities_are_stacked_bars_per_state() -> None:
    result = solve(tabular_taste())
    ids = svg_ids(choice_probability_plot(result))
    assert {f"bar-{k}-{i}" for k in range(2) for i in range(3)} <= ids


def test_one_state_variable_stacks_the_values_of_the_choice() -> None:
    result = solve(taste_machine())
    ids = svg_ids(choice_probability_plot(result, shock_index=2))
    assert {"series-0", "series-1"} <= ids
    assert choice_probability_plot(result, fmt="png")[:8] == b"\x89PNG\r\n\x1a\n"
    with pytest.raises(Problem) as caught:
        choice_probability_plot(result, shock_index=3)
    assert caught.value.errors[0]["path"] == "query.shock_index"


def test_a_named_choice_of_several_is_drawn_summed_over_the_others() -> None:
    document = taste_machine(
        choices={"replace": {"values": [0, 1]}, "oil": {"values": [0.0, 0.5, 1.0]}},
        reward="-(1 - replace) * 0.3 * mileage - replace * 4 - oil",
    )
    result = solve(document)
    assert {"series-0", "series-1", "series-2"} <= svg_ids(choice_probability_plot(result, choice="oil"))
    with pytest.raises(Problem) as caught:
        choice_probability_plot(result, choice="speed")
    assert caught.value.errors[0]["path"] == "query.choice"


def test_two_state_variables_draw_a_heatmap_of_the_last_value() -> None:
    document = taste_machine(
        states={"mileage": {"min": 0, "max": 9, "points": 10}, "age": {"min": 0, "max": 4, "points": 5}},
        next={"mileage": "(1 - replace) * min(mileage + wear, 9)", "age": "(1 - replace) * min(age + 1, 4)"},
        reward="-(1 - replace) * 0.3 * (mileage + age) - replace * 4",
    )
    result = solve(document)
    assert svg_ids(choice_probability_plot(result))


def test_a_result_without_taste_shocks_has_no_picture() -> None:
    with pytest.raises(Problem) as caught:
        choice_probability_plot(solve(idle_busy_worn()))
    assert caught.value.status == 404


@pytest.fixture
def plot_app(store: JobStore, monkeypatch: pytest.MonkeyPatch) -> Iterator[httpx.Client]:
    with plots_app(store, monkeypatch) as (client, _):
        yield client


def test_the_route_draws_them_and_the_summary_says_so(plot_app: httpx.Client, store: JobStore) -> None:
    document = tabular_taste()
    record = store.create_job(
        document, owner="anonymous", estimate=estimate(parse_document(document)),
        document_hash=document_hash(document), enqueue=False,
    )
    assert run_job(record["id"])["outcome"] == "done"
    summary = plot_app.get(f"/v1/jobs/{record['id']}/plots").json()
    assert summary["choice_probabilities"] is True
    assert summary["diagnostics"]["taste_shocks"]["choices"] == {"action": ["run", "service"]}
    svg = plot_app.get(f"/v1/jobs/{record['id']}/plots/choice_probabilities.svg")
    assert svg.status_code == 200, svg.text
    assert "bar-1-0" in svg_ids(svg.content)
    plain = solve(idle_busy_worn())
    assert "choice_probabilities" not in plain


def test_the_long_table_has_a_probability_column_per_alternative() -> None:
    from service.tables import table_columns

    result = solve(tabular_taste())
    names, columns = table_columns(result)
    assert names[-2:] == ["P(action=run)", "P(action=service)"]
    assert [list(c) for c in columns[-2:]] == [[row[0] for row in result["choice_probabilities"]],
                                               [row[1] for row in result["choice_probabilities"]]]
    grid = solve(taste_machine(
        choices={"replace": {"values": [0, 1]}, "oil": {"values": [0.0, 0.5, 1.0]}},
        reward="-(1 - replace) * 0.3 * mileage - replace * 4 - oil",
    ))
    names, columns = table_columns(grid)
    assert names[-6:] == [f"P(replace={r}, oil={o})" for r in (0.0, 1.0) for o in (0.0, 0.5, 1.0)]
    total = sum(columns[-6:])
    assert abs(total - 1.0).max() < 1e-12
    assert "P(action=run)" not in table_columns(solve(idle_busy_worn()))[0]
