"""Warnings when a policy chooses an end of a grid, for grid and continuous choices alike, and
``model.states.NAME.real_ends``, which declares an end a real limit of the problem so that it is not warned
about (the borrowing limit every savings model has).

Before, a continuous ``next_of`` choice at either end of its state's grid was counted
(``continuous_choice.at_upper_end``) but never warned about, and ``real_ends`` silenced only the stationary
report's warning about mass at the top, not the choice's warning at a borrowing limit.
"""

from __future__ import annotations

import copy
from typing import Any

import numpy as np
import pytest

from tests._documents import grid_document, savings_market
from worker import solve


def _saver(*, real_ends: list[str], top: float, points: int = 40) -> dict[str, Any]:
    """The search tests' invented household at r = 0.04 (no search), its asset grid ending at ``top``."""
    model = savings_market(points)
    model["params"]["r"] = 0.04
    model["states"]["a"].update(max=top, real_ends=real_ends)
    return {"version": 1, "discount": 0.95, "model": {**model, "hints": {"monotone": True, "concave": True}},
            "solver": {"tolerance": 1e-7}}


def _end_warnings(result: dict[str, Any]) -> list[str]:
    return [w for w in result["diagnostics"]["warnings"] if "point of `" in w]


def test_a_continuous_choice_at_the_top_of_a_short_grid_is_warned_unless_the_top_is_a_real_limit() -> None:
    # A grid ending at 2 where the richer households want to save more: many points choose its top.
    result = solve(_saver(real_ends=["min"], top=2.0))
    continuous = result["diagnostics"]["continuous_choice"]
    assert continuous["at_upper_end"] >= 0.01 * 80
    (warning,) = _end_warnings(result)
    assert "highest point of `save`" in warning and "larger max for the grid of state `a`" in warning
    assert 'list "max" in model.states.a.real_ends' in warning
    declared = solve(_saver(real_ends=["min", "max"], top=2.0))
    assert declared["diagnostics"]["continuous_choice"]["at_upper_end"] == continuous["at_upper_end"]
    assert not _end_warnings(declared)


def test_a_continuous_choice_at_its_borrowing_limit_is_warned_unless_real_ends_lists_min() -> None:
    result = solve(_saver(real_ends=[], top=30.0))
    low = result["diagnostics"]["continuous_choice"]["at_lower_end"]
    assert low >= 0.01 * 80  # the poor households save nothing
    (warning,) = [w for w in _end_warnings(result) if "lowest point" in w]
    assert "lowest point of `save`" in warning and 'list "min" in model.states.a.real_ends' in warning
    assert not [w for w in _end_warnings(solve(_saver(real_ends=["min"], top=30.0))) if "lowest point" in w]


def test_a_grid_choice_at_its_borrowing_limit_is_warned_unless_real_ends_lists_min() -> None:
    model = {
        "states": {"a": {"min": 0.0, "max": 10.0, "points": 60}},
        "shocks": {"y": {"markov": {"values": [0.5, 1.5], "matrix": [[0.9, 0.1], [0.1, 0.9]]},
                         "transform": "none"}},
        "choices": {"a_next": {"next_of": "a"}},
        "define": {"c": "1.02 * a + y - a_next"},
        "reward": "log(c)",
        "feasible": ["c > 0"],
    }
    result = solve(grid_document(model, hints={"monotone": True, "concave": True}))
    assert result["diagnostics"]["edge_hits"]["a_next"]["lowest"] >= 0.01
    assert any("lowest point of `a_next`" in w and 'list "min" in model.states.a.real_ends' in w
               for w in _end_warnings(result))
    declared = copy.deepcopy(model)
    declared["states"]["a"]["real_ends"] = ["min"]
    quiet = solve(grid_document(declared, hints={"monotone": True, "concave": True}))
    assert quiet["diagnostics"]["edge_hits"] == result["diagnostics"]["edge_hits"]
    assert not any("lowest point" in w for w in _end_warnings(quiet))


def _shop(hours: dict[str, Any]) -> dict[str, Any]:
    """An invented repair shop: stock of spare parts (state), hours of overtime chosen on a grid of their own
    (no overtime at all is a real corner: a quiet week needs none) and tomorrow's stock."""
    return grid_document({
        "states": {"s": {"min": 0.0, "max": 6.0, "points": 25}},
        "shocks": {"d": {"markov": {"values": [0.5, 2.0], "matrix": [[0.7, 0.3], [0.4, 0.6]]},
                         "transform": "none"}},
        "choices": {"s_next": {"next_of": "s"}, "overtime": hours},
        "define": {"made": "s + overtime - d"},
        "reward": "-0.5 * overtime**2 - 0.1 * s_next - 3 * max(0 - made, 0)",
        "feasible": ["s_next <= max(made, 0)"],
    }, hints={})


def test_a_choice_on_its_own_grid_at_a_real_corner_is_silenced_by_its_own_real_ends() -> None:
    # Before, a choice with a grid of its own (min, max, points) had no way to declare a real limit: every
    # solve of the shop warned that the best overtime "may lie below" zero hours.
    hours = {"min": 0.0, "max": 3.0, "points": 13}
    result = solve(_shop(hours))
    assert result["diagnostics"]["edge_hits"]["overtime"]["lowest"] >= 0.01
    (warning,) = [w for w in _end_warnings(result) if "lowest point of `overtime`" in w]
    assert "smaller min for choice `overtime`" in warning
    assert 'list "min" in model.choices.overtime.real_ends' in warning
    quiet = solve(_shop({**hours, "real_ends": ["min"]}))
    assert quiet["diagnostics"]["edge_hits"] == result["diagnostics"]["edge_hits"]
    assert not [w for w in _end_warnings(quiet) if "point of `overtime`" in w]
    np.testing.assert_array_equal(np.array(quiet["value"]), np.array(result["value"]))


def test_real_ends_on_a_choice_without_a_grid_of_its_own_is_refused_at_the_field() -> None:
    from worker.errors import InvalidDocument

    for choice, said in (({"next_of": "s", "real_ends": ["min"]}, "model.states.s.real_ends"),
                         ({"min": 0.0, "max": 3.0, "continuous": True, "real_ends": ["min"]},
                          "never warned about its ends")):
        document = _shop({"min": 0.0, "max": 3.0, "points": 13})
        document["model"]["choices"]["s_next"] = choice
        with pytest.raises(InvalidDocument) as refused:
            solve(document)
        assert "model.choices.s_next.real_ends" in str(refused.value) and said in str(refused.value)
