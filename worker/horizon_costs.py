"""The measured costs of a finite horizon's periods and of its result, and their sizing formulas.

Split from :mod:`worker.costs` by topic: what backward induction adds per period beyond its Bellman steps (the
period's params, its log entry) and what the result of every period costs (the value and policy lists of each
period, the cohort's distribution, taste shocks' choice probabilities).  :mod:`worker.estimate`,
:mod:`worker.grid_seconds` and :mod:`worker.continuous_estimate` call :func:`horizon_seconds` and
:func:`horizon_bytes`; the Bellman steps of the periods are theirs to count.  Every figure is a measurement on
the development machine (2 shared x86 cores), with its date and bench.
"""

from __future__ import annotations

import math
from typing import Any

from worker.costs import RESULT_BYTES_PER_STATE

__all__ = [
    "COHORT_POINT_NS",
    "HORIZON_POINT_NS",
    "PERIOD_S",
    "TASTE_PROBABILITY_NS",
    "horizon_bytes",
    "horizon_seconds",
]

PERIOD_S = 5e-5
"""Fixed cost of one period of a finite horizon besides its Bellman step: its params entered, its rounding
allowance, its log entry and its diagnostics (seconds; measured 2026-12-05 on the 2-core development machine:
the van of ``tests._horizon_shapes`` at 22 points, warm solves of 50 and 400 periods, 35 µs a period; 1 ms was
used before, the glassblower's whole period, its steps included)."""
HORIZON_POINT_NS = 200.0
"""A finite horizon's result per point and period: the nested lists of every period's value and policy (and
grid index), and freeing them (nanoseconds; measured 2026-12-05: 100–144 on the glassblower example at 150 and
600 savings points without its cohort, 150 on the van with draws at 802 points, 250–370 on the 7,000-point saver
while the machine was loaded; 2,000 was used before, which had the glassblower's cohort in it)."""
COHORT_POINT_NS = 450.0
"""``report.cohort`` per point and period: the distribution moved by the period's policy and its lists
(nanoseconds; measured 2026-12-05 on the glassblower example at 150 and 600 savings points: 420–440, the result's
time with the cohort less without it)."""
TASTE_PROBABILITY_NS = 250.0
"""A finite horizon with taste shocks: each choice probability of each period and point in the result's nested
lists (nanoseconds; one run, 2026-12-05: 1.6 s for 6.0 million, 60 periods x 500 points x 200 choices)."""


def _choices(model: Any) -> int:
    return model.n_actions if model.kind == "tabular" else math.prod(c.size for c in model.choices.values())


def horizon_seconds(doc: Any, n: int) -> float:
    """A finite horizon's periods besides their Bellman steps and its result: every period's value and policy,
    the cohort when asked for (seconds; 0 without a horizon); with taste shocks the choice probabilities by period
    too (one per choice and point, as ``horizon_bytes``)."""
    horizon = getattr(doc.model, "horizon", None)
    if horizon is None:
        return 0.0
    per_point = HORIZON_POINT_NS
    if getattr(doc.report, "cohort", None) is not None:
        per_point += COHORT_POINT_NS
    if getattr(doc.model, "taste_shocks", None) is not None:
        per_point += _choices(doc.model) * TASTE_PROBABILITY_NS
    return int(horizon.periods) * (n * per_point * 1e-9 + PERIOD_S)


def horizon_bytes(doc: Any, n: int) -> int:
    """The value and policy of every period of a finite horizon, kept for the result (bytes; 0 without one).

    Per period and point: the value and the policy (8 bytes each) in the solve, and the result's
    nested lists of them (about ``RESULT_BYTES_PER_STATE``); with ``report.cohort`` the cohort's
    distribution by period as well; with taste shocks the choice probabilities by period (one per
    choice, in the solve and in the result).
    """
    horizon = getattr(doc.model, "horizon", None)
    if horizon is None:
        return 0
    per_point = 16 + RESULT_BYTES_PER_STATE
    if doc.report.cohort is not None:
        per_point += 8 + RESULT_BYTES_PER_STATE // 3
    if getattr(doc.model, "taste_shocks", None) is not None:
        per_point += _choices(doc.model) * (8 + RESULT_BYTES_PER_STATE)
    return int(horizon.periods) * n * per_point
