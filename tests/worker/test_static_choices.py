"""Choices that affect nothing tomorrow are maximised out within the period, with the reward tables."""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pytest

from tests._documents import TWO_CHOICES
from tests._documents import grid_document as document
from worker import solve
from worker.document import parse_document
from worker.estimate import grid_plan
from worker.feasibility import model_data
from worker.gridmodel import compile_grid
from worker.report import simulate_report, stationary_report

ELASTIC_LABOUR = {
    "params": {"alpha": 0.33, "delta": 0.1, "chi": 2.0, "eta": 0.5},
    "states": {"k": {"min": 1.0, "max": 6.0, "points": 40}},
    "shocks": {"z": {"markov": {"values": [0.9, 1.0, 1.1], "matrix": [[0.8, 0.15, 0.05], [0.1, 0.8, 0.1],
                                                                       [0.05, 0.15, 0.8]]}, "transform": "none"}},
    "choices": {"k_next": {"next_of": "k"}, "h": {"min": 0.1, "max": 1.0, "points": 15}},
    "define": {"c": "z * k**alpha * h**(1 - alpha) + (1 - delta) * k - k_next"},
    "reward": "log(c) - chi * h**(1 + 1 / eta) / (1 + 1 / eta)",
    "feasible": ["c > 0"],
}
"""Invented growth with elastic labour: capital is chosen for tomorrow, hours only matter today."""


def _plain_value_iteration(beta: float, tolerance: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Value iteration in plain numpy that maximises hours out first: values, k' and h indices, all (k, z)."""
    alpha, delta, chi, eta = 0.33, 0.1, 2.0, 0.5
    k = np.linspace(1.0, 6.0, 40)
    z = np.array([0.9, 1.0, 1.1])
    P = np.array([[0.8, 0.15, 0.05], [0.1, 0.8, 0.1], [0.05, 0.15, 0.8]])
    h = np.linspace(0.1, 1.0, 15)
    c = (z[None, :, None, None] * k[:, None, None, None] ** alpha * h[None, None, None, :] ** (1 - alpha)
         + (1 - delta) * k[:, None, None, None] - k[None, None, :, None])
    with np.errstate(divide="ignore", invalid="ignore"):
        r = np.where(c > 0, np.log(np.where(c > 0, c, 1.0)), -np.inf) - chi * h ** (1 + 1 / eta) / (1 + 1 / eta)
    best_h = r.argmax(axis=3)  # (k, z, k')
    R = r.max(axis=3)
    v = np.zeros((40, 3))
    while True:
        EV = v @ P.T  # (k', z)
        total = R + beta * EV.T[None, :, :]
        new = total.max(axis=2)
        done = np.max(np.abs(new - v)) < tolerance
        v = new
        if done:
            break
    k_index = (R + beta * (v @ P.T).T[None, :, :]).argmax(axis=2)
    h_index = np.take_along_axis(best_h, k_index[:, :, None], axis=2)[:, :, 0]
    return v, k_index, h_index


def test_elastic_labour_matches_a_plain_value_iteration_that_maximises_hours_first() -> None:
    result = solve(document(ELASTIC_LABOUR, discount=0.95, method="value_iteration"))
    assert result["status"] == "converged"
    diagnostics = result["diagnostics"]
    assert diagnostics["maximised_within_period"] == ["h"]
    assert diagnostics["reward_storage"] == "tables"
    v, k_index, h_index = _plain_value_iteration(0.95, 1e-12)
    values = np.array(result["value"])
    assert values.shape == (40, 3)
    assert np.max(np.abs(values - v)) <= 2e-7
    assert np.array_equal(np.array(result["policy_index"]["k_next"]), k_index)
    assert np.array_equal(np.array(result["policy_index"]["h"]), h_index)
    h_grid = np.linspace(0.1, 1.0, 15)
    assert np.allclose(np.array(result["policy"]["h"]), h_grid[h_index], rtol=0, atol=1e-15)
    # Not a degenerate answer: hours respond to productivity and capital.
    assert len(np.unique(h_index)) > 2


def test_static_choice_is_in_the_choice_values_and_the_plan_counts_reduced_tables() -> None:
    doc = parse_document(document(ELASTIC_LABOUR))
    plan = grid_plan(doc.model)
    assert plan.reward_storage == "tables"
    assert plan.pairs == 120 * 40 * 15 and plan.table_entries == 120 * 40
    problem = compile_grid(doc, reward_storage="tables")  # the compiled kernels, not the numpy bridge
    assert problem._ctx[0].shape == (120, 40)
    v_plain, _, _ = _plain_value_iteration(0.95, 1e-12)
    values, policy = problem.bellman_step(v_plain.reshape(-1))[:2]
    assert np.max(np.abs(values - v_plain.reshape(-1))) <= 1e-10
    chosen = problem.choice_values(policy)
    assert set(chosen) == {"k_next", "h"}
    data = model_data(doc)
    # Check each point's pick against a direct evaluation over the hours at the chosen k'.
    rows = np.arange(problem.n)
    k, z = np.divmod(rows, 3)
    zv, kv = data.shock_table[z, 0], data.state_grids[0][k]
    h = data.choice_grids[1]
    c = zv[:, None] * kv[:, None] ** 0.33 * h[None, :] ** 0.67 + 0.9 * kv[:, None] - chosen["k_next"][:, None]
    with np.errstate(divide="ignore", invalid="ignore"):
        reward = np.where(c > 0, np.log(np.where(c > 0, c, 1.0)), -np.inf) - 2.0 * h ** 3 / 3
    assert np.array_equal(chosen["h"], h[reward.argmax(axis=1)])
    # The long-run reports read the hours too.
    stationary = stationary_report(problem, policy)
    pi = np.array(stationary["distribution"]).reshape(-1)
    assert stationary["means"]["h"] == pytest.approx(float(pi @ chosen["h"]), abs=1e-12)
    paths = simulate_report(problem, policy, SimpleNamespace(periods=3, paths=4, seed=1, start=None))
    assert "h" in paths["summary"]
    assert set(paths["first_path"]["h"]) <= set(h.tolist())


def test_a_choice_that_moves_a_state_is_not_maximised_out() -> None:
    doc = parse_document(document(TWO_CHOICES))
    assert grid_plan(doc.model).table_entries == grid_plan(doc.model).pairs
    result = solve(document(TWO_CHOICES))
    assert result["status"] == "converged"
    assert result["diagnostics"]["maximised_within_period"] == []
    assert set(result["policy_index"]) == {"a_next", "work"}
