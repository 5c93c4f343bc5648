"""Which of a grid model's speed hints the kernels can use, per choice, and why not where they cannot.

The hinted searches run along one choice: the last of the choices that
move tomorrow's state, once for every combination of the others, which are
searched in full.  Static choices (:mod:`worker.staticchoices`) are
maximised out into tables first when they fit; ``concave`` also applies to
the maximisation over a single static choice (see
:mod:`worker.statickernel`, which verifies every climb exactly).  Every requested hint that cannot be used gets
a note naming the hint, the choice and the reason; nothing is dropped
silently.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass
from typing import Any

from worker import _slopes
from worker.drawnames import draw_names
from worker.errors import join_path
from worker.expressions import names_in, parse

__all__ = ["HintUse", "hint_use", "jumps_along"]


@dataclass(frozen=True)
class HintUse:
    """The hints the kernels will use, and a note on every requested one they will not.

    ``static_concave``: the concave hint is also used along the single static
    choice while it is maximised out; ``used``: which hint applies to which
    choice, in words (None when no hint is used).
    """

    monotone: bool = False
    concave: bool = False
    static_concave: bool = False
    note: str | None = None
    used: str | None = None


def _names(names: list[str] | tuple[str, ...]) -> str:
    return ", ".join(f"`{name}`" for name in names)


@functools.lru_cache(maxsize=512)
def _tree(text: str, *path: str) -> Any:
    """The parsed tree of ``text`` (frozen nodes, so shared safely; a plan is made several times per solve)."""
    return parse(text, path=join_path(*path)).tree


def jumps_along(model: Any, choice: str) -> bool:
    """Whether ``model``'s reward may jump along ``choice`` (a comparison, logic or ``where()`` test that
    depends on it, in the reward or a define it needs): then no bound of its slope exists, and a climb along
    a static choice could not be verified (:mod:`worker._codegen.static_proof`, which decides the same)."""
    trees = {name: _tree(text, "model", "define", name) for name, text in model.define.items()}
    moving = {choice}
    changed = True
    while changed:  # the defines that depend on the choice, whatever order they come in
        changed = False
        for name, tree in trees.items():
            if name not in moving and names_in(tree) & moving:
                moving.add(name)
                changed = True
    reward = _tree(model.reward, "model", "reward")
    needed, todo = set(), [reward]
    while todo:
        for name in names_in(todo.pop()):
            if name in trees and name not in needed:
                needed.add(name)
                todo.append(trees[name])
    varying = {name: True for name in moving if name != choice}
    try:
        for name in needed & moving:
            _slopes.derivative(trees[name], choice, varying)
        _slopes.derivative(reward, choice, varying)
    except _slopes.NotSmooth:
        return True
    return False


def hint_use(model: Any, static: tuple[str, ...] = (), no_tables: str | None = None) -> HintUse:
    """The hints of ``model`` the kernels can use.

    Parameters
    ----------
    model : GridModel
    static : tuple of str
        The model's static choices (:func:`worker.staticchoices.static_choices`).
    no_tables : str, optional
        Why the tables of the best static reward will not be built (over the
        precompute budget, say); None when they will be.
    """
    wants_monotone, wants_concave = bool(model.hints.monotone), bool(model.hints.concave)
    if not (wants_monotone or wants_concave):
        return HintUse()
    asked = " and ".join(name for name, on in (("monotone", wants_monotone), ("concave", wants_concave)) if on)
    were = "s were" if " and " in asked else " was"
    choices = list(model.choices)
    dynamic = [name for name in choices if name not in static]
    if len(choices) > 1 and static and no_tables is not None:
        searched = f"every step searched all combinations of {_names(choices)}"
        return HintUse(note=(
            f"the {asked} hint{were} not used for {_names(dynamic)}: {_names(static)} could not be maximised "
            f"out within the period because {no_tables}; {searched}"
        ))
    name = dynamic[-1]
    notes = []
    if len(dynamic) > 1:
        notes.append(
            f"the hints apply to `{name}`, the last of the choices that move tomorrow's state: it is searched with "
            f"them once for every combination of {_names(dynamic[:-1])}, which are searched in full (the promises "
            "are read for each such combination)"
            + ("; the model has draws after the choice, so no choice is maximised out within the period"
               if draw_names(model) else "")
        )
    monotone = wants_monotone and model.choices[name].next_of is not None
    if wants_monotone and not monotone:
        notes.append(
            f"the monotone hint was not used: it needs the choice `{name}` to be next_of a state (the policy is "
            "promised not to fall along that state)"
        )
    static_concave = wants_concave and len(static) == 1 and not jumps_along(model, static[0])
    if wants_concave and len(static) == 1 and not static_concave:
        notes.append(
            f"the concave hint was not used along `{static[0]}` (maximised out within the period): the reward may "
            f"jump along it (a comparison, logic or where() that depends on it), so a climb along it could not be "
            f"verified by bounds of the reward's slope; `{static[0]}` was maximised over all its values"
        )
    if wants_concave and len(static) > 1:
        notes.append(
            f"the concave hint was not used along {_names(static)} (maximised out within the period): it applies "
            "along one choice's ordered values, so all their combinations were searched"
        )
    used = " and ".join(h for h, on in (("monotone", monotone), ("concave", wants_concave)) if on)
    words = None
    if used:
        words = f"the {used} hint{'s apply' if ' and ' in used else ' applies'} to `{name}`"
        if static_concave:
            words += (
                f", and the concave hint to `{static[0]}`, maximised out by climbing from the best value at the "
                f"neighbouring `{name}`, each climb verified by bounds of the reward's slope along `{static[0]}`"
            )
        if monotone and static:
            sets = "which sets" if len(static) == 1 else "which set"
            words += f"; the monotone hint does not apply to {_names(static)}, {sets} no state of tomorrow"
    return HintUse(monotone, wants_concave, static_concave, "; ".join(notes) or None, words)
