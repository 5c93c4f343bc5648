"""The result document's schema holds for real results: every key a solve writes is documented, and every
documented key is written by some solve.

Each result goes through JSON (orjson, as the service stores it) and is validated against
:class:`worker.result_document.ResultDocument`, whose models refuse keys they do not list: a new key that is
not documented fails here.  The cases cover the bundled examples and the shapes they do not reach: a finite
horizon (grid, continuous, tabular), taste shocks (tabular and grid), a continuous choice by the endogenous grid
method, a search, a static choice, rewards that are not finite, a law of motion leaving its grid, simulations
and stationary reports.  All the models are invented scenarios on small grids.
"""

from __future__ import annotations

import copy
from collections.abc import Callable, Iterator
from typing import Any

import numpy as np
import orjson
import pytest
from pydantic import BaseModel, ValidationError

from service.examples import example_names, load_example
from tests._documents import aging_saver, grid_document, log_growth, machine_shop, savings_market, two_peaks
from tests._mixed_models import household_document
from worker import solve
from worker.coarse_start import COARSE_MIN_POINTS
from worker.report import PERCENTILES
from worker.result_document import ResultDocument, result_json_schema
from worker.result_document.reports import SeriesSummary

SIMULATION = {"periods": 12, "paths": 6, "seed": 3}

ECONOMY: dict[str, Any] = savings_market(30)
"""Invented: households saving in an asset, their wage and capital demand given by the interest rate r."""


def _economy(**top_level: Any) -> dict[str, Any]:
    return {
        "version": 1,
        "discount": 0.95,
        "model": copy.deepcopy(ECONOMY),
        "solver": {"method": "howard", "tolerance": 1e-8},
        **top_level,
    }


def _glassblower(points: int) -> dict[str, Any]:
    document = load_example("glassblower_life_cycle")
    document["model"]["states"]["savings"]["points"] = points
    # One define between the choice and the reward, the form Euler-equation errors need.
    document["model"]["reward"] = "spending**(1 - gamma) / (1 - gamma)"
    del document["model"]["define"]["left_behind"]
    document["report"] = {
        "cohort": document["report"]["cohort"],
        "simulation": dict(SIMULATION, periods=60),
        "euler_errors": True,
    }
    return document


def _tabular_taste() -> dict[str, Any]:
    document = machine_shop(report={"stationary": True, "simulation": SIMULATION})
    document["model"]["taste_shocks"] = {"scale": 0.5}
    return document


def _tabular_horizon() -> dict[str, Any]:
    document = machine_shop(
        report={"cohort": {"start": "new"}, "simulation": dict(SIMULATION, periods=5), "euler_errors": True}
    )
    document["model"]["horizon"] = {"periods": 5, "terminal_value": 0.0}
    return document


def _tabular_taste_horizon() -> dict[str, Any]:
    document = _tabular_horizon()
    document["model"]["taste_shocks"] = {"scale": 0.5}
    return document


def _aging_saver(method: str | None) -> dict[str, Any]:
    """A continuous choice over a finite horizon: tests/_documents.aging_saver (its kernels are other tests' too),
    with a simulation beside its cohort and Euler-equation errors."""
    document = aging_saver(method)
    document["report"]["simulation"] = dict(SIMULATION, periods=8)
    return document


def _coarse_start() -> dict[str, Any]:
    """The economy on a grid large enough for a coarse start (worker.coarse_start), from zeros."""
    document = _economy()
    document["model"]["states"]["a"]["points"] = COARSE_MIN_POINTS
    return document


def _grid_taste() -> dict[str, Any]:
    document = load_example("courier_van_replacement")
    document["report"] = {"stationary": True, "simulation": SIMULATION, "euler_errors": True}
    return document


def _static_choice() -> dict[str, Any]:
    """Invented: growth with an hours choice that only this period's reward sees (maximised within the period)."""
    model = log_growth(
        points=12,
        choices={"k_next": {"next_of": "k"}, "hours": {"values": [0.5, 1.0]}},
        define={"c": "z * k**alpha * hours - k_next"},
        reward="log(c) - 0.3 * hours",
    )
    return {**grid_document(model), "report": {"stationary": True, "simulation": SIMULATION}}


def _leaving_grid() -> dict[str, Any]:
    """Invented: a stock whose law of motion leaves its grid, and a reward that is NaN at some feasible pairs."""
    model = {
        "states": {"x": {"min": 0.0, "max": 1.0, "points": 6}},
        "choices": {"effort": {"values": [0.0, 1.0]}},
        "next": {"x": "x + 0.5 * effort"},
        "reward": "x + sqrt(0.8 - x * effort) - 0.2 * effort",
    }
    return grid_document(model, discount=0.9)


def _saving_with_work() -> dict[str, Any]:
    """Households choosing whether to work (a menu) beside their continuous saving: the work-or-not household of
    tests/_mixed_models.py (its kernels are compiled for the tests of a continuous choice beside a discrete one)."""
    return household_document({"concave": True}, stationary=True, simulation=SIMULATION, euler_errors=True)


def _growth_two_states() -> dict[str, Any]:
    """Invented: growth with a productivity level that drifts by its own law beside capital (two states)."""
    model = log_growth(points=12, define={"c": "z * level * k**alpha - k_next"}, next={"level": "level**0.5"})
    model["states"] = {"level": {"min": 0.9, "max": 1.1, "points": 3}, **model["states"]}
    return {**grid_document(model), "report": {"stationary": True, "euler_errors": True}}


def _two_chosen_states() -> dict[str, Any]:
    """Invented: a workshop choosing tomorrow's machines k and tools h out of today's output (two next_of choices)."""
    model = log_growth(points=8, define={"c": "z * k**0.25 * h**0.15 - k_next - h_next"},
                       choices={"k_next": {"next_of": "k"}, "h_next": {"next_of": "h"}})
    model["states"] = {"k": {"min": 0.04, "max": 0.16, "points": 8}, "h": {"min": 0.02, "max": 0.1, "points": 6}}
    return {**grid_document(model), "report": {"stationary": True, "euler_errors": True}}


CASES: dict[str, Callable[[], dict[str, Any]]] = {
    **{f"example:{name}": (lambda name=name: load_example(name)) for name in example_names()},
    "grid horizon, hints, cohort, simulation, euler errors": lambda: _glassblower(20),
    "continuous horizon": lambda: _aging_saver(None),
    "tabular horizon": _tabular_horizon,
    "tabular taste shocks": _tabular_taste,
    "tabular taste shocks with a horizon": _tabular_taste_horizon,
    "endogenous grid method with a horizon": lambda: _aging_saver("endogenous_grid"),
    "grid taste shocks": _grid_taste,
    "endogenous grid method": lambda: _economy(
        solver={"method": "endogenous_grid", "tolerance": 1e-8},
        report={"stationary": True, "simulation": SIMULATION, "euler_errors": True},
    ),
    "search": lambda: _economy(
        search={
            "unknowns": {"r": {"min": 0.0, "max": 0.05}},
            "conditions": ["mean(a) - capital_demand"],
            "tolerance": 1e-4,
        }
    ),
    "coarse start": _coarse_start,
    "continuous choice beside a discrete one": _saving_with_work,
    "static choice": _static_choice,
    "euler errors with two states": _growth_two_states,
    "euler errors of two next_of choices": _two_chosen_states,
    "law of motion leaving its grid, non-finite rewards": _leaving_grid,
    "max_iterations": lambda: machine_shop(solver={"method": "howard", "max_iterations": 1}),
    "a false concave hint, searched locally from the verified policy": lambda: two_peaks(
        0.5, {"monotone": True, "concave": True}),
}
"""What each case is for, and its document."""

RARE = {
    ("ClampedNext", "note"),
    ("Diagnostics", "resumed_trial_iteration"),
}
"""Keys no case here writes, with why: ``clamped_next.note`` needs more (point, choice) pairs than a quick test
solves (over 50 million); ``diagnostics.resumed_trial_iteration`` a search resumed from a checkpoint saved inside a
trial (tests/worker/test_search.py makes two and validates their results against the schema)."""


@pytest.fixture(scope="module")
def results() -> Iterator[dict[str, dict[str, Any]]]:
    yield {name: orjson.loads(orjson.dumps(solve(build()))) for name, build in CASES.items()}


def _shape(nested: Any) -> tuple[int, ...]:
    """The shape of nested lists (checked regular)."""
    array = np.asarray(nested, dtype=object)
    return array.shape


def _set_fields(model: BaseModel, seen: set[tuple[str, str]]) -> None:
    """Every (model class, key) set in the validated tree under ``model``."""
    for key in model.model_fields_set:
        seen.add((type(model).__name__, key))
        _walk(getattr(model, key), seen)


def _walk(node: Any, seen: set[tuple[str, str]]) -> None:
    if isinstance(node, BaseModel):
        _set_fields(node, seen)
    elif isinstance(node, dict):
        for item in node.values():
            _walk(item, seen)
    elif isinstance(node, list) and node and isinstance(node[0], (BaseModel, dict)):
        for item in node:
            _walk(item, seen)


@pytest.mark.parametrize("case", list(CASES))
def test_every_result_validates_with_unknown_keys_refused(results: dict[str, dict[str, Any]], case: str) -> None:
    result = results[case]
    document = ResultDocument.model_validate_json(orjson.dumps(result))
    lengths = tuple(len(values) for values in result["axes"].values())
    assert _shape(result["value"]) == lengths
    for name, chosen in result["policy"].items():
        assert _shape(chosen) == lengths, name
    for name, index in (result["policy_index"] or {}).items():
        assert _shape(index) == lengths, name
    assert result["axis_order"] == list(result["axes"])
    if document.stationary is not None:
        assert _shape(result["stationary"]["distribution"]) == lengths
    if document.choice_probabilities is not None:
        choices = result["diagnostics"]["taste_shocks"]["choices"]
        assert _shape(result["choice_probabilities"]) == lengths + tuple(len(v) for v in choices.values())


def test_the_cases_reach_the_shapes_they_are_for(results: dict[str, dict[str, Any]]) -> None:
    horizon = results["grid horizon, hints, cohort, simulation, euler errors"]
    assert horizon["method"] == "backward_induction" and list(horizon["axes"])[0] == "period"
    assert horizon["diagnostics"]["verification"]["periods"] == 60
    assert horizon["diagnostics"]["euler_errors"]["by_period"]["period"][0] == 0
    assert horizon["simulation"]["by_period"] and horizon["cohort"]["means"]
    assert results["continuous horizon"]["policy_index"] is None
    assert results["tabular taste shocks"]["simulation"]["first_path"]["action"][0] in ("run", "repair")
    assert results["grid taste shocks"]["choice_probabilities"]
    egm = results["endogenous grid method"]
    assert egm["diagnostics"]["continuous_choice"]["endogenous_grid"]["rounds"] > 0
    assert egm["simulation"]["interpolated"] is True and egm["diagnostics"]["euler_errors"]["weighted_mean_log10"]
    search = results["search"]["search"]
    assert search["status"] == "converged" and search["sign_change"] is not None
    assert results["static choice"]["diagnostics"]["maximised_within_period"] == ["hours"]
    assert results["euler errors with two states"]["diagnostics"]["euler_errors"]["profile"]["over"] == ["level"]
    assert list(results["euler errors of two next_of choices"]["diagnostics"]["euler_errors"]["by_choice"]) == [
        "k_next", "h_next"]
    leaving = results["law of motion leaving its grid, non-finite rewards"]["diagnostics"]
    assert leaving["clamped_next"]["policy"]["count"] > 0 and leaving["nonfinite_rewards"]["count"] > 0
    assert results["max_iterations"]["status"] == "max_iterations"


def test_every_documented_key_is_written_by_some_case(results: dict[str, dict[str, Any]]) -> None:
    seen: set[tuple[str, str]] = set()
    for result in results.values():
        _set_fields(ResultDocument.model_validate_json(orjson.dumps(result)), seen)
    documented = set()

    def collect(model: type[BaseModel]) -> None:
        for key, field in model.model_fields.items():
            if (model.__name__, key) in documented:
                continue
            documented.add((model.__name__, key))
            for inner in _models_in(field.annotation):
                collect(inner)

    collect(ResultDocument)
    never = documented - seen - RARE
    assert not never, f"documented but never written: {sorted(never)}"


def _models_in(annotation: Any) -> list[type[BaseModel]]:
    """The models named anywhere inside a type annotation."""
    if isinstance(annotation, type) and issubclass(annotation, BaseModel):
        return [annotation]
    found = []
    for arg in getattr(annotation, "__args__", ()) or ():
        found += _models_in(arg)
    value = getattr(annotation, "__value__", None)  # a type alias
    if value is not None and not isinstance(value, str):
        found += _models_in(value)
    return found


@pytest.mark.parametrize("where", [(), ("diagnostics",), ("log", 0), ("diagnostics", "bracket")])
def test_an_undocumented_key_fails_validation(results: dict[str, dict[str, Any]], where: tuple[Any, ...]) -> None:
    result = copy.deepcopy(results["example:household_saving"])
    node = result
    for step in where:
        node = node[step]
    node["not_documented"] = 1
    with pytest.raises(ValidationError, match="not_documented"):
        ResultDocument.model_validate_json(orjson.dumps(result))


def test_every_key_of_the_schema_has_a_description() -> None:
    schema = result_json_schema()
    objects = [("ResultDocument", schema), *schema["$defs"].items()]
    for name, node in objects:
        assert node.get("description"), name
        for key, prop in node.get("properties", {}).items():
            assert len(prop.get("description", "")) > 3, (name, key)
        assert node.get("additionalProperties") is not False, f"{name}: clients must be free to ignore new keys"


def test_a_series_summary_has_the_percentiles_the_report_computes() -> None:
    assert list(SeriesSummary.model_fields) == ["mean", "sd", *(f"p{p}" for p in PERCENTILES)]
