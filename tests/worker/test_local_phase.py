"""The local phase after a failed hint verification (worker.solvers.loop): restricted steps searching from the
verified policy, verified again by an unrestricted step before anything rests on them.

Two kinds of models, both invented:

* tabular problems whose "hints" are action subsets (the hinted search looks at some actions, the local one at
  others), solved against an independent plain-numpy policy iteration (Howard 1960; the value of a policy is
  ``(I − β P_σ)⁻¹ r_σ``, Puterman 1994 §6.1, cited from memory), so that the phase that holds, the one that
  fails again and the capped one are each made to happen;
* a continuous choice whose reward has two peaks (a broad one and a narrow, higher one), so the concave hint is
  false; the answer is compared with the unhinted solve (its search is the branch and bound that
  tests/worker/test_continuous_bound.py checks against brute force).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest

from tests._documents import two_peaks
from tests._memory_checkpoint import Crash, MemoryCheckpoint
from worker import environment, threadpool
from worker.solve import compile_document, solve
from worker.solvers import GENERAL_METHODS, METHODS, loop
from worker.tabular import TabularProblem


def _fully_allowed(seed: int, n_states: int, n_actions: int, beta: float) -> TabularProblem:
    """A random finite MDP whose last action is the best one in most states."""
    rng = np.random.default_rng(seed)
    reward = rng.normal(size=(n_states, n_actions))
    reward[:, -1] += 2.0
    weights = rng.random((n_states, n_actions, n_states)) ** 3
    return TabularProblem(reward, weights / weights.sum(axis=2, keepdims=True), beta)


def _exact_value(problem: TabularProblem) -> np.ndarray:
    """v* by plain-numpy policy iteration (Howard 1960), dense linear solves (Puterman 1994, §6.1)."""
    n, actions, beta = problem.n_states, problem.n_actions, problem.discount
    dense = problem.transition.toarray().reshape(n, actions, n)
    policy = np.zeros(n, dtype=np.int64)
    for _ in range(100):
        rows = np.arange(n)
        value = np.linalg.solve(np.eye(n) - beta * dense[rows, policy], problem.reward[rows, policy])
        better = (problem.reward + beta * dense @ value).argmax(axis=1)
        if np.array_equal(better, policy):
            return value
        policy = better
    raise AssertionError("policy iteration did not settle")


class LocalProblem:
    """A tabular problem that claims hints: its hinted search looks only at ``hinted`` actions, its local step
    only at ``local`` ones (the loop's protocol: ``local_step(v, policy_guess=)``), and with ``keep_guess`` at
    each state's guessed action too, as a search from the guess does."""

    hints_active = True

    def __init__(self, inner: TabularProblem, hinted: list[int], local: list[int], keep_guess: bool = False) -> None:
        self.inner = inner
        self.keep_guess = keep_guess
        self.masks = {name: np.full(inner.n_actions, -np.inf) for name in ("hinted", "local")}
        self.masks["hinted"][hinted] = 0.0
        self.masks["local"][local] = 0.0
        self.calls = {"restricted": 0, "local": 0, "full": 0}

    def __getattr__(self, name: str) -> Any:
        return getattr(self.inner, name)

    def _search(self, v: np.ndarray, kind: str, guess: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
        self.calls["restricted" if kind == "hinted" else "local"] += 1
        inner = self.inner
        q = (inner.transition @ v).reshape(inner.n_states, inner.n_actions) * inner.discount
        mask = np.tile(self.masks[kind], (inner.n_states, 1))
        if guess is not None:
            mask[np.arange(inner.n_states), guess] = 0.0
        q = q + inner.reward + mask
        policy = q.argmax(axis=1)
        return q[np.arange(q.shape[0]), policy], policy

    def bellman_step(self, v, *, restricted=False, policy_guess=None):  # type: ignore[no-untyped-def]
        if not restricted:
            self.calls["full"] += 1
            return self.inner.bellman_step(v)
        return self._search(v, "hinted")

    def local_step(self, v, *, policy_guess):  # type: ignore[no-untyped-def]
        assert policy_guess is not None  # the phase starts from the verified step's policy
        return self._search(v, "local", policy_guess if self.keep_guess else None)


@pytest.mark.parametrize("name", sorted(GENERAL_METHODS))
def test_a_local_phase_that_holds_ends_on_its_check(name: str) -> None:
    inner = _fully_allowed(31, 25, 3, 0.9)
    problem = LocalProblem(inner, hinted=[0, 1], local=[0, 1, 2])  # the hint is false; the local search is not
    outcome = METHODS[name](problem, np.zeros(inner.n), tolerance=1e-8)
    assert outcome.status == "converged"
    assert np.abs(outcome.value - _exact_value(inner)).max() <= outcome.error_bound
    check = outcome.verification
    assert check is not None and check["hints_held"] is False
    local = check["local_search"]
    assert local["hints_held"] is True and local["iterations"] == problem.calls["local"] > 0
    assert local["first_states_better"] > 0 and local["first_policy_changes"] > 0
    # Two checks and no unrestricted iteration: hinted iterations, the first check, then the local ones.
    assert problem.calls["full"] == 2
    assert outcome.iterations == len(outcome.log) == problem.calls["restricted"] + 1 + problem.calls["local"]
    [warning] = outcome.warnings
    assert "searched locally from the verified policy" in warning and warning.endswith("verified again: held")


@pytest.mark.parametrize("name", sorted(GENERAL_METHODS))
def test_a_local_phase_that_fails_again_falls_back_to_unrestricted_steps(name: str) -> None:
    inner = _fully_allowed(31, 25, 3, 0.9)
    problem = LocalProblem(inner, hinted=[0], local=[0, 1])  # both leave out the best action
    outcome = METHODS[name](problem, np.zeros(inner.n), tolerance=1e-8)
    assert outcome.status == "converged"
    assert np.abs(outcome.value - _exact_value(inner)).max() <= outcome.error_bound
    local = outcome.verification["local_search"]  # type: ignore[index]
    assert local["hints_held"] is False and local["iterations"] == problem.calls["local"] > 0
    # Every check is an iteration here (the solve went on from each), and so is every unrestricted step after.
    assert outcome.iterations == problem.calls["restricted"] + problem.calls["local"] + problem.calls["full"]
    [warning] = outcome.warnings
    assert "verified again: did not hold at" in warning and warning.endswith("re-solved without hints")


def test_a_local_phase_is_checked_at_its_cap(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(loop, "_local_cap", lambda began: 1)
    inner = _fully_allowed(31, 25, 3, 0.9)
    problem = LocalProblem(inner, hinted=[0, 1], local=[0, 1, 2])
    outcome = METHODS["value_iteration"](problem, np.zeros(inner.n), tolerance=1e-8)
    assert outcome.status == "converged" and problem.calls["local"] == 1
    assert problem.calls["full"] > 2  # not converged at the cap: the solve went on unrestricted
    assert np.abs(outcome.value - _exact_value(inner)).max() <= outcome.error_bound
    assert outcome.verification["local_search"]["iterations"] == 1  # type: ignore[index]
    assert "(1 iterations, the last one up to its cap)" in outcome.warnings[0]


@pytest.mark.parametrize("name", sorted(GENERAL_METHODS))
def test_a_local_phase_follows_a_check_that_found_fewer_states_better(name: str) -> None:
    inner = _fully_allowed(30, 25, 3, 0.9)
    problem = LocalProblem(inner, hinted=[0], local=[0], keep_guess=True)  # keeps what the last check found
    outcome = METHODS[name](problem, np.zeros(inner.n), tolerance=1e-8)
    assert outcome.status == "converged"
    assert np.abs(outcome.value - _exact_value(inner)).max() <= outcome.error_bound
    local = outcome.verification["local_search"]  # type: ignore[index]
    assert local["phases"] == 2 and local["hints_held"] is True and local["iterations"] == problem.calls["local"]
    # Three checks: the first two are iterations (the solve went on from them), the last one held and ends it.
    assert problem.calls["full"] == 3
    assert outcome.iterations == problem.calls["restricted"] + problem.calls["local"] + 2
    assert "in 2 phases), verified again: held" in outcome.warnings[0]


def test_with_one_local_phase_a_second_failure_falls_back(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(loop, "LOCAL_PHASES", 1)
    inner = _fully_allowed(30, 25, 3, 0.9)
    problem = LocalProblem(inner, hinted=[0], local=[0], keep_guess=True)
    outcome = METHODS["howard"](problem, np.zeros(inner.n), tolerance=1e-8)
    assert np.abs(outcome.value - _exact_value(inner)).max() <= outcome.error_bound
    local = outcome.verification["local_search"]  # type: ignore[index]
    assert local["phases"] == 1 and local["hints_held"] is False
    assert outcome.iterations == problem.calls["restricted"] + problem.calls["local"] + problem.calls["full"]
    assert outcome.warnings[0].endswith("re-solved without hints")




@pytest.mark.parametrize(("local", "keep"), [([0, 1, 2], False), ([0, 1], False), ([0], True)],
                         ids=["holds", "fails_again", "two_phases"])
def test_a_solve_resumed_in_the_local_phase_repeats_the_whole_one(local: list[int], keep: bool) -> None:
    inner = _fully_allowed(30 if keep else 37, 25, 3, 0.97)
    options = dict(tolerance=1e-10, evaluation_steps=6, fingerprint="local", checkpoint_s=0.0)
    whole = METHODS["howard"](LocalProblem(inner, [0], local, keep), np.zeros(inner.n), **options)
    if keep:
        assert whole.verification["local_search"]["phases"] == 2  # type: ignore[index]
    counting = MemoryCheckpoint()
    METHODS["howard"](LocalProblem(inner, [0], local, keep), np.zeros(inner.n), checkpoint=counting, **options)
    assert any(state["local"] is not None for state in counting.saves)  # some saves fall in the local phase
    strip = lambda entry: {k: v for k, v in entry.items() if k != "seconds"}  # noqa: E731
    for crash_after in range(1, len(counting.saves) + 1):
        store = MemoryCheckpoint(crash_after=crash_after)
        with pytest.raises(Crash):
            METHODS["howard"](LocalProblem(inner, [0], local, keep), np.zeros(inner.n), checkpoint=store, **options)
        resumed = METHODS["howard"](LocalProblem(inner, [0], local, keep), np.zeros(inner.n), checkpoint=store,
                                    **options)
        np.testing.assert_array_equal(resumed.value, whole.value)
        assert (resumed.iterations, resumed.evaluation_steps) == (whole.iterations, whole.evaluation_steps)
        assert [strip(e) for e in resumed.log] == [strip(e) for e in whole.log]
        assert strip(resumed.verification) == strip(whole.verification)
        assert resumed.warnings == whole.warnings


BOTH = {"monotone": True, "concave": True}


@pytest.mark.parametrize(("bonus", "most", "phases", "held"),
                         [(0.5, 3, 1, True), (0.2, 3, 2, True), (0.2, 1, 1, False)])
def test_a_false_concave_hint_on_a_continuous_choice(monkeypatch: pytest.MonkeyPatch, bonus: float, most: int,
                                                     phases: int, held: bool) -> None:
    # 0.5: the narrow peak wins everywhere, and the local search from the verified choices stays on it; 0.2: it
    # wins above some k only, where the choice jumps from peak to peak while the value moves, and the local
    # search from the first check's choices misses some jumps: the second check catches them, and a second
    # phase from its choices holds (or, allowed one phase only, the solve goes on unrestricted).
    monkeypatch.setattr(loop, "LOCAL_PHASES", most)
    plain = solve(two_peaks(bonus, None))
    hinted = solve(two_peaks(bonus, BOTH))
    assert plain["status"] == hinted["status"] == "converged"
    gap = np.abs(np.array(hinted["value"]) - np.array(plain["value"])).max()
    # Both bounds, plus what two searches of the narrow peak may differ by: Brent's tolerance on the choice
    # (about 1e-8 at 0.725, worker.continuous.search) squared times the peak's curvature (2·bonus/spread² ≤ 2,500),
    # over 1 − β: under 1e-12.
    assert gap <= hinted["error_bound"] + plain["error_bound"] + 1e-12
    np.testing.assert_allclose(np.array(hinted["policy"]["k_next"]), np.array(plain["policy"]["k_next"]), atol=2e-3)
    check = hinted["diagnostics"]["verification"]
    assert check["hints_held"] is False and check["local_search"]["hints_held"] is held
    assert check["local_search"]["phases"] == phases
    assert check["local_search"]["first_states_better"] > 0
    # The result rests on an unrestricted step: the second check's bound (kept with the local step's when it held)
    if not held:
        assert hinted["log"][-1]["error_bound"] == hinted["error_bound"]
    assert "searched locally from the verified policy" in " ".join(hinted["diagnostics"]["warnings"])


def test_two_threads_give_the_bits_of_one_through_the_local_phase(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(threadpool, "THREAD_MIN_PAIRS", 0)
    results = []
    for threads in ("1", "2"):
        monkeypatch.setenv(environment.SOLVE_THREADS, threads)
        result = solve(two_peaks(0.5, BOTH))
        assert "local_search" in result["diagnostics"]["verification"]
        results.append((result["iterations"], np.array(result["value"]).tobytes(),
                        np.array(result["policy"]["k_next"]).tobytes(), result["diagnostics"]["warnings"]))
    assert results[0] == results[1]


def test_only_a_concave_hint_offers_a_local_step() -> None:
    _, concave = compile_document(two_peaks(0.5, {"concave": True}))
    _, monotone = compile_document(two_peaks(0.5, {"monotone": True}))
    assert concave.local_step is not None and monotone.local_step is None
    # A model with discrete choices only has none: its failed check goes on unrestricted, as before.
    document = two_peaks(0.5, BOTH)
    document["model"]["choices"] = {"k_next": {"next_of": "k"}}
    _, grid = compile_document(document)
    assert getattr(grid, "local_step", None) is None
