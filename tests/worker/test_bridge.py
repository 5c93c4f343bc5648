"""The numpy reference of the compiled kernels, and the cold-start bridge that solves with it while a
structure's kernels compile in the background."""

from __future__ import annotations

import numpy as np
import pytest

from tests._documents import GROWTH, LQ, TWO_CHOICES, random_values
from tests._documents import grid_document as document
from worker import _codegen, bridge, solve
from worker.document import parse_document
from worker.environment import COLD_BRIDGE
from worker.gridmodel import compile_grid
from worker.problem import CompiledProblem, Hints
from worker.reference import ReferenceProblem
from worker.tabular import TabularProblem


def _reference_problem(
    model: dict, monkeypatch: pytest.MonkeyPatch, tmp_path, hints: dict | None = None
) -> ReferenceProblem:
    """The bridge's problem for ``model``: a cold kernel cache, and no background compile."""
    monkeypatch.setenv("FIXQ_KERNEL_CACHE", str(tmp_path))
    monkeypatch.setenv(COLD_BRIDGE, "on")
    monkeypatch.setattr(bridge, "compile_later", lambda *args, **kwargs: False)
    problem = compile_grid(parse_document(document(model, hints=hints)))
    assert isinstance(problem, ReferenceProblem)
    return problem


KERNEL_CASES = {
    "growth": (GROWTH, None),
    "growth-hinted": (GROWTH, {"monotone": True, "concave": True}),
    "lq-interpolated-next": (LQ, None),
    "two-choices": (TWO_CHOICES, None),
}
"""Models the compiled kernels are checked on: next_of only, with hints, an interpolated ``next``
with clamping, and several choices with shocks and interpolation at once."""


@pytest.mark.parametrize("case", sorted(KERNEL_CASES))
def test_compiled_kernels_equal_the_numpy_reference(case, monkeypatch, tmp_path) -> None:
    # The numpy reference (worker.reference) against the generated kernels of both reward storages,
    # at value functions of no particular shape.  The tables kernels scan the same tables with the same
    # operations in the same order: same bits, same policy (first of equal values).  The on-the-fly
    # kernels evaluate log/exp/** in compiled code, which may differ from numpy's in the last bits:
    # same policy, values within 1e-13 (relative); LQ uses none of those functions, so bit for bit.
    model, hints = KERNEL_CASES[case]
    reference = _reference_problem(model, monkeypatch, tmp_path, hints)
    monkeypatch.setenv(COLD_BRIDGE, "off")
    doc = parse_document(document(model, hints=hints))
    tables = compile_grid(doc, reward_storage="tables")
    pointwise = compile_grid(doc, reward_storage="on_the_fly")
    assert not isinstance(tables, ReferenceProblem) and not isinstance(pointwise, ReferenceProblem)
    for seed in range(3):
        v = random_values(tables, seed=seed)
        expected_v, expected_policy = reference.bellman_step(v)
        got_v, got_policy = tables.bellman_step(v)
        assert np.array_equal(got_policy, expected_policy)
        assert np.array_equal(got_v, expected_v)
        # A fixed policy's reward and nodes, hence its one-step value, match too.
        assert np.array_equal(tables.policy_step(v, expected_policy), reference.policy_step(v, expected_policy))
        assert np.array_equal(tables.policy_reward(expected_policy), reference.policy_reward(expected_policy))
        for exhaustive in (False, True):
            point_v, point_policy = pointwise.bellman_step(v, exhaustive=exhaustive)
            assert np.array_equal(point_policy, expected_policy)
            if model is LQ:
                assert np.array_equal(point_v, expected_v)
            else:
                np.testing.assert_allclose(point_v, expected_v, rtol=1e-13, atol=1e-13)


def test_the_reference_problem_uses_no_hints_and_no_fused_steps(monkeypatch, tmp_path) -> None:
    problem = _reference_problem(GROWTH, monkeypatch, tmp_path, {"monotone": True, "concave": True})
    assert not problem.hints_active and problem.hints == Hints()
    assert problem.policy_steps is None
    v = random_values(problem)
    assert all(np.array_equal(a, b) for a, b in zip(problem.bellman_step(v, restricted=True), problem.bellman_step(v)))


def test_a_cold_solve_takes_the_bridge_and_leaves_compiled_kernels_behind(monkeypatch, tmp_path) -> None:
    monkeypatch.setenv("FIXQ_KERNEL_CACHE", str(tmp_path))
    monkeypatch.setenv(COLD_BRIDGE, "on")
    doc = document(GROWTH, hints={"monotone": True, "concave": True})
    first = solve(doc)
    assert first["status"] == "converged"
    assert first["diagnostics"]["reward_storage"] == "tables"
    assert "not in the cache yet" in first["diagnostics"]["notes"][0]
    assert first["diagnostics"]["timings"]["compile_s"] == 0.0
    assert bridge.wait_idle(timeout=240), "the background compile finished"
    assert list(tmp_path.glob("*.ready")), "the background compile marked the kernels ready"
    second = solve(doc)
    assert second["diagnostics"]["reward_storage"] == "on_the_fly"
    assert "not in the cache yet" not in second["diagnostics"]["notes"][0]
    # Both answers are certified to the tolerance, so they agree to twice that.
    gap = np.max(np.abs(np.array(first["value"]) - np.array(second["value"])))
    assert gap <= first["error_bound"] + second["error_bound"]
    assert first["policy_index"] == second["policy_index"]


def test_the_background_compile_warms_exactly_the_kernels_the_caller_looks_for(monkeypatch, tmp_path) -> None:
    # Params in reverse alphabetical order: their order is part of the generated source, so a
    # background compile of a reordered (canonical) document would warm another module.
    monkeypatch.setenv("FIXQ_KERNEL_CACHE", str(tmp_path))
    monkeypatch.setenv(COLD_BRIDGE, "on")
    model = {**GROWTH, "params": {"gamma": 2.0, "delta": 0.08, "alpha": 0.36}}
    doc = parse_document(document(model))
    limits = {"max_bytes": 64 << 20}
    assert isinstance(compile_grid(doc, limits=limits), ReferenceProblem)
    assert bridge.wait_idle(timeout=240)
    warmed = compile_grid(doc, limits=limits)
    assert not isinstance(warmed, ReferenceProblem), "the next solve finds the kernels it looks for"
    assert warmed.timings["compile_s"] < 2.0, "loaded from the cache, not compiled again"


def test_the_bridge_stays_out_when_off_forced_too_large_or_warm(monkeypatch, tmp_path) -> None:
    monkeypatch.setenv("FIXQ_KERNEL_CACHE", str(tmp_path))
    monkeypatch.setattr(bridge, "compile_later", lambda *args, **kwargs: False)
    doc = parse_document(document(GROWTH))
    monkeypatch.setenv(COLD_BRIDGE, "off")
    assert not isinstance(compile_grid(doc), ReferenceProblem)
    monkeypatch.setenv(COLD_BRIDGE, "on")
    assert not isinstance(compile_grid(doc, reward_storage="tables"), ReferenceProblem)
    # compile_grid above warmed this structure's kernels and marked them: no bridge now.
    assert not isinstance(compile_grid(doc), ReferenceProblem)
    monkeypatch.setenv("FIXQ_KERNEL_CACHE", str(tmp_path / "fresh"))
    assert isinstance(compile_grid(doc), ReferenceProblem)
    monkeypatch.setattr(bridge, "BRIDGE_MAX_PAIRS", 10)
    assert not isinstance(compile_grid(doc), ReferenceProblem)


def test_one_background_compile_at_a_time(monkeypatch, tmp_path) -> None:
    monkeypatch.setenv("FIXQ_KERNEL_CACHE", str(tmp_path))
    name = _codegen.module_name("# a structure\n")
    lock = tmp_path / f"{name}.{bridge._tag()}.compiling"
    lock.touch()
    assert bridge.compile_later({}, name, reward_storage="on_the_fly") is False
    # Nor a second structure while one compiles (MAX_BACKGROUND is 1).
    assert bridge.compile_later({}, _codegen.module_name("# another structure\n"), reward_storage="on_the_fly") is False
    assert not bridge.wait_idle(timeout=0.2)
    lock.unlink()
    assert bridge.wait_idle(timeout=1.0)


def test_every_problem_class_offers_the_whole_compiled_problem_interface(monkeypatch, tmp_path) -> None:
    members = set(CompiledProblem.__annotations__) | {
        name for name, value in vars(CompiledProblem).items() if callable(value) and not name.startswith("_")
    }
    assert {"hints", "policy_steps", "bellman_step", "diagnostics"} <= members
    reference = _reference_problem(LQ, monkeypatch, tmp_path)
    monkeypatch.setenv(COLD_BRIDGE, "off")
    grid = compile_grid(parse_document(document(LQ)), reward_storage="tables")
    tabular = TabularProblem(np.zeros((2, 1)), np.full((2, 1, 2), 0.5), 0.9)
    for problem in (reference, grid, tabular):
        missing = sorted(name for name in members if not hasattr(problem, name))
        assert not missing, f"{type(problem).__name__} lacks {missing}"
        assert isinstance(problem.hints, Hints)
