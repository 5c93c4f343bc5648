"""The front door ``worker.solve``: documents in, result documents out.

The demo model is invented (a machine shop: a machine that is idle, busy or
worn, run or serviced).  References: the value of the returned policy,
``(I − β P_σ)⁻¹ r_σ`` solved with ``numpy.linalg.solve`` (Puterman 1994,
§6.1, from memory); for the grid model, the closed form of the growth model
with log utility and full depreciation, ``k' = αβ z k^α`` (Brock & Mirman
1972; Stokey & Lucas 1989, §2.1, from memory).
"""

from __future__ import annotations

import copy
import json
import math
import os
import subprocess
import sys

import numpy as np
import pytest

import worker
from tests._documents import idle_busy_worn, log_growth
from worker import Canceled, InvalidDocument, TooLarge, solve
from worker.solve import compile_document
from worker.solvers import GENERAL_METHODS
from worker.tabular import TabularProblem

REPO = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))


def worn_machine(**solver) -> dict:
    """Invented: a machine that earns while it runs and wears out unless serviced."""
    return idle_busy_worn(solver={"tolerance": 1e-9, **solver})


def policy_value(document: dict, policy_index: list[int]) -> np.ndarray:
    model = document["model"]
    reward = np.array([[np.nan if x is None else x for x in row] for row in model["reward"]])
    transition = np.array(model["transition"])
    rows = np.arange(len(policy_index))
    matrix = transition[rows, policy_index]
    return np.linalg.solve(np.eye(len(rows)) - document["discount"] * matrix, reward[rows, policy_index])


def test_result_document_has_every_part_and_is_plain_json():
    document = worn_machine()
    result = solve(copy.deepcopy(document))
    assert set(result) == {
        "status",
        "method",
        "error_bound",
        "iterations",
        "evaluation_steps",
        "linear_solves",
        "seconds",
        "axes",
        "axis_order",
        "value",
        "policy",
        "policy_index",
        "log",
        "diagnostics",
        "stationary",
        "simulation",
        "chains",
    }
    assert result["chains"] == {}  # a tabular model has no shocks
    assert result["status"] == "converged" and result["method"] == "howard"
    assert result["axes"] == {"state_label": ["idle", "busy", "worn"]}
    assert set(result["policy"]) == {"action"} and set(result["policy_index"]) == {"action"}
    assert all(label in ("run", "service") for label in result["policy"]["action"])
    diagnostics = result["diagnostics"]
    assert {"observed_rate", "warnings", "resumed_from_iteration", "bracket"} <= set(diagnostics)
    assert diagnostics["resumed_from_iteration"] is None and diagnostics["warnings"] == []
    text = json.dumps(result, allow_nan=False)
    assert json.loads(text) == result
    _assert_plain(result)


def _assert_plain(node) -> None:
    if isinstance(node, dict):
        for value in node.values():
            _assert_plain(value)
    elif isinstance(node, list):
        for value in node:
            _assert_plain(value)
    else:
        assert node is None or type(node) in (str, int, float, bool), type(node)


@pytest.mark.parametrize("method", sorted(GENERAL_METHODS))
def test_every_method_solves_the_machine_shop(method):
    document = worn_machine(method=method)
    result = solve(copy.deepcopy(document))
    exact = policy_value(document, result["policy_index"]["action"])
    assert result["method"] == method and result["status"] == "converged"
    assert np.abs(np.array(result["value"]) - exact).max() <= result["error_bound"] <= 1e-9
    assert len(result["log"]) == result["iterations"]


def test_non_convergence_is_a_status():
    result = solve(worn_machine(method="value_iteration", tolerance=1e-30, max_iterations=5))
    assert (result["status"], result["iterations"]) == ("max_iterations", 5)
    result = solve(worn_machine(tolerance=1e-30, time_limit_s=1e-9))
    assert result["status"] == "time_limit"


def test_initial_values_are_used_and_checked():
    cold = solve(worn_machine(method="value_iteration"))
    warm = solve(worn_machine(method="value_iteration", initial={"values": cold["value"]}))
    assert warm["iterations"] < cold["iterations"]
    with pytest.raises(InvalidDocument) as caught:
        solve(worn_machine(initial={"values": [1.0, 2.0]}))
    assert caught.value.errors[0]["path"] == "solver.initial.values"


def test_a_job_start_needs_the_service_or_a_warm_start():
    document = worn_machine(method="value_iteration", initial={"job": "earlier-job"})
    with pytest.raises(InvalidDocument) as caught:
        solve(document)
    assert caught.value.errors[0]["path"] == "solver.initial.job"
    assert "service" in caught.value.errors[0]["message"]
    earlier = solve(worn_machine(method="value_iteration"))
    warm = solve(document, warm_start={"axes": earlier["axes"], "value": earlier["value"]})
    assert warm["iterations"] < earlier["iterations"]
    with pytest.raises(InvalidDocument) as caught:
        solve(document, warm_start={"axes": {"state": ["a", "b", "c"]}, "value": [0.0, 0.0, 0.0]})
    assert caught.value.errors[0]["path"] == "solver.initial.job"


class MemoryCheckpoint:
    def __init__(self) -> None:
        self.state = None
        self.saves = 0

    def load(self):
        return self.state

    def save(self, state):
        self.state = state
        self.saves += 1


class Crash(Exception):
    pass


def test_checkpoints_resume_through_solve():
    document = worn_machine(method="value_iteration", tolerance=1e-10, checkpoint_s=1e-9)
    whole = solve(copy.deepcopy(document))
    store = MemoryCheckpoint()

    crash_at = whole["iterations"] - 3

    def crash(entry):
        if entry["iteration"] == crash_at:
            raise Crash

    with pytest.raises(Crash):
        solve(copy.deepcopy(document), checkpoint=store, on_progress=crash)
    assert store.state["iteration"] == crash_at - 1
    resumed = solve(copy.deepcopy(document), checkpoint=store)
    assert resumed["diagnostics"]["resumed_from_iteration"] == crash_at - 1
    assert resumed["value"] == whole["value"]
    assert [e["iteration"] for e in resumed["log"]] == list(range(1, whole["iterations"] + 1))
    # The same problem with another label is the same problem; another discount is not.
    relabelled = copy.deepcopy(document) | {"label": "renamed"}
    assert solve(relabelled, checkpoint=store)["diagnostics"]["resumed_from_iteration"] is not None
    other = copy.deepcopy(document) | {"discount": 0.9}
    assert solve(other, checkpoint=store)["diagnostics"]["resumed_from_iteration"] is None
    changed = copy.deepcopy(document)
    changed["model"]["reward"][2][0] = 0.30000001
    store.state = None
    with pytest.raises(Crash):
        solve(copy.deepcopy(document), checkpoint=store, on_progress=crash)
    assert solve(changed, checkpoint=store)["diagnostics"]["resumed_from_iteration"] is None


def test_progress_and_cancel():
    seen = []
    result = solve(worn_machine(method="value_iteration"), on_progress=seen.append)
    assert seen == result["log"]
    with pytest.raises(Canceled) as caught:
        solve(
            worn_machine(method="value_iteration"),
            on_progress=seen.append,
            should_stop=lambda: len(seen) > len(result["log"]) + 2,
        )
    assert caught.value.context["iteration"] == 3


def test_the_memory_cap_refuses_with_the_estimate(monkeypatch):
    with pytest.raises(TooLarge) as caught:
        solve(worn_machine(), limits={"max_bytes": 10})
    assert caught.value.errors[0]["path"] == "model"
    assert "MiB" in caught.value.errors[0]["message"]
    assert caught.value.context["estimate"]["bytes"] > 10
    monkeypatch.setenv("FIXQ_MAX_PROBLEM_MB", "0.000001")
    with pytest.raises(TooLarge):
        solve(worn_machine())
    monkeypatch.setenv("FIXQ_MAX_PROBLEM_MB", "1")
    assert solve(worn_machine())["status"] == "converged"


def test_reports_through_solve():
    document = worn_machine() | {
        "report": {"stationary": True, "simulate": {"periods": 20, "paths": 50, "seed": 4, "start": "worn"}}
    }
    result = solve(document)
    stationary = result["stationary"]
    assert len(stationary["distribution"]) == 3
    assert math.isclose(sum(stationary["distribution"]), 1.0, abs_tol=1e-12)
    assert set(stationary["means"]) == {"state_label", "action"}
    simulation = result["simulation"]
    assert simulation["first_path"]["state_label"][0] == "worn"
    assert set(simulation["summary"]) == {"state_label", "action"}
    assert set(simulation["summary"]["state_label"]) == {"mean", "sd", "p5", "p25", "p50", "p75", "p95"}
    json.dumps(result, allow_nan=False)


def test_compile_document_gives_the_document_and_the_problem():
    doc, problem = compile_document(worn_machine())
    assert isinstance(problem, TabularProblem)
    assert doc.discount == 0.95 and problem.shape == (3,)


def test_package_exports_and_light_import():
    assert worker.__all__ == sorted(worker.__all__)
    assert {
        "solve",
        "estimate",
        "METHODS",
        "FixqError",
        "InvalidDocument",
        "InfeasibleModel",
        "TooLarge",
        "Canceled",
    } <= set(worker.__all__)
    code = "import sys, worker; assert 'numba' not in sys.modules, 'numba was imported'; print('ok')"
    done = subprocess.run([sys.executable, "-c", code], cwd=REPO, capture_output=True, text=True, timeout=60)
    assert done.returncode == 0 and done.stdout.strip() == "ok", done.stderr


def growth_document(points: int = 300) -> dict:
    return {
        "version": 1,
        "discount": 0.95,
        "model": log_growth(k_min=0.05, k_max=0.5, points=points),
        "solver": {"tolerance": 1e-7},
        "report": {"stationary": True},
    }


def test_a_grid_model_matches_the_closed_form():
    result = solve(growth_document())
    assert result["status"] == "converged"
    k = np.array(result["axes"]["k"])
    z = np.array(result["axes"]["z"])
    policy = np.array(result["policy"]["k_next"])
    assert policy.shape == (k.size, z.size) == np.array(result["value"]).shape
    exact = 0.3 * 0.95 * z[None, :] * k[:, None] ** 0.3
    inside = (exact > k[0]) & (exact < k[-1])
    spacing = k[1] - k[0]
    assert np.abs(policy - exact)[inside].max() <= spacing
    assert set(result["stationary"]["means"]) >= {"k", "z", "k_next"}


def test_grid_hints_that_hold_give_the_same_answer():
    plain = solve(growth_document(120))
    hinted_document = growth_document(120)
    hinted_document["model"]["hints"] = {"monotone": True, "concave": True}
    hinted = solve(hinted_document)
    assert hinted["diagnostics"]["warnings"] == []
    assert hinted["policy_index"] == plain["policy_index"]
    gap = np.abs(np.array(hinted["value"]) - np.array(plain["value"])).max()
    assert gap <= hinted["error_bound"] + plain["error_bound"]


@pytest.mark.parametrize("method", ["value_iteration", "howard"])
def test_a_hinted_grid_solve_reports_its_verification_apart_from_the_log(method):
    document = growth_document(120)
    document["model"]["hints"] = {"monotone": True, "concave": True}
    document["solver"] = {"method": method, "tolerance": 1e-7}
    result = solve(document)
    assert result["status"] == "converged"
    log, check = result["log"], result["diagnostics"]["verification"]
    # The verification re-applies the last iteration's Bellman step without hints: it is not an
    # iteration, so the log neither counts nor repeats it, and its last ratio is not 1.
    assert len(log) == result["iterations"] and log[-1]["iteration"] == result["iterations"]
    assert log[-1]["distance"] < log[-2]["distance"]
    assert check["hints_held"] is True and check["policy_changes"] == 0
    assert check["distance"] == pytest.approx(log[-1]["distance"], rel=1e-9)
    assert result["error_bound"] == check["error_bound"] <= 1e-7
    plain = solve({**document, "model": {**document["model"], "hints": {}}})
    assert plain["diagnostics"]["verification"] is None


def test_a_broken_grid_hint_is_reported_and_solved_without_it():
    # Invented: tomorrow's best k' = 0.55 − k falls as k rises, so "monotone" is false.
    document = growth_document(120)
    document["model"]["reward"] = "-(k_next - (0.55 - k))**2"
    document["model"]["feasible"] = []
    document["model"]["hints"] = {"monotone": True, "concave": False}
    broken = solve(copy.deepcopy(document))
    document["model"]["hints"] = {"monotone": False, "concave": False}
    honest = solve(document)
    assert len(broken["diagnostics"]["warnings"]) == 1
    warning = broken["diagnostics"]["warnings"][0]
    assert (
        warning.startswith("the `monotone` hint did not hold for this model") and "re-solved without hints" in warning
    )
    gap = np.abs(np.array(broken["value"]) - np.array(honest["value"])).max()
    assert gap <= broken["error_bound"] + honest["error_bound"]
    assert broken["policy_index"] == honest["policy_index"]


def test_a_grid_warm_start_is_carried_onto_a_finer_grid():
    coarse = growth_document(60)
    coarse["solver"] = {"method": "value_iteration", "tolerance": 1e-6}
    earlier = solve(coarse)
    fine = growth_document(150)
    fine["solver"] = {"method": "value_iteration", "tolerance": 1e-6}
    cold = solve(copy.deepcopy(fine))
    fine["solver"]["initial"] = {"job": "coarse-run"}
    warm = solve(fine, warm_start={"axes": earlier["axes"], "value": earlier["value"]})
    assert warm["status"] == "converged"
    assert warm["iterations"] < cold["iterations"]
    assert warm["policy_index"] == cold["policy_index"]


def test_endogenous_grid_is_refused_for_a_model_not_of_its_form():
    document = worn_machine(method="endogenous_grid")
    with pytest.raises(InvalidDocument) as caught:
        solve(copy.deepcopy(document))
    assert caught.value.errors[0]["path"] == "solver.method"
    assert "continuous" in caught.value.errors[0]["message"]
