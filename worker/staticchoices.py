"""Choices that affect nothing tomorrow, maximised out within the period.

A choice is *static* when it is not ``next_of`` a state and no ``next``
expression uses it, directly or through a define (hours worked, effort).
Tomorrow's state then depends on the other (dynamic) choices only, so

    max over (d, s) of r(x, d, s) + β EV(x'(x, d))
    = max over d of [max over s of r(x, d, s)] + β EV(x'(x, d)),

and the inner maximum is computed once, into the reward tables
(:mod:`worker.gridtables`; in compiled code by :mod:`worker.statickernel`),
and reused by every iteration.  The speed hints then apply to the one
remaining choice, if one remains (:mod:`worker.hintuse`).  Feasibility
expressions may use static choices freely: they only decide which
combinations enter the inner maximum.  A model whose every choice is static
(nothing chosen moves tomorrow's state) keeps its plain tables: there is
nothing to gain.
"""

from __future__ import annotations

from typing import Any

from worker.drawnames import draw_names
from worker.errors import join_path
from worker.expressions import parse

__all__ = ["static_choices", "unmoving_choices"]


def static_choices(model: Any) -> tuple[str, ...]:
    """Names of ``model``'s static choices, in document order (empty unless there are ≥ 2 choices and ≥ 1 dynamic)."""
    if len(model.choices) < 2 or draw_names(model):
        # With draws after the choice any choice may move their probabilities, and the tables hold expectations.
        return ()
    static = unmoving_choices(model)
    return static if len(static) < len(model.choices) else ()


def unmoving_choices(model: Any) -> tuple[str, ...]:
    """Names of ``model``'s choices that affect nothing tomorrow, in document order (all of them, possibly)."""
    uses: dict[str, set[str]] = {}
    for name, text in model.define.items():
        found = set(parse(text, path=join_path("model", "define", name)).names)
        for other in list(found):
            found |= uses.get(other, set())
        uses[name] = found
    moving: set[str] = set()
    for name, text in model.next.items():
        if name not in model.states:
            continue
        found = set(parse(text, path=join_path("model", "next", name)).names)
        for other in list(found):
            found |= uses.get(other, set())
        moving |= found
    return tuple(name for name, spec in model.choices.items() if spec.next_of is None and name not in moving)
