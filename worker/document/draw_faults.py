"""The faults of shocks drawn after the choice (``"timing": "after_choice"``) within their model.

Kept apart from :mod:`worker.document.grid` so that module stays one reading; the semantics are in
the README, "Draws revealed after the choice".
"""

from __future__ import annotations

from typing import Any

from worker import expressions
from worker.document._faults import Fault, fault
from worker.document.horizon import PERIOD_NAME
from worker.drawnames import draw_dependent, draw_names
from worker.errors import InvalidDocument, join_path

__all__ = ["draw_faults"]


def draw_faults(model: Any) -> list[Fault]:
    """Faults of the after-choice draws: where they may not be used, and their probabilities' names."""
    draws = draw_names(model)
    if not draws:
        return []
    dependent = draw_dependent(model)
    known = [
        *model.params, *model.states, *(n for n in model.shocks if n not in draws), *model.choices,
        *(n for n in model.define if n not in dependent),
    ]
    if getattr(model, "horizon", None) is not None:
        known.append(PERIOD_NAME)
    faults: list[Fault] = []
    for i, text in enumerate(model.feasible):
        faults += _uses_draws(text, dependent, join_path("feasible", i), "a feasibility condition is decided before "
                              "the draw")
    for name in draws:
        spec = model.shocks[name].iid
        if not spec.written:
            continue
        for k, entry in enumerate(spec.probs):
            if not isinstance(entry, str):
                continue
            where = join_path("shocks", name, "iid", "probs", k)
            used = _uses_draws(entry, dependent, where, "the probabilities of a draw are known before it")
            if used:
                faults += used
                continue
            try:
                expressions.check_names(expressions.parse(entry, path=where), known, path=where)
            except InvalidDocument as exc:
                faults += exc.errors
    return faults


def _uses_draws(text: str, dependent: set[str], where: str, why: str) -> list[Fault]:
    try:
        used = sorted(expressions.parse(text, path=where).names & dependent)
    except InvalidDocument as exc:
        return exc.errors
    if not used:
        return []
    names = ", ".join(f"`{n}`" for n in used)
    return [fault(where, f"uses {names}, drawn after the choice (or computed from such a draw): {why}")]
