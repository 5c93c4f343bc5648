"""Size, memory and time estimates, and the reward-storage decision they share with the compiler."""

from __future__ import annotations

import copy
import tracemalloc

import numpy as np
import pytest

from tests._documents import GROWTH, array_tabular
from worker import solve
from worker.document import parse_document
from worker.errors import TooLarge
from worker.estimate import PRECOMPUTE_MAX_BYTES, estimate, grid_plan
from worker.gridmodel import compile_grid


def growth_document(
    *, points: int = 200, shocks: int = 3, hints: dict | None = None, choices: dict | None = None
) -> dict:
    """The shared growth model on a capital grid [1, 9] of ``points`` points (invented calibration); its
    expressions are those of :data:`tests._documents.GROWTH`, so the kernel tests' compiled kernels are reused."""
    model = {"kind": "grid", **copy.deepcopy(GROWTH)}
    model["states"]["k"] = {"min": 1.0, "max": 9.0, "points": points}
    model["shocks"]["z"]["ar1"]["points"] = shocks
    if choices:
        model["choices"] = choices
    if hints is not None:
        model["hints"] = hints
    return {"version": 1, "discount": 0.95, "model": model}


def test_a_billion_pair_document_is_sized_without_allocating() -> None:
    doc = parse_document(growth_document(points=20_000, shocks=7, hints={"monotone": True, "concave": True}))
    tracemalloc.start()
    try:
        size = estimate(doc)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert peak < 200_000  # a grid alone would be 160 kB, a table of pairs 22 GB
    assert size["points"] == 140_000 and size["shocks"] == 7 and size["choice_points"] == 20_000
    assert size["pairs"] == 2_800_000_000
    assert size["reward_storage"] == "on_the_fly"
    assert size["bytes"] < 1 << 30
    assert size["seconds"] > 0 and "iterations" in size["basis"]
    assert any("monotone and concave" in note for note in size["notes"])


def test_small_models_without_hints_are_tabulated() -> None:
    size = estimate(parse_document(growth_document()))
    assert size["reward_storage"] == "tables"
    assert size["bytes"] >= size["pairs"] * 8


def test_hints_choose_pointwise_evaluation() -> None:
    size = estimate(parse_document(growth_document(hints={"monotone": True, "concave": True})))
    assert size["reward_storage"] == "on_the_fly"


def test_the_memory_cap_moves_tables_out_of_reach() -> None:
    doc = parse_document(growth_document())
    pairs = 200 * 3 * 200
    assert grid_plan(doc.model, limits={"max_bytes": 4 * pairs * 8}).reward_storage == "tables"
    assert grid_plan(doc.model, limits={"max_bytes": 4 * pairs * 8 - 8}).reward_storage == "on_the_fly"
    assert grid_plan(doc.model, limits={"max_bytes": 1 << 50}).budget == PRECOMPUTE_MAX_BYTES


def test_unusable_hints_are_explained() -> None:
    two = {"k_next": {"next_of": "k"}, "effort": {"values": [0.0, 1.0]}}
    size = estimate(parse_document(growth_document(hints={"concave": True}, choices=two)))
    assert size["reward_storage"] == "tables"
    # `effort` affects nothing tomorrow: it is maximised out and the hint applies to `k_next`.
    assert any("the concave hint applies to `k_next`" in note for note in size["notes"])
    own = growth_document(
        hints={"monotone": True, "concave": True}, choices={"k_next": {"min": 1.0, "max": 9.0, "points": 50}}
    )
    own["model"]["next"] = {"k": "k_next"}
    plan = grid_plan(parse_document(own).model)
    assert plan.concave and not plan.monotone and "next_of" in plan.hint_note


@pytest.mark.parametrize(
    "raw",
    [
        growth_document(),
        growth_document(hints={"monotone": True, "concave": True}),
        growth_document(points=30, shocks=2),
    ],
    ids=["plain", "hinted", "small"],
)
def test_the_compiler_uses_the_estimated_reward_storage(raw: dict) -> None:
    doc = parse_document(raw)
    assert compile_grid(doc).reward_storage == estimate(doc)["reward_storage"]


@pytest.mark.parametrize("hints", [None, {"monotone": True, "concave": True}], ids=["tables", "on_the_fly"])
def test_estimated_bytes_cover_what_compiling_and_a_step_allocate(hints: dict | None) -> None:
    doc = parse_document(growth_document(points=300, shocks=3, hints=hints))
    compile_grid(doc)  # kernels compiled or loaded outside the measurement
    tracemalloc.start()
    try:
        problem = compile_grid(doc)
        v = np.zeros(problem.n)
        tv, policy = problem.bellman_step(v)
        problem.policy_matrix(policy)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert peak <= estimate(doc)["bytes"]


def test_tabular_documents_are_sized_from_their_shapes() -> None:
    S, A = 30, 4
    transition = np.full((S, A, S), 1.0 / S)
    raw = array_tabular(np.ones((S, A)), transition.tolist())
    size = estimate(parse_document(raw))
    assert size["kind"] == "tabular" and size["reward_storage"] == "tables"
    assert (size["points"], size["choice_points"], size["pairs"]) == (S, A, S * A)
    assert size["bytes"] >= S * A * S * 8
    assert size["seconds"] > 0


def test_a_solve_over_the_cap_is_refused_with_the_estimate() -> None:
    with pytest.raises(TooLarge) as caught:
        solve(growth_document(), limits={"max_bytes": 10_000})
    assert caught.value.context["estimate"]["pairs"] == 200 * 3 * 200
