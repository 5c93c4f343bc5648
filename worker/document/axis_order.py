"""``model.axis_order``: the order of the value array's axes, fixed by a list of names rather than key order.

A JSON object's key order is not kept by every decoder (MATLAB's ``containers.Map``, R environments, Julia's
``Dict``), so a document may name the order of the value array's axes outright: a permutation of the model's
states and of its shocks that are axes of the value (a shock drawn after the choice is not).  The numerics keep
their own layout (the states in the order ``axis_order`` names them, then the shocks likewise, so that key
order changes nothing even inside); :mod:`worker.axis_order` transposes to ``axis_order`` at the result's
boundary when it puts a shock before a state.
"""

from __future__ import annotations

from typing import Annotated, Any

from pydantic import BeforeValidator, Field

from worker.document._faults import Fault, fault
from worker.document._fields import Name, one_as_list
from worker.document.limits import MAX_AXES
from worker.errors import join_path

__all__ = ["AXIS_ORDER_DESCRIPTION", "AxisOrder", "axis_order_faults", "in_axis_order"]

AxisOrder = Annotated[
    list[Name],
    BeforeValidator(one_as_list, json_schema_input_type=Name | list[Name]),
    Field(min_length=1, max_length=2 * MAX_AXES),
]
"""A list of axis names, or one name as a string."""

AXIS_ORDER_DESCRIPTION = (
    "The order of the axes of the value array and of every array over them in the result (policy, "
    "policy_index, choice_probabilities, distributions), and of the arrays sent over them (solver.initial "
    "values, report.cohort distribution): every state and every shock that is an axis of the value (not one "
    "drawn after the choice), each once. Absent: the states in the order the document lists them, then the "
    "shocks. Name it when the client's JSON encoder may not keep key order. The result states the order it "
    "used as axis_order (with a finite horizon, period first)."
)


def axis_order_faults(model: Any) -> list[Fault]:
    """Faults of ``model.axis_order`` (paths relative to the model)."""
    order = getattr(model, "axis_order", None)
    if order is None:
        return []
    axes = list(model.axis_sizes())
    where = "axis_order"
    faults: list[Fault] = []
    seen: set[str] = set()
    for i, name in enumerate(order):
        if name in seen:
            faults.append(fault(join_path(where, i), f"`{name}` is named twice; each axis is named once"))
        elif name not in axes:
            drawn = name in getattr(model, "shocks", {})
            faults.append(fault(join_path(where, i), (
                f"`{name}` is a shock drawn after the choice, not an axis of the value" if drawn
                else f"`{name}` is not a state or shock of the model") + f"; the axes are {', '.join(axes)}"))
        seen.add(name)
    missing = [name for name in axes if name not in seen]
    if missing:
        faults.append(fault(where, f"must name every axis of the value once; missing {', '.join(missing)} "
                                   f"(the axes are {', '.join(axes)})"))
    return faults


def in_axis_order(states: dict[str, Any], shocks: dict[str, Any], order: list[str]) -> tuple[dict, dict]:
    """``states`` and ``shocks`` with their keys in the order ``order`` names them (shocks drawn after the choice,
    which it does not name, last, as they came): the internal layout then depends on ``order`` alone."""
    rank = {name: i for i, name in enumerate(order)}
    return ({name: states[name] for name in sorted(states, key=rank.__getitem__)},
            {name: shocks[name] for name in sorted(shocks, key=lambda name: rank.get(name, len(order)))})
