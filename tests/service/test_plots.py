"""Pictures of jobs: ``service.plots`` on result documents, and the plot routes on a real store."""

from __future__ import annotations

import secrets
import struct
import subprocess
import sys
import xml.etree.ElementTree as ET
from collections.abc import Iterator
from typing import Any

import httpx
import numpy as np
import pytest
from fastapi import FastAPI

from service import plots, problems
from service.deps import Caller, current_owner
from service.examples import load_example
from service.problems import Problem
from service.store import JobStore
from service.task import run_job
from tests.service._plot_app import plots_app
from worker.document import document_hash, parse_document
from worker.estimate import estimate

SVG_NS = "{http://www.w3.org/2000/svg}"


def svg_ids(svg: bytes) -> set[str]:
    root = ET.fromstring(svg)
    assert root.tag == f"{SVG_NS}svg"
    return {node.get("id") for node in root.iter() if node.get("id")}


def png_size(png: bytes) -> tuple[int, int]:
    assert png[:8] == b"\x89PNG\r\n\x1a\n"
    width, height = struct.unpack(">II", png[16:24])
    return width, height


def line_result(n_points: int = 30, n_shocks: int = 3) -> dict[str, Any]:
    k = np.linspace(0.5, 10.0, n_points)
    z = np.linspace(0.9, 1.1, n_shocks)
    value = np.log(k)[:, None] + z[None, :]
    return {
        "axes": {"k": k.tolist(), "z": z.tolist()},
        "value": value.tolist(),
        "policy": {"k_next": (0.9 * k[:, None] * z[None, :]).tolist(), "hours": np.ones((n_points, n_shocks)).tolist()},
    }


def two_state_result() -> dict[str, Any]:
    a, b, y = np.linspace(0, 1, 12), np.linspace(1, 2, 9), np.array([0.5, 1.0, 1.5])
    value = a[:, None, None] + b[None, :, None] * y[None, None, :]
    return {
        "axes": {"a": a.tolist(), "b": b.tolist(), "y": y.tolist()},
        "value": value.tolist(),
        "policy": {"a_next": value.tolist()},
    }


def tabular_result() -> dict[str, Any]:
    actions = ["keep"] * 6 + ["replace"] * 4
    return {
        "axes": {"state_label": [f"wear {i}" for i in range(10)]},
        "value": np.linspace(50, 30, 10).tolist(),
        "policy": {"action": actions},
        "policy_index": {"action": [0 if a == "keep" else 1 for a in actions]},
    }


def test_convergence_plot_draws_both_series_on_a_log_axis() -> None:
    log = [
        {"iteration": i, "distance": 0.9**i, "error_bound": 9 * 0.9**i, "policy_changes": 5, "seconds": 0.01}
        for i in range(1, 60)
    ]
    ids = svg_ids(plots.convergence_plot(log, tolerance=1e-3, fmt="svg"))
    assert {"series-distance", "series-error_bound"} <= ids
    assert png_size(plots.convergence_plot(log, fmt="png")) == (
        round(plots.FIGURE_SIZE_IN[0] * plots.PNG_DPI),
        round(plots.FIGURE_SIZE_IN[1] * plots.PNG_DPI),
    )


def test_convergence_plot_of_an_empty_or_exact_log() -> None:
    assert "series-distance" not in svg_ids(plots.convergence_plot([]))
    # A distance of exactly 0 cannot sit on a log axis; the other points still do.
    log = [{"iteration": 1, "distance": 1.0, "error_bound": 2.0}, {"iteration": 2, "distance": 0.0, "error_bound": 0.0}]
    assert "series-distance" in svg_ids(plots.convergence_plot(log))


def test_value_plot_draws_a_line_per_shock_state() -> None:
    ids = svg_ids(plots.value_plot(line_result(n_shocks=3)))
    assert {"series-0", "series-1", "series-2"} <= ids and "series-3" not in ids


def test_many_shock_states_share_a_colour_ramp() -> None:
    ids = svg_ids(plots.value_plot(line_result(n_shocks=plots.MAX_LEGEND_LINES + 3)))
    assert f"series-{plots.MAX_LEGEND_LINES + 2}" in ids
    assert "legend_1" not in ids


def test_policy_plot_picks_the_named_choice() -> None:
    result = line_result()
    hours = plots.policy_plot(result, choice="hours")
    capital = plots.policy_plot(result, choice="k_next")
    assert hours != capital
    assert plots.policy_plot(result) == capital  # the first choice by default
    with pytest.raises(Problem) as refused:
        plots.policy_plot(result, choice="leisure")
    assert refused.value.status == 400
    assert refused.value.errors[0]["path"] == "query.choice"


def test_two_state_variables_make_a_heatmap_per_shock_point() -> None:
    result = two_state_result()
    layout = plots.AxisLayout(states=("a", "b"), shocks=("y",))
    first = plots.value_plot(result, layout=layout, shock_index=0)
    last = plots.value_plot(result, layout=layout, shock_index=2, fmt="svg")
    assert b"<image" in first  # the mesh is rasterised inside the SVG
    assert first != last
    with pytest.raises(Problem) as refused:
        plots.value_plot(result, layout=layout, shock_index=3)
    assert refused.value.errors[0]["path"] == "query.shock_index"
    png_size(plots.policy_plot(result, layout=layout, fmt="png"))


def test_a_third_state_is_held_at_its_middle_point() -> None:
    a, b, c = np.linspace(0, 1, 4), np.linspace(0, 1, 5), np.array([10.0, 20.0, 30.0])
    value = a[:, None, None, None] + b[None, :, None, None] + c[None, None, :, None] * np.ones((1, 1, 1, 2))
    result = {"axes": {"a": a.tolist(), "b": b.tolist(), "c": c.tolist(), "y": [0.0, 1.0]}, "value": value.tolist()}
    layout = plots.AxisLayout(states=("a", "b", "c"), shocks=("y",))
    svg = plots.value_plot(result, layout=layout, shock_index=1)
    assert b"<image" in svg
    assert svg == plots.value_plot(result, layout=layout, shock_index=1)
    assert svg != plots.value_plot(result, layout=layout, shock_index=0)


def test_tabular_results_are_bars_per_state() -> None:
    result = tabular_result()
    layout = plots.axis_layout(result)
    assert layout.tabular
    ids = svg_ids(plots.value_plot(result))
    assert {f"bar-{i}" for i in range(10)} <= ids and "bar-10" not in ids
    assert {f"bar-{i}" for i in range(10)} <= svg_ids(plots.policy_plot(result))


def test_axis_layout_reads_states_and_shocks_from_the_document() -> None:
    result = two_state_result()
    document = {"model": {"kind": "grid", "states": {"a": {}, "b": {}}, "shocks": {"y": {}}}}
    assert plots.axis_layout(result, document) == plots.AxisLayout(states=("a", "b"), shocks=("y",))
    # Without the document the first axis is taken as the state.
    assert plots.axis_layout(result) == plots.AxisLayout(states=("a",), shocks=("b", "y"))
    assert plots.shock_labels(result["axes"], ("y",)) == ["y=0.5", "y=1", "y=1.5"]


def test_plots_of_a_solved_example_result() -> None:
    from worker import solve

    document = load_example("machine_replacement")
    result = solve(document)
    layout = plots.axis_layout(result, document)
    assert layout.tabular
    assert len({f"bar-{i}" for i in range(10)} & svg_ids(plots.policy_plot(result, layout=layout))) == 10
    assert "series-distance" in svg_ids(plots.convergence_plot(result["log"]))


def test_euler_errors_of_two_states_are_drawn_along_the_chosen_one() -> None:
    # Invented: growth with a productivity level moving by its own law; the profile runs along capital, each
    # entry the worst over the level's grid points, and the plot says so.
    from tests._documents import grid_document, log_growth
    from worker import solve

    model = log_growth(points=12, define={"c": "z * level * k**alpha - k_next"}, next={"level": "level**0.5"})
    model["states"] = {"level": {"min": 0.9, "max": 1.1, "points": 3}, **model["states"]}
    result = solve({**grid_document(model), "report": {"euler_errors": True}})
    profile = result["diagnostics"]["euler_errors"]["profile"]
    assert profile["state"] == "k" and profile["over"] == ["level"]
    svg = plots.euler_plot(result)
    assert "mean" in svg_ids(svg)
    assert b"the worst over level" in svg


def test_euler_errors_of_a_horizon_say_which_period_the_curves_show() -> None:
    # Invented: a five-period cake of log growth. The worst and mean in the title pool periods 0–3 while the
    # profile is period 0's; before, nothing said so, and the curves could stay below the "worst" printed above.
    from tests._documents import grid_document, log_growth
    from worker import solve

    document = {**grid_document(log_growth(points=12)), "report": {"euler_errors": True}}
    document["model"]["horizon"] = {"periods": 5, "terminal_value": 0.0}
    result = solve(document)
    assert result["diagnostics"]["euler_errors"]["by_period"]["period"] == [0, 1, 2, 3]
    assert "curves: period 0 (of 0–3)".encode() in plots.euler_plot(result, layout=plots.axis_layout(result, document))


@pytest.fixture
def plot_app(store: JobStore, monkeypatch: pytest.MonkeyPatch) -> Iterator[tuple[httpx.Client, FastAPI]]:
    with plots_app(store, monkeypatch) as pair:
        yield pair


def submit(store: JobStore, document: dict[str, Any], *, owner: str = "anonymous", solve_now: bool = True) -> str:
    parsed = parse_document(document)
    record = store.create_job(
        document, owner=owner, estimate=estimate(parsed), document_hash=document_hash(document), enqueue=False
    )
    if solve_now:
        assert run_job(record["id"])["outcome"] == "done"
    return record["id"]


def test_plot_routes_draw_a_solved_job(plot_app: tuple[httpx.Client, FastAPI], store: JobStore) -> None:
    client, _ = plot_app
    job_id = submit(store, load_example("machine_replacement"))
    for picture in ("convergence", "value", "policy"):
        svg = client.get(f"/v1/jobs/{job_id}/plots/{picture}.svg")
        assert svg.status_code == 200, svg.text
        assert svg.headers["content-type"] == "image/svg+xml"
        svg_ids(svg.content)
        png = client.get(f"/v1/jobs/{job_id}/plots/{picture}.png")
        assert png.headers["content-type"] == "image/png"
        png_size(png.content)
    summary = client.get(f"/v1/jobs/{job_id}/plots").json()
    assert summary["layout"] == "bars"
    assert summary["choices"] == ["action"]
    assert summary["status"] == "converged"
    assert summary["tolerance"] == load_example("machine_replacement")["solver"]["tolerance"]
    assert "distribution" not in summary["stationary"]


def test_plot_routes_refuse_what_cannot_be_drawn(plot_app: tuple[httpx.Client, FastAPI], store: JobStore) -> None:
    client, _ = plot_app
    queued = submit(store, load_example("machine_replacement"), solve_now=False)
    # A queued job has a (still empty) convergence picture but no value yet: 409, as for its result.
    assert client.get(f"/v1/jobs/{queued}/plots/convergence.svg").status_code == 200
    not_ready = client.get(f"/v1/jobs/{queued}/plots/value.png")
    assert not_ready.status_code == 409
    assert not_ready.headers["content-type"] == problems.PROBLEM_JSON
    assert not_ready.json()["state"] == "queued"

    done = submit(store, load_example("machine_replacement"))
    bad_choice = client.get(f"/v1/jobs/{done}/plots/policy.svg", params={"choice": "nope"})
    assert bad_choice.status_code == 400
    assert bad_choice.json()["errors"][0]["path"] == "query.choice"
    assert client.get(f"/v1/jobs/{done}/plots/policy.gif").status_code in (400, 404)
    assert client.get(f"/v1/jobs/{done}/plots/surface.svg").status_code in (400, 404)
    assert client.get("/v1/jobs/0123456789abcdef/plots/value.svg").status_code == 404
    assert client.get("/v1/jobs/not-a-job/plots/value.svg").status_code == 404


def roastery_result(capacity: int = 4, customers: int = 3, taste: int = 2) -> dict[str, Any]:
    """A result document shaped like the roastery example's (two state variables, one shock)."""
    c, m, t = np.linspace(1, 2, capacity), np.linspace(0, 1, customers), np.linspace(0.9, 1.1, taste)
    value = c[:, None, None] + m[None, :, None] * t[None, None, :]
    axes = {"capacity": c.tolist(), "customers": m.tolist(), "taste": t.tolist()}
    policy = {"capacity_next": value.tolist(), "marketing": (value / 2).tolist()}
    return {"status": "converged", "error_bound": 1e-9, "iterations": 3, "evaluation_steps": 0, "seconds": 0.1,
            "axes": axes, "value": value.tolist(), "policy": policy, "policy_index": policy, "log": [],
            "diagnostics": {}}  # fmt: skip


def finish_with(store: JobStore, job_id: str, result: dict[str, Any]) -> None:
    token = secrets.token_hex(8)
    store.claim(job_id, token, worker="test:1")
    assert store.finish(job_id, token, "done", result=result)


def test_heatmap_routes_pick_the_shock_point_by_its_flat_index(
    plot_app: tuple[httpx.Client, FastAPI], store: JobStore
) -> None:
    client, _ = plot_app
    job_id = submit(store, load_example("roastery_growth"), solve_now=False)
    finish_with(store, job_id, roastery_result())
    summary = client.get(f"/v1/jobs/{job_id}/plots").json()
    assert summary["layout"] == "heatmap" and summary["shocks"] == ["taste"]
    assert summary["shock_labels"] == ["taste=0.9", "taste=1.1"]
    first = client.get(f"/v1/jobs/{job_id}/plots/value.svg", params={"shock_index": 0})
    second = client.get(f"/v1/jobs/{job_id}/plots/value.svg", params={"shock_index": 1})
    assert first.status_code == second.status_code == 200 and first.content != second.content
    policy = client.get(f"/v1/jobs/{job_id}/plots/policy.svg", params={"choice": "marketing", "shock_index": 1})
    assert policy.status_code == 200
    out_of_range = client.get(f"/v1/jobs/{job_id}/plots/value.svg", params={"shock_index": 2})
    assert out_of_range.status_code == 400
    assert out_of_range.json()["errors"][0]["path"] == "query.shock_index"


def test_a_finite_horizon_job_draws_value_and_policy_by_period(
    plot_app: tuple[httpx.Client, FastAPI], store: JobStore
) -> None:
    client, _ = plot_app
    job_id = submit(store, load_example("glassblower_life_cycle"))
    summary = client.get(f"/v1/jobs/{job_id}/plots").json()
    assert summary["layout"] == "heatmap" and summary["shocks"] == ["orders"]
    assert summary["periods"] == 60 and summary["life_cycle"]
    for picture in ("convergence", "value", "policy", "life_cycle"):
        svg = client.get(f"/v1/jobs/{job_id}/plots/{picture}.svg", params={"shock_index": 2} if picture in (
                         "value", "policy") else {})
        assert svg.status_code == 200, svg.text
        svg_ids(svg.content)
    result = store.get_result(job_id)
    assert result is not None and list(result["axes"]) == ["period", "savings", "orders"]
    assert "series-savings_next" in svg_ids(client.get(f"/v1/jobs/{job_id}/plots/life_cycle.svg").content)
    plain = submit(store, load_example("household_saving"))
    assert client.get(f"/v1/jobs/{plain}/plots/life_cycle.svg").status_code == 404
    record = store.get_job(job_id)
    assert record["progress"]["period"] == 0 and record["progress"]["periods"] == 60 and record["iterations"] == 60
    assert [entry["period"] for entry in store.get_log(job_id)] == list(range(59, -1, -1))
    assert plots.axis_layout(result, load_example("glassblower_life_cycle")) == plots.AxisLayout(
        states=("period", "savings"), shocks=("orders",))


def test_an_expired_result_is_gone_for_plots_as_for_the_result(
    plot_app: tuple[httpx.Client, FastAPI], store: JobStore
) -> None:
    client, _ = plot_app
    job_id = submit(store, load_example("machine_replacement"))
    assert client.get(f"/v1/jobs/{job_id}/plots/value.svg").status_code == 200
    store.redis.delete(store.keys.result(job_id))
    for path in ("plots", "plots/value.svg", "plots/policy.png"):
        gone = client.get(f"/v1/jobs/{job_id}/{path}")
        assert gone.status_code == 410, path
        assert gone.headers["content-type"] == problems.PROBLEM_JSON
    # The convergence picture is drawn from the log, not the result.
    assert client.get(f"/v1/jobs/{job_id}/plots/convergence.svg").status_code == 200


def test_plot_routes_hide_other_owners_jobs(plot_app: tuple[httpx.Client, FastAPI], store: JobStore) -> None:
    client, app = plot_app
    job_id = submit(store, load_example("machine_replacement"), owner="bob")
    app.dependency_overrides[current_owner] = lambda: Caller("alice")
    assert client.get(f"/v1/jobs/{job_id}/plots/value.svg").status_code == 404
    assert client.get(f"/v1/jobs/{job_id}/plots").status_code == 404
    app.dependency_overrides[current_owner] = lambda: Caller("bob")
    assert client.get(f"/v1/jobs/{job_id}/plots/value.svg").status_code == 200


def test_the_api_loads_matplotlib_only_for_a_first_picture() -> None:
    from service.routers import plots as plot_routes

    assert plot_routes.MEDIA_TYPES == plots.MEDIA_TYPES
    code = "import sys, service.app; print('matplotlib' in sys.modules)"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False"
