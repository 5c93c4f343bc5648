"""The faults a bad value inside a grid model hid: its names and expressions checked from the raw document.

A grid model's checks of names, laws of motion and expressions run after every one of its fields is valid,
so a bad value inside an entry (``states.capacity.points`` of 1, a shock's ``rho`` of 2, a non-boolean hint)
hid an unknown name in ``reward`` until the next round trip.  Such a fault leaves the entry's name known, so
:func:`value_hidden_faults` runs the checks that read only names and expression text on the raw model: the
names used twice, the defines in a circle, each valid expression's grammar and names, and (when ``choices``
and ``next`` are themselves valid) the laws of motion.  The checks that read an entry's values (continuous
choices, draws after the choice, the horizon, the axis order, taste shocks) and the document's
cross-checks still wait for a valid model.  A fault that leaves the names unknown (``states`` missing or not an
object, a bad name as a key) stops these checks too, as before: every name would read as unknown.
"""

from __future__ import annotations

from types import SimpleNamespace
from typing import Any

from worker.document._faults import Fault
from worker.document.define_order import dependency_order
from worker.document.grid import _expression_faults, _motion_faults, _name_faults
from worker.document.horizon import PERIOD_NAME
from worker.errors import join_path

__all__ = ["value_hidden_faults"]

NAME_SECTIONS = ("params", "states", "shocks", "choices", "define")
"""The sections of a grid model whose keys are the names expressions may use."""

_MODEL = ("model", "grid")
"""Where pydantic's errors inside a grid model start."""


def value_hidden_faults(raw: Any, errors: list[Any]) -> list[Fault]:
    """Faults of the raw grid model's names and expressions that ``errors`` (pydantic's, of ``raw``) kept
    from being checked; paths from the document root.  Empty when the model's own checks ran, when it is not
    a grid model, or when its names are not all known."""
    model = raw.get("model") if isinstance(raw, dict) else None
    if not isinstance(model, dict) or model.get("kind") != "grid":
        return []
    inside = [tuple(error["loc"][2:]) for error in errors
              if tuple(error["loc"][:2]) == _MODEL and error["type"] != "extra_forbidden"]
    if not inside or any(not loc for loc in inside):
        return []  # nothing inside the model failed, or its own checks ran and reported
    if not _names_known(model, inside):
        return []
    sections = {section: model.get(section, {}) for section in NAME_SECTIONS}
    define = _valid(sections["define"], "define", inside)
    ordered, cycle = dependency_order(define)
    if cycle:
        return [_rooted(item) for item in cycle]
    feasible = model.get("feasible", [])
    texts = {
        **{join_path("define", name): text for name, text in ordered.items()},
        **{join_path("next", name): text for name, text in _valid(model.get("next", {}), "next", inside).items()},
        **({"reward": model.get("reward")} if not _failed(inside, ("reward",)) else {}),
        **{join_path("feasible", i): text for i, text in _valid(
            dict(enumerate([feasible] if isinstance(feasible, str) else feasible)), "feasible", inside).items()},
    }
    known = [*(name for section in NAME_SECTIONS for name in sections[section])]
    if model.get("horizon") is not None:
        known.append(PERIOD_NAME)
    names = SimpleNamespace(**sections)
    faults = _name_faults(names)
    if not _failed(inside, ("choices",)) and not _failed(inside, ("next",)):
        choices = sections["choices"].items()
        names.choices = {name: SimpleNamespace(next_of=choice.get("next_of")) for name, choice in choices}
        names.next = model.get("next", {})
        faults += _motion_faults(names)
    for where, text in texts.items():
        if isinstance(text, str) and text:
            faults += _expression_faults(text, known, where)
    return [_rooted(item) for item in faults]


def _names_known(model: dict, inside: list[tuple]) -> bool:
    """Whether every name section is an object whose keys are all valid names."""
    for section in NAME_SECTIONS:
        if not isinstance(model.get(section, {}), dict):
            return False
        if any(loc[0] == section and (len(loc) == 1 or loc[-1] == "[key]") for loc in inside):
            return False
    return isinstance(model.get("next", {}), dict) and isinstance(model.get("feasible", []), (str, list))


def _valid(entries: Any, section: str, inside: list[tuple]) -> dict:
    """The entries of ``section`` that are strings and failed no check of their own."""
    if not isinstance(entries, dict) or _failed(inside, (section,), whole=True):
        return {}
    return {key: text for key, text in entries.items()
            if isinstance(text, str) and not _failed(inside, (section, key))}


def _failed(inside: list[tuple], prefix: tuple, *, whole: bool = False) -> bool:
    """Whether an error lies at or under ``prefix`` (with ``whole``: exactly at it)."""
    if whole:
        return any(loc == prefix for loc in inside)
    return any(loc[:len(prefix)] == prefix for loc in inside)


def _rooted(item: Fault) -> Fault:
    return {**item, "path": join_path("model", item["path"])}
