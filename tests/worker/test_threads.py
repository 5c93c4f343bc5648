"""One solve on several threads (``FIXQ_SOLVE_THREADS``): the same bits as on one, and small problems stay on one."""

from __future__ import annotations

import os

import numpy as np
import pytest

from tests._documents import GROWTH, LQ, TWO_CHOICES, random_values
from tests._documents import grid_document as document
from tests._thread_spy import spy_run_blocks
from worker import environment, gridtables, solve, threadpool
from worker.document import parse_document
from worker.gridmodel import compile_grid


@pytest.fixture
def spied(monkeypatch: pytest.MonkeyPatch) -> list[tuple[int, int]]:
    """Every :func:`worker.threadpool.run_blocks` call as ``(threads, blocks)``; compiled kernels, no bridge."""
    monkeypatch.setenv("FIXQ_COLD_BRIDGE", "off")
    return spy_run_blocks(monkeypatch)


@pytest.fixture
def everything_threads(monkeypatch: pytest.MonkeyPatch) -> None:
    """Thresholds at zero, and tables filled in many chunks, so the test models take every threaded path."""
    monkeypatch.setattr(threadpool, "THREAD_MIN_PAIRS", 0)
    monkeypatch.setattr(threadpool, "THREAD_MIN_STEP_POINTS", 0)
    monkeypatch.setattr(gridtables, "CHUNK_ELEMENTS", 2_000)


def solved(monkeypatch: pytest.MonkeyPatch, threads: int, doc: dict) -> dict:
    monkeypatch.setenv(environment.SOLVE_THREADS, str(threads))
    return solve(doc)


def assert_same_bits(one: dict, two: dict) -> None:
    assert one["status"] == two["status"] == "converged"
    assert np.array_equal(np.array(one["value"]).view(np.int64), np.array(two["value"]).view(np.int64))
    assert one["policy"] == two["policy"]
    assert one["policy_index"] == two["policy_index"]
    assert one["iterations"] == two["iterations"]
    assert one["error_bound"] == two["error_bound"]


CASES = {
    "growth-tables": (GROWTH, None, {}),
    "growth-hinted": (GROWTH, {"monotone": True, "concave": True}, {}),
    "growth-value-iteration": (GROWTH, None, {"method": "value_iteration"}),
    "two-choices-interpolated": (TWO_CHOICES, None, {}),
    "lq-clamped": (LQ, None, {}),
}


@pytest.mark.parametrize("case", list(CASES), ids=list(CASES))
@pytest.mark.usefixtures("everything_threads")
def test_two_threads_give_the_bits_of_one(case: str, monkeypatch: pytest.MonkeyPatch, spied: list) -> None:
    model, hints, options = CASES[case]
    doc = document(model, hints=hints, **options)
    one = solved(monkeypatch, 1, doc)
    assert all(threads == 1 for threads, _ in spied)
    spied.clear()
    two = solved(monkeypatch, 2, doc)
    assert any(threads == 2 and blocks > 1 for threads, blocks in spied)
    assert_same_bits(one, two)


@pytest.mark.parametrize("model", [GROWTH, LQ, TWO_CHOICES], ids=["growth", "lq", "two-choices"])
@pytest.mark.parametrize("storage", ["tables", "on_the_fly"])
@pytest.mark.usefixtures("everything_threads")
def test_threaded_bellman_steps_give_the_bits_of_one_thread(
    model: dict, storage: str, monkeypatch: pytest.MonkeyPatch, spied: list
) -> None:
    monkeypatch.setenv(environment.SOLVE_THREADS, "2")
    problem = compile_grid(parse_document(document(model)), reward_storage=storage)
    assert problem.threads == 2
    rng = np.random.default_rng(3)
    for trial in range(3):
        v = random_values(problem, seed=trial)
        guess = rng.integers(0, problem._data.n_choices, size=problem.n) if trial else None
        problem.threads = 1
        single = problem.bellman_step(v, policy_guess=guess)
        problem.threads = 2
        threaded = problem.bellman_step(v, policy_guess=guess)
        assert np.array_equal(single[0].view(np.int64), threaded[0].view(np.int64))
        assert np.array_equal(single[1], threaded[1])
    assert any(threads == 2 and blocks > 1 for threads, blocks in spied)


@pytest.mark.usefixtures("everything_threads")
def test_threaded_evaluation_steps_give_the_bits_of_one_thread(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv(environment.SOLVE_THREADS, "2")
    problem = compile_grid(parse_document(document(TWO_CHOICES)))
    v = random_values(problem)
    _, policy = problem.bellman_step(v)
    for steps, span_stop in ((1, -np.inf), (4, -np.inf), (7, -np.inf), (10_000, 1e-9)):
        problem.threads = 1
        single = problem.policy_steps(v, policy, steps, span_stop)
        problem.threads = 2
        threaded = problem.policy_steps(v, policy, steps, span_stop)
        assert np.array_equal(single[0].view(np.int64), threaded[0].view(np.int64))
        assert single[1:] == threaded[1:]
    assert threaded[1] < 10_000  # the span test stopped both early, after the same step


def test_a_small_problem_stays_on_one_thread(monkeypatch: pytest.MonkeyPatch, spied: list) -> None:
    doc = document(GROWTH)
    assert 360 * 120 < threadpool.THREAD_MIN_PAIRS
    one = solved(monkeypatch, 1, doc)
    spied.clear()
    two = solved(monkeypatch, 2, doc)
    assert spied and all(threads == 1 for threads, _ in spied)
    assert_same_bits(one, two)
    monkeypatch.setenv(environment.SOLVE_THREADS, "2")
    assert compile_grid(parse_document(doc)).threads == 1


def test_a_large_problem_takes_the_threads_it_is_given(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv(environment.SOLVE_THREADS, "3")
    assert threadpool.threads_for(threadpool.THREAD_MIN_PAIRS, 1) == 3
    assert threadpool.threads_for(threadpool.THREAD_MIN_PAIRS - 1, 1) == 1
    monkeypatch.setenv(environment.SOLVE_THREADS, "1")
    assert threadpool.threads_for(10 * threadpool.THREAD_MIN_PAIRS, 1) == 1


@pytest.mark.parametrize(
    ("raw", "expected"),
    [(None, "cpus"), ("", "cpus"), ("all", "cpus"), ("ALL ", "cpus"), ("1", 1), ("4", 4), ("0", 1), ("-2", 1),
     ("many", "cpus")],
)
def test_solve_threads_reader(raw: str | None, expected: object, monkeypatch: pytest.MonkeyPatch) -> None:
    if raw is None:
        monkeypatch.delenv(environment.SOLVE_THREADS, raising=False)
    else:
        monkeypatch.setenv(environment.SOLVE_THREADS, raw)
    cpus = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else os.cpu_count()
    assert environment.solve_threads() == (cpus if expected == "cpus" else expected)


def test_row_blocks_cover_every_row_once_in_order() -> None:
    for rows in (0, 1, 5, 8, 1001):
        for blocks in (1, 2, 3, 8, 2000):
            parts = threadpool.row_blocks(rows, blocks)
            covered = [i for start, stop in parts for i in range(start, stop)]
            assert covered == list(range(rows))
            assert all(stop > start for start, stop in parts)
            assert len(parts) == min(blocks, rows)


def test_a_failing_block_is_raised_after_every_block_ended() -> None:
    ended = []

    def task(start: int, stop: int) -> int:
        if start == 0:
            raise ValueError("first block")
        ended.append(start)
        return start

    with pytest.raises(ValueError, match="first block"):
        threadpool.run_blocks(task, threadpool.row_blocks(40, 4), 2)
    assert sorted(ended) == [10, 20, 30]
