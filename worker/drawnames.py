"""The names, dependencies and sizes of a grid model's draws after the choice, read from the document alone.

Nothing is built here (no values, no tables), and nothing of :mod:`worker.document` is imported, so the
document's checks, the estimate and :mod:`worker.staticchoices` share it; the numbers are in
:mod:`worker.draws`.
"""

from __future__ import annotations

import math
from typing import Any

from worker import expressions
from worker.errors import InvalidDocument, join_path

__all__ = ["draw_count", "draw_dependent", "draw_names", "draw_table_bytes"]


def draw_names(model: Any) -> tuple[str, ...]:
    """The names of the model's shocks drawn after the choice, in document order."""
    return tuple(name for name, shock in (getattr(model, "shocks", None) or {}).items() if shock.after_choice)


def draw_dependent(model: Any) -> set[str]:
    """The draws and every define that uses one (directly or through an earlier define)."""
    dependent = set(draw_names(model))
    for name, text in model.define.items():
        try:
            used = expressions.parse(text, path=join_path("model", "define", name)).names
        except InvalidDocument:
            continue  # the define's own fault is reported by the expression checks
        if used & dependent:
            dependent.add(name)
    return dependent


def draw_table_bytes(pairs: int, draws: int, interpolated: int) -> int:
    """Bytes of the tables with ``draws`` combinations: the expected reward and, when some state is
    interpolated, a flag of a clamped next value and per draw its probability, lower nodes (int32) and upper
    weights (float64)."""
    return pairs * (8 + (1 + draws * (8 + 12 * interpolated) if interpolated else 0))


def draw_count(model: Any) -> int:
    """Combinations of the model's after-choice draws (0 without)."""
    names = draw_names(model)
    return math.prod(model.shocks[name].size for name in names) if names else 0
