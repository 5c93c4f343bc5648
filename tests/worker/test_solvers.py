"""The solvers: answers, certified bounds, statuses, hooks and hints.

References used below (cited from memory):

* the linear-programming formulation of a discounted MDP — Puterman (1994),
  *Markov Decision Processes*, §6.9: v* is the solution of
  ``min Σ_s v(s)  s.t.  v(s) ≥ r(s,a) + β Σ_s' P(s'|s,a) v(s')`` for every
  allowed (s, a); solved here with ``scipy.optimize.linprog`` (HiGHS), a
  reference independent of fixq;
* the value of a fixed policy is ``(I − β P_σ)⁻¹ r_σ`` (Puterman 1994, §6.1),
  solved densely with ``numpy.linalg.solve``;
* the contraction mapping theorem (Banach 1922): ``‖T²v − Tv‖∞ ≤ β‖Tv − v‖∞``;
* MacQueen (1966) / Porteus (1971) bounds (Puterman 1994, §6.6.3).
"""

from __future__ import annotations

import time

import numpy as np
import pytest
import scipy.sparse as sp
from scipy.optimize import linprog

from tests._memory_checkpoint import Crash, MemoryCheckpoint
from worker.errors import Canceled
from worker.solvers import GENERAL_METHODS, METHODS, RATE_FLOOR_ULPS, SolveOutcome, observed_rate
from worker.tabular import TabularProblem

EPS = float(np.finfo(np.float64).eps)


def random_mdp(seed: int, n_states: int, n_actions: int, beta: float, successors: int | None = None) -> TabularProblem:
    """A random finite MDP with about 20% disallowed actions (never all of a state's)."""
    rng = np.random.default_rng(seed)
    reward = rng.normal(scale=3.0, size=(n_states, n_actions)) + rng.normal(size=(n_states, 1)) * 5
    blocked = rng.random((n_states, n_actions)) < 0.2
    blocked[np.arange(n_states), rng.integers(n_actions, size=n_states)] = False
    reward[blocked] = np.nan
    if successors is None:
        weights = rng.random((n_states, n_actions, n_states)) ** 4
    else:
        weights = np.zeros((n_states * n_actions, n_states))
        chosen = rng.random((n_states * n_actions, n_states)).argsort(axis=1)[:, :successors]
        np.put_along_axis(weights, chosen, rng.random(chosen.shape) + 0.05, axis=1)
        weights = weights.reshape(n_states, n_actions, n_states)
    transition = weights / weights.sum(axis=2, keepdims=True)
    return TabularProblem(reward, transition, beta)


def exact_policy_value(problem: TabularProblem, policy: np.ndarray) -> np.ndarray:
    """(I − β P_σ)⁻¹ r_σ, dense (Puterman 1994, §6.1)."""
    matrix = problem.policy_matrix(policy).toarray()
    return np.linalg.solve(np.eye(problem.n) - problem.discount * matrix, problem.policy_reward(policy))


def optimal_value(problem: TabularProblem) -> np.ndarray:
    """v* from an exact solve of an optimal policy, checked to be a Bellman fixed point."""
    outcome = METHODS["policy_iteration"](problem, np.zeros(problem.n), tolerance=1e-9)
    value = exact_policy_value(problem, outcome.policy)
    tv, _ = problem.bellman_step(value)
    assert np.abs(tv - value).max() <= 1e-11 * max(1.0, np.abs(value).max())
    return value


def linear_program_value(problem: TabularProblem) -> np.ndarray:
    """v* from the primal LP (Puterman 1994, §6.9), via scipy.optimize.linprog."""
    n, n_actions = problem.n_states, problem.n_actions
    rows = np.flatnonzero(problem.allowed.ravel())
    dense = problem.transition.toarray()[rows]
    own = np.zeros((rows.size, n))
    own[np.arange(rows.size), rows // n_actions] = 1.0
    a_ub = -(own - problem.discount * dense)
    b_ub = -problem.reward.ravel()[rows]
    result = linprog(np.ones(n), A_ub=a_ub, b_ub=b_ub, bounds=[(None, None)] * n, method="highs")
    assert result.status == 0, result.message
    return result.x


CASES = [
    (0, 8, 3, 0.9, None),
    (1, 25, 4, 0.95, None),
    (2, 40, 3, 0.99, 3),
    (3, 60, 5, 0.8, 2),
    (4, 30, 2, 0.97, 1),
]


@pytest.mark.parametrize("seed, n_states, n_actions, beta, successors", CASES)
def test_all_methods_agree_with_the_linear_program(seed, n_states, n_actions, beta, successors):
    problem = random_mdp(seed, n_states, n_actions, beta, successors)
    reference = linear_program_value(problem)
    exact = optimal_value(problem)
    # HiGHS solves to ~1e-7 relative feasibility (common practice for its defaults).
    assert np.abs(reference - exact).max() <= 1e-6 * max(1.0, np.abs(exact).max())
    for name, method in _general_items():
        outcome = method(problem, np.zeros(problem.n), tolerance=1e-7)
        assert outcome.status == "converged", name
        assert outcome.error_bound <= 1e-7
        assert np.abs(outcome.value - exact).max() <= outcome.error_bound, name
        assert np.abs(outcome.value - reference).max() <= 1e-7 + 1e-6 * max(1.0, np.abs(exact).max()), name
        np.testing.assert_array_equal(exact_policy_value(problem, outcome.policy).round(4), exact.round(4))


def test_certified_bound_is_never_below_the_true_error():
    checked = 0
    for seed in range(12):
        rng = np.random.default_rng(100 + seed)
        n_states = int(rng.integers(3, 40))
        n_actions = int(rng.integers(1, 5))
        beta = float(rng.choice([0.3, 0.9, 0.99]))
        successors = None if seed % 3 == 0 else int(rng.integers(1, 4))
        problem = random_mdp(seed, n_states, n_actions, beta, successors)
        exact = optimal_value(problem)
        start = rng.normal(scale=10.0, size=problem.n)
        for name, method in _general_items():
            for tolerance in (1e-1, 1e-4, 1e-8, 1e-13):
                outcome = method(problem, start, tolerance=tolerance, evaluation_steps=7, max_iterations=400)
                assert np.abs(outcome.value - exact).max() <= outcome.error_bound, (seed, name, tolerance)
                checked += 1
            for cut in (1, 2, 5):
                outcome = method(problem, start, tolerance=1e-30, max_iterations=cut, evaluation_steps=3)
                assert outcome.status == "max_iterations"
                assert np.abs(outcome.value - exact).max() <= outcome.error_bound, (seed, name, cut)
                checked += 1
    assert checked == 12 * 3 * 7


def test_midpoint_bound_is_at_most_the_standard_bound():
    problem = random_mdp(7, 30, 3, 0.95, 2)
    exact = optimal_value(problem)
    for cut in (1, 3, 10, 30):
        outcome = METHODS["value_iteration"](problem, np.zeros(problem.n), tolerance=1e-30, max_iterations=cut)
        bracket = outcome.bracket
        assert outcome.error_bound <= bracket["standard_bound"]
        assert outcome.error_bound == pytest.approx(
            0.5 * (bracket["upper"] - bracket["lower"]) + bracket["rounding_allowance"]
        )
        # The bracket holds statewise: value − shift is Tv, and v* − Tv ∈ [lower, upper].
        tv = outcome.value - bracket["shift"]
        slack = bracket["rounding_allowance"]
        assert np.all(exact - tv >= bracket["lower"] - slack)
        assert np.all(exact - tv <= bracket["upper"] + slack)


def test_value_iteration_distances_shrink_at_rate_beta():
    # Contraction mapping theorem (Banach 1922): ‖T²v − Tv‖∞ ≤ β ‖Tv − v‖∞.
    for seed, beta in ((11, 0.9), (12, 0.97), (13, 0.5)):
        problem = random_mdp(seed, 40, 3, beta, 2)
        outcome = METHODS["value_iteration"](problem, np.zeros(problem.n), tolerance=1e-9)
        distances = np.array([entry["distance"] for entry in outcome.log])
        floor = RATE_FLOOR_ULPS * EPS * np.abs(outcome.value).max()
        meaningful = distances[:-1] > floor
        ratios = distances[1:][meaningful] / distances[:-1][meaningful]
        assert ratios.size >= 3
        assert np.all(ratios <= beta * (1 + 1e-9))
        assert outcome.observed_rate is not None
        assert outcome.observed_rate <= beta * (1 + 1e-9)


def test_observed_rate_is_the_geometric_mean_of_the_last_ratios():
    log = [{"distance": d} for d in (8.0, 4.0, 2.0, 1.0, 0.25)]
    assert observed_rate(log, scale=1.0) == pytest.approx((0.5 * 0.5 * 0.5 * 0.25) ** 0.25)
    assert observed_rate(log[:1], scale=1.0) is None
    assert observed_rate([{"distance": 1e-300}, {"distance": 1e-301}], scale=1.0) is None


def test_howard_and_policy_iteration_need_fewer_iterations():
    problem = random_mdp(21, 50, 4, 0.99, 2)
    counts = {name: method(problem, np.zeros(problem.n), tolerance=1e-8).iterations
              for name, method in _general_items()}
    assert counts["howard"] < counts["value_iteration"]
    assert counts["policy_iteration"] <= counts["howard"]


def test_policy_iteration_stops_on_a_stable_policy():
    problem = random_mdp(22, 30, 3, 0.95, 3)
    outcome = METHODS["policy_iteration"](problem, np.zeros(problem.n), tolerance=1e-8)
    assert outcome.status == "converged"
    assert outcome.log[-1]["policy_changes"] == 0
    assert outcome.linear_solves == outcome.iterations - 1
    assert outcome.evaluation_steps == 0


def test_statuses_for_max_iterations_and_time_limit():
    problem = random_mdp(23, 20, 3, 0.99, 1)
    capped = METHODS["value_iteration"](problem, np.zeros(problem.n), tolerance=1e-12, max_iterations=4)
    assert (capped.status, capped.iterations, len(capped.log)) == ("max_iterations", 4, 4)
    timed = METHODS["howard"](problem, np.zeros(problem.n), tolerance=1e-12, time_limit_s=0.0)
    assert (timed.status, timed.iterations) == ("time_limit", 1)

    slow = SlowProblem(problem, pause_s=0.01)
    started = time.perf_counter()
    timed = METHODS["value_iteration"](slow, np.zeros(problem.n), tolerance=1e-14, time_limit_s=0.1)
    assert timed.status == "time_limit"
    assert 0.1 <= timed.seconds < 0.1 + 0.2
    assert time.perf_counter() - started < 1.0


def test_tolerance_below_float64_reach_runs_to_max_iterations():
    problem = random_mdp(24, 15, 3, 0.9, None)
    for name, method in _general_items():
        outcome = method(problem, np.zeros(problem.n), tolerance=1e-30, max_iterations=60)
        assert outcome.status == "max_iterations", name
        assert outcome.iterations == 60
        assert 0 < outcome.error_bound < 1e-9


def test_progress_callback_gets_every_entry_in_order():
    problem = random_mdp(25, 20, 3, 0.9, 2)
    seen: list[dict] = []
    outcome = METHODS["howard"](problem, np.zeros(problem.n), tolerance=1e-9, on_progress=seen.append)
    assert seen == outcome.log
    assert [entry["iteration"] for entry in seen] == list(range(1, outcome.iterations + 1))
    assert set(seen[0]) == {"iteration", "distance", "error_bound", "policy_changes", "seconds"}
    assert seen[0]["policy_changes"] == problem.n
    assert all(b["seconds"] >= a["seconds"] for a, b in zip(seen, seen[1:]))




@pytest.mark.parametrize("name", sorted(GENERAL_METHODS))
def test_checkpoint_resume_gives_the_same_answer_and_log(name):
    problem = random_mdp(26, 30, 3, 0.97, 2)
    method = METHODS[name]
    options = dict(tolerance=1e-10, evaluation_steps=6, fingerprint="doc-a", checkpoint_s=0.0)
    whole = method(problem, np.zeros(problem.n), **{k: v for k, v in options.items() if k != "checkpoint_s"})
    assert whole.iterations >= 3
    counting = MemoryCheckpoint()
    method(problem, np.zeros(problem.n), checkpoint=counting, **options)
    strip = lambda log: [{k: v for k, v in e.items() if k != "seconds"} for e in log]  # noqa: E731

    resumed_mid_phase = False
    for crash_after in range(1, len(counting.saves) + 1, max(1, len(counting.saves) // 7)):
        store = MemoryCheckpoint(crash_after=crash_after)
        with pytest.raises(Crash):
            method(problem, np.zeros(problem.n), checkpoint=store, **options)
        at = store.state["iteration"]
        resumed_mid_phase |= store.state["evaluation_steps_done"] is not None
        resumed = method(problem, np.zeros(problem.n), checkpoint=store, **options)
        assert resumed.resumed_from_iteration == at
        np.testing.assert_array_equal(resumed.value, whole.value)
        np.testing.assert_array_equal(resumed.policy, whole.policy)
        assert (resumed.iterations, resumed.evaluation_steps) == (whole.iterations, whole.evaluation_steps)
        assert resumed.linear_solves == whole.linear_solves
        assert [e["iteration"] for e in resumed.log] == list(range(1, whole.iterations + 1))
        assert strip(resumed.log) == strip(whole.log)
    assert resumed_mid_phase == (name == "howard"), "Howard checkpoints between evaluation steps too"


def test_checkpoint_of_another_document_is_ignored():
    problem = random_mdp(27, 10, 2, 0.9, None)
    store = MemoryCheckpoint()
    METHODS["value_iteration"](
        problem, np.zeros(problem.n), max_iterations=3, checkpoint=store, checkpoint_s=0.0, fingerprint="one"
    )
    assert store.state["iteration"] >= 2
    fresh = METHODS["value_iteration"](problem, np.zeros(problem.n), checkpoint=store, fingerprint="two")
    assert fresh.resumed_from_iteration is None
    assert fresh.log[0]["iteration"] == 1


def test_checkpoint_is_saved_no_more_often_than_checkpoint_s():
    problem = SlowProblem(random_mdp(28, 10, 2, 0.999, 1), pause_s=0.002)
    store = MemoryCheckpoint()
    outcome = METHODS["value_iteration"](
        problem, np.zeros(problem.n), tolerance=1e-30, time_limit_s=0.3, checkpoint=store, checkpoint_s=0.05
    )
    times = [save["seconds"] for save in store.saves]
    assert 2 <= len(times) <= outcome.seconds / 0.05 + 1
    assert all(b - a >= 0.05 for a, b in zip(times, times[1:]))
    assert times[0] >= 0.05


def test_stop_flag_raises_canceled_with_iteration_and_log():
    problem = random_mdp(29, 20, 3, 0.99, 1)
    seen: list[dict] = []
    with pytest.raises(Canceled) as caught:
        METHODS["value_iteration"](
            problem, np.zeros(problem.n), tolerance=1e-12, on_progress=seen.append, should_stop=lambda: len(seen) >= 3
        )
    assert caught.value.context["iteration"] == 3
    assert [e["iteration"] for e in caught.value.context["log"]] == [1, 2, 3]


def test_stop_flag_is_polled_between_evaluation_steps():
    problem = random_mdp(30, 200, 3, 0.999, 3)
    seen: list[dict] = []
    started = time.perf_counter()
    with pytest.raises(Canceled) as caught:
        METHODS["howard"](
            problem,
            np.zeros(problem.n),
            evaluation_steps=10_000_000,
            on_progress=seen.append,
            should_stop=lambda: bool(seen),
        )
    assert caught.value.context["iteration"] == 1
    assert time.perf_counter() - started < 1.0


class SlowProblem:
    """A compiled problem whose Bellman step takes at least ``pause_s`` seconds."""

    def __init__(self, inner: TabularProblem, pause_s: float) -> None:
        self.inner = inner
        self.pause_s = pause_s

    def __getattr__(self, name: str):
        return getattr(self.inner, name)

    def bellman_step(self, v, *, restricted=False, policy_guess=None):
        time.sleep(self.pause_s)
        return self.inner.bellman_step(v)


class HintedProblem:
    """A tabular problem that claims hints; its restricted search looks only at ``hinted`` actions."""

    hints_active = True

    def __init__(self, inner: TabularProblem, hinted: list[int]) -> None:
        self.inner = inner
        self.mask = np.full(inner.n_actions, -np.inf)
        self.mask[hinted] = 0.0
        self.calls = {"restricted": 0, "full": 0}

    def __getattr__(self, name: str):
        return getattr(self.inner, name)

    def bellman_step(self, v, *, restricted=False, policy_guess=None):
        if not restricted:
            self.calls["full"] += 1
            return self.inner.bellman_step(v)
        self.calls["restricted"] += 1
        q = (self.inner.transition @ v).reshape(self.inner.n_states, self.inner.n_actions) * self.inner.discount
        q = q + self.inner.reward + self.mask
        q[~np.isfinite(q).any(axis=1), 0] = -1e300  # a state with no hinted action keeps a finite (awful) value
        policy = q.argmax(axis=1)
        return q[np.arange(q.shape[0]), policy], policy


def fully_allowed(seed: int, n_states: int, n_actions: int, beta: float) -> TabularProblem:
    rng = np.random.default_rng(seed)
    reward = rng.normal(size=(n_states, n_actions))
    reward[:, -1] += 2.0  # the last action is the best one in most states
    weights = rng.random((n_states, n_actions, n_states)) ** 3
    return TabularProblem(reward, weights / weights.sum(axis=2, keepdims=True), beta)


@pytest.mark.parametrize("name", sorted(GENERAL_METHODS))
def test_a_broken_hint_is_reported_and_the_answer_is_still_right(name):
    inner = fully_allowed(31, 25, 3, 0.9)
    exact = optimal_value(inner)
    problem = HintedProblem(inner, hinted=[0, 1])  # leaves out the best action: the promise is false
    outcome = METHODS[name](problem, np.zeros(inner.n), tolerance=1e-8)
    assert outcome.status == "converged"
    assert len(outcome.warnings) == 1
    assert "did not hold" in outcome.warnings[0] and "re-solved without hints" in outcome.warnings[0]
    assert problem.calls["restricted"] >= 1 and problem.calls["full"] >= 1
    assert np.abs(outcome.value - exact).max() <= outcome.error_bound
    assert outcome.error_bound <= 1e-8


def test_a_hint_that_holds_is_verified_once_and_gives_no_warning():
    inner = fully_allowed(32, 25, 3, 0.9)
    exact = optimal_value(inner)
    problem = HintedProblem(inner, hinted=[0, 1, 2])
    outcome = METHODS["value_iteration"](problem, np.zeros(inner.n), tolerance=1e-8)
    assert outcome.warnings == []
    assert problem.calls["full"] == 1
    # The verification is the one unrestricted step, and not an iteration: every iteration was hinted.
    assert problem.calls["restricted"] == outcome.iterations
    assert np.abs(outcome.value - exact).max() <= outcome.error_bound


def test_with_hints_the_step_that_ends_at_max_iterations_is_unrestricted():
    inner = fully_allowed(33, 15, 3, 0.95)
    problem = HintedProblem(inner, hinted=[0, 1])
    outcome = METHODS["value_iteration"](problem, np.zeros(inner.n), tolerance=1e-30, max_iterations=5)
    assert outcome.status == "max_iterations" and outcome.iterations == 5
    assert problem.calls["full"] == 1
    assert len(outcome.warnings) == 1
    assert np.abs(outcome.value - optimal_value(inner)).max() <= outcome.error_bound


def test_outcome_is_one_result_type_for_every_method():
    problem = random_mdp(34, 10, 2, 0.9, None)
    outcomes = [method(problem, np.zeros(problem.n)) for method in _general()]
    assert all(isinstance(o, SolveOutcome) for o in outcomes)
    assert all(o.value.shape == (10,) and o.policy.dtype == np.int64 for o in outcomes)


def test_methods_match_the_schema_names():
    from worker.document import METHOD_NAMES
    from worker.document.options import BACKWARD_INDUCTION

    # A finite horizon's backward induction is named in documents but is not an iterative method.
    assert set(METHOD_NAMES) == set(METHODS) | {BACKWARD_INDUCTION}


def test_a_large_sparse_problem_solves():
    rng = np.random.default_rng(35)
    n_states, n_actions = 20_000, 4
    rows = np.repeat(np.arange(n_states * n_actions), 3)
    cols = rng.integers(n_states, size=rows.size)
    transition = sp.csr_matrix((np.full(rows.size, 1 / 3), (rows, cols)), shape=(n_states * n_actions, n_states))
    problem = TabularProblem(rng.normal(size=(n_states, n_actions)), transition, 0.95)
    outcome = METHODS["howard"](problem, np.zeros(n_states), tolerance=1e-6)
    assert outcome.status == "converged"
    tv, _ = problem.bellman_step(outcome.value)
    assert np.abs(tv - outcome.value).max() <= (1 + 0.95) * outcome.error_bound


@pytest.mark.parametrize("name", sorted(GENERAL_METHODS))
def test_the_hint_verification_is_reported_apart_and_is_not_an_iteration(name):
    inner = fully_allowed(35, 25, 3, 0.9)
    problem = HintedProblem(inner, hinted=[0, 1, 2])
    seen: list[dict] = []
    outcome = METHODS[name](problem, np.zeros(inner.n), tolerance=1e-8, on_progress=seen.append)
    assert outcome.status == "converged"
    assert len(outcome.log) == outcome.iterations == problem.calls["restricted"] and seen == outcome.log
    assert [e["iteration"] for e in outcome.log] == list(range(1, outcome.iterations + 1))
    check = outcome.verification
    assert set(check) == {"distance", "error_bound", "policy_changes", "seconds", "hints_held"}
    assert check["hints_held"] is True and check["policy_changes"] == 0
    # The verification re-applies the last iteration's step without hints: same distance, and the
    # final error bound is its own (certified without hints), yet the log does not repeat it.
    assert check["distance"] == pytest.approx(outcome.log[-1]["distance"], rel=1e-12)
    assert outcome.error_bound == check["error_bound"]
    assert check["seconds"] >= outcome.log[-1]["seconds"]
    if len(outcome.log) >= 2 and name != "policy_iteration":
        assert outcome.log[-1]["distance"] < outcome.log[-2]["distance"]


def test_a_broken_hint_verification_becomes_the_next_iteration():
    inner = fully_allowed(31, 25, 3, 0.9)
    problem = HintedProblem(inner, hinted=[0, 1])
    outcome = METHODS["value_iteration"](problem, np.zeros(inner.n), tolerance=1e-8)
    assert outcome.verification is not None and outcome.verification["hints_held"] is False
    hinted = problem.calls["restricted"]
    # Hinted iterations, then the verification (the solve went on from it), then plain iterations.
    assert outcome.iterations == len(outcome.log) == problem.calls["full"] + hinted
    assert outcome.log[hinted]["distance"] == outcome.verification["distance"]


def test_without_hints_there_is_no_verification():
    problem = random_mdp(36, 10, 2, 0.9, None)
    assert all(method(problem, np.zeros(problem.n)).verification is None for method in _general())


def test_a_hinted_solve_resumes_from_checkpoints_with_the_same_log_and_verification():
    inner = fully_allowed(37, 25, 3, 0.97)
    options = dict(tolerance=1e-10, evaluation_steps=6, fingerprint="hinted", checkpoint_s=0.0)
    whole = METHODS["howard"](HintedProblem(inner, hinted=[0, 1]), np.zeros(inner.n), **options)
    counting = MemoryCheckpoint()
    METHODS["howard"](HintedProblem(inner, hinted=[0, 1]), np.zeros(inner.n), checkpoint=counting, **options)
    strip = lambda entry: {k: v for k, v in entry.items() if k != "seconds"}  # noqa: E731
    for crash_after in range(1, len(counting.saves) + 1):
        store = MemoryCheckpoint(crash_after=crash_after)
        with pytest.raises(Crash):
            METHODS["howard"](HintedProblem(inner, hinted=[0, 1]), np.zeros(inner.n), checkpoint=store, **options)
        resumed = METHODS["howard"](HintedProblem(inner, hinted=[0, 1]), np.zeros(inner.n), checkpoint=store, **options)
        np.testing.assert_array_equal(resumed.value, whole.value)
        assert (resumed.iterations, resumed.evaluation_steps) == (whole.iterations, whole.evaluation_steps)
        assert [strip(e) for e in resumed.log] == [strip(e) for e in whole.log]
        assert strip(resumed.verification) == strip(whole.verification)
        assert resumed.warnings == whole.warnings



def _general():
    return [METHODS[name] for name in GENERAL_METHODS]


def _general_items():
    return [(name, METHODS[name]) for name in GENERAL_METHODS]
