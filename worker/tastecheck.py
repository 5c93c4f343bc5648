"""The size check of a grid model with taste shocks, made at the door and again before compiling.

With taste shocks every step needs every (point, choice) pair's value, so the
reward tables are the only storage (:mod:`worker.tastegrid`); tables over the
precompute budget cannot be solved and are refused before any work, with the
path ``model.taste_shocks``.  No numba is imported here (the service's door
calls it).
"""

from __future__ import annotations

from typing import Any

from worker.errors import TooLarge
from worker.estimate import grid_plan
from worker.taste import taste_table_bytes

__all__ = ["check_taste_tables"]

_MIB = 2**20


def check_taste_tables(doc: Any, *, limits: dict[str, Any] | None = None) -> None:
    """Raise :class:`~worker.errors.TooLarge` at ``model.taste_shocks`` when a grid model's tables with taste
    shocks exceed the precompute budget under ``limits`` (``{"max_bytes": int}``; default the worker's cap).
    Other documents pass."""
    model = doc.model
    if model.kind != "grid" or getattr(model, "taste_shocks", None) is None or model.continuous_choice() is not None:
        return
    plan = grid_plan(model, limits=limits, method=doc.solver.method)
    table_bytes = taste_table_bytes(plan.pairs, plan.interpolated, plan.nodes)
    if table_bytes > plan.budget:
        raise TooLarge.at(
            "model.taste_shocks",
            f"with taste shocks every step needs the values of all {plan.pairs:,} (point, choice) pairs: "
            f"{table_bytes / _MIB:,.0f} MiB of tables and choice probabilities, over the precompute budget of "
            f"{plan.budget / _MIB:,.0f} MiB; use coarser grids or fewer choices",
        )
