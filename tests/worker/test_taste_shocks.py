"""Taste shocks on a tabular model: the smoothed Bellman operator, choice probabilities, evaluation, reports.

References named beside each check:

* McFadden (1973): with additive i.i.d. extreme-value type I shocks of scale s the probability of a choice is
  the logit of the conditional choice values, and the expected maximum is s·log Σ exp(v_a/s) (centred shocks).
* Hotz & Miller (1993): log(P_a/P_b) = (v_a − v_b)/s between choice-specific values.
* An independent plain-numpy smoothed value iteration written here (loops over states, ``math`` functions).
* ``scipy.optimize.root`` on v − T(v) = 0, an independent solve of the smoothed Bellman equation.
* The elementary bound max_a x_a ≤ s·log Σ_a exp(x_a/s) ≤ max_a x_a + s·log A (log-sum-exp), so the
  value with shocks exceeds the one without by at most s·log A/(1 − β).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.optimize

from tests._documents import array_tabular, idle_busy_worn
from tests._memory_checkpoint import Crash, MemoryCheckpoint
from worker import solve
from worker.errors import InvalidDocument
from worker.solve import compile_document
from worker.solvers import GENERAL_METHODS, METHODS
from worker.tabular import TabularProblem
from worker.taste import EULER_GAMMA, entropy_reward, smoothed_max


def random_model(seed: int, n_states: int, n_actions: int) -> tuple[np.ndarray, np.ndarray]:
    """Random rewards (about 30% of the pairs not allowed, action 0 always allowed) and transitions."""
    rng = np.random.default_rng(seed)
    reward = rng.normal(size=(n_states, n_actions))
    reward[rng.random((n_states, n_actions)) < 0.3] = np.nan
    reward[:, 0] = rng.normal(size=n_states)
    weights = rng.random((n_states, n_actions, n_states)) ** 4
    return reward, weights / weights.sum(axis=2, keepdims=True)


def plain_smoothed_iteration(
    reward: np.ndarray, transition: np.ndarray, beta: float, scale: float, tolerance: float = 1e-13
) -> tuple[np.ndarray, np.ndarray]:
    """Independent reference: smoothed value iteration with loops, stopped by the contraction bound."""
    n_states, n_actions = reward.shape
    v = np.zeros(n_states)
    while True:
        new = np.empty(n_states)
        probabilities = np.zeros((n_states, n_actions))
        for s in range(n_states):
            values = [
                reward[s, a] + beta * sum(transition[s, a, t] * v[t] for t in range(n_states))
                for a in range(n_actions)
                if not math.isnan(reward[s, a])
            ]
            actions = [a for a in range(n_actions) if not math.isnan(reward[s, a])]
            top = max(values)
            total = sum(math.exp((q - top) / scale) for q in values)
            new[s] = top + scale * math.log(total)
            for a, q in zip(actions, values):
                probabilities[s, a] = math.exp((q - top) / scale) / total
        gap = float(np.abs(new - v).max())
        v = new
        if beta / (1 - beta) * gap < tolerance:
            return v, probabilities


def choice_values(reward: np.ndarray, transition: np.ndarray, beta: float, v: np.ndarray) -> np.ndarray:
    """Q(s, a) = r(s, a) + β Σ P(s'|s, a) v(s'), −inf where not allowed."""
    q = np.where(np.isnan(reward), -np.inf, reward) + beta * np.einsum("sat,t->sa", transition, v)
    return np.where(np.isnan(reward), -np.inf, q)


def taste_document(reward: np.ndarray, transition: np.ndarray, scale: float, method: str, **solver) -> dict:
    document = array_tabular(reward, transition.tolist(), solver={"method": method, **solver})
    document["model"]["taste_shocks"] = {"scale": scale}
    return document


def test_two_choices_with_iid_tomorrow_match_the_closed_form_logit():
    # Tomorrow's state does not depend on today's state or action, so every choice shares EV = C and the
    # conditional choice values differ by the rewards: McFadden (1973) gives P(1|s) = 1/(1 + exp((r0 − r1)/s))
    # and v(s) = s·log(exp(r0/s) + exp(r1/s)) + βC with C = μ·v (closed form below).
    rng = np.random.default_rng(3)
    n_states, beta, scale = 5, 0.9, 0.7
    reward = rng.normal(size=(n_states, 2))
    mu = rng.random(n_states)
    mu /= mu.sum()
    transition = np.broadcast_to(mu, (n_states, 2, n_states)).copy()
    result = solve(taste_document(reward, transition, scale, "howard", tolerance=1e-12))
    probabilities = np.asarray(result["choice_probabilities"])
    expected = 1.0 / (1.0 + np.exp((reward[:, 0] - reward[:, 1]) / scale))
    np.testing.assert_allclose(probabilities[:, 1], expected, rtol=0, atol=1e-12)
    np.testing.assert_allclose(probabilities.sum(axis=1), 1.0, rtol=0, atol=1e-15)
    smooth = scale * np.logaddexp(reward[:, 0] / scale, reward[:, 1] / scale)
    constant = mu @ smooth / (1 - beta)
    np.testing.assert_allclose(result["value"], smooth + beta * constant, rtol=0, atol=1e-10)
    assert result["policy_index"]["action"] == (expected > 0.5).astype(int).tolist()


@pytest.mark.parametrize("method", sorted(GENERAL_METHODS))
def test_every_method_matches_an_independent_plain_solver_within_its_bound(method):
    reward, transition = random_model(5, 9, 3)
    beta, scale = 0.93, 0.4
    reference, reference_p = plain_smoothed_iteration(reward, transition, beta, scale)
    document = taste_document(reward, transition, scale, method, tolerance=1e-4)
    document["discount"] = beta
    result = solve(document)
    assert result["status"] == "converged"
    error = np.abs(np.asarray(result["value"]) - reference).max()
    assert error <= result["error_bound"] + 1e-12
    # The probabilities are the logit of choice values read from a value within the bound: each log
    # probability moves by at most 2β·bound/s.
    log_gap = np.abs(np.log(np.asarray(result["choice_probabilities"])[reference_p > 0]) - np.log(reference_p[
        reference_p > 0]))
    assert log_gap.max() <= 2 * beta * result["error_bound"] / scale + 1e-9
    assert np.all(np.asarray(result["choice_probabilities"])[np.isnan(reward)] == 0.0)


def test_all_three_methods_agree_within_their_error_bounds_and_the_bound_holds():
    reward, transition = random_model(7, 14, 4)
    beta, scale = 0.97, 0.25
    reference, _ = plain_smoothed_iteration(reward, transition, beta, scale)
    results = {}
    for method in sorted(GENERAL_METHODS):
        document = taste_document(reward, transition, scale, method, tolerance=1e-3)
        document["discount"] = beta
        results[method] = solve(document)
        error = np.abs(np.asarray(results[method]["value"]) - reference).max()
        assert error <= results[method]["error_bound"], method
    for a in results.values():
        for b in results.values():
            gap = np.abs(np.asarray(a["value"]) - np.asarray(b["value"])).max()
            assert gap <= a["error_bound"] + b["error_bound"]
    assert results["howard"]["evaluation_steps"] > 0
    assert results["policy_iteration"]["linear_solves"] > 0


def test_hotz_miller_identity_between_choice_specific_values():
    # Hotz & Miller (1993): log(P_a / P_b) = (v_a − v_b)/s, the v_a computed here from the returned value.
    reward, transition = random_model(11, 8, 3)
    beta, scale = 0.9, 0.6
    document = taste_document(reward, transition, scale, "policy_iteration", tolerance=1e-11)
    result = solve(document)
    p = np.asarray(result["choice_probabilities"])
    q = choice_values(reward, transition, beta, np.asarray(result["value"]))
    allowed = ~np.isnan(reward)
    for s in range(reward.shape[0]):
        a, *others = np.flatnonzero(allowed[s])
        for b in others:
            assert math.log(p[s, b] / p[s, a]) == pytest.approx((q[s, b] - q[s, a]) / scale, abs=1e-12)


def test_scipy_root_of_the_smoothed_bellman_equation_agrees():
    # scipy.optimize.root solves v − T(v) = 0 with T written directly with numpy's logaddexp.
    reward, transition = random_model(13, 6, 2)
    reward[:, 1] = np.nan_to_num(reward[:, 1], nan=-1.0)
    beta, scale = 0.85, 0.3

    def residual(v: np.ndarray) -> np.ndarray:
        q = reward + beta * np.einsum("sat,t->sa", transition, v)
        return v - scale * np.logaddexp(q[:, 0] / scale, q[:, 1] / scale)

    found = scipy.optimize.root(residual, np.zeros(6), tol=1e-12)
    # A residual r puts the root within r/(1 − β) of the fixed point (T is a β-contraction).
    root_error = float(np.abs(residual(found.x)).max()) / (1 - beta)
    assert root_error < 1e-10
    document = taste_document(reward, transition, scale, "value_iteration", tolerance=1e-9)
    document["discount"] = beta
    result = solve(document)
    np.testing.assert_allclose(result["value"], found.x, rtol=0, atol=result["error_bound"] + root_error)


def test_as_the_scale_shrinks_the_solution_tends_to_the_one_without_taste_shocks():
    # log-sum-exp bound: 0 ≤ v_s − v_0 ≤ s·log A/(1 − β), so v_s → v_0 as s → 0.
    reward, transition = random_model(17, 10, 3)
    beta = 0.9
    plain = solve(array_tabular(reward, transition.tolist(), solver={"tolerance": 1e-12}))
    v0 = np.asarray(plain["value"])
    for scale in (1.0, 0.1, 0.01, 0.001):
        result = solve(taste_document(reward, transition, scale, "howard", tolerance=1e-12))
        gap = np.asarray(result["value"]) - v0
        assert gap.min() >= -1e-9
        assert gap.max() <= scale * math.log(3) / (1 - beta) + 1e-9
    assert result["policy_index"] == plain["policy_index"]


def test_one_evaluation_step_at_the_logit_probabilities_is_the_smoothed_bellman_step():
    # Σ_a π_a (Q_a − s·log π_a) = s·log Σ exp(Q/s) at π = softmax(Q/s): the entropy term makes the
    # evaluation of the step's own probabilities reproduce the step (module docstring of worker.taste).
    reward, transition = random_model(19, 12, 4)
    problem = TabularProblem(reward, transition, 0.95, taste_scale=0.5)
    v = np.random.default_rng(1).normal(size=12)
    tv, policy = problem.bellman_step(v)
    np.testing.assert_allclose(problem.policy_step(v, policy), tv, rtol=0, atol=1e-12)
    assert np.array_equal(problem.policy_matrix(policy).sum(axis=1).A1.round(12), np.ones(12))


def test_the_entropy_term_is_the_expected_shock_of_the_chosen_action_by_simulation():
    # Monte Carlo with numpy's Gumbel draws, centred by Euler's constant: choosing the largest u_a + s·ε_a
    # gives E[max] = s·log Σ exp(u/s) (McFadden 1973) and E[u_a + s·ε_a; a chosen] summed over a equals
    # Σ_a π_a (u_a − s·log π_a), the evaluation formula with π the logit of u.
    rng = np.random.default_rng(23)
    u = np.array([[0.3, -0.2, 1.1]])
    scale = 0.8
    draws = scale * (rng.gumbel(size=(400_000, 3)) - EULER_GAMMA)
    totals = u + draws
    best = totals.max(axis=1)
    value, probabilities, _ = smoothed_max(u.copy(), scale)
    standard_error = best.std() / math.sqrt(best.size)
    assert abs(best.mean() - value[0]) < 5 * standard_error
    assert abs(best.mean() - entropy_reward(u, probabilities, scale)[0]) < 5 * standard_error
    frequency = np.bincount(totals.argmax(axis=1), minlength=3) / best.size
    np.testing.assert_allclose(frequency, probabilities[0], atol=5 * math.sqrt(0.25 / best.size))


def test_smoothed_max_is_stable_for_large_values_and_skips_choices_not_allowed():
    q = np.array([[1e6, 1e6 - 1.0, -np.inf], [-5e5, -np.inf, -5e5]])
    value, probabilities, most = smoothed_max(q.copy(), 0.5)
    assert np.isfinite(value).all()
    assert value[0] == pytest.approx(1e6 + 0.5 * math.log(1 + math.exp(-2.0)), abs=1e-9)
    assert value[1] == pytest.approx(-5e5 + 0.5 * math.log(2.0), abs=1e-9)
    assert probabilities[0, 2] == 0.0 and probabilities[1, 1] == 0.0
    assert most.tolist() == [0, 0]


def test_stationary_distribution_mixes_the_actions_by_their_probabilities():
    document = idle_busy_worn(report={"stationary": True})
    document["model"]["taste_shocks"] = {"scale": 0.5}
    result = solve(document)
    p = np.asarray(result["choice_probabilities"])
    transition = np.array(document["model"]["transition"])
    mixed = np.einsum("sa,sat->st", p, transition)
    pi = np.asarray(result["stationary"]["distribution"])
    np.testing.assert_allclose(pi @ mixed, pi, rtol=0, atol=1e-12)
    assert result["stationary"]["means"]["action"] == pytest.approx(float(pi @ p[:, 1]), abs=1e-12)
    taste = result["diagnostics"]["taste_shocks"]
    assert taste["euler_constant_included"] is False
    assert taste["location_zero_offset"] == pytest.approx(0.5 * EULER_GAMMA / (1 - 0.95))
    assert taste["choices"] == {"action": ["run", "service"]}


def test_simulation_draws_the_actions_with_their_probabilities():
    document = idle_busy_worn(report={"stationary": True, "simulation": {"periods": 400, "paths": 400, "seed": 4}})
    document["model"]["taste_shocks"] = {"scale": 0.5}
    result = solve(document)
    simulated = result["simulation"]["summary"]["action"]["mean"]
    expected = result["stationary"]["means"]["action"]
    # 160,000 draws, correlated along each path: a generous 0.03 (common practice for a seeded check).
    assert simulated == pytest.approx(expected, abs=0.03)
    first = result["simulation"]["first_path"]
    assert set(first["action"]) <= {"run", "service"} and len(set(first["action"])) == 2
    # A busy machine cannot be serviced: the drawn actions respect what is allowed.
    assert all(a == "run" for s, a in zip(first["state_label"], first["action"]) if s == "busy")




def _tabular_factory():
    reward, transition = random_model(29, 30, 3)
    return lambda: TabularProblem(reward, transition, 0.97, taste_scale=0.3)


def _grid_factory():
    document = {
        "version": 1,
        "discount": 0.97,
        "model": {
            "kind": "grid",
            "states": {"stock": {"min": 0, "max": 9, "points": 10}},
            "shocks": {"demand": {"markov": {"values": [0, 1, 2], "matrix": [[0.6, 0.3, 0.1], [0.2, 0.6, 0.2],
                                                                            [0.1, 0.3, 0.6]]}}},
            "choices": {"order": {"values": [0, 1, 2, 3]}},
            "next": {"stock": "min(max(stock + order - demand, 0), 9)"},
            "reward": "2 * min(stock, demand) - order - 0.1 * stock - 0.8 * (order > 0)",
            "taste_shocks": {"scale": 0.3},
        },
    }
    return lambda: compile_document(document)[1]


@pytest.mark.parametrize("factory", [_tabular_factory, _grid_factory], ids=["tabular", "grid"])
@pytest.mark.parametrize("name", sorted(GENERAL_METHODS))
def test_a_resumed_solve_ends_exactly_where_an_uninterrupted_one_does(name, factory, monkeypatch):
    # Each run gets a fresh compiled problem, as a resumed job does in a new process.  Fused evaluation
    # steps (grid) run one step per call here, so that checkpoints fall inside evaluation phases.
    from worker.solvers import evaluation

    monkeypatch.setattr(evaluation, "STEP_BLOCK_S", 0.0)
    make = factory()
    n = make().n
    method = METHODS[name]
    options = dict(tolerance=1e-10, evaluation_steps=6, fingerprint="doc", checkpoint_s=0.0)
    whole = method(make(), np.zeros(n), **{k: v for k, v in options.items() if k != "checkpoint_s"})
    counting = MemoryCheckpoint()
    method(make(), np.zeros(n), checkpoint=counting, **options)
    mid_phase = False
    for crash_after in range(1, len(counting.saves) + 1, max(1, len(counting.saves) // 6)):
        store = MemoryCheckpoint(crash_after=crash_after)
        with pytest.raises(Crash):
            method(make(), np.zeros(n), checkpoint=store, **options)
        mid_phase |= store.state["evaluation_steps_done"] is not None
        resumed = method(make(), np.zeros(n), checkpoint=store, **options)
        np.testing.assert_array_equal(resumed.value, whole.value)
        np.testing.assert_array_equal(resumed.policy, whole.policy)
        assert (resumed.iterations, resumed.evaluation_steps) == (whole.iterations, whole.evaluation_steps)
    assert mid_phase == (name == "howard")


def test_the_scale_must_be_positive_and_is_named_by_path():
    for bad in (0.0, -1.0, "big"):
        document = idle_busy_worn()
        document["model"]["taste_shocks"] = {"scale": bad}
        with pytest.raises(InvalidDocument) as caught:
            solve(document)
        assert any(error["path"] == "model.taste_shocks.scale" for error in caught.value.errors)
    document = idle_busy_worn()
    document["model"]["taste_shocks"] = {"scale": 1.0, "shape": 2}
    with pytest.raises(InvalidDocument) as caught:
        solve(document)
    assert any(error["path"].startswith("model.taste_shocks") for error in caught.value.errors)


def test_without_taste_shocks_the_result_has_no_choice_probabilities():
    result = solve(idle_busy_worn())
    assert "choice_probabilities" not in result
    assert "taste_shocks" not in result["diagnostics"]
