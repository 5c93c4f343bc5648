"""The cold-start bridge: numpy table scans while a structure's kernels compile in the background."""

from __future__ import annotations

import numpy as np
import pytest

from worker.document.schema import parse_document
from worker import _codegen, bridge, solve
from worker.environment import COLD_BRIDGE
from worker.gridmodel import compile_grid

from test_gridmodel import GROWTH, LQ, TWO_CHOICES, document, random_values


def _table_problem(model: dict, monkeypatch: pytest.MonkeyPatch, tmp_path) -> bridge.TableProblem:
    monkeypatch.setenv("FIXQ_KERNEL_CACHE", str(tmp_path))
    monkeypatch.setenv(COLD_BRIDGE, "on")
    monkeypatch.setattr(bridge, "compile_later", lambda *args, **kwargs: False)
    problem = compile_grid(parse_document(document(model)))
    assert isinstance(problem, bridge.TableProblem)
    return problem


@pytest.mark.parametrize("model", [GROWTH, LQ, TWO_CHOICES], ids=["growth", "lq", "two-choices"])
def test_table_scan_equals_the_compiled_table_kernels_bit_for_bit(model, monkeypatch, tmp_path) -> None:
    # The same tables scanned by numpy and by the table backend's bellman_full: same bits, same
    # policy (first of equal values), at value functions of no particular shape.
    bridged = _table_problem(model, monkeypatch, tmp_path)
    monkeypatch.setenv(COLD_BRIDGE, "off")
    compiled = compile_grid(parse_document(document(model)), regime="precomputed")
    assert not isinstance(compiled, bridge.TableProblem)
    for seed in range(3):
        v = random_values(compiled, seed=seed)
        expected_v, expected_policy = compiled.bellman_step(v)
        got_v, got_policy = bridged.bellman_step(v)
        assert np.array_equal(got_policy, expected_policy)
        assert np.array_equal(got_v, expected_v)
        # A fixed policy's reward and nodes, hence its one-step value, match too.
        assert np.array_equal(bridged.policy_step(v, expected_policy), compiled.policy_step(v, expected_policy))
        assert np.array_equal(bridged.policy_reward(expected_policy), compiled.policy_reward(expected_policy))


def test_a_cold_solve_takes_the_bridge_and_leaves_compiled_kernels_behind(monkeypatch, tmp_path) -> None:
    monkeypatch.setenv("FIXQ_KERNEL_CACHE", str(tmp_path))
    monkeypatch.setenv(COLD_BRIDGE, "on")
    doc = document(GROWTH, hints={"monotone": True, "concave": True})
    first = solve(doc)
    assert first["status"] == "converged"
    assert first["diagnostics"]["regime"] == "precomputed"
    assert "not in the cache yet" in first["diagnostics"]["notes"][0]
    assert first["diagnostics"]["timings"]["compile_s"] == 0.0
    assert bridge.wait_idle(timeout=240), "the background compile finished"
    assert list(tmp_path.glob("*.ready")), "the background compile marked the kernels ready"
    second = solve(doc)
    assert second["diagnostics"]["regime"] == "on_the_fly"
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
    assert isinstance(compile_grid(doc, limits=limits), bridge.TableProblem)
    assert bridge.wait_idle(timeout=240)
    warmed = compile_grid(doc, limits=limits)
    assert not isinstance(warmed, bridge.TableProblem), "the next solve finds the kernels it looks for"
    assert warmed.timings["compile_s"] < 2.0, "loaded from the cache, not compiled again"


def test_the_bridge_stays_out_when_off_forced_too_large_or_warm(monkeypatch, tmp_path) -> None:
    monkeypatch.setenv("FIXQ_KERNEL_CACHE", str(tmp_path))
    monkeypatch.setattr(bridge, "compile_later", lambda *args, **kwargs: False)
    doc = parse_document(document(GROWTH))
    monkeypatch.setenv(COLD_BRIDGE, "off")
    assert not isinstance(compile_grid(doc), bridge.TableProblem)
    monkeypatch.setenv(COLD_BRIDGE, "on")
    assert not isinstance(compile_grid(doc, regime="precomputed"), bridge.TableProblem)
    # compile_grid above warmed this structure's kernels and marked them: no bridge now.
    assert not isinstance(compile_grid(doc), bridge.TableProblem)
    monkeypatch.setenv("FIXQ_KERNEL_CACHE", str(tmp_path / "fresh"))
    assert isinstance(compile_grid(doc), bridge.TableProblem)
    monkeypatch.setattr(bridge, "BRIDGE_MAX_PAIRS", 10)
    assert not isinstance(compile_grid(doc), bridge.TableProblem)


def test_one_background_compile_at_a_time(monkeypatch, tmp_path) -> None:
    monkeypatch.setenv("FIXQ_KERNEL_CACHE", str(tmp_path))
    name = _codegen.module_name("# a structure\n")
    lock = tmp_path / f"{name}.{bridge._tag()}.compiling"
    lock.touch()
    assert bridge.compile_later({}, name, regime="on_the_fly") is False
    # Nor a second structure while one compiles (MAX_BACKGROUND is 1).
    assert bridge.compile_later({}, _codegen.module_name("# another structure\n"), regime="on_the_fly") is False
    assert not bridge.wait_idle(timeout=0.2)
    lock.unlink()
    assert bridge.wait_idle(timeout=1.0)
