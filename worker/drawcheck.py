"""The size check of a grid model with draws after the choice, made at the door and again before compiling.

Such a model is solved from its reward tables only (:mod:`worker.draws`); tables over the precompute budget
are refused before any work, at the first draw's ``timing``.  No numba is imported here.
"""

from __future__ import annotations

from typing import Any

from worker.drawnames import draw_names
from worker.errors import TooLarge, join_path
from worker.estimate import GridPlan, grid_plan

__all__ = ["check_draw_tables"]

_MIB = 2**20


def check_draw_tables(doc: Any, *, limits: dict[str, Any] | None = None, plan: GridPlan | None = None) -> None:
    """Raise :class:`~worker.errors.TooLarge` at the first draw's ``timing`` when a grid model with draws after
    the choice has tables over the precompute budget under ``limits`` (their only storage for now).  ``plan``:
    the model's :func:`~worker.estimate.grid_plan` under the same ``limits`` when the caller has it already."""
    model = doc.model
    if model.kind != "grid" or not draw_names(model):
        return
    if plan is None:
        plan = grid_plan(model, limits=limits, method=doc.solver.method)
    if plan.reward_storage != "tables":
        raise TooLarge.at(
            join_path("model", "shocks", draw_names(model)[0], "timing"),
            f"with draws after the choice the model is solved from tables of every (point, choice) pair and draw: "
            f"{plan.precompute_bytes / _MIB:,.0f} MiB, over the precompute budget of {plan.budget / _MIB:,.0f} MiB; "
            "use coarser grids, fewer choices or fewer draw values",
        )
