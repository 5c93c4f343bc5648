"""Reward tables filled again in each period of a finite horizon, for the models tables alone can solve.

A grid model whose reward, feasibility or laws of motion change with the period is usually evaluated
on the fly, one params vector per period (:mod:`worker.periods`).  Two kinds of model have no such
storage: taste shocks, whose smoothed maximum needs every (point, choice) pair's value
(:mod:`worker.tastegrid`), and draws after the choice, whose tables hold every draw's nodes and
probability (:mod:`worker.draws`).  For them :func:`enter_period_tables` fills the tables with period
``t``'s params (:func:`worker.gridtables.precompute_tables`, the same numpy evaluation as the first
ones) and puts them in the problem's kernel context, dropping every cache derived from the old
tables.  Only one period's tables are held at a time; a period entered twice in a row is not filled
again.  A period in which some draw's probabilities are wrong is named in the error.
"""

from __future__ import annotations

import dataclasses
from typing import Any

import numpy as np

from worker.errors import InvalidDocument

__all__ = ["enter_period_tables"]


def enter_period_tables(problem: Any, model: Any, t: int) -> None:
    """Make ``problem`` (a grid problem with reward storage ``tables``) evaluate period ``t`` of ``model``."""
    from worker.feasibility import infeasible, period_params
    from worker.gridtables import precompute_tables

    if getattr(problem, "_tables_period", None) == t:
        return
    data = dataclasses.replace(problem.model_data, param_values=period_params(model, t))
    try:
        tables, counts = precompute_tables(data)
    except InvalidDocument as exc:
        raise InvalidDocument([{**error, "message": f"in period {t}: {error['message']}"}
                               for error in exc.errors]) from None
    stuck = np.flatnonzero(~counts["any_allowed"])
    if stuck.size:
        error = infeasible(data, stuck, counts["any_feasible"])
        error.errors = [{**entry, "message": f"in period {t}: {entry['message']}"} for entry in error.errors]
        raise error
    meta = problem._ctx[-1]
    problem._ctx = (*tables, meta)
    if hasattr(problem, "_tables"):  # the numpy steps (taste shocks) read the node tables (and draw probabilities)
        problem._tables = tuple(tables)
    for cache in ("_policy_cache", "_last_hinted", "_last_exact", "_pair_nodes", "_mixed", "_probabilities",
                  "_most_probable"):
        if hasattr(problem, cache):
            setattr(problem, cache, None)
    problem._data = dataclasses.replace(problem._data, param_values=data.param_values)
    problem._full = dataclasses.replace(problem._full, param_values=data.param_values)
    problem._tables_period = t
