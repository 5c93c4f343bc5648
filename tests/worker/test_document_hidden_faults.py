"""An unknown key no longer hides the faults elsewhere in the document (worker/document/unknown_keys.py).

Before, pydantic stopped at the object holding an unknown key, so the grid model's expression checks never
ran: a document with the typo ``model.statez`` and an unknown name ``gama`` in ``model.reward`` was told
only of the typo (and of ``states`` missing).  Each test but the last two failed before the fix.
"""

from __future__ import annotations

import copy

import pytest

from tests._documents import plant_capacity
from worker.document import parse_document
from worker.errors import InvalidDocument


def faults(document: dict) -> dict[str, str]:
    with pytest.raises(InvalidDocument) as info:
        parse_document(document)
    found: dict[str, str] = {}
    for error in info.value.errors:
        found[error["path"]] = " | ".join(filter(None, [found.get(error["path"]), error["message"]]))
    return found


def test_a_misspelt_key_and_an_unknown_name_elsewhere_are_reported_together() -> None:
    document = plant_capacity()
    document["model"]["statez"] = document["model"].pop("states")
    document["model"]["reward"] += " * gama"
    found = faults(document)
    assert "unknown key `statez` (did you mean `states`?)" in found["model.statez"]
    assert found["model.reward"].startswith("unknown name `gama`")
    # The misspelt block was read as `states`, so its names are known: capacity raises no unknown-name fault.
    assert "unknown name `capacity`" not in " ".join(found.values())


def test_faults_inside_a_misspelt_block_are_named_where_they_were_written() -> None:
    document = plant_capacity()
    states = document["model"].pop("states")
    states["capacity"]["points"] = -3
    document["model"]["statez"] = states
    found = faults(document)
    assert "model.statez" in found
    assert "model.statez.capacity.points" in found, found
    assert not any(path.startswith("model.states.") for path in found)


def test_unknown_keys_in_two_places_and_a_syntax_error_elsewhere_all_come_back() -> None:
    document = plant_capacity()
    document["model"]["colour"] = "blue"
    document["solver"] = {"methd": "howard"}
    document["model"]["define"]["sales"] = "min(capacity, demand) +"
    found = faults(document)
    assert set(found) >= {"model.colour", "solver.methd", "model.define.sales"}
    assert "the expression ends with `+`" in found["model.define.sales"]


def test_the_document_as_sent_is_not_changed() -> None:
    document = plant_capacity()
    document["model"]["statez"] = document["model"].pop("states")
    document["model"]["reward"] += " * gama"
    before = copy.deepcopy(document)
    faults(document)
    assert document == before


def test_a_missing_key_with_no_typo_for_it_still_stops_the_checks_that_need_it() -> None:
    # With `states` gone, every state's name would read as unknown: those checks mean nothing, so none run.
    document = plant_capacity()
    del document["model"]["states"]
    document["model"]["colour"] = "blue"
    found = faults(document)
    assert set(found) == {"model.states", "model.colour"}


def test_a_document_with_only_an_unknown_key_lists_only_it() -> None:
    document = plant_capacity()
    document["model"]["colour"] = "blue"
    assert set(faults(document)) == {"model.colour"}
