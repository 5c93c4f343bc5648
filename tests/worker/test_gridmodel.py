"""The grid compiler: semantics, exactness of the searches, reward storages, hints and diagnostics."""

from __future__ import annotations

import math
import pathlib

import numpy as np
import pytest

from tests._documents import GROWTH, LQ, TWO_CHOICES, random_values
from tests._documents import grid_document as document
from worker import _codegen, solve
from worker.document import parse_document
from worker.errors import InfeasibleModel
from worker.feasibility import check_feasibility
from worker.griddiagnostics import EDGE_WARNING_SHARE
from worker.gridmodel import compile_grid


def compiled(model: dict, **kwargs: object):
    hints = kwargs.pop("hints", None)
    return compile_grid(parse_document(document(model, hints=hints)), **kwargs)


def test_value_array_layout_and_axes() -> None:
    problem = compiled(TWO_CHOICES)
    assert problem.shape == (25, 4, 2)
    assert problem.n == 200
    assert list(problem.axes) == ["a", "h", "e"]
    assert problem.axes["e"] == [0.8, 1.2]
    states = problem.state_values()
    flat = np.arange(problem.n)
    assert np.array_equal(states["a"], np.array(problem.axes["a"])[flat // 8])
    assert np.array_equal(states["h"], np.array(problem.axes["h"])[(flat // 2) % 4])
    assert np.array_equal(states["e"], np.array([0.8, 1.2])[flat % 2])


@pytest.mark.parametrize("model", [GROWTH, LQ, TWO_CHOICES], ids=["growth", "lq", "two-choices"])
def test_block_search_equals_exhaustive_search(model: dict) -> None:
    problem = compiled(model, reward_storage="on_the_fly")
    rng = np.random.default_rng(1)
    for trial in range(3):
        v = random_values(problem, seed=trial)
        guess = rng.integers(0, problem._data.n_choices, size=problem.n) if trial else None
        exhaustive = problem.bellman_step(v, exhaustive=True)
        blocked = problem.bellman_step(v, policy_guess=guess)
        assert np.array_equal(blocked[1], exhaustive[1])
        assert np.array_equal(blocked[0], exhaustive[0])


def test_block_search_equals_exhaustive_search_at_a_converged_value() -> None:
    problem = compiled(GROWTH, reward_storage="on_the_fly")
    result = solve(document(GROWTH))
    v = np.array(result["value"]).reshape(-1)
    exhaustive = problem.bellman_step(v, exhaustive=True)
    blocked = problem.bellman_step(v, policy_guess=exhaustive[1])
    assert np.array_equal(blocked[0], exhaustive[0]) and np.array_equal(blocked[1], exhaustive[1])


@pytest.mark.parametrize("model", [GROWTH, LQ, TWO_CHOICES], ids=["growth", "lq", "two-choices"])
def test_tables_and_on_the_fly_reward_storages_agree(model: dict) -> None:
    table = compiled(model, reward_storage="tables")
    pointwise = compiled(model, reward_storage="on_the_fly")
    v = random_values(table)
    tv_table, policy_table = table.bellman_step(v)
    tv_point, policy_point = pointwise.bellman_step(v)
    # numpy's log/exp/** may differ from the C library's in the last bits (worker.expressions), so
    # the rewards may differ by rounding; everything else is the same arithmetic.
    assert np.array_equal(policy_table, policy_point)
    assert np.allclose(tv_table, tv_point, rtol=1e-13, atol=1e-13)
    for name in ("policy_reward",):
        assert np.allclose(getattr(table, name)(policy_table), getattr(pointwise, name)(policy_table), rtol=1e-13)
    assert (table.policy_matrix(policy_table) != pointwise.policy_matrix(policy_table)).nnz == 0


def test_reward_storages_agree_bit_for_bit_without_transcendental_functions() -> None:
    table = compiled(LQ, reward_storage="tables")
    pointwise = compiled(LQ, reward_storage="on_the_fly")
    v = random_values(table)
    assert np.array_equal(table.bellman_step(v)[0], pointwise.bellman_step(v)[0])


def test_fixed_policy_operators_match_the_bellman_step() -> None:
    for storage in ("tables", "on_the_fly"):
        problem = compiled(TWO_CHOICES, reward_storage=storage)
        v = random_values(problem)
        tv, policy = problem.bellman_step(v)
        assert np.array_equal(problem.policy_step(v, policy), tv)
        matrix = problem.policy_matrix(policy)
        assert np.allclose(matrix.sum(axis=1), 1.0, atol=1e-12)
        assert np.allclose(problem.policy_reward(policy) + problem.discount * (matrix @ v), tv, rtol=1e-12, atol=1e-12)


def test_expected_continuation_is_the_chain_times_tomorrows_values() -> None:
    problem = compiled(GROWTH, reward_storage="tables")
    v = random_values(problem)
    policy = np.zeros(problem.n, dtype=np.int64)  # everyone picks the lowest k'
    P = problem._data.transition
    expected = problem.policy_reward(policy) + problem.discount * (v.reshape(120, 3)[0] @ P.T)[np.arange(problem.n) % 3]
    assert np.allclose(problem.policy_step(v, policy), expected, rtol=1e-13)


def test_three_methods_agree() -> None:
    results = {m: solve(document(GROWTH, method=m)) for m in ("value_iteration", "howard", "policy_iteration")}
    reference = np.array(results["policy_iteration"]["value"])
    for method, result in results.items():
        assert result["status"] == "converged", method
        assert np.max(np.abs(np.array(result["value"]) - reference)) <= 2e-6, method
        assert result["policy_index"] == results["policy_iteration"]["policy_index"], method


def test_hints_on_and_off_agree() -> None:
    plain = solve(document(GROWTH))
    hinted = solve(document(GROWTH, hints={"monotone": True, "concave": True}))
    assert hinted["diagnostics"]["hints"] == {"monotone": True, "concave": True}
    assert np.max(np.abs(np.array(plain["value"]) - np.array(hinted["value"]))) <= 2e-6
    assert plain["policy_index"] == hinted["policy_index"]
    assert not hinted["diagnostics"]["warnings"]


def test_hinted_step_is_exact_when_the_hints_hold() -> None:
    problem = compiled(GROWTH, hints={"monotone": True, "concave": True})
    result = solve(document(GROWTH))
    v = np.array(result["value"]).reshape(-1)
    restricted = problem.bellman_step(v, restricted=True)
    exact = problem.bellman_step(v, exhaustive=True)
    assert np.array_equal(restricted[1], exact[1]) and np.array_equal(restricted[0], exact[0])


BUMPY = {
    "states": {"x": {"min": 0.0, "max": 1.0, "points": 5}},
    "choices": {"u": {"min": -2.0, "max": 2.0, "points": 81}},
    "next": {"x": "x"},
    "reward": "-(u**2 - 1)**2 + 0.3 * u * x",
}
"""Two peaks in u (near −1 and +1), the right one higher: not concave in the choice."""

FALLING = {
    "states": {"k": {"min": 0.0, "max": 1.0, "points": 30}},
    "choices": {"k_next": {"next_of": "k"}},
    "reward": "-(k_next - (1 - k))**2",
}
"""The best k' is 1 − k, which falls as k rises: not monotone."""


@pytest.mark.parametrize(("model", "hints"), [(BUMPY, {"concave": True}), (FALLING, {"monotone": True})],
                         ids=["not-concave", "not-monotone"])
def test_broken_hint_still_gives_the_right_answer_and_a_warning(model: dict, hints: dict) -> None:
    honest = solve(document(model, discount=0.9))
    promised = solve(document(model, discount=0.9, hints=hints))
    assert promised["policy_index"] == honest["policy_index"]
    assert np.max(np.abs(np.array(promised["value"]) - np.array(honest["value"]))) <= 2e-6
    assert any("hint" in warning for warning in promised["diagnostics"]["warnings"])
    # And the hinted step really does go wrong on this model.
    problem = compiled(model, hints=hints)
    v = np.array(honest["value"]).reshape(-1)
    assert not np.array_equal(problem.bellman_step(v, restricted=True)[1], problem.bellman_step(v)[1])


def test_hints_that_cannot_apply_to_a_choice_are_noted() -> None:
    problem = compiled(TWO_CHOICES, hints={"monotone": True, "concave": True})
    # With two choices the hints run along the last (`work`, a menu): concave applies, monotone cannot.
    assert problem.hints_active and problem.hints.concave and not problem.hints.monotone
    notes = problem.diagnostics(np.zeros(problem.n, dtype=np.int64))["notes"]
    assert any("the monotone hint was not used" in note and "`work`" in note for note in notes)
    grid_choice = compiled(LQ, hints={"monotone": True, "concave": True})
    assert grid_choice.hints.concave and not grid_choice.hints.monotone


@pytest.mark.parametrize("storage", ["tables", "on_the_fly"])
def test_clamped_next_states_are_counted(storage: str) -> None:
    problem = compiled(LQ, reward_storage=storage)
    result = solve(document(LQ))
    policy = np.array(result["policy_index"]["u"]).reshape(-1)
    diagnostics = problem.diagnostics(policy)["clamped_next"]
    # Independent count: x' = a x + b u outside [−1, 1], over every (x, u) pair and at the policy.
    x = np.linspace(-1.0, 1.0, 41)[:, None]
    u = np.linspace(-3.0, 3.0, 61)[None, :]
    outside = np.abs(0.95 * x + 0.5 * u) > 1.0
    assert diagnostics["all_pairs"]["count"] == int(outside.sum())
    assert diagnostics["policy"]["count"] == int(outside[np.arange(41), policy].sum())


def test_clamping_at_the_policy_is_warned_about() -> None:
    narrow = {**LQ, "choices": {"u": {"min": -1.0, "max": 1.0, "points": 21}}, "next": {"x": "x + 0.5 * u + 0.6"}}
    result = solve(document(narrow))
    assert result["diagnostics"]["clamped_next"]["policy"]["count"] > 0
    assert any("outside its grid" in warning for warning in result["diagnostics"]["warnings"])


def test_edge_hits_warn_about_a_too_narrow_grid() -> None:
    narrow = {**GROWTH, "states": {"k": {"min": 0.5, "max": 1.5, "points": 40}}}
    result = solve(document(narrow))
    hits = result["diagnostics"]["edge_hits"]["k_next"]
    # Capital wants to grow towards its steady state (about 5.4), far above this grid.
    assert hits["highest"] >= EDGE_WARNING_SHARE and hits["lowest"] == 0.0
    assert any("highest point of `k_next`" in warning and "larger max" in warning
               for warning in result["diagnostics"]["warnings"])


def test_states_without_an_allowed_choice_are_named() -> None:
    stuck = {**GROWTH, "params": {"alpha": 0.36, "delta": 0.08, "gamma": 2.0},
             "feasible": ["c > 0", "k_next >= 1.2 * k"]}
    doc = parse_document(document(stuck))
    with pytest.raises(InfeasibleModel) as caught:
        check_feasibility(doc)
    first = caught.value.errors[0]
    assert first["path"] == "model.feasible"
    assert "at k = " in first["message"] and ", z = " in first["message"]
    assert "`c > 0` and `k_next >= 1.2 * k`" in first["message"]
    assert "more of the 360 points" in caught.value.errors[-1]["message"]
    for storage in ("tables", "on_the_fly"):
        with pytest.raises(InfeasibleModel):
            compile_grid(doc, reward_storage=storage)


def test_feasibility_names_the_reward_when_only_non_finite_rewards_remain() -> None:
    model = {**LQ, "reward": "log(x - 2)"}  # x ≤ 1 everywhere: log of a negative number is NaN
    with pytest.raises(InfeasibleModel) as caught:
        check_feasibility(parse_document(document(model)))
    assert caught.value.errors[0]["path"] == "model.reward"
    assert "at x = -1" in caught.value.errors[0]["message"]


def test_feasibility_check_can_stop_at_its_budget() -> None:
    upward = {**GROWTH, "feasible": ["c > 0", "k_next >= k"]}  # needs several passes of the scan
    report = check_feasibility(parse_document(document(upward)), budget_s=0.0)
    assert report["complete"] is False and report["unresolved"] > 0
    assert check_feasibility(parse_document(document(upward)))["complete"] is True
    report = check_feasibility(parse_document(document(GROWTH)))
    assert report == {**report, "complete": True, "unresolved": 0}
    # The lowest k' is always affordable, so the coarse-to-fine scan needs about one pair per state.
    assert report["pairs_evaluated"] <= 2 * 360


def test_nan_rewards_are_excluded_and_reported() -> None:
    # log(c) without a feasibility condition: NaN wherever c < 0, -inf at c = 0.
    model = {**GROWTH, "reward": "log(c)", "feasible": []}
    problem = compiled(model, reward_storage="tables")
    result = solve(document(model))
    assert np.isfinite(np.array(result["value"])).all()
    k = np.linspace(2.7, 8.2, 120)
    z = np.array(result["axes"]["z"])
    c = z[None, :, None] * k[:, None, None] ** 0.36 + 0.92 * k[:, None, None] - k[None, None, :]
    excluded = problem.diagnostics(np.zeros(problem.n, dtype=np.int64))["nonfinite_rewards"]
    assert excluded["count"] == int((c < 0).sum())
    assert "k = " in excluded["example"]["state"] and "k_next = " in excluded["example"]["choice"]
    assert any("NaN or +inf" in warning for warning in result["diagnostics"]["warnings"])


def test_describe_policy_nests_values_and_indices() -> None:
    problem = compiled(TWO_CHOICES)
    v = random_values(problem)
    _, policy = problem.bellman_step(v)
    values, indices = problem.describe_policy(policy)
    a_index, work_index = np.unravel_index(policy, (25, 3))
    assert np.array(indices["a_next"]).shape == (25, 4, 2)
    assert np.array_equal(np.array(indices["work"]).reshape(-1), work_index)
    assert np.array_equal(np.array(values["a_next"]).reshape(-1), np.linspace(0, 4, 25)[a_index])
    assert np.array_equal(problem.choice_values(policy)["work"], np.array([0.0, 0.5, 1.0])[work_index])


def test_params_are_runtime_numbers_so_a_sweep_reuses_the_kernels() -> None:
    base = compiled(GROWTH, reward_storage="on_the_fly")
    other = compiled({**GROWTH, "params": {"alpha": 0.3, "delta": 0.1, "gamma": 3.0},
                      "states": {"k": {"min": 1.0, "max": 9.0, "points": 77}}}, reward_storage="on_the_fly")
    assert other._kernels is base._kernels


def test_generated_source_carries_no_document_text() -> None:
    sneaky = {
        "params": {"system": 1.0, "__class__": 2.0},
        "states": {"exec": {"min": 0.0, "max": 1.0, "points": 5}},
        "choices": {"popen": {"next_of": "exec"}},
        "define": {"getattr": "system * exec - popen"},
        "reward": "-getattr**2 + __class__",
    }
    problem = compiled(sneaky, reward_storage="on_the_fly")
    source = pathlib.Path(problem._kernels.__file__).read_text()
    for name in ("system", "__class__", "exec", "popen", "getattr"):
        assert name not in source.replace("def ", "").replace("import", ""), name


def test_kernels_live_in_the_cache_folder_under_their_hash(tmp_path, monkeypatch) -> None:
    monkeypatch.setenv("FIXQ_KERNEL_CACHE", str(tmp_path))
    data_layout = _codegen.layout_for((0,), 1, 1, "table", False)
    source = _codegen.module_source(data_layout, None)
    module = _codegen.load(source + "\n# a test's own copy\n")
    assert module.__file__.startswith(str(tmp_path))
    assert pathlib.Path(module.__file__).read_text().startswith("# fixq generated kernels")
    assert _codegen.load(source + "\n# a test's own copy\n") is module


def test_reward_storage_follows_the_estimate_and_the_memory_cap() -> None:
    doc = parse_document(document(GROWTH))
    assert compile_grid(doc).reward_storage == "tables"
    assert compile_grid(doc, limits={"max_bytes": 1000}).reward_storage == "on_the_fly"
    hinted = parse_document(document(GROWTH, hints={"monotone": True, "concave": True}))
    assert compile_grid(hinted).reward_storage == "on_the_fly"


def test_tables_are_never_built_on_the_fly() -> None:
    problem = compiled(GROWTH, reward_storage="on_the_fly")
    assert all(
        array.size <= max(problem._data.n_grid, problem._data.n_choices, 3 * 3 + 1) * 8 for array in problem._ctx
    )
    assert math.prod(problem.shape) * problem._data.n_choices > max(array.size for array in problem._ctx)


def test_fused_evaluation_steps_match_the_sparse_matrix_and_split_calls_give_the_same_bits() -> None:
    # Reference: scipy's sparse P_σ (policy_matrix) applied step by step, v ← r_σ + β P_σ v.
    problem = compiled(TWO_CHOICES, reward_storage="on_the_fly")
    v = random_values(problem)
    _, policy = problem.bellman_step(v)
    matrix, reward = problem.policy_matrix(policy), problem.policy_reward(policy)
    expected = v.copy()
    for _ in range(7):
        expected = reward + problem.discount * (matrix @ expected)
    whole, done, _ = problem.policy_steps(v, policy, 7)
    assert done == 7
    np.testing.assert_allclose(whole, expected, rtol=1e-12, atol=1e-12)
    first, _, _ = problem.policy_steps(v, policy, 3)
    split, _, _ = problem.policy_steps(first, policy, 4)
    assert np.array_equal(split, whole)
    settled, done, span = problem.policy_steps(v, policy, 10_000, 1e-9)
    assert done < 10_000 and span <= 1e-9
    step = problem.policy_step(settled, policy) - settled
    assert float(step.max() - step.min()) <= 1e-9 * (1 + 1e-6)


class _Store:
    """A checkpoint store in memory; ``crash_after`` saves, it raises ``RuntimeError``."""

    def __init__(self, crash_after: int | None = None) -> None:
        self.state: dict | None = None
        self.saves = 0
        self.crash_after = crash_after

    def load(self) -> dict | None:
        return self.state

    def save(self, state: dict) -> None:
        self.state = state
        self.saves += 1
        if self.crash_after is not None and self.saves >= self.crash_after:
            self.crash_after = None
            raise RuntimeError("crash")


def test_grid_howard_resumes_bit_for_bit_from_checkpoints_between_evaluation_blocks() -> None:
    from worker.solvers import METHODS

    problem = compiled(GROWTH, reward_storage="on_the_fly")
    options = dict(tolerance=1e-9, evaluation_steps=40, fingerprint="grid", max_iterations=10_000)
    whole = METHODS["howard"](problem, np.zeros(problem.n), **options)
    counting = _Store()
    METHODS["howard"](problem, np.zeros(problem.n), checkpoint=counting, checkpoint_s=0.0, **options)
    assert counting.saves >= 3
    mid_phase = False
    for crash_after in sorted({1, counting.saves // 3, counting.saves // 2, counting.saves - 1}):
        store = _Store(crash_after=max(1, crash_after))
        with pytest.raises(RuntimeError):
            METHODS["howard"](problem, np.zeros(problem.n), checkpoint=store, checkpoint_s=0.0, **options)
        mid_phase |= store.state["evaluation_steps_done"] is not None
        resumed = METHODS["howard"](problem, np.zeros(problem.n), checkpoint=store, checkpoint_s=0.0, **options)
        np.testing.assert_array_equal(resumed.value, whole.value)
        np.testing.assert_array_equal(resumed.policy, whole.policy)
        assert (resumed.iterations, resumed.evaluation_steps) == (whole.iterations, whole.evaluation_steps)
    assert mid_phase, "some crash points fall between evaluation blocks of a phase"
    assert whole.status == "converged" and whole.error_bound <= 1e-9


def test_exact_step_after_a_hinted_step_equals_exhaustive_search() -> None:
    # The exact step reuses the policy of a hinted step at the same v as its seed; a seed never
    # changes the answer, at that v or at another one (the reference is the plain scan of every choice).
    problem = compiled(GROWTH, reward_storage="on_the_fly", hints={"monotone": True, "concave": True})
    assert problem.hints_active
    v = random_values(problem, seed=3)
    other = random_values(problem, seed=4)
    problem.bellman_step(v, restricted=True)
    for point in (v, other):
        blocked = problem.bellman_step(point)
        exhaustive = problem.bellman_step(point, exhaustive=True)
        assert np.array_equal(blocked[0], exhaustive[0]) and np.array_equal(blocked[1], exhaustive[1])
