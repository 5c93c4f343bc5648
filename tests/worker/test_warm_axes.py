"""The axes a warm start must meet, read from the document alone (``worker.interpolate.document_axes``), and
the one set of rules (``check_axes``) that the door applies to a finished job's summary and ``regrid`` to its
result at run time."""

from __future__ import annotations

import copy

import pytest

from tests._documents import GROWTH, LQ, TWO_CHOICES, grid_document, machine_shop
from worker.document import parse_document
from worker.errors import InvalidDocument
from worker.gridmodel import compile_grid
from worker.interpolate import axes_summary, check_start, document_axes
from worker.solve import solve
from worker.tabular import compile_tabular

PATH = "solver.initial.job"

WITH_DRAW = {
    **LQ,
    "shocks": {"luck": {"iid": {"values": [0.9, 1.1], "probs": [0.5, 0.5]}, "timing": "after_choice"}},
    "reward": "-(q * x**2 + r * u**2) * luck",
}
"""LQ with a cost scale drawn after the choice (invented): a shock that is no axis of the value."""

SHOCK_FIRST = {**TWO_CHOICES, "shocks": {**TWO_CHOICES["shocks"], "luck": WITH_DRAW["shocks"]["luck"]}}
"""The household with a draw after the choice listed last among two shocks."""

CAKE = {
    "states": {"w": {"min": 0.0, "max": 2.0, "points": 11}},
    "choices": {"wn": {"next_of": "w"}},
    "feasible": ["wn < w or w == 0"],
    "reward": "where(w > 0, log(w - wn), -1e6)",
    "horizon": {"periods": 3},
}
"""Cake eating over three periods (invented numbers)."""


LQ_Y = {**LQ, "states": {"y": LQ["states"]["x"]}, "next": {"y": "a * y + b * u"}, "reward": "-(q * y**2 + r * u**2)"}
"""LQ with its state called y."""


def refusal(call) -> list[dict]:
    with pytest.raises(InvalidDocument) as caught:
        call()
    return caught.value.errors


@pytest.mark.parametrize("model", [LQ, GROWTH, TWO_CHOICES, WITH_DRAW, SHOCK_FIRST, CAKE],
                         ids=["lq", "growth", "household", "draw", "household_draw", "horizon"])
def test_grid_axes_from_the_document_are_the_compiled_problems(model: dict) -> None:
    doc = parse_document(grid_document(model))
    axes = document_axes(doc)
    assert list(axes) == list(compile_grid(doc).axes)
    assert set(axes.values()) == {None}  # numbers: their values are not needed to check a start


def test_tabular_axes_from_the_document_are_the_compiled_problems_with_their_labels() -> None:
    doc = parse_document(machine_shop())
    assert document_axes(doc) == compile_tabular(doc).axes == {"state_label": ["new", "worn", "broken"]}
    counted = copy.deepcopy(machine_shop())
    counted["model"]["states"] = 3
    doc = parse_document(counted)
    assert document_axes(doc) == {"state_label": None} and list(compile_tabular(doc).axes) == ["state_label"]


def test_a_renamed_state_is_refused_by_the_summary_with_the_run_times_words() -> None:
    earlier = solve(grid_document(LQ))
    later = grid_document(LQ_Y, initial={"job": "0123456789abcdef"})
    at_door = refusal(lambda: check_start(axes_summary(earlier["axes"]), parse_document(later), path=PATH))
    at_run = refusal(lambda: solve(later, warm_start=earlier))
    assert at_door == at_run
    assert at_door[0]["path"] == PATH and "lacks axes ['y']" in at_door[0]["message"]


def test_a_missing_label_is_refused_by_the_summary_with_the_run_times_words() -> None:
    earlier = solve(machine_shop())
    later = machine_shop(solver={"initial": {"job": "0123456789abcdef"}})
    later["model"]["states"] = ["new", "worn", "scrapped"]
    at_door = refusal(lambda: check_start(axes_summary(earlier["axes"]), parse_document(later), path=PATH))
    at_run = refusal(lambda: solve(later, warm_start=earlier))
    assert at_door == at_run
    assert "has no entry for ['scrapped']" in at_door[0]["message"]


def test_starts_the_run_time_accepts_pass_the_summary() -> None:
    earlier = solve(grid_document(LQ))
    finer = copy.deepcopy(LQ)
    finer["states"]["x"]["points"] = 21
    finer["params"]["a"] = 0.9
    horizon = {**copy.deepcopy(LQ), "horizon": {"periods": 2}}
    for model in (finer, horizon):
        later = grid_document(model, initial={"job": "0123456789abcdef"})
        check_start(axes_summary(earlier["axes"]), parse_document(later), path=PATH)
        assert solve(later, warm_start=earlier)["status"] == "converged"
    # A finite job's result starts a later horizon: its period axis is left out, as the solve leaves it out.
    finite = solve(grid_document(horizon))
    assert "period" in finite["axes"]
    later = grid_document(horizon, initial={"job": "0123456789abcdef"})
    check_start(axes_summary(finite["axes"]), parse_document(later), path=PATH)
    shop = solve(machine_shop())
    reordered = machine_shop()
    reordered["model"]["states"] = ["broken", "new", "worn"]
    check_start(axes_summary(shop["axes"]), parse_document(reordered), path=PATH)
