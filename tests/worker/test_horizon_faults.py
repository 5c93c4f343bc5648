"""Faults of a finite horizon named at their field, not raised as a traceback from inside the solve.

A terminal value that used a shock drawn after the choice passed validation (the draw's name was among the
known names) and then failed inside the solve with ``KeyError: no value given for name `e```. Invented
scenario: a beekeeper's household whose honey price is drawn after it saves.
"""

from __future__ import annotations

from typing import Any

import pytest

from worker import solve
from worker.errors import InvalidDocument


def beekeeper(terminal_value: str) -> dict[str, Any]:
    return {
        "version": 1, "label": "a beekeeper's household (invented)", "discount": 0.95,
        "model": {
            "kind": "grid",
            "params": {"R": 1.03, "inc": [1.0, 0.5]},
            "states": {"a": {"min": 0.0, "max": 3.0, "points": 7}},
            "shocks": {"z": {"markov": {"values": [0.9, 1.1], "matrix": [[0.8, 0.2], [0.2, 0.8]]}},
                       "price": {"timing": "after_choice", "iid": {"values": [0.0, 0.2], "probs": [0.5, 0.5]}}},
            "choices": {"a_next": {"next_of": "a"}},
            "define": {"c": "R * a + inc * z - a_next"},
            "reward": "log(c) + price",
            "feasible": ["c > 0"],
            "horizon": {"periods": 2, "terminal_value": terminal_value},
        },
    }


def test_a_terminal_value_using_a_draw_after_the_choice_is_refused_at_its_field() -> None:
    with pytest.raises(InvalidDocument) as caught:
        solve(beekeeper("price * log(1 + a)"))
    (error,) = caught.value.errors
    assert error["path"] == "model.horizon.terminal_value"
    assert "`price`, drawn after the choice" in error["message"]


def test_a_terminal_value_of_the_states_and_the_shocks_seen_before_the_choice_is_accepted() -> None:
    result = solve(beekeeper("z * log(1 + a)"))
    assert result["status"] == "converged"


def test_a_cohort_start_giving_a_draw_after_the_choice_says_what_it_is() -> None:
    """Before, the message said the draw was "not a state or shock of the model", which it is."""
    document = beekeeper("z * log(1 + a)")
    document["report"] = {"cohort": {"start": {"a": 0.0, "z": 0.9, "price": 0.2}}}
    with pytest.raises(InvalidDocument) as caught:
        solve(document)
    (error,) = caught.value.errors
    assert error["path"] == "report.cohort.start.price"
    assert "`price` is drawn after the choice" in error["message"]
