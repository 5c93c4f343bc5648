"""Guiding and certifying trials of a search (``worker.search_trials``), and the one-unknown outer method
(``worker.search_outer``).

The economy is the invented one of ``tests/worker/test_search.py`` (written again here: test modules do not
import each other): households saving in ``a`` (a continuous choice, with the monotone and concave hints),
income from a two-state chain, a Cobb–Douglas firm's wage and capital demand as params given as expressions
of ``r``.  The reference for the answer is a client-side loop: scipy's ``brentq`` over single solves, each
reading mean assets off its stationary distribution with numpy.
"""

from __future__ import annotations

import copy
import importlib
import math
from typing import Any

import numpy as np
import pytest
from scipy.optimize import brentq

import worker.search_trials as search_trials
from tests._documents import savings_market
from worker.errors import InvalidDocument
from worker.search_outer import NoRoot, estimate_root, find_root
from worker.solve import compile_document, solve
from worker.solvers import METHODS

ALPHA, DELTA = 0.36, 0.08
DOCUMENT: dict[str, Any] = {
    "version": 1, "discount": 0.95, "solver": {"method": "howard", "tolerance": 1e-10},
    "model": savings_market(hints={"monotone": True, "concave": True}),
}
"""Invented: the households of the economy."""
MARKET = {"unknowns": {"r": {"min": 0.0, "max": 0.05}}, "conditions": ["mean(a) - capital_demand"],
          "tolerance": 1e-6}


def _search_document() -> dict[str, Any]:
    return {**copy.deepcopy(DOCUMENT), "search": MARKET}


def _client_loop_root() -> float:
    """scipy's brentq over single solves (the stationary report read with numpy): the reference r."""

    def excess(r: float) -> float:
        single = copy.deepcopy(DOCUMENT)
        single["model"]["params"]["r"] = r
        single["report"] = {"stationary": True}
        result = solve(single)
        pi = np.asarray(result["stationary"]["distribution"])
        grid = np.asarray(result["axes"]["a"])
        return float((pi * grid[:, None]).sum()) - (ALPHA / (r + DELTA)) ** (1 / (1 - ALPHA))

    return brentq(excess, 0.0, 0.05, xtol=1e-12)


@pytest.fixture(scope="module")
def reference() -> float:
    return _client_loop_root()


def test_the_answer_is_a_certifying_trial_and_guiding_trials_say_they_are_not(reference: float) -> None:
    search = solve(_search_document())["search"]
    trials = search["trials"]
    assert search["status"] == "converged"
    assert all(isinstance(row["certified"], bool) for row in trials)
    assert not trials[0]["certified"]  # far from the root: a guiding trial
    answer = trials[-1]
    assert answer["certified"] and answer["unknowns"] == search["unknowns"]
    assert answer["residuals"] == search["residuals"] and abs(answer["residuals"][0]) <= MARKET["tolerance"]
    assert answer["inner_tolerance"] == pytest.approx(1e-10)
    # The mean assets rise by about 300 per unit of r here: a residual of 1e-6 is about 3e-9 in r.
    assert abs(search["unknowns"]["r"] - reference) <= 1e-8


def test_guiding_trials_that_mislead_never_become_the_answer(monkeypatch: pytest.MonkeyPatch,
                                                             reference: float) -> None:
    """Guiding trials made to answer for another point (r + 2e-4): a guiding residual within the tolerance
    is then far from the truth, and the certifying trial there says so; the search goes on with certifying
    trials and ends at the true root."""
    import worker.search as search_module

    original = search_trials.TrialModels.solve
    shifted: list[float] = []

    def lying(self: Any, xs: tuple[float, ...], start: Any, tolerance: float, certify: bool,
              checkpoint: Any = None, **kwargs: Any) -> Any:
        if certify:
            return original(self, xs, start, tolerance, certify, checkpoint, **kwargs)
        shifted.append(xs[0])
        return original(self, (xs[0] + 2e-4,), start, tolerance, certify, checkpoint)

    monkeypatch.setattr(search_trials.TrialModels, "solve", lying)
    # Guiding trials all the way down to the tolerance, so that one meets it where the truth does not.
    monkeypatch.setattr(search_module, "CERTIFY_NEAR", 1.0)
    search = solve(_search_document())["search"]
    assert shifted, "the search made no guiding trial"
    assert search["status"] == "converged"
    assert search["trials"][-1]["certified"]
    assert abs(search["unknowns"]["r"] - reference) <= 1e-8
    # Some guiding trial met the tolerance at a point that is not the answer, and was refused there.
    misled = [row for row in search["trials"] if not row["certified"] and abs(row["residuals"][0]) <= 1e-6]
    assert misled and all(abs(row["unknowns"]["r"] - reference) > 1e-5 for row in misled)
    # The certifying trials after the misled guiding one: the first at the guiding trials' estimate, then
    # Newton steps with their slope (a shift moves the residual, not its slope), within SETTLE_STEPS.
    assert sum(row["certified"] for row in search["trials"]) <= search_module.SETTLE_STEPS


def test_the_results_stationary_distribution_is_the_certifying_trials_not_solved_again(
        monkeypatch: pytest.MonkeyPatch) -> None:
    import worker.report as report

    general: list[int] = []
    original = report.long_run_distribution

    def counted(matrix: Any) -> Any:
        general.append(matrix.shape[0])
        return original(matrix)

    monkeypatch.setattr(report, "long_run_distribution", counted)
    result = solve(_search_document())
    # No trial takes the general solve (the first is pinned at the state of most inflow, each later one at the
    # last distribution's heaviest state), and the result does not solve the chain again.
    assert general == []
    pi = np.asarray(result["stationary"]["distribution"]).reshape(-1)
    # Independent: the stationary distribution of the result's own policy, by numpy's least squares.
    single = copy.deepcopy(DOCUMENT)
    single["model"]["params"]["r"] = result["search"]["unknowns"]["r"]
    _, problem = compile_document(single)
    chosen = np.asarray(result["policy"]["save"], dtype=np.float64).reshape(-1)  # the certified policy
    np.testing.assert_allclose(pi, _stationary_numpy(problem.policy_matrix(chosen).toarray()), rtol=0, atol=1e-12)
    assert result["stationary"]["residual"] <= 1e-12


def test_guiding_trials_reuse_one_compiled_problem(monkeypatch: pytest.MonkeyPatch) -> None:
    front = importlib.import_module("worker.solve")  # the module: ``worker.solve`` the attribute is the function
    compiled: list[Any] = []
    original = front._compile

    def counting(doc: Any, cap: Any) -> Any:
        compiled.append(doc)
        return original(doc, cap)

    monkeypatch.setattr(front, "_compile", counting)
    shared = solve(_search_document())["search"]
    certified = sum(row["certified"] for row in shared["trials"])
    # One compile for the first guiding trial, one per certifying trial; none for the other guiding ones.
    assert len(compiled) == 1 + certified < len(shared["trials"])
    monkeypatch.setattr(search_trials, "_swappable", lambda doc, problem: False)
    compiled.clear()
    apart = solve(_search_document())["search"]
    assert len(compiled) == len(apart["trials"])
    # The same trials and answer either way: swapping the params is the same model as compiling it.
    assert apart["unknowns"]["r"] == pytest.approx(shared["unknowns"]["r"], abs=1e-12)
    assert [row["unknowns"]["r"] for row in apart["trials"]] == pytest.approx(
        [row["unknowns"]["r"] for row in shared["trials"]], abs=1e-12)


def test_a_trusted_hinted_solve_skips_only_the_verification() -> None:
    single = copy.deepcopy(DOCUMENT)
    doc, problem = compile_document(single)
    start = np.zeros(problem.n)
    checked = METHODS["howard"](problem, start, tolerance=1e-10)
    trusted = METHODS["howard"](problem, start, tolerance=1e-10, trust_hints=True)
    assert checked.verification is not None and checked.verification["hints_held"]
    assert trusted.verification is None
    np.testing.assert_allclose(trusted.value, checked.value, rtol=0, atol=1e-9)


def test_a_checked_solve_whose_hints_held_ends_with_its_hinted_step_and_a_bound_that_holds() -> None:
    doc, problem = compile_document(copy.deepcopy(DOCUMENT))
    start = np.zeros(problem.n)
    checked = METHODS["howard"](problem, start, tolerance=1e-10)
    trusted = METHODS["howard"](problem, start, tolerance=1e-10, trust_hints=True)
    assert checked.verification is not None and checked.verification["hints_held"]
    # The hinted iterations' own choices, as a guiding trial ends with; not the unrestricted step's, which a
    # different search of the same flat objective places a little apart.
    np.testing.assert_array_equal(checked.policy, trusted.policy)
    unrestricted = np.asarray(problem.bellman_step(start if checked.iterations == 0 else checked.value,
                                                   restricted=False)[1])
    assert not np.array_equal(unrestricted, checked.policy)
    # Its bound answers for the unrestricted step too: it differs from that step's own by rounding only.
    assert checked.error_bound <= 1e-10
    assert checked.error_bound == pytest.approx(checked.verification["error_bound"], rel=1e-4)
    # The bound holds: against the same model solved without hints to a far tighter tolerance (independent of
    # the hinted search and of the step kept).
    plain = copy.deepcopy(DOCUMENT)
    plain["model"]["hints"] = {}
    _, reference_problem = compile_document(plain)
    reference = METHODS["howard"](reference_problem, checked.value, tolerance=1e-11, max_iterations=50)
    assert reference.error_bound <= 1e-10
    assert np.abs(checked.value - reference.value).max() <= checked.error_bound + reference.error_bound


def _counted(f: Any) -> tuple[Any, list[float]]:
    calls: list[float] = []

    def g(x: float) -> float:
        calls.append(x)
        return f(x)

    return g, calls


def test_find_root_stays_in_its_bracket_and_finds_a_root_near_a_pole() -> None:
    # A residual that blows up just past the top of its bracket (like savings as r nears 1/beta - 1).
    def f(x: float) -> float:
        return 1.0 / (0.0417 - x) - 1.0 / (0.0417 - 0.0337)

    g, calls = _counted(f)
    find_root(g, 0.0, 0.0416, 0.03, xtol=1e-14, maxiter=60)
    assert all(0.0 <= x <= 0.0416 for x in calls)
    assert min(abs(x - 0.0337) for x in calls) <= 1e-12
    # Fewer residuals than scipy's brentq from the ends to the same point (common practice as a yardstick).
    h, ends_first = _counted(f)
    brentq(h, 0.0, 0.0416, xtol=1e-14)
    assert len(calls) < len(ends_first)


class _Found(Exception):
    pass


@pytest.mark.parametrize("root", [0.005, 0.02, 0.0337, 0.0408, 0.0415])
def test_find_root_reaches_a_root_near_a_pole_in_few_residuals(root: float) -> None:
    # The residual's model (a rational function) is exact for f = 1/(p - x) - 1/(p - root): the probe, one
    # secant step and one model step reach the root, wherever it lies.  Secant steps alone (the method
    # before) took 9-16 residuals here, scipy's brentq from the ends 8-15 (measured).
    calls: list[float] = []

    def f(x: float) -> float:
        calls.append(x)
        if abs(x - root) <= 1e-12:
            raise _Found
        return 1.0 / (0.0417 - x) - 1.0 / (0.0417 - root)

    with pytest.raises(_Found):
        find_root(f, 0.0, 0.0416, 0.03, xtol=1e-14, maxiter=60)
    assert len(calls) <= 5 and all(0.0 <= x <= 0.0416 for x in calls)


@pytest.mark.parametrize("shape", ["straight", "cubic", "tanh", "log", "exp"])
def test_find_root_takes_no_more_residuals_than_scipys_brentq_from_the_ends_on_smooth_shapes(shape: str) -> None:
    root = 0.02
    curve = {"straight": lambda x: 3 * (x - root), "cubic": lambda x: (x - root) + 300 * (x - root) ** 3,
             "tanh": lambda x: math.tanh(80 * (x - root)), "log": lambda x: math.log((x + 1e-3) / (root + 1e-3)),
             "exp": lambda x: math.exp(150 * x) - math.exp(150 * root)}[shape]

    def counted(calls: list[float]) -> Any:
        def f(x: float) -> float:
            calls.append(x)
            if abs(x - root) <= 1e-11:
                raise _Found
            return curve(x)
        return f

    ours: list[float] = []
    with pytest.raises(_Found):
        find_root(counted(ours), 0.0, 0.0416, 0.03, xtol=1e-14, maxiter=60)
    ends: list[float] = []  # scipy's brentq from the bracket's ends (common practice as a yardstick)
    with pytest.raises(_Found):
        brentq(counted(ends), 0.0, 0.0416, xtol=1e-14)
    assert len(ours) <= len(ends) + 1 and all(0.0 <= x <= 0.0416 for x in ours)


def test_estimate_root_is_the_models_root_inside_the_sign_change_with_the_nearest_trials_slope() -> None:
    # Three points of f = 1/(0.05 - x) - 40 (root 0.025): the rational model is exact.
    f = lambda x: 1.0 / (0.05 - x) - 40.0  # noqa: E731
    points = [(x, f(x)) for x in (0.01, 0.03, 0.02)]
    x, slope = estimate_root(points, 0.0, 0.04)
    assert abs(x - 0.025) <= 1e-12
    # The slope: the secant of the two trials nearest the estimate (0.02 and 0.03), written here.
    assert slope == pytest.approx((f(0.03) - f(0.02)) / 0.01, rel=1e-12)
    # A straight residual: the secant's root.
    x, slope = estimate_root([(0.0, -1.0), (1.0, 1.0)], -5.0, 5.0)
    assert x == pytest.approx(0.5) and slope == pytest.approx(2.0)
    # A model root outside the narrowest sign change is replaced by that sign change's secant root: through
    # (0, -1), (3, 2), (0.9, 5) the model crosses zero at 4.4, outside [0, 0.9]; the secant of (0, -1) and
    # (0.9, 5) crosses at 0.15.
    x, _ = estimate_root([(0.0, -1.0), (3.0, 2.0), (0.9, 5.0)], -5.0, 5.0)
    assert x == pytest.approx(0.15)


def test_find_root_without_a_sign_change_names_both_ends() -> None:
    g, calls = _counted(lambda x: 1.0 + x * x)
    with pytest.raises(NoRoot) as caught:
        find_root(g, -1.0, 2.0, 0.5, xtol=1e-12, maxiter=60)
    assert caught.value.low == 2.0 and caught.value.high == 5.0
    assert {-1.0, 2.0} <= set(calls) and all(-1.0 <= x <= 2.0 for x in calls)


def test_find_root_starts_at_the_midpoint_when_the_value_lies_outside() -> None:
    g, calls = _counted(lambda x: math.atan(x - 0.3))
    find_root(g, 0.0, 1.0, 7.0, xtol=1e-13, maxiter=60)
    assert calls[0] == 0.5 and abs(calls[-1] - 0.3) <= 1e-12


def _stationary_numpy(matrix: np.ndarray) -> np.ndarray:
    """pi (I - P) = 0 with sum(pi) = 1, as one least-squares system (numpy, written here)."""
    n = matrix.shape[0]
    system = np.vstack([(np.eye(n) - matrix).T, np.ones(n)])
    target = np.zeros(n + 1)
    target[-1] = 1.0
    pi, *_ = np.linalg.lstsq(system, target, rcond=None)
    return pi


def test_a_trials_distribution_pinned_at_the_last_ones_heaviest_state_is_the_stationary_one() -> None:
    import scipy.sparse as sp

    rng = np.random.default_rng(7)
    n = 60
    dense = np.zeros((n, n))
    for i in range(n):  # a savings-like chain: each state moves to one of a few neighbours
        columns = np.clip(i + rng.integers(-3, 4, size=3), 0, n - 1)
        dense[i, columns] += rng.random(3) + 0.1
    dense /= dense.sum(axis=1, keepdims=True)
    expected = _stationary_numpy(dense)
    for previous in (expected, np.roll(expected, 5), None):
        pi, info = search_trials.trial_distribution(sp.csr_matrix(dense), previous)
        np.testing.assert_allclose(pi, expected, rtol=0, atol=1e-12)
        assert info["residual"] <= 1e-12
    # A pin on a transient state (the first one leaks into the rest and is never re-entered): the general
    # solve answers instead, with that state's mass 0.
    leaky = dense.copy()
    leaky[:, 0] = 0.0
    leaky[0] = 0.0
    leaky[0, 1] = 1.0
    leaky /= leaky.sum(axis=1, keepdims=True)
    pinned_there = np.zeros(n)
    pinned_there[0] = 1.0
    pi, info = search_trials.trial_distribution(sp.csr_matrix(leaky), pinned_there)
    np.testing.assert_allclose(pi, _stationary_numpy(leaky), rtol=0, atol=1e-12)
    assert abs(pi[0]) <= 1e-15 and info["residual"] <= 1e-12


def _savings_like_chain(seed: int, n: int = 60) -> np.ndarray:
    rng = np.random.default_rng(seed)
    dense = np.zeros((n, n))
    for i in range(n):  # each state moves to one of a few neighbours
        columns = np.clip(i + rng.integers(-3, 4, size=3), 0, n - 1)
        dense[i, columns] += rng.random(3) + 0.1
    return dense / dense.sum(axis=1, keepdims=True)


def test_a_nearby_trials_distribution_is_refined_from_the_last_ones_lu_and_a_far_one_factorised_afresh() -> None:
    import scipy.sparse as sp

    first = _savings_like_chain(7)
    factors: dict[str, Any] = {}
    previous = _stationary_numpy(first)
    pi, info = search_trials.trial_distribution(sp.csr_matrix(first), previous, factors)
    assert info["method"] == "direct" and factors["pin"] == int(np.argmax(previous))
    # A nearby chain (a trial close to the last): a few refinement steps with the kept LU.
    nearby = 0.999 * first + 0.001 * _savings_like_chain(8)
    pi, info = search_trials.trial_distribution(sp.csr_matrix(nearby), previous, factors)
    assert info["method"] == "refined" and 1 <= info["steps"] <= search_trials.REFINE_STEPS
    np.testing.assert_allclose(pi, _stationary_numpy(nearby), rtol=0, atol=1e-12)
    assert info["residual"] <= 1e-12
    # A far chain pinned at the same state: refinement stalls, and a fresh LU answers (and is kept).
    far = 0.3 * first + 0.7 * _savings_like_chain(9)
    kept = factors["lu"]
    pi, info = search_trials.trial_distribution(sp.csr_matrix(far), previous, factors)
    assert info["method"] == "direct" and factors["lu"] is not kept
    np.testing.assert_allclose(pi, _stationary_numpy(far), rtol=0, atol=1e-12)


def test_a_trials_start_is_the_polynomial_through_the_last_solves_one_per_value() -> None:
    from worker.search import START_POINTS, _start

    rng = np.random.default_rng(7)
    values = {x: rng.normal(size=5) for x in (0.01, 0.02, 0.025, 0.03)}
    solved = [((x,), v) for x, v in values.items()]
    # Independent: numpy's least-squares polynomial of degree START_POINTS - 1 through the last START_POINTS
    # (exact through that many points), evaluated at the next value, component by component.
    last = list(values)[-START_POINTS:]
    fit = np.polyfit(last, np.array([values[x] for x in last]), START_POINTS - 1)
    expected = np.array([np.polyval(fit[:, j], 0.04) for j in range(5)])
    np.testing.assert_allclose(_start(solved, (0.04,), values[0.03]), expected, rtol=1e-9, atol=1e-9)
    # A second solve at a value already solved (a certifying trial after a guiding one) replaces the first.
    again = rng.normal(size=5)
    fit = np.polyfit(last, np.array([values[x] for x in last[:-1]] + [again]), START_POINTS - 1)
    expected = np.array([np.polyval(fit[:, j], 0.04) for j in range(5)])
    np.testing.assert_allclose(_start([*solved, ((0.03,), again)], (0.04,), again), expected, rtol=1e-9, atol=1e-9)
    # One value solved, or several unknowns: the last value as it is.
    assert _start(solved[:1], (0.04,), values[0.01]) is values[0.01]
    assert _start([((0.01, 1.0), values[0.01]), ((0.02, 1.0), values[0.02])], (0.04, 1.0), values[0.02]) is values[0.02]


def test_a_start_through_three_solves_saves_howard_iterations_over_a_line_through_two(
        monkeypatch: pytest.MonkeyPatch) -> None:
    import worker.search as search

    three = solve(_search_document())["search"]
    monkeypatch.setattr(search, "START_POINTS", 2)
    two = solve(_search_document())["search"]
    assert three["status"] == two["status"] == "converged"
    assert three["unknowns"]["r"] == pytest.approx(two["unknowns"]["r"], abs=1e-9)
    # Measured: 37 Howard iterations in 8 trials where the line through two took 39.
    assert sum(row["iterations"] for row in three["trials"]) < sum(row["iterations"] for row in two["trials"])


def test_a_search_factorises_a_banded_chain_in_the_states_order_and_a_scrambled_one_with_colamd() -> None:
    import scipy.sparse as sp

    n = 200
    rng = np.random.default_rng(11)
    banded = np.zeros((n, n))
    for i in range(n):  # to the next states down and up (one closed class) and a few others near: half-bandwidth 3
        columns = np.clip(np.r_[i - 1, i + 1, i + rng.integers(-3, 4, size=3)], 0, n - 1)
        banded[i, columns] += rng.random(5) + 0.1
    banded /= banded.sum(axis=1, keepdims=True)
    order = np.random.default_rng(12).permutation(n)
    scrambled = banded[np.ix_(order, order)]  # the same chain with its states renumbered at random
    for dense, ordering in ((banded, "NATURAL"), (scrambled, "COLAMD")):
        expected = _stationary_numpy(dense)
        factors: dict[str, Any] = {}
        pi, info = search_trials.trial_distribution(sp.csr_matrix(dense), expected, factors)
        assert factors["ordering"] == ordering and info["method"] == "direct"
        np.testing.assert_allclose(pi, expected, rtol=0, atol=1e-12)
        # The choice is kept for the search's later factorisations (the next chain pinned elsewhere).
        later = 0.5 * dense + 0.5 * dense @ dense
        pi, info = search_trials.trial_distribution(sp.csr_matrix(later), np.roll(expected, 1), factors)
        assert factors["ordering"] == ordering
        np.testing.assert_allclose(pi, _stationary_numpy(later), rtol=0, atol=1e-12)
    # A banded chain whose LU in the states' order fills past NATURAL_FILL times its entries: COLAMD instead.
    import worker.stationary_lu as stationary_lu

    factors = {}
    original = stationary_lu.NATURAL_FILL
    try:
        stationary_lu.NATURAL_FILL = 0.5
        search_trials.trial_distribution(sp.csr_matrix(banded), _stationary_numpy(banded), factors)
    finally:
        stationary_lu.NATURAL_FILL = original
    assert factors["ordering"] == "COLAMD"


def test_a_condition_not_finite_at_a_trial_is_refused_naming_the_trial_and_never_tried_at_nan(
        monkeypatch: pytest.MonkeyPatch) -> None:
    # The condition is NaN below r = 0.01 (sqrt of a negative number); the document starts the search at
    # 0.005, inside the bracket and where the document itself is fine.  Before: the model step through two NaN
    # residuals was NaN, the third trial was made at r = nan, and the job failed at model.params.capital_demand.
    tried: list[float] = []
    solve_trial = search_trials.TrialModels.solve

    def spy(self: Any, xs: tuple[float, ...], *args: Any, **kwargs: Any) -> Any:
        tried.append(xs[0])
        return solve_trial(self, xs, *args, **kwargs)

    monkeypatch.setattr(search_trials.TrialModels, "solve", spy)
    document = _search_document()
    document["model"]["params"]["r"] = 0.005
    document["search"] = {**MARKET, "conditions": ["mean(a) - capital_demand + 0 * sqrt(r - 0.01)"]}
    with pytest.raises(InvalidDocument) as caught:
        solve(document)
    assert tried == [0.005], tried
    (fault,) = caught.value.errors
    assert fault["path"] == "search.conditions[0]"
    assert "is nan at the search's trial r = 0.005" in fault["message"], fault
    # An aggregate that is not finite is named: log(0) at the borrowing limit, where the distribution has mass.
    document["model"]["params"]["r"] = 0.02
    document["search"] = {**MARKET, "conditions": ["mean(log(a)) - 1"]}
    with pytest.raises(InvalidDocument) as caught:
        solve(document)
    assert "mean(log(a)) is -inf" in caught.value.errors[0]["message"], caught.value.errors


def test_a_trial_the_model_cannot_be_solved_at_is_named_beside_the_models_fault() -> None:
    # A careless bracket: r = -0.1 makes r + delta negative and capital demand NaN.  The condition has no root
    # (mean assets never reach 200), so the end is solved.  Before: the only fault was at
    # model.params.capital_demand, with nothing saying that the document's own r (0.02) was fine.
    document = _search_document()
    document["search"] = {**MARKET, "unknowns": {"r": {"min": -0.1, "max": 0.05}}, "conditions": ["mean(a) - 200"]}
    with pytest.raises(InvalidDocument) as caught:
        solve(document)
    first, second = caught.value.errors
    assert first["path"] == "search.unknowns.r" and "trial r = -0.1," in first["message"], first
    assert "[-0.1, 0.05]" in first["message"]
    assert second["path"] == "model.params.capital_demand", second
    assert second["message"].startswith("at the search's trial r = -0.1: "), second


@pytest.mark.parametrize(("unknowns", "conditions", "budget"), [
    ({"r": {"min": 0.0, "max": 0.05}}, ["mean(a) - capital_demand"], 3),
    ({"r": {"min": 0.0, "max": 0.05}, "discount": {"min": 0.9, "max": 0.96}},
     ["mean(a) - capital_demand", "sd(a) - 4"], 5),
])
def test_a_search_makes_at_most_max_trials_solves_the_last_a_certifying_one(
        unknowns: dict[str, Any], conditions: list[str], budget: int) -> None:
    # Before: the budget ran out on a guiding trial, which was then certified by one solve more (4 of 3, 6 of
    # 5, 61 of the default 60).
    document = _search_document()
    document["search"] = {**MARKET, "unknowns": unknowns, "conditions": conditions, "max_trials": budget}
    search = solve(document)["search"]
    assert search["status"] == "max_trials"
    assert len(search["trials"]) == budget, [row["certified"] for row in search["trials"]]
    assert search["trials"][-1]["certified"]
    assert search["residuals"] == search["trials"][-1]["residuals"]


def test_a_stopped_search_reports_the_status_of_the_solve_its_result_is_built_from(
        monkeypatch: pytest.MonkeyPatch) -> None:
    # Measured at solver.tolerance 1e-13 with time_limit_s 20: a guiding trial ended at max_iterations, the
    # certifying solve of its point (the result) at time_limit; search.status said max_iterations while the
    # warning and the last row said time_limit.  Here the certifying solves are made to stop otherwise.
    solve_trial = search_trials.TrialModels.solve

    def spy(self: Any, xs: tuple[float, ...], start: Any, tolerance: float, certify: bool, *args: Any,
            **kwargs: Any) -> Any:
        doc, problem, outcome, certified = solve_trial(self, xs, start, tolerance, certify, *args, **kwargs)
        if certified:
            outcome.status = "time_limit"
        return doc, problem, outcome, certified

    monkeypatch.setattr(search_trials.TrialModels, "solve", spy)
    document = _search_document()
    document["solver"]["max_iterations"] = 2
    result = solve(document)
    search = result["search"]
    first, last = search["trials"]
    assert first["inner_status"] == "max_iterations" and last["certified"]
    assert search["status"] == last["inner_status"] == "time_limit", search["status"]
    assert any("did NOT meet" in w and "time_limit" in w for w in result["diagnostics"]["warnings"])


def test_a_point_whose_solve_used_up_max_iterations_is_certified_in_one_more_iteration() -> None:
    # Measured: a discount bracket reaching 0.998 (where solver.tolerance 1e-10 is below float64's reach) had a
    # guiding trial run its 100,000 iterations (25 s), and the certifying solve of its point 100,000 more (24 s).
    document = _search_document()
    document["solver"]["max_iterations"] = 3
    search = solve(document)["search"]
    assert search["status"] == "max_iterations"
    first, last = search["trials"]
    assert first["unknowns"] == last["unknowns"] and not first["certified"] and last["certified"]
    assert (first["iterations"], last["iterations"]) == (3, 1)
    assert last["inner_status"] == "max_iterations" and math.isfinite(last["error_bound"])
