"""The convergence log stays bounded: every early iteration, a sampling that doubles its step, the latest ones."""

from __future__ import annotations

import copy
import random

import pytest

from tests._documents import print_shop
from worker import solve
from worker.convergence_log import KEEP_FIRST, KEEP_LATEST, KEEP_SAMPLED, ConvergenceLog, dropped, kept, stride
from worker.solvers.outcome import observed_rate

BOUND = KEEP_FIRST + KEEP_SAMPLED + KEEP_LATEST


def entries(first: int, last: int) -> list[dict]:
    return [{"iteration": i, "distance": 0.9**i} for i in range(first, last + 1)]


def test_the_rule_keeps_early_sampled_and_latest_iterations_and_never_revives_one() -> None:
    for last in (10, KEEP_FIRST, KEEP_FIRST + KEEP_SAMPLED, 10**5, 10**7):
        held = [i for i in range(1, last + 1) if kept(i, last)] if last <= 10**5 else None
        if held is not None:
            assert len(held) <= BOUND
            assert held[: min(last, KEEP_FIRST)] == list(range(1, min(last, KEEP_FIRST) + 1))
            assert held[-KEEP_LATEST:] == list(range(max(1, last - KEEP_LATEST + 1), last + 1))[-KEEP_LATEST:]
        assert (last - KEEP_FIRST) // stride(last) <= KEEP_SAMPLED
    rng = random.Random(1)
    for _ in range(2000):
        last = rng.randrange(1, 200_000)
        later = last + rng.randrange(1, 200_000)
        i = rng.randrange(1, last + 1)
        assert kept(i, later) <= kept(i, last) or i > later - KEEP_LATEST


def test_appending_holds_exactly_what_the_rule_keeps() -> None:
    log = ConvergenceLog()
    for n, entry in enumerate(entries(1, 40_000), start=1):
        log.append(entry)
        if n in (5, KEEP_FIRST, KEEP_FIRST + 1, 3 * KEEP_FIRST + 17, 40_000):
            assert [e["iteration"] for e in log] == [i for i in range(1, n + 1) if kept(i, n)]
            assert log.dropped == dropped(log) == n - len(log)
    assert len(log) <= BOUND


def test_a_log_rebuilt_from_a_checkpoint_goes_on_as_if_never_stopped() -> None:
    whole = ConvergenceLog()
    for entry in entries(1, 12_345):
        whole.append(entry)
    part = ConvergenceLog()
    for entry in entries(1, 7_000):
        part.append(entry)
    resumed = ConvergenceLog(copy.deepcopy(list(part)))
    for entry in entries(7_001, 12_345):
        resumed.append(entry)
    assert list(resumed) == list(whole)


def test_the_observed_rate_only_pairs_consecutive_iterations() -> None:
    full = [{"iteration": i, "distance": 0.9**i} for i in range(1, 5001)]
    full[2000]["distance"] *= 1e3  # a jump far from the end; a gap across it must not count
    bounded = ConvergenceLog()
    for entry in full:
        bounded.append(entry)
    assert observed_rate(bounded, 1.0) == pytest.approx(observed_rate(full, 1.0))
    gapped = [{"iteration": 1, "distance": 1.0}, {"iteration": 9, "distance": 0.5}]
    assert observed_rate(gapped, 1.0) is None


def long_document(max_iterations: int, **solver: object) -> dict:
    document = print_shop()
    document["solver"] = {"method": "value_iteration", "tolerance": 1e-300, "max_iterations": max_iterations, **solver}
    return document


def test_a_long_solve_returns_a_bounded_log_and_says_how_many_entries_it_dropped() -> None:
    seen: list[int] = []
    result = solve(long_document(6000), on_progress=lambda entry: seen.append(entry["iteration"]))
    assert result["iterations"] == 6000 and seen == list(range(1, 6001))
    iterations = [entry["iteration"] for entry in result["log"]]
    assert iterations == [i for i in range(1, 6001) if kept(i, 6000)]
    assert result["diagnostics"]["log_dropped"] == 6000 - len(iterations) > 0


class MemoryCheckpoint:
    def __init__(self) -> None:
        self.state = None

    def load(self):
        return self.state

    def save(self, state):
        self.state = state


class Crash(Exception):
    pass


def test_a_resumed_long_solve_logs_each_kept_iteration_once_in_order() -> None:
    document = long_document(5000, checkpoint_s=0.002)
    whole = solve(copy.deepcopy(document))
    store = MemoryCheckpoint()

    def crash(entry):
        if entry["iteration"] == 3500:
            raise Crash

    with pytest.raises(Crash):
        solve(copy.deepcopy(document), checkpoint=store, on_progress=crash)
    assert len(store.state["log"]) <= BOUND
    resumed = solve(copy.deepcopy(document), checkpoint=store)
    assert KEEP_FIRST < resumed["diagnostics"]["resumed_from_iteration"] < 3500
    assert [e["iteration"] for e in resumed["log"]] == [e["iteration"] for e in whole["log"]]
    assert resumed["diagnostics"]["log_dropped"] == whole["diagnostics"]["log_dropped"]
