"""The faults of a continuous choice, and of a model that has one (``interpolation`` included).

Kept apart from :mod:`worker.document.grid` so that module stays one reading; the rules are in the
README, "Continuous choices".
"""

from __future__ import annotations

import math
from typing import Any

from worker import expressions
from worker.document._faults import Fault, fault, number
from worker.errors import InvalidDocument, join_path

__all__ = ["CUBIC_MAX_STATES", "POLICY_ITERATION_CUBIC", "continuous_faults", "continuous_model_faults",
           "endogenous_grid_faults", "policy_iteration_faults"]

CUBIC_MAX_STATES = 3
"""Most state variables of a model with monotone_cubic interpolation (count): its tensor product reads
4^(d−1) lines of the grid per evaluation, 16 at three states (common practice: the cost grows fourfold with
each state)."""

POLICY_ITERATION_CUBIC = (
    "policy_iteration solves a linear system for each policy's value, and with monotone_cubic interpolation that "
    "value is not linear in the value function; use howard or value_iteration, or linear interpolation"
)
"""Why ``solver.method`` policy_iteration is refused beside a continuous choice read by monotone cubics."""


def policy_iteration_faults(model: Any) -> list[Fault]:
    """``solver.method`` policy_iteration with a continuous choice and monotone_cubic interpolation, refused at
    the door (before, only the compile refused it, so the job was queued and then failed)."""
    cubic = getattr(model, "interpolation", None) == "monotone_cubic"
    if model.kind != "grid" or not cubic or model.continuous_choice() is None:
        return []
    return [fault("solver.method", POLICY_ITERATION_CUBIC)]


def continuous_faults(choice: Any) -> list[Fault]:
    """Faults of a continuous choice: ``next_of`` alone, or ``min`` and ``max`` (and the scan's ``points``)."""
    if choice.next_of is not None:
        keys = ("values", "min", "max", "points", "spacing", "exponent")
        extra = [key for key in keys if getattr(choice, key) is not None]
        return [
            fault(key, f"a continuous next_of choice takes any value between the ends of `{choice.next_of}`'s grid; "
                  f"drop `{key}`")
            for key in extra
        ]
    faults = [
        fault(key, f"a continuous choice chooses any value of an interval, so it has no `{key}`")
        for key in ("values", "spacing", "exponent")
        if getattr(choice, key) is not None
    ]
    faults += [
        fault(key, f"missing `{key}`: a continuous choice needs next_of, or min and max (numbers or expressions)")
        for key in ("min", "max")
        if getattr(choice, key) is None
    ]
    faults += [
        fault(key, f"the bounds of a continuous choice must be finite, got {number(getattr(choice, key))}")
        for key in ("min", "max")
        if isinstance(getattr(choice, key), float) and not math.isfinite(getattr(choice, key))
    ]
    low, high = choice.min, choice.max
    if not faults and isinstance(low, float) and isinstance(high, float) and not high > low:
        faults.append(fault("max", f"max ({number(high)}) must be greater than min ({number(low)})"))
    return faults


def continuous_model_faults(model: Any) -> list[Fault]:
    """Faults of a continuous choice within its model, and of ``interpolation``."""
    continuous = [name for name, choice in model.choices.items() if choice.continuous]
    faults = []
    if len(continuous) > 1:
        names = ", ".join(f"`{name}`" for name in continuous)
        faults.append(fault(
            join_path("choices", continuous[1], "continuous"),
            f"a model may have one continuous choice, and this one has {len(continuous)} ({names}); make the "
            "others discrete (a grid or a menu): the continuous one is then searched for each combination of them",
        ))
    known = [*model.params, *model.states, *model.shocks]
    for name in continuous:
        for key in ("min", "max"):
            text = getattr(model.choices[name], key)
            if isinstance(text, str):
                where = join_path("choices", name, key)
                later = set(model.choices) | set(model.define)
                try:
                    expression = expressions.parse(text, path=where)
                    used = sorted(expression.names & later)
                    if used:
                        names = ", ".join(f"`{n}`" for n in used)
                        faults.append(fault(where, f"uses {names}: the bounds of a continuous choice may use only "
                                            "params, states and shocks"))
                        continue
                    expressions.check_names(expression, known, path=where)
                except InvalidDocument as exc:
                    faults += exc.errors
    if model.interpolation == "monotone_cubic":
        if not continuous:
            faults.append(fault("interpolation", 'monotone_cubic interpolation applies to a model with a continuous '
                                'choice; a discrete choice reads tomorrow\'s value at grid points or linearly'))
        elif len(model.states) > CUBIC_MAX_STATES:
            faults.append(fault("interpolation", f"monotone_cubic interpolation reads 4^(d−1) lines of the grid at "
                                f"each point, so it takes at most {CUBIC_MAX_STATES} states, and this model has "
                                f"{len(model.states)}; use \"linear\" (multilinear on the product grid)"))
    shocks = getattr(model, "taste_shocks", None)
    if continuous and shocks is not None:
        # With taste_shocks.choices naming only discrete choices the old words (`a_next` is continuous) read as
        # if a_next had been listed: the model as a whole is what is not supported.
        listed = [name for name in (shocks.choices or ()) if name not in continuous]
        beside = (f"even on {', '.join(f'`{n}`' for n in listed)} alone: a model with a continuous choice has none "
                  "yet" if listed and shocks.choices and len(listed) == len(shocks.choices) else
                  "they apply to choices among finitely many values")
        faults.append(fault("taste_shocks", f"taste shocks are not supported beside the continuous choice "
                            f"`{continuous[0]}`, {beside}; give it a grid (points) or a menu (values) instead"))
    return faults


def endogenous_grid_faults(model: Any) -> list[Fault]:
    """Faults of ``solver.method: endogenous_grid`` that the document shows: the method needs a grid model with one
    state, whose one choice is continuous and next_of it, and no draw after the choice.  The worker checks the rest
    (the reward through one define, smoothness) when it compiles the model (``worker.continuous.egm.conditions``).
    Before, a model with a grid choice was accepted at the door and then failed in the worker (no horizon) or was
    solved by backward induction with a note that blamed the horizon."""
    where = "solver.method"
    if getattr(model, "kind", None) != "grid":
        return [fault(where, "the endogenous grid method applies to a grid model (one state, one continuous next_of "
                      "choice), not a tabular one; use howard, value_iteration or policy_iteration")]
    reasons = []
    continuous = [name for name, choice in model.choices.items() if choice.continuous and choice.next_of]
    if not continuous:
        reasons.append("a continuous choice that is next_of the state (tomorrow's value of it), and no choice here "
                       "is (\"continuous\": true with next_of)")
    if len(model.choices) > 1:
        reasons.append(f"the continuous choice to be the model's only choice, and this model has {len(model.choices)} ("
                       + ", ".join(f"`{name}`" for name in model.choices) + ")")
    if len(model.states) != 1:
        reasons.append(f"one state, and this model has {len(model.states)}")
    draws = [name for name, shock in model.shocks.items() if shock.after_choice]
    if draws:
        reasons.append("no shock drawn after the choice (" + ", ".join(f"`{n}`" for n in draws) + "): its "
                       "first-order condition would hold only in expectation over the draws")
    if not reasons:
        return []
    return [fault(where, "the endogenous grid method does not apply: it needs " + "; and ".join(reasons)
                  + "; use howard, value_iteration or policy_iteration (a horizon: backward induction, the default)")]
