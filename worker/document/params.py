"""Params given as expressions of other params (a wage from the interest rate), resolved to numbers.

:func:`resolve_params` runs on the raw document before it is validated: every param of a grid model
that is a string is parsed as an expression of the model's other params and evaluated in dependency
order, so everything after it sees numbers only.  A cycle is refused naming the params on it.
"""

from __future__ import annotations

import copy
import math
from graphlib import CycleError, TopologicalSorter
from typing import Any

from worker.document._faults import Fault, fault
from worker.errors import InvalidDocument, join_path
from worker.expressions import evaluate, parse

__all__ = ["param_expressions", "resolve_params"]


def param_expressions(raw: Any) -> dict[str, str]:
    """The params of a raw grid document that are given as strings (name → text); empty when none."""
    model = raw.get("model") if isinstance(raw, dict) else None
    params = model.get("params") if isinstance(model, dict) else None
    if not isinstance(params, dict):
        return {}
    return {name: text for name, text in params.items() if isinstance(name, str) and isinstance(text, str)}


def resolve_params(raw: Any) -> Any:
    """A copy of ``raw`` with every string param replaced by its value (``raw`` itself when there are none).

    Raises
    ------
    InvalidDocument
        Faults at ``model.params.NAME``: a text that does not parse, an unknown name, a param with one
        value per period used in another, a cycle (every param on it named), a value that is not finite.
    """
    texts = param_expressions(raw)
    if not texts:
        return raw
    params = raw["model"]["params"]
    numbers = {name: value for name, value in params.items() if name not in texts}
    faults: list[Fault] = []
    parsed = {}
    for name, text in texts.items():
        where = join_path("model.params", name)
        try:
            parsed[name] = parse(text, path=where)
        except InvalidDocument as exc:
            faults += exc.errors
            continue
        for used in sorted(parsed[name].names):
            if used not in params:
                faults.append(fault(where, f"unknown name `{used}`: a param's expression may use only other params"))
            elif isinstance(numbers.get(used), list):
                faults.append(fault(where, f"`{used}` has one value per period; an expression param may use only "
                                    "params with one value"))
    if faults:
        raise InvalidDocument(faults)
    order = TopologicalSorter({name: [u for u in expr.names if u in texts] for name, expr in parsed.items()})
    try:
        ordered = list(order.static_order())
    except CycleError as exc:
        cycle = list(dict.fromkeys(exc.args[1]))
        raise InvalidDocument([fault(join_path("model.params", name), "the params " + " → ".join(
            f"`{n}`" for n in [*cycle, cycle[0]]) + " are defined through each other in a cycle") for name in cycle
        ]) from None
    values = dict(numbers)
    for name in ordered:
        value = float(evaluate(parsed[name], values))
        if not math.isfinite(value):
            raise InvalidDocument.at(join_path("model.params", name), f"`{texts[name]}` evaluates to {value}, "
                                     "not a finite number")
        values[name] = value
    out = copy.copy(raw)
    out["model"] = {**raw["model"], "params": {name: values.get(name, params[name]) for name in params}}
    return out
