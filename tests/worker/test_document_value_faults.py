"""A bad value inside a grid model no longer hides its name and expression faults (worker/document/value_faults.py).

Before, a fault inside an entry of ``states``, ``shocks`` or ``choices`` (or in ``hints``, ``horizon``, a
define that is not a string) stopped the model's name checks: an unknown name ``gama`` in ``reward`` was
reported only on the next round trip.  Each test failed before the change except
``test_with_states_missing_no_unknown_name_is_reported``, which pins that a fault leaving the names
unknown still stops those checks (it fails if the new checks run regardless).
"""

from __future__ import annotations

import pytest

from tests._documents import plant_capacity
from worker.document import parse_document
from worker.errors import InvalidDocument
from worker.solve import solve


def faults(document: dict) -> list[dict[str, str]]:
    with pytest.raises(InvalidDocument) as info:
        parse_document(document)
    return info.value.errors


def by_path(errors: list[dict[str, str]]) -> dict[str, str]:
    found: dict[str, str] = {}
    for error in errors:
        found[error["path"]] = " | ".join(filter(None, [found.get(error["path"]), error["message"]]))
    return found


def three_faults() -> dict:
    """The plant example with a bad state value, an unknown name in the reward and a bad shock spec."""
    document = plant_capacity()
    document["model"]["states"]["capacity"]["points"] = 1
    document["model"]["reward"] += " * gama"
    document["model"]["shocks"]["demand"]["ar1"]["rho"] = 2
    return document


def assert_three(errors: list[dict[str, str]]) -> None:
    found = by_path(errors)
    assert set(found) == {"model.states.capacity.points", "model.reward", "model.shocks.demand.ar1.rho"}, found
    assert found["model.states.capacity.points"] == "a grid needs at least 2 points, got 1"
    assert found["model.reward"].startswith("unknown name `gama`; known names are: ")
    assert "capacity" in found["model.reward"]  # the state with the bad value still counts as a known name
    assert found["model.shocks.demand.ar1.rho"].startswith("rho must lie strictly between -1 and 1, got 2")
    assert len(errors) == 3  # each fault once


def test_a_bad_state_value_an_unknown_name_and_a_bad_shock_come_back_together() -> None:
    assert_three(faults(three_faults()))


def test_the_solve_front_door_lists_the_same_three() -> None:
    with pytest.raises(InvalidDocument) as info:
        solve(three_faults())
    assert_three(info.value.errors)


def test_min_above_max_in_a_state_hides_no_unknown_name() -> None:
    document = plant_capacity()
    document["model"]["states"]["capacity"]["min"] = 20.0
    document["model"]["define"]["sales"] = "min(capacity, demnd)"
    found = by_path(faults(document))
    assert set(found) == {"model.states.capacity.max", "model.define.sales"}, found
    assert found["model.define.sales"].startswith("unknown name `demnd`")


def test_with_states_missing_no_unknown_name_is_reported() -> None:
    # Every expression names `capacity`: with `states` gone, checking them would only say it is unknown.
    document = plant_capacity()
    del document["model"]["states"]
    document["model"]["shocks"]["demand"]["ar1"]["rho"] = 2
    found = by_path(faults(document))
    assert set(found) == {"model.states", "model.shocks.demand.ar1.rho"}, found


def test_a_bad_name_as_a_key_stops_the_name_checks() -> None:
    document = plant_capacity()
    document["model"]["states"]["bad name"] = {"min": 0.0, "max": 1.0, "points": 3}
    document["model"]["reward"] += " * gama"
    assert not any(path == "model.reward" for path in by_path(faults(document)))


def test_an_expression_with_its_own_fault_is_not_checked_again_and_the_others_are() -> None:
    document = plant_capacity()
    document["model"]["hints"] = {"monotone": 3}
    document["model"]["define"]["extra"] = 5
    document["model"]["feasible"].append("spare > 0")
    document["model"]["reward"] += " + extra"  # extra is a define, known though its text is not valid
    found = by_path(faults(document))
    assert set(found) == {"model.hints.monotone", "model.define.extra", "model.feasible[1]"}, found
    assert found["model.define.extra"] == "expected a string, got the number 5"
    assert found["model.feasible[1]"].startswith("unknown name `spare`")


def test_names_used_twice_and_laws_of_motion_are_checked_beside_a_bad_state_value() -> None:
    document = plant_capacity()
    document["model"]["states"]["capacity"]["points"] = 1
    document["model"]["params"]["demand"] = 1.0
    document["model"]["choices"]["capacity_next"]["next_of"] = "capacty"
    found = by_path(faults(document))
    assert found["model.shocks.demand"].startswith("the name `demand` is already used in params")
    assert found["model.choices.capacity_next.next_of"].startswith("`capacty` is not a state")


def test_a_misspelt_block_with_a_bad_value_hides_no_unknown_name() -> None:
    document = plant_capacity()
    states = document["model"].pop("states")
    states["capacity"]["points"] = 1
    document["model"]["statez"] = states
    document["model"]["reward"] += " * gama"
    found = by_path(faults(document))
    assert "model.statez.capacity.points" in found, found
    assert found["model.reward"].startswith("unknown name `gama`")
    assert "unknown name `capacity`" not in " ".join(found.values())
