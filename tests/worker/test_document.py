"""Tests of the problem-document package (worker/document/).

The example problems here (a machine shop, a plant, a farm) are invented.
"""

from __future__ import annotations

import base64
import copy
import json
import math
import re
import subprocess
import sys
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from tests._documents import grid_document, idle_busy_worn, savings_market
from worker.defaults import DEFAULT_EVALUATION_STEPS, DEFAULT_MAX_ITERATIONS
from worker.document import (
    MAX_REPORTED,
    METHOD_NAMES,
    PRIORITIES,
    GridModel,
    TabularModel,
    canonical_json,
    document_hash,
    json_schema,
    parse_document,
)
from worker.document.limits import DEFAULT_WIDTH
from worker.errors import InfeasibleModel, InvalidDocument, TooLarge

DELETE = object()


def worn_machine() -> dict[str, Any]:
    """Invented: a machine that is idle, busy or worn; run it or service it."""
    return idle_busy_worn(
        reward=[[1.0, -0.5], [2.0, None], [0.2, -1.0]],
        transition=[
            [[0.6, 0.4, 0.0], [1.0, 0.0, 0.0]],
            [[0.1, 0.7, 0.2], [0.0, 0.0, 0.0]],
            [[0.0, 0.0, 1.0], [0.9, 0.1, 0.0]],
        ],
        tags=["invented", "shop.floor:A-1"],
        discount=0.9,
        solver={"method": "policy_iteration", "tolerance": 1e-8},
        report={"stationary": True, "simulation": {"periods": 50, "paths": 20, "seed": 7, "start": "idle"}},
    )


def plant() -> dict[str, Any]:
    """Invented: a plant choosing next period's capacity under persistent demand."""
    return {
        "version": 1,
        "label": "plant expansion (invented)",
        "discount": 0.95,
        "model": {
            "kind": "grid",
            "params": {"price": 1.2, "upkeep": 0.1, "wear": 0.08},
            "states": {"capacity": {"min": 0.5, "max": 10.0, "points": 60, "spacing": "power", "exponent": 1.5}},
            "shocks": {"demand": {"ar1": {"rho": 0.8, "sigma": 0.1, "points": 5}, "transform": "exp"}},
            "choices": {"capacity_next": {"next_of": "capacity"}},
            "define": {
                "investment": "capacity_next - (1 - wear) * capacity",
                "sales": "min(capacity, demand)",
            },
            "reward": "price * sales - upkeep * capacity - investment - 0.3 * investment**2 / capacity",
            "feasible": ["investment >= 0"],
            "hints": {"monotone": True},
        },
        "solver": {"method": "howard", "tolerance": 1e-6},
        "report": {"simulation": {"periods": 100, "paths": 10, "start": {"capacity": 2.0, "demand": 1.0}}},
    }


def farm() -> dict[str, Any]:
    """Invented: a farm with a herd grown by a formula, a stock of feed, and weather shocks."""
    return {
        "version": 1,
        "discount": 0.97,
        "model": {
            "kind": "grid",
            "params": {"growth": 1.1},
            "states": {
                "herd": {"values": [0, 5, 10, 20, 40]},
                "feed": {"min": 1.0, "max": 100.0, "points": 12, "spacing": "log"},
            },
            "shocks": {
                "rain": {
                    "markov": {"values": [0.5, 1.0, 1.5], "matrix": [[0.5, 0.5, 0], [0.25, 0.5, 0.25], [0, 0.5, 0.5]]}
                },
                "price": {"iid": {"values": [0.8, 1.0, 1.3], "probs": [0.25, 0.5, 0.25]}},
            },
            "choices": {
                "sell": {"values": [0, 0.25, 0.5]},
                "feed_next": {"next_of": "feed"},
                "effort": {"min": 0, "max": 1, "points": 3},
            },
            "next": {"herd": "growth * herd * (1 - sell) * rain"},
            "define": {"sold": "sell * herd", "income": "price * sold"},
            "reward": "income - 0.01 * feed_next - effort**2",
            "feasible": ["feed_next <= feed + 10 * rain"],
        },
        "solver": {
            "method": "value_iteration",
            "max_iterations": 5000,
            "time_limit_s": 60,
            "initial": {"job": "job_123-abc"},
        },
    }


def edit(document: dict[str, Any], path: str, value: Any) -> dict[str, Any]:
    """A copy of ``document`` with ``value`` at a dotted ``path`` (``[i]`` for list items)."""
    out = copy.deepcopy(document)
    parts = [int(p[1:-1]) if p.startswith("[") else p for p in re.findall(r"\[\d+\]|[^.\[\]]+", path)]
    node = out
    for part in parts[:-1]:
        node = node[part]
    if value is DELETE:
        del node[parts[-1]]
    else:
        node[parts[-1]] = value
    return out


def faults(document: Any, exception: type[Exception] = InvalidDocument) -> list[dict[str, str]]:
    with pytest.raises(exception) as info:
        parse_document(document)
    assert type(info.value) is exception, info.value.errors
    return info.value.errors


def assert_fault(document: Any, path: str, phrase: str, exception: type[Exception] = InvalidDocument) -> None:
    errors = faults(document, exception)
    assert any(e["path"] == path and phrase in e["message"] for e in errors), errors


def packed(array: Any, dtype: str = "float64") -> dict[str, Any]:
    data = np.ascontiguousarray(array, dtype="<f8" if dtype == "float64" else "<i8").tobytes()
    return {"dtype": dtype, "shape": list(np.shape(array)), "base64": base64.b64encode(data).decode()}


# Valid documents.


def test_machine_shop_parses_with_arrays_and_labels() -> None:
    doc = parse_document(worn_machine())
    model = doc.model
    assert isinstance(model, TabularModel)
    assert model.reward.dtype == np.float64 and model.reward.flags.c_contiguous
    assert np.isnan(model.reward[1, 1]) and model.reward[0, 1] == -0.5
    assert model.transition.shape == (3, 2, 3)
    assert model.state_labels() == ["idle", "busy", "worn"]
    assert model.action_labels() == ["run", "service"]
    assert doc.solver.method == "policy_iteration" and doc.solver.initial == "zeros"
    assert doc.report.simulation.start == "idle" and doc.priority == "normal"


def test_counts_become_index_labels() -> None:
    document = edit(edit(worn_machine(), "model.states", 3), "model.actions", 2.0)
    doc = parse_document(edit(document, "report.simulation.start", 0))
    assert doc.model.state_labels() == [0, 1, 2] and doc.model.action_labels() == [0, 1]


def test_plant_parses_with_defaults_filled_in() -> None:
    doc = parse_document(plant())
    model = doc.model
    assert isinstance(model, GridModel)
    axis = model.states["capacity"]
    assert axis.size == 60 and axis.spacing == "power" and axis.exponent == 1.5
    assert model.shocks["demand"].ar1.method == "rouwenhorst" and model.shocks["demand"].ar1.width is None
    assert model.choices["capacity_next"].size == 60
    assert model.axis_sizes() == {"capacity": 60, "demand": 5}
    assert doc.solver.evaluation_steps == DEFAULT_EVALUATION_STEPS
    assert doc.solver.max_iterations == DEFAULT_MAX_ITERATIONS
    assert doc.solver.checkpoint_s == 30.0 and doc.solver.time_limit_s is None
    assert doc.report.simulation.seed == 0


def test_farm_parses_with_every_shock_and_choice_form() -> None:
    doc = parse_document(farm())
    model = doc.model
    assert list(model.axis_sizes().items()) == [("herd", 5), ("feed", 12), ("rain", 3), ("price", 3)]
    assert [c.size for c in model.choices.values()] == [3, 12, 3]
    assert model.states["feed"].spacing == "log" and model.states["herd"].spacing is None
    assert doc.solver.initial.job == "job_123-abc" and doc.solver.time_limit_s == 60.0


def test_grid_axis_grid_and_size() -> None:
    model = parse_document(farm()).model
    feed = model.states["feed"].grid()
    # A log grid has a constant ratio between neighbours, (max/min)^(1/(points-1)): the
    # definition of geometric spacing.
    assert feed.shape == (12,) and feed[0] == 1.0 and feed[-1] == 100.0
    np.testing.assert_allclose(feed[1:] / feed[:-1], 100.0 ** (1 / 11), rtol=1e-12)
    np.testing.assert_array_equal(model.states["herd"].grid(), [0, 5, 10, 20, 40])
    np.testing.assert_array_equal(model.choices["effort"].grid(), [0.0, 0.5, 1.0])
    np.testing.assert_array_equal(model.choices["feed_next"].grid(), feed)


def test_shock_chain() -> None:
    model = parse_document(plant()).model
    values, matrix = model.shocks["demand"].chain()
    assert values.shape == (5,) and matrix.shape == (5, 5)
    np.testing.assert_allclose(matrix.sum(axis=1), 1.0, atol=1e-12)
    # Rouwenhorst (1995) spans mean +- sigma / sqrt(1 - rho^2) * sqrt(n - 1); exp applied after.
    half = 0.1 / math.sqrt(1 - 0.8**2) * 2
    np.testing.assert_allclose(np.log(values), np.linspace(-half, half, 5), atol=1e-12)
    assert model.shocks["demand"].size == 5
    assert model.shocks["demand"].bounds == pytest.approx((math.exp(-half), math.exp(half)))
    farm_model = parse_document(farm()).model
    values, matrix = farm_model.shocks["price"].chain()
    np.testing.assert_allclose(matrix, [[0.25, 0.5, 0.25]] * 3)


def test_tauchen_width_defaults() -> None:
    doc = parse_document(edit(plant(), "model.shocks.demand.ar1.method", "tauchen"))
    assert doc.model.shocks["demand"].ar1.width == DEFAULT_WIDTH


def test_tiny_tolerance_is_accepted() -> None:
    assert parse_document(edit(plant(), "solver.tolerance", 1e-300)).solver.tolerance == 1e-300


def test_disallowed_rows_are_ignored() -> None:
    # busy/service is not allowed, so its all-zero row is fine; so is garbage there.
    parse_document(edit(worn_machine(), "model.transition[1][1]", [5.0, -3.0, 0.0]))


def test_packed_arrays_are_accepted() -> None:
    shop = worn_machine()
    reward = np.array([[1.0, -0.5], [2.0, np.nan], [0.2, -1.0]])
    doc = parse_document(
        edit(edit(shop, "model.reward", packed(reward)), "model.transition", packed(shop["model"]["transition"]))
    )
    np.testing.assert_array_equal(doc.model.reward, reward)
    assert doc.model.transition.shape == (3, 2, 3)


def test_sparse_transition() -> None:
    # (1, 0, 2) appears twice: duplicates are summed, so the row still sums to 1.
    entries = [
        [0, 0, 0, 0.6], [0, 0, 1, 0.4], [0, 1, 0, 1.0], [1, 0, 0, 0.1], [1, 0, 1, 0.7],
        [1, 0, 2, 0.1], [1, 0, 2, 0.1], [2, 0, 2, 1.0], [2, 1, 0, 0.9], [2, 1, 1, 0.1],
    ]
    doc = parse_document(edit(worn_machine(), "model.transition", {"entries": entries}))
    assert doc.model.transition.entries.shape == (10, 4)
    doc = parse_document(edit(worn_machine(), "model.transition", {"entries": packed(entries)}))
    assert doc.model.transition.entries.dtype == np.float64


def test_methods_match_the_solver_registry() -> None:
    from worker.solvers import METHODS

    # Backward induction is no solver of the registry: a document with a horizon is always solved by it.
    assert sorted(METHOD_NAMES) == sorted([*METHODS, "backward_induction"])
    for method in METHODS:
        # The endogenous grid method is refused at the door for a model not of its form (the plant's choice is on
        # a grid): the search tests' household, whose saving is continuous, takes it.
        base = plant() if method != "endogenous_grid" else grid_document(savings_market())
        assert parse_document(edit(base, "solver.method", method)).solver.method == method


def test_initial_values_in_value_shape_or_flat() -> None:
    values = np.arange(60 * 5, dtype=float)
    doc = parse_document(edit(plant(), "solver.initial", {"values": values.reshape(60, 5).tolist()}))
    assert doc.solver.initial.values.shape == (60, 5)
    parse_document(edit(plant(), "solver.initial", {"values": packed(values)}))
    assert doc.value_shape() == (60, 5)


def test_tabular_start_by_index_and_label() -> None:
    parse_document(edit(worn_machine(), "report.simulation.start", 2))
    parse_document(edit(worn_machine(), "report.simulation.start", "worn"))


def test_numpy_arrays_are_accepted_from_python_callers() -> None:
    document = edit(worn_machine(), "model.reward", np.array([[1.0, 2.0], [3.0, np.nan], [0.0, 1.0]]))
    assert np.isnan(parse_document(document).model.reward[1, 1])


def test_a_packed_reward_writes_not_allowed_as_nan() -> None:
    reward = np.array([[1.0, 2.0], [3.0, np.nan], [0.0, 1.0]])
    doc = parse_document(edit(worn_machine(), "model.reward", packed(reward)))
    assert np.isnan(doc.model.reward[1, 1]) and not np.isnan(doc.model.reward[1, 0])


def test_report_simulate_is_a_deprecated_alias_of_simulation() -> None:
    current = worn_machine()
    old = edit(current, "report", {"stationary": True, "simulate": current["report"]["simulation"]})
    doc = parse_document(old)
    assert doc.report.simulation.start == "idle" and doc.report.simulation.periods == 50
    assert document_hash(old) == document_hash(current)
    assert json.loads(canonical_json(old))["report"] == json.loads(canonical_json(current))["report"]
    assert "simulation" in json.loads(canonical_json(old))["report"]
    assert_fault(edit(old, "report.simulate.periods", 0), "report.simulate.periods", "at least 1")
    assert_fault(edit(old, "report.simulate.start", 3), "report.simulate.start", "state index 3 is out of range")
    assert_fault(edit(old, "report.simulate.perods", 3), "report.simulate.perods", "did you mean `periods`?")
    both = edit(old, "report.simulation", current["report"]["simulation"])
    assert_fault(both, "report.simulate", "give simulation only")


def test_priorities_are_listed_once() -> None:
    assert PRIORITIES == ("high", "normal", "low")
    for priority in PRIORITIES:
        assert parse_document(edit(plant(), "priority", priority)).priority == priority
    assert_fault(edit(plant(), "priority", "urgent"), "priority", '"high", "normal" or "low"')
    assert json_schema()["properties"]["priority"]["enum"] == list(PRIORITIES)


def test_a_nan_number_inside_a_nested_reward_is_refused() -> None:
    # Only null means "not allowed" in nested lists; a Python caller's float NaN is a mistake.
    document = edit(worn_machine(), "model.reward[2][1]", float("nan"))
    errors = faults(document)
    assert errors == [
        {"path": "model.reward[2][1]", "message": "NaN is not a number here; use null for a choice that is not allowed"}
    ]
    document = edit(worn_machine(), "model.reward[1]", [np.float64("nan"), None])
    assert_fault(document, "model.reward[1][0]", "NaN is not a number here")


@pytest.mark.parametrize("value", [math.inf, -math.inf])
def test_infinity_inside_a_nested_reward_is_refused(value: float) -> None:
    assert_fault(
        edit(worn_machine(), "model.reward[0][1]", value), "model.reward[0][1]", "infinity is not allowed here"
    )


def test_solve_refuses_a_nan_number_inside_a_nested_reward() -> None:
    from worker import solve

    with pytest.raises(InvalidDocument) as info:
        solve(edit(worn_machine(), "model.reward[2][1]", float("nan")))
    assert {
        "path": "model.reward[2][1]",
        "message": "NaN is not a number here; use null for a choice that is not allowed",
    } in info.value.errors


NESTED_ARRAYS = [
    (worn_machine, "model.transition[0][0][1]"),
    (farm, "model.states.herd.values[1]"),
    (farm, "model.shocks.rain.markov.values[0]"),
    (farm, "model.shocks.rain.markov.matrix[0][1]"),
    (farm, "model.shocks.price.iid.values[2]"),
    (farm, "model.shocks.price.iid.probs[1]"),
    (farm, "model.choices.sell.values[1]"),
]


@pytest.mark.parametrize(("value", "word"), [(math.nan, "NaN"), (math.inf, "infinity"), (-math.inf, "infinity")])
@pytest.mark.parametrize(("document", "path"), NESTED_ARRAYS)
def test_other_nested_arrays_refuse_nan_and_infinity(document: Any, path: str, value: float, word: str) -> None:
    assert_fault(edit(document(), path, value), path, f"{word} is not allowed here: expected a finite number")


@pytest.mark.parametrize("value", [math.nan, math.inf])
def test_initial_values_refuse_nan_and_infinity(value: float) -> None:
    values = [[0.0] * 5 for _ in range(60)]
    values[3][2] = value
    assert_fault(
        edit(plant(), "solver.initial", {"values": values}), "solver.initial.values[3][2]", "is not allowed here"
    )


def test_examples_shipped_with_the_service_parse() -> None:
    folder = Path(__file__).resolve().parents[2] / "service" / "examples"
    documents = sorted(folder.glob("*.json"))
    assert documents, f"no example documents in {folder}"
    for path in documents:
        parse_document(json.loads(path.read_text()))


def test_service_package_is_import_light() -> None:
    code = "import sys, service; print('fastapi' in sys.modules, 'pydantic' in sys.modules)"
    out = subprocess.run(
        [sys.executable, "-c", code],
        capture_output=True,
        text=True,
        check=True,
        cwd=Path(__file__).resolve().parents[2],
    )
    assert out.stdout.split() == ["False", "False"]


# Faults: the path and a key phrase of each message.

TOP_LEVEL = [
    ("discount", 1.0, "discount", "not a contraction"),
    ("discount", 1.5, "discount", "iteration need not converge"),
    ("discount", 0.0, "discount", "degenerate"),
    ("discount", -0.2, "discount", "strictly between 0 and 1"),
    ("discount", float("nan"), "discount", "finite number"),
    ("discount", "0.9", "discount", "expected a number"),
    ("discount", True, "discount", "expected a number, got true"),
    ("discount", 10**400, "discount", "too large"),
    ("discount", DELETE, "discount", "missing required key `discount`"),
    ("version", 2, "version", "unsupported document version 2"),
    ("version", DELETE, "version", "missing required key `version`"),
    ("version", True, "version", "expected a whole number"),
    ("colour", "red", "colour", "unknown key `colour`"),
    ("label", "x" * 201, "label", "at most 200 characters"),
    ("tags", [f"t{i}" for i in range(33)], "tags", "at most 32 items"),
    ("tags", ["ok", "has space"], "tags[1]", "a tag must be 1 to 64 characters"),
    ("tags", [""], "tags[0]", "a tag must be"),
    ("tags", ["x" * 65], "tags[0]", "a tag must be"),
    ("tags", 3, "tags", "expected a list"),
    ("priority", "urgent", "priority", '"high", "normal" or "low"'),
    ("notify", {"url": "ftp://example.org/x"}, "notify.url", "http:// or https://"),
    ("notify", {"url": "https://"}, "notify.url", "with a host name"),
    ("notify", {"url": "https://example.org/" + "a" * 2048}, "notify.url", "at most 2048 characters"),
    ("notify", {"url": "https://example.org", "secret": "s" * 257}, "notify.secret", "at most 256 characters"),
    ("notify", {"url": "https://example.org", "secret": ""}, "notify.secret", "must not be empty"),
    ("notify", {"secret": "s"}, "notify.url", "missing required key `url`"),
    ("notify", {"url": "https://example.org", "retries": 3}, "notify.retries", "unknown key `retries`"),
]

SOLVER_AND_REPORT = [
    ("solver.tolerance", 0, "solver.tolerance", "greater than 0"),
    ("solver.tolerance", -1e-6, "solver.tolerance", "greater than 0"),
    ("solver.tolerence", 1e-6, "solver.tolerence", "did you mean `tolerance`?"),
    ("solver.method", "newton", "solver.method", '"howard", "policy_iteration" or "value_iteration"'),
    ("solver.max_iterations", 0, "solver.max_iterations", "at least 1"),
    ("solver.max_iterations", 10_000_001, "solver.max_iterations", "at most 10000000"),
    ("solver.max_iterations", 2.5, "solver.max_iterations", "expected a whole number"),
    ("solver.evaluation_steps", 0, "solver.evaluation_steps", "at least 1"),
    ("solver.evaluation_steps", 100_001, "solver.evaluation_steps", "at most 100000"),
    ("solver.time_limit_s", 0, "solver.time_limit_s", "greater than 0"),
    ("solver.time_limit_s", float("inf"), "solver.time_limit_s", "finite"),
    ("solver.checkpoint_s", -5, "solver.checkpoint_s", "greater than 0"),
    ("solver.initial", "ones", "solver.initial", 'must be "zeros"'),
    ("solver.initial", {"values": [1.0], "job": "a"}, "solver.initial", '{"values": ARRAY} or an object {"job": JOB_ID}'),  # noqa: E501
    ("solver.initial", {"job": "no spaces"}, "solver.initial.job", "a job id is 1 to 128 ASCII letters"),
    ("solver.initial", {"values": [[1.0, 2.0]]}, "solver.initial.values", "the value array has shape [60, 5]"),
    ("solver.initial", {"values": [1.0, float("nan")]}, "solver.initial.values[1]", "NaN is not allowed"),
    ("report.stationary", "yes", "report.stationary", "expected true or false"),
    ("report.simulation.periods", 0, "report.simulation.periods", "at least 1"),
    ("report.simulation.periods", 100_001, "report.simulation.periods", "at most 100000"),
    ("report.simulation.paths", 100_001, "report.simulation.paths", "at most 100000"),
    ("report.simulation.paths", DELETE, "report.simulation.paths", "missing required key `paths`"),
    ("report.simulation", {"periods": 1000, "paths": 10_001}, "report.simulation", "periods × paths is 10,001,000"),
    ("report.simulation.seed", -1, "report.simulation.seed", "at least 0"),
    ("report.simulation.start", {"capacity": 2.0, "demand": 1.0, "weather": 1}, "report.simulation.start.weather", "not a state or shock"),  # noqa: E501
    ("report.simulation.start", {"capacity": 2.0}, "report.simulation.start.demand", "missing a starting value"),
    ("report.simulation.start", {"capacity": 20.0, "demand": 1.0}, "report.simulation.start.capacity", "outside the grid of `capacity`, [0.5, 10]"),  # noqa: E501
    ("report.simulation.start", {"capacity": 2.0, "demand": 5.0}, "report.simulation.start.demand", "outside the grid of `demand`"),  # noqa: E501
    ("report.simulation.start", {"capacity": "a", "demand": 1.0}, "report.simulation.start.capacity", "expected a number"),  # noqa: E501
    ("report.simulation.start", "capacity", "report.simulation.start", "for a grid model, start is an object"),
    ("report.simulation.start", [1, 2], "report.simulation.start", "expected an object of state and shock values"),
]

GRID = [
    ("model.kind", "table", "model.kind", 'must be "tabular" or "grid"'),
    ("model.kind", DELETE, "model.kind", 'missing required key `kind` ("tabular" or "grid")'),
    ("model.states.capacity.max", 0.5, "model.states.capacity.max", "must be greater than min"),
    ("model.states.capacity.points", 1, "model.states.capacity.points", "at least 2 points"),
    ("model.states.capacity.points", 10_000_001, "model.states.capacity.points", "at most 10,000,000 points per axis"),
    ("model.states.capacity.points", 10**12, "model.states.capacity.points", "at most 10,000,000 points"),
    ("model.states.capacity.points", DELETE, "model.states.capacity.points", "missing `points`"),
    ("model.states.capacity.minimum", 1, "model.states.capacity.minimum", "unknown key `minimum` (did you mean `min`?)"),  # noqa: E501
    ("model.states.capacity.spacing", "cubic", "model.states.capacity.spacing", '"uniform", "log" or "power"'),
    ("model.states.capacity.exponent", 0, "model.states.capacity.exponent", "greater than 0"),
    ("model.states.capacity.values", [1, 2], "model.states.capacity.values", "cannot be combined with `min`, `max`, `points`"),  # noqa: E501
    ("model.states.capacity", {}, "model.states.capacity", "give either `min`, `max` and `points`"),
    ("model.states.capacity", {"values": [1, 2, 2, 3]}, "model.states.capacity.values[2]", "strictly increasing, but 2 follows 2"),  # noqa: E501
    ("model.states.capacity", {"values": [1]}, "model.states.capacity.values", "at least 2 values"),
    ("model.states.capacity", {"values": [[1, 2]]}, "model.states.capacity.values", "1-dimensional"),
    ("model.states.capacity", {"values": [1, "2"]}, "model.states.capacity.values[1]", "expected a number"),
    ("model.states.capacity", {"min": 0, "max": 1, "points": 3, "spacing": "log"}, "model.states.capacity.min", "log spacing needs min > 0"),  # noqa: E501
    ("model.states.capacity", {"min": 0, "max": 1, "points": 3, "exponent": 2}, "model.states.capacity.exponent", 'only with spacing "power"'),  # noqa: E501
    ("model.states.capacity", {"min": 1, "max": 1 + 1e-12, "points": 100_000}, "model.states.capacity.points", "too close together"),  # noqa: E501
    ("model.states", {}, "model.states", "at least 1 entry"),
    ("model.states.2k", {"min": 0, "max": 1, "points": 3}, "model.states.2k", "not a valid name"),
    ("model.params.exp", 1.0, "model.params.exp", "name of a function"),
    ("model.params.lambda", 1.0, "model.params.lambda", "reserved word"),
    ("model.params.price", float("inf"), "model.params.price", "finite number"),
    ("model.params.price", None, "model.params.price", "expected a number, got null"),
    ("model.params.capacity", 1.0, "model.states.capacity", "already used in params"),
    ("model.define.demand", "1", "model.define.demand", "already used in shocks"),
    ("model.shocks.demand.ar1.rho", 1.0, "model.shocks.demand.ar1.rho", "not stationary"),
    ("model.shocks.demand.ar1.rho", -1.5, "model.shocks.demand.ar1.rho", "strictly between -1 and 1"),
    ("model.shocks.demand.ar1.sigma", 0, "model.shocks.demand.ar1.sigma", "must be positive"),
    ("model.shocks.demand.ar1.points", 1, "model.shocks.demand.ar1.points", "at least 2"),
    # A chain is a dense matrix built at admission (an AR(1) of 20,000 points, or an iid of 20,000 values, held the
    # API for minutes or took 3.2 GB before this cap): refused at once, naming the field.
    ("model.shocks.demand.ar1.points", 2_001, "model.shocks.demand.ar1.points", "at most 2,000 values are accepted"),
    ("model.shocks.demand.ar1.points", 10**6, "model.shocks.demand.ar1.points", "got 1,000,000"),
    ("model.shocks.demand", {"iid": {"values": list(range(2_001)), "probs": [1 / 2_001] * 2_001}}, "model.shocks.demand.iid.values", "at most 2,000 values are accepted"),  # noqa: E501
    ("model.shocks.demand.ar1.width", 2.0, "model.shocks.demand.ar1.width", 'only with method "tauchen"'),
    ("model.shocks.demand.ar1.method", "hermite", "model.shocks.demand.ar1.method", '"rouwenhorst" or "tauchen"'),
    ("model.shocks.demand.ar1.mean", 800.0, "model.shocks.demand.transform", "overflows float64"),
    ("model.shocks.demand.transform", "log", "model.shocks.demand.transform", '"exp" or "none"'),
    ("model.shocks.demand", {"transform": "exp"}, "model.shocks.demand", "exactly one of `ar1`, `markov` or `iid`"),
    ("model.shocks.demand.iid", {"values": [1], "probs": [1]}, "model.shocks.demand.iid", "cannot be combined with `ar1`"),  # noqa: E501
    ("model.shocks.demand", {"markov": {"values": [1, 2], "matrix": [[1, 0]]}}, "model.shocks.demand.markov.matrix", "must be square"),  # noqa: E501
    ("model.shocks.demand", {"markov": {"values": [1, 2], "matrix": [[1, 0, 0]] * 3}}, "model.shocks.demand.markov.matrix", "there are 2 values"),  # noqa: E501
    ("model.shocks.demand", {"markov": {"values": [1, 2], "matrix": [[1, 0], [0.3, 0.6]]}}, "model.shocks.demand.markov.matrix[1]", "sums to 0.9"),  # noqa: E501
    ("model.shocks.demand", {"markov": {"values": [1, 2], "matrix": [[1.2, -0.2], [0, 1]]}}, "model.shocks.demand.markov.matrix[0][1]", "non-negative"),  # noqa: E501
    ("model.shocks.demand", {"markov": {"values": [2, 1], "matrix": [[1, 0], [0, 1]]}}, "model.shocks.demand.markov.values[1]", "strictly increasing"),  # noqa: E501
    ("model.shocks.demand", {"iid": {"values": [1, 2], "probs": [0.5, 0.6]}}, "model.shocks.demand.iid.probs", "the probabilities sum to 1.1"),  # noqa: E501
    ("model.shocks.demand", {"iid": {"values": [1, 2], "probs": [1.5, -0.5]}}, "model.shocks.demand.iid.probs[1]", "non-negative"),  # noqa: E501
    ("model.shocks.demand", {"iid": {"values": [1, 2], "probs": [1.0]}}, "model.shocks.demand.iid.probs", "one per value"),  # noqa: E501
    ("model.choices", {}, "model.choices", "at least 1 entry"),
    ("model.choices.capacity_next.next_of", "size", "model.choices.capacity_next.next_of", "`size` is not a state"),
    ("model.choices.again", {"next_of": "capacity"}, "model.choices.again.next_of", "already chosen by choice `capacity_next`"),  # noqa: E501
    ("model.choices.capacity_next", {}, "model.choices.capacity_next", "exactly one of: `next_of`"),
    ("model.choices.capacity_next.values", [1.0], "model.choices.capacity_next.values", "cannot be combined with `next_of`"),  # noqa: E501
    ("model.choices.price_cut", {"values": [0.1, 0.0]}, "model.choices.price_cut.values[1]", "strictly increasing"),
    ("model.choices.price_cut", {"min": 1, "max": 0, "points": 3}, "model.choices.price_cut.max", "must be greater than min"),  # noqa: E501
    ("model.next", {"capacity": "capacity"}, "model.next.capacity", "must not also have a next expression"),
    ("model.next", {"size": "1"}, "model.next.size", "`size` is not a state"),
    ("model.reward", "price * (sales", "model.reward", "syntax error"),
    ("model.reward", "price * salse", "model.reward", "unknown name `salse` (did you mean `sales`?)"),
    ("model.reward", "sales.real", "model.reward", "attribute access"),
    ("model.reward", "", "model.reward", "must not be empty"),
    ("model.reward", "1 + " * 600 + "1", "model.reward", "at most 2000 characters"),
    ("model.reward", 3, "model.reward", "expected a string, got the number 3"),
    ("model.define.investment", "investment + capacity", "model.define.investment", "use each other in a circle"),
    ("model.feasible", ["investment >= 0", "capacity < limit"], "model.feasible[1]", "unknown name `limit`"),
    ("model.hints.monotone", "true", "model.hints.monotone", "expected true or false"),
    ("model.hints.fast", True, "model.hints.fast", "unknown key `fast`"),
]

TABULAR = [
    ("model.reward", [[1.0, 2.0]] * 2, "model.reward", "reward[s][a] must have shape [3, 2]"),
    ("model.reward", [[1.0, float("inf")]] * 3, "model.reward[0][1]", "infinity is not allowed"),
    ("model.reward", [[1.0, "a"]] * 3, "model.reward[0][1]", "expected a number"),
    ("model.reward", [[1.0, 2.0], [1.0], [1.0, 2.0]], "model.reward[1]", "expected 2 entries, got 1"),
    ("model.reward", {"dtype": "float64", "shape": [3, 2], "base64": "AAAA"}, "model.reward.base64", "needs 48 bytes"),
    ("model.reward", {"dtype": "float64", "shape": [3, 2]}, "model.reward.base64", "missing"),
    ("model.transition", [[[1.0, 0.0, 0.0]] * 2] * 2, "model.transition", "must have shape [3, 2, 3]"),
    ("model.transition[0][0]", [0.6, 0.3, 0.0], "model.transition[0][0]", 'from state "idle" (index 0) under action "run" (index 0) sum to 0.9'),  # noqa: E501
    ("model.transition[1][0]", [0.5, 0.7, -0.2], "model.transition[1][0][2]", "probability -0.2 is negative"),
    ("model.transition[1][0][1]", None, "model.transition[1][0][1]", "null is not allowed"),
    ("model.transition", {"entry": []}, "model.transition", 'a sparse object {"entries": ...}'),
    ("model.transition", {"entries": [[0, 0, 0, 1]], "format": "coo"}, "model.transition.format", "unknown key `format`"),  # noqa: E501
    ("model.transition", {"entries": [[0, 0, 0]]}, "model.transition.entries", "rows of 4 numbers"),
    ("model.states", ["idle", "busy", "idle"], "model.states[2]", 'duplicate state label "idle" (first used at index 0)'),  # noqa: E501
    ("model.actions", ["run", "run"], "model.actions[1]", "duplicate action label"),
    ("model.states", ["idle", 2, "worn"], "model.states[1]", "expected a string"),
    ("model.states", 0, "model.states", "at least 1"),
    ("model.states", 3.5, "model.states", "expected a list of labels (strings) or a count"),
    ("model.states", [], "model.states", "at least 1 item"),
    ("model.actions", True, "model.actions", "expected a list of labels"),
    ("model.reward", DELETE, "model.reward", "missing required key `reward`"),
    ("model.next", {}, "model.next", "unknown key `next`"),
    ("report.simulation.start", "broken", "report.simulation.start", '"broken" is not a state label'),
    ("report.simulation.start", 3, "report.simulation.start", "state index 3 is out of range"),
    ("report.simulation.start", {"idle": 1}, "report.simulation.start", "for a tabular model, start is a state label or a state index"),  # noqa: E501
    ("solver.initial", {"values": [0.0, 1.0]}, "solver.initial.values", "the value array has shape [3]"),
]

SPARSE_ENTRIES = [[0, 0, 0, 0.6], [0, 0, 1, 0.4], [0, 1, 0, 1.0], [1, 0, 1, 1.0], [2, 0, 2, 1.0], [2, 1, 0, 1.0]]

SPARSE = [
    (0, [0, 0, 0.5, 0.6], "model.transition.entries[0][2]", "next-state index 0.5 is not a whole number"),
    (1, [3, 0, 1, 0.4], "model.transition.entries[1][0]", "state index 3 is out of range: with 3 states it must be 0 to 2"),  # noqa: E501
    (2, [0, 2, 0, 1.0], "model.transition.entries[2][1]", "action index 2 is out of range"),
    (3, [1, 0, 1, 1.5], "model.transition.entries[3][3]", "probability 1.5 is outside [0, 1]"),
    (3, [1, 0, 1, 0.5], "model.transition.entries", 'from state "busy" (index 1) under action "run" (index 0) sum to 0.5'),  # noqa: E501
    (3, [1, 0, 1, float("nan")], "model.transition.entries[3][3]", "NaN is not allowed"),
]


@pytest.mark.parametrize(
    ("path", "value", "where", "phrase"),
    TOP_LEVEL + [c for c in SOLVER_AND_REPORT if not c[0].startswith("report.simulation.start")],
)
def test_top_level_solver_and_report_faults(path: str, value: Any, where: str, phrase: str) -> None:
    assert_fault(edit(plant(), path, value), where, phrase)


@pytest.mark.parametrize(
    ("path", "value", "where", "phrase"), [c for c in SOLVER_AND_REPORT if c[0].startswith("report.simulation.start")]
)
def test_grid_start_faults(path: str, value: Any, where: str, phrase: str) -> None:
    assert_fault(edit(plant(), path, value), where, phrase)


@pytest.mark.parametrize(("path", "value", "where", "phrase"), GRID)
def test_grid_model_faults(path: str, value: Any, where: str, phrase: str) -> None:
    assert_fault(edit(plant(), path, value), where, phrase)


@pytest.mark.parametrize(("path", "value", "where", "phrase"), TABULAR)
def test_tabular_model_faults(path: str, value: Any, where: str, phrase: str) -> None:
    assert_fault(edit(worn_machine(), path, value), where, phrase)


@pytest.mark.parametrize(("row", "entry", "where", "phrase"), SPARSE)
def test_sparse_transition_faults(row: int, entry: list[float], where: str, phrase: str) -> None:
    entries = copy.deepcopy(SPARSE_ENTRIES)
    entries[row] = entry
    assert_fault(edit(worn_machine(), "model.transition", {"entries": entries}), where, phrase)


def test_sparse_rows_with_no_entries_sum_to_zero() -> None:
    entries = [e for e in SPARSE_ENTRIES if e[:2] != [2, 1]]
    assert_fault(
        edit(worn_machine(), "model.transition", {"entries": entries}),
        "model.transition.entries",
        'state "worn" (index 2) under action "service" (index 1) sum to 0',
    )


def test_farm_faults_on_next_and_law_of_motion() -> None:
    assert_fault(edit(farm(), "model.next", {}), "model.next.herd", "state `herd` has no law of motion")
    assert_fault(edit(farm(), "model.next.herd", "herd * rainfall"), "model.next.herd", "unknown name `rainfall`")
    assert_fault(
        edit(farm(), "model.states.herd.values", [0, 5, 10, 20, 40, 30]), "model.states.herd.values[5]", "30 follows 40"
    )
    assert_fault(edit(farm(), "model.states.feed.min", -1), "model.states.feed.min", "log spacing needs min > 0")
    assert_fault(edit(farm(), "model.choices.sell", {"values": []}), "model.choices.sell.values", "must not be empty")


def test_a_state_with_no_allowed_action_is_infeasible() -> None:
    document = edit(worn_machine(), "model.reward[2]", [None, None])
    errors = faults(document, InfeasibleModel)
    assert errors == [
        {
            "path": "model.reward[2]",
            "message": 'state "worn" (index 2) has no allowed action: every reward in its row is null',
        }
    ]


def test_infeasibility_with_other_faults_is_an_invalid_document() -> None:
    document = edit(edit(worn_machine(), "model.reward[2]", [None, None]), "discount", 2.0)
    assert {e["path"] for e in faults(document, InvalidDocument)} == {"discount", "model.reward[2]"}


def test_every_fault_is_listed_at_once() -> None:
    document = edit(plant(), "discount", 1.0)
    document = edit(document, "solver.tolerance", 0)
    document = edit(document, "model.states.capacity.points", 1)
    document = edit(document, "model.shocks.demand.ar1.rho", 2.0)
    document = edit(document, "report.simulation.paths", 0)
    document = edit(document, "label", 5)
    paths = {e["path"] for e in faults(document)}
    assert paths == {
        "discount",
        "solver.tolerance",
        "model.states.capacity.points",
        "model.shocks.demand.ar1.rho",
        "report.simulation.paths",
        "label",
    }


def test_not_an_object() -> None:
    assert faults([1, 2]) == [{"path": "", "message": "expected a JSON object (the problem document), got a list"}]


def test_many_bad_rows_are_counted_not_listed() -> None:
    rows = 200
    reward = np.zeros((rows, 1))
    transition = np.zeros((rows, 1, rows))
    transition[:, 0, 0] = 0.5
    model = {
        "kind": "tabular",
        "states": rows,
        "actions": 1,
        "reward": packed(reward),
        "transition": packed(transition),
    }
    document = {"version": 1, "discount": 0.9, "model": model}
    errors = faults(document)
    assert len(errors) == 11 and errors[0]["path"] == "model.transition[0][0]"
    assert errors[-1] == {"path": "model.transition", "message": "and 190 more rows that do not sum to 1"}


# Hostile documents.


def test_a_flood_of_unknown_keys_is_listed_up_to_the_cap() -> None:
    document = plant()
    for part in (document, document["solver"], document["model"]["hints"]):
        part.update({f"key{i}": i for i in range(900)})
    errors = faults(document)
    assert len(errors) == MAX_REPORTED + 1
    assert all("unknown key `key" in e["message"] for e in errors[:-1])
    assert errors[-1] == {"path": "", "message": "and 2,600 more faults"}


def test_objects_with_too_many_keys_are_refused_before_validation() -> None:
    document = edit(plant(), "model.params", {f"p{i}": "not a number" for i in range(100_000)})
    assert faults(document) == [
        {"path": "model.params", "message": "has 100,000 keys; no object in a problem document needs more than 1,000"}
    ]


def test_a_million_bad_labels_give_one_fault() -> None:
    document = edit(worn_machine(), "model.states", [1] * 1_000_000)
    assert faults(document) == [{"path": "model.states[0]", "message": "expected a string, got the number 1"}]
    document = edit(worn_machine(), "model.states", ["idle"] * 1_000_000)
    errors = faults(document)
    assert errors[10] == {"path": "model.states", "message": "and 999,989 more duplicate labels"}


def test_huge_grids_are_validated_without_being_built(monkeypatch: pytest.MonkeyPatch) -> None:
    import worker.grids
    import worker.shocks

    def refuse(*args: Any, **kwargs: Any) -> None:
        raise AssertionError("validation must not build grids or chains")

    for module, names in ((worker.grids, ("build_grid", "uniform_grid")), (worker.shocks, ("rouwenhorst", "tauchen"))):
        for name in names:
            monkeypatch.setattr(module, name, refuse)
    document = edit(plant(), "model.states.capacity.points", 10_000_000)
    document = edit(document, "model.shocks.demand.ar1.points", 2_000)  # a chain's most (MAX_CHAIN_POINTS)
    document = edit(document, "model.states.capacity.spacing", "uniform")
    document = edit(document, "model.states.capacity.exponent", DELETE)
    assert parse_document(document).model.axis_sizes() == {"capacity": 10_000_000, "demand": 2_000}


def test_packed_array_with_huge_shape_is_refused_before_decoding() -> None:
    text = "AAAA" * (50 * 2**20 // 4)  # 50 MiB of base64
    document = edit(worn_machine(), "model.reward", {"dtype": "float64", "shape": [10**9, 10**9], "base64": text})
    errors = faults(document, TooLarge)
    assert errors[0]["path"] == "model.reward" and "more than the limit" in errors[0]["message"]
    document = edit(
        worn_machine(), "model.reward", {"dtype": "float64", "shape": [10**6, 10**6, 10**6], "base64": text}
    )
    assert_fault(document, "model.reward", "expected a 2-dimensional array")


def test_packed_array_whose_shape_does_not_match_its_bytes() -> None:
    text = base64.b64encode(np.zeros(6).tobytes()).decode()
    assert_fault(
        edit(worn_machine(), "model.reward", {"dtype": "float64", "shape": [3, 3], "base64": text}),
        "model.reward.base64",
        "needs 72 bytes",
    )


def test_large_sparse_problem_validates_with_vectorised_checks() -> None:
    # 100,000 states, 2 actions, 5 successors each: 1,000,000 entries, handed over as
    # ndarrays (as Python callers may) so that the test measures the checks, not base64.
    states, actions, successors = 100_000, 2, 5
    s = np.repeat(np.arange(states), actions * successors)
    a = np.tile(np.repeat(np.arange(actions), successors), states)
    rng = np.random.default_rng(0)
    entries = np.column_stack([s, a, rng.integers(0, states, size=s.size), np.full(s.size, 1.0 / successors)])
    reward = rng.normal(size=(states, actions))
    document = {
        "version": 1,
        "discount": 0.99,
        "model": {
            "kind": "tabular",
            "states": states,
            "actions": actions,
            "reward": reward,
            "transition": {"entries": entries},
        },
    }
    assert parse_document(document).model.transition.entries.shape == (1_000_000, 4)
    entries[-1, 3] = 0.3
    assert_fault(document, "model.transition.entries", "state 99999 under action 1 sum to 1.1")
    entries[-1, 3], entries[5, 2] = 0.2, states
    assert_fault(document, "model.transition.entries[5][2]", "next-state index 100000 is out of range")


# JSON Schema.

_ANNOTATIONS = {"title", "description", "default", "discriminator", "contentEncoding", "$schema", "$defs"}


def _resolve(root: dict[str, Any], ref: str) -> dict[str, Any]:
    assert ref.startswith("#/$defs/"), ref
    return root["$defs"][ref.removeprefix("#/$defs/")]


def _is_type(value: Any, name: str) -> bool:
    checks = {
        "object": lambda v: isinstance(v, dict),
        "array": lambda v: isinstance(v, list),
        "string": lambda v: isinstance(v, str),
        "boolean": lambda v: isinstance(v, bool),
        "null": lambda v: v is None,
        "number": lambda v: isinstance(v, (int, float)) and not isinstance(v, bool),
        "integer": lambda v: isinstance(v, (int, float)) and not isinstance(v, bool) and float(v).is_integer(),
    }
    return checks[name](value)


def _valid(root: dict[str, Any], schema_: dict[str, Any], value: Any) -> bool:
    """A small JSON Schema 2020-12 validator for the keywords the fixq schema uses.

    An unknown keyword fails the test, so no constraint is silently skipped.
    """
    for key, rule in schema_.items():
        if key in _ANNOTATIONS:
            continue
        if key == "$ref":
            ok = _valid(root, _resolve(root, rule), value)
        elif key == "type":
            ok = any(_is_type(value, t) for t in ([rule] if isinstance(rule, str) else rule))
        elif key == "enum":
            ok = value in rule
        elif key == "const":
            ok = value == rule and type(value) is not bool
        elif key == "anyOf":
            ok = any(_valid(root, s, value) for s in rule)
        elif key == "oneOf":
            ok = sum(_valid(root, s, value) for s in rule) == 1
        elif key == "allOf":
            ok = all(_valid(root, s, value) for s in rule)
        elif key in ("then", "else"):
            continue  # applied with "if"
        elif key == "if":
            branch = schema_.get("then" if _valid(root, rule, value) else "else")
            ok = branch is None or _valid(root, branch, value)
        elif key in (
            "properties",
            "required",
            "additionalProperties",
            "propertyNames",
            "maxProperties",
            "minProperties",
        ):
            if not isinstance(value, dict):
                continue
            props = schema_.get("properties", {})
            if key == "properties":
                ok = all(_valid(root, props[k], v) for k, v in value.items() if k in props)
            elif key == "required":
                ok = all(k in value for k in rule)
            elif key == "additionalProperties":
                extra = [v for k, v in value.items() if k not in props]
                ok = all(_valid(root, rule, v) for v in extra) if isinstance(rule, dict) else (rule or not extra)
            elif key == "propertyNames":
                ok = all(_valid(root, rule, k) for k in value)
            elif key == "maxProperties":
                ok = len(value) <= rule
            else:
                ok = len(value) >= rule
        elif key in ("items", "minItems", "maxItems"):
            if not isinstance(value, list):
                continue
            ok = (
                all(_valid(root, rule, v) for v in value)
                if key == "items"
                else (len(value) >= rule if key == "minItems" else len(value) <= rule)
            )
        elif key in ("minimum", "maximum", "exclusiveMinimum", "exclusiveMaximum"):
            if not _is_type(value, "number"):
                continue
            ok = {
                "minimum": value >= rule,
                "maximum": value <= rule,
                "exclusiveMinimum": value > rule,
                "exclusiveMaximum": value < rule,
            }[key]
        elif key in ("minLength", "maxLength", "pattern"):
            if not isinstance(value, str):
                continue
            if key == "pattern":
                ok = re.search(rule, value) is not None
            else:
                ok = len(value) >= rule if key == "minLength" else len(value) <= rule
        else:
            raise AssertionError(f"the test validator does not know the keyword {key!r}")
        if not ok:
            return False
    return True


def _json(document: dict[str, Any]) -> Any:
    return json.loads(json.dumps(document))


def test_json_schema_is_a_2020_12_schema_with_descriptions() -> None:
    document_schema = json_schema()
    assert document_schema["$schema"] == "https://json-schema.org/draft/2020-12/schema"
    assert document_schema["type"] == "object" and document_schema["additionalProperties"] is False
    missing = []

    def walk(node: Any, where: str) -> None:
        if isinstance(node, dict):
            if "$ref" in node:
                _resolve(document_schema, node["$ref"])
            if node.get("type") == "object" and "properties" in node:
                assert node.get("additionalProperties") is False, where
                missing.extend(f"{where}.{k}" for k, v in node["properties"].items() if not v.get("description"))
            for key, value in node.items():
                walk(value, f"{where}.{key}")
        elif isinstance(node, list):
            for i, value in enumerate(node):
                walk(value, f"{where}[{i}]")

    walk(document_schema, "#")
    assert not missing, missing
    assert all(d.get("description") for d in document_schema["$defs"].values())
    try:
        import jsonschema
    except ImportError:
        return
    jsonschema.Draft202012Validator.check_schema(document_schema)


def test_json_schema_accepts_the_valid_examples_and_refuses_unknown_keys() -> None:
    document_schema = json_schema()
    shop_packed = edit(worn_machine(), "model.transition", {"entries": packed(SPARSE_ENTRIES)})
    examples = [
        worn_machine(),
        plant(),
        farm(),
        shop_packed,
        edit(plant(), "solver.initial", {"values": [[0.0] * 5] * 60}),
    ]
    for example in examples:
        assert _valid(document_schema, document_schema, _json(example))
    assert not _valid(document_schema, document_schema, _json(edit(plant(), "colour", 1)))
    assert not _valid(document_schema, document_schema, _json(edit(plant(), "model.states.capacity.minimum", 1)))
    assert not _valid(document_schema, document_schema, _json(edit(plant(), "discount", 1)))
    finite = edit(edit(plant(), "discount", 1), "model.horizon", {"periods": 3})
    assert _valid(document_schema, document_schema, _json(finite))
    assert not _valid(document_schema, document_schema, _json(edit(plant(), "model.params.2x", 1)))
    assert not _valid(document_schema, document_schema, _json(edit(worn_machine(), "model.kind", "grid")))
    try:
        import jsonschema
    except ImportError:
        return
    for example in examples:
        jsonschema.validate(_json(example), document_schema)


def test_json_schema_describes_arrays_honestly() -> None:
    defs = json_schema()["$defs"]
    reward = defs["TabularModel"]["properties"]["reward"]["anyOf"]
    assert reward[0] == {"type": "array", "items": {"type": "array", "items": {"type": ["number", "null"]}}}
    assert reward[1] == {"$ref": "#/$defs/PackedArray"}
    assert defs["PackedArray"]["required"] == ["dtype", "shape", "base64"]
    assert "float64" in defs["PackedArray"]["properties"]["dtype"]["enum"]


# Canonical form and hash.


def test_hash_ignores_key_order_and_submission_options() -> None:
    original = plant()
    reordered = json.loads(json.dumps(original, sort_keys=True))
    reordered["model"]["states"] = original["model"]["states"]
    relabelled = edit(edit(edit(original, "label", "another name"), "tags", ["x"]), "priority", "high")
    relabelled["notify"] = {"url": "https://example.org/hook"}
    assert document_hash(original) == document_hash(reordered) == document_hash(relabelled)
    assert re.fullmatch(r"[0-9a-f]{64}", document_hash(original))


def test_hash_sees_defaults_packing_and_numbers_alike() -> None:
    shop = worn_machine()
    defaults = {
        "evaluation_steps": DEFAULT_EVALUATION_STEPS,
        "initial": "zeros",
        "checkpoint_s": 30,
        "time_limit_s": None,
    }
    explicit = edit(shop, "solver", {**shop["solver"], **defaults})
    as_packed = edit(shop, "model.transition", packed(shop["model"]["transition"]))
    assert document_hash(shop) == document_hash(explicit) == document_hash(as_packed)


def test_hash_changes_with_the_problem() -> None:
    base = document_hash(plant())
    assert document_hash(edit(plant(), "discount", 0.96)) != base
    assert document_hash(edit(plant(), "model.states.capacity.points", 61)) != base
    assert document_hash(edit(plant(), "solver.method", "value_iteration")) != base


def test_axis_order_is_part_of_the_problem() -> None:
    document = farm()
    swapped = copy.deepcopy(document)
    swapped["model"]["states"] = dict(reversed(list(document["model"]["states"].items())))
    assert document_hash(document) != document_hash(swapped)


def test_canonical_json_is_compact_sorted_and_a_valid_document() -> None:
    text = canonical_json(plant())
    assert b'": ' not in text and b'", "' not in text
    data = json.loads(text)
    assert list(data) == sorted(data) and "label" not in data
    assert list(data["model"]["states"]) == ["capacity"]
    assert document_hash(data) == document_hash(plant())
    full = json.loads(canonical_json(plant(), include_submission=True))
    assert full["label"] == "plant expansion (invented)"


def test_canonical_json_packs_large_arrays() -> None:
    rows = 100
    transition = np.zeros((rows, 1, rows))
    transition[:, 0, 0] = 1.0
    model = {
        "kind": "tabular",
        "states": rows,
        "actions": 1,
        "reward": [[1.0]] * rows,
        "transition": transition.tolist(),
    }
    document = {"version": 1, "discount": 0.9, "model": model}
    data = json.loads(canonical_json(document))
    assert set(data["model"]["transition"]) == {"base64", "dtype", "shape"}
    assert data["model"]["reward"] == [[1.0]] * rows
    assert document_hash(data) == document_hash(document)


def test_defines_in_any_order_solve_to_the_same_numbers() -> None:
    """Keys of a decoded JSON object may arrive in any order: the defines mean the same thing."""
    from worker import solve

    ordered = grid_document(GROWTH_ORDERED)
    shuffled = grid_document(dict(GROWTH_ORDERED, define=dict(reversed(list(GROWTH_ORDERED["define"].items())))))
    assert list(parse_document(shuffled).model.define) == list(GROWTH_ORDERED["define"])
    assert solve(shuffled)["value"] == solve(ordered)["value"]


GROWTH_ORDERED = {  # invented: output, then what is left to eat, then its utility
    "params": {"alpha": 0.3},
    "states": {"k": {"min": 0.1, "max": 2.0, "points": 15}},
    "choices": {"k_next": {"next_of": "k"}},
    "define": {"output": "k**alpha", "eaten": "output - k_next", "joy": "log(eaten)"},
    "reward": "joy",
    "feasible": ["eaten > 0"],
}


def test_a_circle_of_defines_is_refused_naming_it() -> None:
    model = dict(GROWTH_ORDERED, define={"output": "k**alpha + joy", "eaten": "output - k_next", "joy": "log(eaten)"})
    with pytest.raises(InvalidDocument) as caught:
        parse_document(grid_document(model))
    error = caught.value.errors[0]
    # Each define on the path uses the next: output uses joy, joy uses eaten, eaten uses output.
    assert error["path"] == "model.define.output" and "`output` → `joy` → `eaten` → `output`" in error["message"]


def test_a_single_string_is_accepted_where_a_list_of_strings_is() -> None:
    # R's jsonlite with auto_unbox turns a one-element list into its element.
    document = grid_document(dict(GROWTH_ORDERED, feasible="eaten > 0"))
    document["tags"] = "nightly"
    doc = parse_document(document)
    assert doc.model.feasible == ["eaten > 0"] and doc.tags == ["nightly"]
