"""The time estimate of a continuous choice (:mod:`worker.continuous_estimate`): deterministic figures of the
document (the measured ratios are ``bench/bench_estimates.py --continuous``'s, never a timed test)."""

from __future__ import annotations

import copy

from tests._estimate_set import continuous_with_draws, saver
from worker.continuous_estimate import SCAN_POINT_NS
from worker.costs import EXPECTATION_NS, MATVEC_NS, POINT_NS
from worker.document import parse_document
from worker.estimate import estimate


def seconds(raw: dict) -> float:
    return estimate(parse_document(raw))["seconds"]


def test_an_evaluation_step_forms_the_expectation_once_then_reads_each_points_nodes() -> None:
    # As a grid model's step (worker.grid_seconds): grid × shocks² products, then n · nodes reads; the shocks were
    # counted a second time before (n · nodes · shocks), three times what the steps took on the savings shapes.
    raw = saver(1000)
    longer = copy.deepcopy(raw)
    raw["solver"]["evaluation_steps"], longer["solver"]["evaluation_steps"] = 50, 100
    grid, shocks, nodes = 1000, 7, 2
    per_step = (grid * shocks * shocks * EXPECTATION_NS + grid * shocks * nodes * MATVEC_NS) * 1e-9
    added = seconds(longer) - seconds(raw)
    # 50 more steps after each of at most 16 iterations but the last (3 + 1.5 per doubling of the 512 scanned
    # choices), the coarse start's levels a share of them: at most 800 steps of per_step each; priced at the
    # double count (before 2026-12-05), they came to 5 times that bound.
    assert 0 < added <= 800 * per_step

def test_a_scan_at_the_grids_own_points_is_cheaper_than_one_that_interpolates() -> None:
    assert SCAN_POINT_NS < POINT_NS
    # Without the concave hint a next_of choice scans the state's grid; with it, the search alone (and the proof).
    plain, hinted = seconds(saver(1000, hinted=False)), seconds(saver(1000))
    assert plain > hinted
    # The fishery's harvest is an interval of its own: each of its 40 candidates a draw is interpolated, at POINT_NS.
    fishery = estimate(parse_document(continuous_with_draws(400)))
    assert f"{POINT_NS:g} ns a scanned point" in fishery["basis"]
    assert f"{SCAN_POINT_NS:g} ns a scanned point" in estimate(parse_document(saver(1000, hinted=False)))["basis"]
