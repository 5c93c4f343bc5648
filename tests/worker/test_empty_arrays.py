"""An empty JSON array where an object, a number or null is expected is refused saying what was expected.

MATLAB/Octave's ``jsonencode`` writes ``[]`` for an empty or missing value (and ``jsondecode`` reads ``null``
back as ``[]``), so documents that went through them carry ``[]`` where fixq expects an object or null.
"""

from __future__ import annotations

import copy
from typing import Any

import pytest

from tests._documents import machine_shop
from worker.document import parse_document
from worker.errors import InvalidDocument

MATLAB_NOTE = "got an empty array — MATLAB/Octave encode a missing value as []"


def grid() -> dict[str, Any]:
    return {
        "version": 1,
        "discount": 0.9,
        "model": {
            "kind": "grid",
            "states": {"k": {"min": 0.5, "max": 5.0, "points": 20}},
            "shocks": {"z": {"markov": {"values": [0.9, 1.1], "matrix": [[0.9, 0.1], [0.1, 0.9]]}}},
            "choices": {"kn": {"next_of": "k"}},
            "define": {"c": "z * k ** 0.3 + 0.9 * k - kn"},
            "reward": "log(c)",
            "feasible": "c > 0",
        },
    }


def refusal(document: dict[str, Any], path: tuple[str, ...]) -> list[dict[str, str]]:
    document = copy.deepcopy(document)
    node = document
    for key in path[:-1]:
        node = node.setdefault(key, {})
    node[path[-1]] = []
    with pytest.raises(InvalidDocument) as caught:
        parse_document(document)
    return caught.value.errors


@pytest.mark.parametrize(("path", "expected"), [
    (("report", "simulation"), "expected an object (or null); "),
    (("report", "cohort"), "expected an object (or null); "),
    (("notify",), "expected an object (or null); "),
    (("model", "horizon"), "expected an object (or null); "),
    (("model", "taste_shocks"), "expected an object (or null); "),
    (("solver", "time_limit_s"), "expected a number (or null); "),
    (("label",), "expected a string (or null); "),
])
def test_empty_array_for_an_optional_value_says_send_null_or_leave_it_out(path: tuple[str, ...], expected: str) -> None:
    errors = refusal(grid(), path)
    assert errors == [{"path": ".".join(path), "message": f"{expected}{MATLAB_NOTE}; send null or leave the key out"}]


@pytest.mark.parametrize(("path", "expected"), [
    (("model", "hints"), "expected an object; "),
    (("report",), "expected an object; "),
    (("solver", "initial"), 'expected "zeros", an object {"values": ARRAY} or an object {"job": JOB_ID}; '),
    (("model", "shocks", "z", "transform"), 'expected "exp" or "none"; '),
])
def test_empty_array_for_a_value_with_a_default_says_leave_it_out(path: tuple[str, ...], expected: str) -> None:
    errors = refusal(grid(), path)
    message = f"{expected}{MATLAB_NOTE}; leave the key out for the default"
    assert errors == [{"path": ".".join(path), "message": message}]


@pytest.mark.parametrize(("document", "path", "expected"), [
    (grid(), ("model", "states", "k"), "expected an object; "),
    (grid(), ("model", "shocks", "z"), "expected an object; "),
    (grid(), ("discount",), "expected a number; "),
    (grid(), ("model", "states", "k", "points"), "expected a whole number"),
    (machine_shop(), ("model",), "expected an object; "),
])
def test_empty_array_for_a_required_value_says_it_is_required(document: dict[str, Any], path: tuple[str, ...],
                                                              expected: str) -> None:
    errors = refusal(document, path)
    assert len(errors) == 1 and errors[0]["path"] == ".".join(path)
    assert errors[0]["message"].startswith(expected) and MATLAB_NOTE in errors[0]["message"]
    assert "got an object" not in errors[0]["message"] and "got a list" not in errors[0]["message"]


def test_an_empty_array_where_a_list_belongs_is_judged_as_a_list() -> None:
    document = grid()
    document["model"]["feasible"] = []  # no conditions: allowed
    parse_document(document)
    errors = refusal({**grid(), "tags": ["a"]}, ("model", "states", "k", "values"))  # too few grid values
    assert errors and all(MATLAB_NOTE not in e["message"] for e in errors)
