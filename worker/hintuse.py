"""Which of a grid model's speed hints the kernels can use, per choice, and why not where they cannot.

The hinted searches run along one choice.  A model with several choices
keeps its hints when its static choices (:mod:`worker.staticchoices`) are
maximised out into tables and exactly one choice remains: ``monotone`` and
``concave`` then apply to that choice as to a single choice, and
``concave`` also to the maximisation over a single static choice (see
:mod:`worker.statickernel`).  Every requested hint that cannot be used gets
a note naming the hint, the choice and the reason; nothing is dropped
silently.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from worker.drawnames import draw_names
from worker.staticchoices import unmoving_choices

__all__ = ["HintUse", "hint_use"]


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
    if len(choices) > 1:
        searched = f"every step searched all combinations of {_names(choices)}"
        if not static:
            why = (
                "the model has draws after the choice, so no choice is maximised out within the period"
                if draw_names(model)
                else f"no choice ({_names(choices)}) moves tomorrow's state, so none is set aside"
                if len(unmoving_choices(model)) == len(choices)
                else f"every choice ({_names(choices)}) moves tomorrow's state"
            )
            return HintUse(note=(
                f"the {asked} hint{were} not used: with several choices, hints apply to the one choice left "
                f"once the choices that affect nothing tomorrow are maximised out within the period, and here {why}; "
                f"{searched}"
            ))
        if len(dynamic) > 1:
            return HintUse(note=(
                f"the {asked} hint{were} not used: after maximising out {_names(static)} within the period, "
                f"{len(dynamic)} choices that move tomorrow's state remain ({_names(dynamic)}), and hints apply to "
                f"one; {searched}"
            ))
        if no_tables is not None:
            return HintUse(note=(
                f"the {asked} hint{were} not used for `{dynamic[0]}`: {_names(static)} could not be maximised "
                f"out within the period because {no_tables}; {searched}"
            ))
    name = dynamic[0]
    notes = []
    monotone = wants_monotone and model.choices[name].next_of is not None
    if wants_monotone and not monotone:
        notes.append(
            f"the monotone hint was not used: it needs the choice `{name}` to be next_of a state (the policy is "
            "promised not to fall along that state)"
        )
    static_concave = wants_concave and len(static) == 1
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
                f"neighbouring `{name}` (the promise is tested over every value of `{static[0]}` along a sample of "
                f"lines, and should it fail there `{static[0]}` is searched in full)"
            )
        if monotone and static:
            sets = "which sets" if len(static) == 1 else "which set"
            words += f"; the monotone hint does not apply to {_names(static)}, {sets} no state of tomorrow"
    return HintUse(monotone, wants_concave, static_concave, "; ".join(notes) or None, words)
