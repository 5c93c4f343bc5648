"""The estimate of a document with a search (``search.unknowns``): its trials' solves, each with the stationary
distribution its conditions read.  Kept apart from :mod:`worker.estimate`, which calls it (so it imports
nothing of that module)."""

from __future__ import annotations

from typing import Any, Callable

__all__ = ["SEARCH_TRIALS_ONE", "SEARCH_TRIALS_SEVERAL", "search_estimate"]

SEARCH_TRIALS_ONE = 8
"""Trials a search of one unknown is priced at (count): the most of the 6–8 it took from a calibrator's guess on
``bench/bench_aiyagari.py`` (bench/RESULTS.md), each about one solve."""
SEARCH_TRIALS_SEVERAL = 22
"""Trials a search of several unknowns is priced at (count): the most of the 12–22 it took from 5 of 7 starts on
the invented taxed economy of ``tests/worker/test_search_several.py`` (README, "Searches")."""


def search_estimate(doc: Any, one_solve: Callable[[Any], dict[str, Any]]) -> dict[str, Any]:
    """A search: every trial solves the model and makes its stationary distribution, asked for or not;
    ``one_solve`` is :func:`worker.estimate.estimate` of a document without a search (passed in, so that this
    module does not import that one, which calls it).

    Before, a search was priced as one solve without the stationary report: on an invented savings market of
    3,000 asset points its memory came to 5 MB where the trials' stationary LU alone needs about 100 MB, and its
    time to one solve of the seven it made."""
    report = doc.report.model_copy(update={"stationary": True})
    out = one_solve(doc.model_copy(update={"search": None, "report": report}))
    several = len(doc.search.unknowns) > 1
    trials = min(SEARCH_TRIALS_SEVERAL if several else SEARCH_TRIALS_ONE, int(doc.search.max_trials))
    out["seconds"] *= trials
    unknowns = "several unknowns" if several else "one unknown"
    out["basis"] += f"; search.unknowns: {unknowns}, priced at {trials} trials, each a solve with its stationary report"
    out["notes"].append(f"the search (search.unknowns) makes as many solves as it needs, up to search.max_trials "
                        f"({doc.search.max_trials}); the time is that of {trials}, typical from a good starting value "
                        "(README, \"Searches\"), and the memory that of one solve with its stationary distribution")
    return out
