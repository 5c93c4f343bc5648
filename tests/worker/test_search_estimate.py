"""The estimate of a document with a search: its trials' solves, each with the stationary distribution.

Before, a search was priced as one solve without the stationary report (the conditions read it whether
``report.stationary`` is asked for or not): on the invented savings market below at 3,000 asset points its
``bytes`` came to 5 MB against 112 MB for the same solve with the report, and its ``seconds`` to one solve where
the search made 8 (one run).  The reference figures here are the estimate's own for one solve with the report,
which ``tests/worker/test_estimate_stationary.py`` checks against measurements.
"""

from __future__ import annotations

import copy

from tests._documents import savings_market
from worker.document import parse_document
from worker.estimate import estimate
from worker.search_estimate import SEARCH_TRIALS_ONE, SEARCH_TRIALS_SEVERAL

MARKET = {"unknowns": {"r": {"min": 0.0, "max": 0.05}}, "conditions": ["mean(a) - capital_demand"]}


def _document(search: dict | None, **report: bool) -> dict:
    """Invented households clearing a capital market (tests/_documents.py), 3,000 asset points."""
    return {"version": 1, "discount": 0.95, "model": savings_market(3000), "solver": {"tolerance": 1e-8},
            "report": report, "search": copy.deepcopy(search)}


def test_a_search_is_priced_as_its_trials_with_the_stationary_report() -> None:
    one = estimate(parse_document(_document(None, stationary=True)))
    searched = estimate(parse_document(_document(MARKET)))
    assert searched["bytes"] == one["bytes"]
    assert searched["seconds"] == SEARCH_TRIALS_ONE * one["seconds"]
    assert "search.unknowns" in searched["basis"] and any("search.max_trials" in n for n in searched["notes"])
    two = {"unknowns": {**MARKET["unknowns"], "discount": {"min": 0.9, "max": 0.97}},
           "conditions": ["mean(a) - capital_demand", "mass(a <= 0) - 0.05"], "max_trials": 12}
    several = estimate(parse_document(_document(two)))
    assert SEARCH_TRIALS_SEVERAL > 12 and several["seconds"] == 12 * one["seconds"]  # capped at max_trials
