"""Searches on a grid model with taste shocks: aggregates over (point, choice) pairs.

The model (invented): a dock worker decides each day whether to work.  Working raises the skill ``h`` one step
(0..4) and idleness lowers it; ``was`` is yesterday's choice, and changing it costs ``cost``; the day's demand
``z`` is a two-state chain.  Work pays ``(1 + 0.25 h) z`` at a disutility ``effort``, idleness pays
``benefit``; an extreme-value taste shock of scale ``SCALE`` rides on each alternative.

The reference, written here in plain numpy: smoothed value iteration (log-sum-exp of the choice-specific
values, logit choice probabilities; the dynamic logit of Rust 1987), the stationary distribution of the
chain that mixes the two choices by their probabilities (left eigenvector of the transition matrix, by
``numpy.linalg.eig``), aggregates over (point, choice) pairs weighted by stationary mass times probability,
and ``scipy.optimize.brentq`` on the unknown.
"""

from __future__ import annotations

import copy
from typing import Any

import numpy as np
import pytest
from scipy.optimize import brentq

from worker.aggregates import parse_condition, point_env
from worker.document import parse_document
from worker.errors import InvalidDocument
from worker.report import long_run_distribution
from worker.search_aggregates import aggregate_values
from worker.solve import compile_document, solve

BETA, SCALE, TOP = 0.9, 0.5, 4
DEMAND = np.array([0.8, 1.4])
CHAIN = np.array([[0.7, 0.3], [0.4, 0.6]])
BENEFIT = 0.6

DOCK: dict[str, Any] = {
    "kind": "grid",
    "params": {"effort": 0.5, "cost": 0.3, "benefit": BENEFIT},
    "states": {"h": {"min": 0, "max": TOP, "points": TOP + 1}, "was": {"min": 0, "max": 1, "points": 2}},
    "shocks": {"z": {"markov": {"values": DEMAND.tolist(), "matrix": CHAIN.tolist()}, "transform": "none"}},
    "choices": {"work": {"values": [0, 1]}},
    "next": {"h": f"where(work > 0, min(h + 1, {TOP}), max(h - 1, 0))", "was": "work"},
    "define": {"switch": "abs(work - was)", "income": "where(work > 0, (1 + 0.25 * h) * z, benefit)"},
    "reward": "income - effort * work - cost * switch",
    "taste_shocks": {"scale": SCALE},
}
"""Invented: the dock worker of the module docstring."""


def _document(search: dict[str, Any] | None, **params: float) -> dict[str, Any]:
    model = copy.deepcopy(DOCK)
    model["params"].update(params)
    out = {"version": 1, "discount": BETA, "model": model, "solver": {"method": "howard", "tolerance": 1e-10}}
    if search is not None:
        out["search"] = search
    return out


def plain_dock(effort: float, cost: float, overtime: bool = False) -> dict[str, np.ndarray]:
    """Independent reference: per (h, was, z) point, the stationary mass ``pi`` and P(work), to 1e-13.
    ``overtime``: a worker also picks overtime 0 or 0.5 paying ``extra * z - 0.3 * extra`` when working (at
    z >= 0.8 always 0.5 when working, 0 when idle: adds ``0.5 z - 0.15`` to work's reward)."""
    h = np.arange(TOP + 1, dtype=float)[:, None, None]
    was = np.arange(2, dtype=float)[None, :, None]
    z = DEMAND[None, None, :]
    shape = (TOP + 1, 2, 2)
    rewards = [np.broadcast_to(BENEFIT - cost * was, shape),
               np.broadcast_to((1 + 0.25 * h) * z - effort - cost * (1 - was) + overtime * (0.5 * z - 0.15), shape)]
    h_next = [np.maximum(np.arange(TOP + 1) - 1, 0), np.minimum(np.arange(TOP + 1) + 1, TOP)]  # idle, work
    v = np.zeros(shape)
    while True:
        q = [rewards[c] + BETA * (v[h_next[c]][:, c] @ CHAIN.T)[:, None, :] for c in (0, 1)]
        top = np.maximum(q[0], q[1])
        new = top + SCALE * np.log(np.exp((q[0] - top) / SCALE) + np.exp((q[1] - top) / SCALE))
        done = np.abs(new - v).max() < 1e-13
        v = new
        if done:
            break
    work = 1.0 / (1.0 + np.exp((q[0] - q[1]) / SCALE))
    transition = np.zeros(shape + shape)
    for (i, w, k), _ in np.ndenumerate(v):
        for c, p in ((0, 1.0 - work[i, w, k]), (1, work[i, w, k])):
            transition[i, w, k, h_next[c][i], c, :] += p * CHAIN[k]
    matrix = transition.reshape(v.size, v.size)
    values, vectors = np.linalg.eig(matrix.T)
    pi = np.real(vectors[:, np.argmin(np.abs(values - 1.0))])
    return {"pi": (pi / pi.sum()).reshape(shape), "work": work}


def plain_participation(effort: float, cost: float, overtime: bool = False) -> float:
    """mean(work) over (point, choice) pairs: Σ π(x) P(work | x)."""
    ref = plain_dock(effort, cost, overtime)
    return float((ref["pi"] * ref["work"]).sum())


def plain_switching(effort: float, cost: float) -> float:
    """mass(switch > 0) over pairs: Σ π(h, was, z) P(work ≠ was | point)."""
    ref = plain_dock(effort, cost)
    changed = np.where(np.arange(2)[None, :, None] == 1, 1.0 - ref["work"], ref["work"])
    return float((ref["pi"] * changed).sum())


def test_a_search_on_taste_shocks_meets_participation_at_the_independent_brentq_root() -> None:
    search = {"unknowns": {"effort": {"min": 0.0, "max": 2.0}}, "conditions": ["mean(work) - 0.8"],
              "tolerance": 1e-9}
    result = solve(_document(search))
    found = result["search"]
    assert found["status"] == "converged", result["diagnostics"]["warnings"]
    # Reference: scipy.optimize.brentq on the plain-numpy participation rate above.
    root = brentq(lambda e: plain_participation(e, 0.3) - 0.8, 0.0, 2.0, xtol=1e-13)
    assert abs(found["unknowns"]["effort"] - root) < 1e-7, (found["unknowns"], root)
    assert abs(found["residuals"][0]) <= 1e-9
    # The stationary report's mean of the choice is the same fact (one source: the pairs of taste_moments).
    assert result["stationary"]["means"]["work"] == pytest.approx(0.8, abs=1e-9)
    # Taste shocks make the condition smooth in the param: few trials, not a bisection's dozens.
    assert len(found["trials"]) <= 12, [row["unknowns"] for row in found["trials"]]
    assert found["trials"][-1]["certified"]


def test_a_switching_cost_meets_a_mass_over_a_define_of_the_drawn_choice() -> None:
    search = {"unknowns": {"cost": {"min": 0.0, "max": 3.0}}, "conditions": ["mass(switch > 0) - 0.15"],
              "tolerance": 1e-9}
    result = solve(_document(search, effort=0.4))
    found = result["search"]
    assert found["status"] == "converged", result["diagnostics"]["warnings"]
    # Reference: scipy.optimize.brentq on the plain-numpy switching mass.
    root = brentq(lambda c: plain_switching(0.4, c) - 0.15, 0.0, 3.0, xtol=1e-13)
    assert abs(found["unknowns"]["cost"] - root) < 1e-7, (found["unknowns"], root)
    # Over points, of the expected choice, abs(E[work] - was) > 0 nearly everywhere: the mass would be about 1.
    assert plain_switching(0.4, root) == pytest.approx(0.15, abs=1e-9)


def test_every_aggregate_of_choices_defines_and_states_matches_the_pairs_in_numpy() -> None:
    """Each kind of aggregate, as a search's condition evaluates it, over choices and defines (pairs) and over
    states (points), against the plain-numpy pairs."""
    effort = 0.5
    doc, problem = compile_document(_document(None, effort=effort))
    value = np.asarray(solve(_document(None, effort=effort))["value"]).reshape(-1)
    _, chosen = problem.bellman_step(value)
    pi_flat, _ = long_run_distribution(problem.policy_matrix(chosen))
    env = point_env(doc, problem, chosen)
    ref = plain_dock(effort, 0.3)
    pi, work = ref["pi"], ref["work"]
    np.testing.assert_allclose(pi_flat, pi.reshape(-1), rtol=0, atol=1e-9)
    h = np.broadcast_to(np.arange(TOP + 1, dtype=float)[:, None, None], pi.shape)
    z = np.broadcast_to(DEMAND[None, None, :], pi.shape)
    # Pairs: (point, idle) with mass π(1 - P), (point, work) with π P.
    weights = np.concatenate([(pi * (1 - work)).ravel(), (pi * work).ravel()])
    work_pairs = np.concatenate([np.zeros(pi.size), np.ones(pi.size)])
    income_pairs = np.concatenate([np.full(pi.size, BENEFIT), ((1 + 0.25 * h) * z).ravel()])
    mean_work, mean_income = weights @ work_pairs, weights @ income_pairs
    order = np.argsort(income_pairs, kind="stable")
    expected = {
        "mean(work)": mean_work,
        "sd(work)": np.sqrt(weights @ (work_pairs - mean_work) ** 2),
        "mean(income)": mean_income,
        "sd(income)": np.sqrt(weights @ (income_pairs - mean_income) ** 2),
        "quantile(income, 0.5)": income_pairs[order][np.searchsorted(np.cumsum(weights[order]), 0.5)],
        "mass(income > 1.2)": weights @ (income_pairs > 1.2),
        "mean(h)": (pi * h).sum(),
        "sd(h)": np.sqrt((pi * (h - (pi * h).sum()) ** 2).sum()),
        "mass(h >= 2)": pi[2:].sum(),
        "mean(h * work)": (pi * h * work).sum(),
    }
    # The spread of the drawn choice is there (sd of a 0/1 choice over points of its probability is smaller).
    assert expected["sd(work)"] == pytest.approx(np.sqrt(mean_work * (1 - mean_work)), abs=1e-12)
    for text, reference in expected.items():
        condition = parse_condition(text, path="x")
        (got,) = aggregate_values(condition.aggregates, doc, problem, chosen, pi_flat, env).values()
        assert got == pytest.approx(reference, abs=1e-8), text


def test_a_search_with_taste_shocks_still_refuses_a_draw_after_the_choice_in_a_condition() -> None:
    document = _document({"unknowns": {"effort": {"min": 0.0, "max": 2.0}}, "conditions": ["mean(late) - 1"]})
    document["model"]["shocks"]["late"] = {"iid": {"values": [0.0, 1.0], "probs": [0.5, 0.5]}, "timing": "after_choice"}
    with pytest.raises(InvalidDocument) as caught:
        parse_document(document)
    assert any(f["path"] == "search.conditions[0]" and "after the choice" in f["message"]
               for f in caught.value.errors), caught.value.errors


def test_shocks_on_one_choice_with_another_maximised_exactly_meet_a_mean_of_the_exact_choice() -> None:
    """Taste shocks on `work` only; overtime is the best given work (0.5 when working, 0 idle), so its mean is
    half the participation rate."""
    search = {"unknowns": {"effort": {"min": 0.0, "max": 3.0}}, "conditions": ["mean(extra) - 0.2"],
              "tolerance": 1e-9}
    document = _document(search)
    model = document["model"]
    model["choices"]["extra"] = {"values": [0, 0.5]}
    model["reward"] += " + work * extra * z - 0.3 * extra"
    model["taste_shocks"]["choices"] = ["work"]
    result = solve(document)
    assert result["search"]["status"] == "converged", result["diagnostics"]["warnings"]
    # Reference: scipy.optimize.brentq on the plain-numpy participation with overtime's pay folded in.
    root = brentq(lambda e: 0.5 * plain_participation(e, 0.3, overtime=True) - 0.2, 0.0, 3.0, xtol=1e-13)
    assert abs(result["search"]["unknowns"]["effort"] - root) < 1e-7, (result["search"]["unknowns"], root)
    assert result["stationary"]["means"]["work"] == pytest.approx(0.4, abs=1e-9)


PARTICIPATION = {"unknowns": {"effort": {"min": 0.0, "max": 2.0}}, "conditions": ["mean(work) - 0.8"],
                 "tolerance": 1e-9}


def test_a_taste_shock_search_stopped_after_three_trials_resumes_from_its_checkpoint() -> None:
    from tests._memory_checkpoint import MemoryCheckpoint
    from worker.errors import Canceled

    document = _document(PARTICIPATION)
    document["solver"]["checkpoint_s"] = 1e-9  # a checkpoint after every trial
    fresh = solve(copy.deepcopy(document))["search"]
    memory = MemoryCheckpoint()
    first: list[dict[str, Any]] = []
    with pytest.raises(Canceled):
        solve(copy.deepcopy(document), checkpoint=memory, on_progress=first.append, should_stop=lambda: len(first) >= 3)
    second: list[dict[str, Any]] = []
    resumed = solve(copy.deepcopy(document), checkpoint=memory, on_progress=second.append)
    # The same trials, the first three answered from the checkpoint without solving.
    assert [row["unknowns"] for row in resumed["search"]["trials"]] == [row["unknowns"] for row in fresh["trials"]]
    assert len(second) == len(fresh["trials"]) - 3
    assert resumed["search"]["status"] == "converged"
    assert resumed["search"]["unknowns"]["effort"] == pytest.approx(fresh["unknowns"]["effort"], abs=1e-9)
    assert resumed["diagnostics"]["resumed_from_iteration"] == 3


def test_a_target_out_of_reach_of_the_random_choice_is_refused_naming_the_ends() -> None:
    # With taste shocks of scale 0.5 participation stays inside (0, 1): 0.999 is out of reach in the bracket.
    search = {"unknowns": {"effort": {"min": 0.0, "max": 2.0}}, "conditions": ["mean(work) - 0.999"]}
    with pytest.raises(InvalidDocument) as caught:
        solve(_document(search))
    (fault,) = caught.value.errors
    assert fault["path"] == "search.unknowns.effort" and "no root in the bracket" in fault["message"], fault
    # The value at the lower end is the plain-numpy participation there, less the target.
    low = plain_participation(0.0, 0.3) - 0.999
    assert low < 0 and f"{low:.6g}"[:6] in fault["message"], (low, fault["message"])
