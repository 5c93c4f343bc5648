"""The stationary report's LU above ``DIRECT_SOLVE_MAX_POINTS`` states as the estimate prices it
(:func:`worker.costs.stationary_lu_entries`), against the LU the report makes (``bench/bench_lu_fill.py
--stationary`` measures it on sixteen shapes; these are deterministic figures of the documents)."""

from __future__ import annotations

import copy

import scipy.sparse.linalg as spla

from tests._estimate_set import example, two_states
from worker import solve
from worker.costs import (
    DIRECT_SOLVE_MAX_POINTS,
    LU_ENTRY_BYTES,
    STATIONARY_LU_SHARE,
    every_state_moves,
    stationary_lu_entries,
)
from worker.document import parse_document
from worker.estimate import estimate


def without_report(raw: dict) -> dict:
    raw = copy.deepcopy(raw)
    raw.pop("report", None)
    return raw


def report_lu_bytes(raw: dict) -> int:
    """What the stationary report adds to the estimate, less its per-state and per-entry parts (bytes)."""
    return estimate(parse_document(raw))["bytes"] - estimate(parse_document(without_report(raw)))["bytes"]


def test_two_moving_states_past_the_envelope_are_priced_without_an_lu() -> None:
    raw = two_states(60, 60)  # 7,200 states: the bench measured an envelope of 0.19 n², no LU made
    doc = parse_document(raw)
    assert every_state_moves(doc)
    n = 60 * 60 * 2
    assert n > DIRECT_SOLVE_MAX_POINTS
    # The one-state share would add 0.035 n² entries (21 MiB); without the LU the report adds a few MiB.
    assert report_lu_bytes(raw) < STATIONARY_LU_SHARE * n * n * LU_ENTRY_BYTES / 4


def test_a_state_that_keeps_its_value_is_priced_as_one_state() -> None:
    raw = two_states(60, 60)
    raw["model"]["next"]["customers"] = "customers"  # customers now keep their value: the chain splits into blocks
    doc = parse_document(raw)
    assert not every_state_moves(doc)
    n, entries = 7200, 7200 * 2 * 2
    assert stationary_lu_entries(n, entries, all_move=False) > 0
    assert stationary_lu_entries(n, entries, all_move=True) == 0


def test_a_one_state_chain_is_priced_at_least_at_the_lu_its_report_makes() -> None:
    raw = example("household_saving")
    raw["model"]["states"]["assets"]["points"] = 500  # 2,500 states, 5 income points: measured 0.026 n²
    raw["report"] = {"stationary": True}
    made: list[int] = []
    factorise = spla.splu

    def kept(matrix, *args, **kwargs):  # type: ignore[no-untyped-def]
        lu = factorise(matrix, *args, **kwargs)
        made.append(lu.nnz)
        return lu

    spla.splu = kept
    try:
        solve(raw)
    finally:
        spla.splu = factorise
    assert made, "the report made no LU (the iterative solves): the shape no longer tests the share"
    n = 2500
    promised = stationary_lu_entries(n, n * 2 * 5, all_move=every_state_moves(parse_document(raw)))
    assert promised >= made[-1] > 0.01 * n * n
