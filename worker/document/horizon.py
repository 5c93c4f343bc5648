"""A finite horizon (``model.horizon``): how many periods, what is left at the end, the discount by period.

A model with a horizon is solved by backward induction (:mod:`worker.solvers.backward`):
the value after the last period is the *terminal value*, and each period's value is one
Bellman step from the next period's.  No fixed point is sought, so the discount need only be
positive or 0 (0: the next period's value does not count, as with a survival probability of 0 at
the last age); the rule ``discount < 1`` of an infinite horizon (which makes the Bellman operator a
contraction) does not apply.

Grid models may use the name ``period`` (0 for the first period) in every expression, and
their params may be lists with one entry per period.  The checks that need the model (names,
list lengths) are in :func:`horizon_faults`, which :class:`worker.document.grid.GridModel` and
the tabular model's checks call.
"""

from __future__ import annotations

from typing import Annotated, Any, Union

import numpy as np
from pydantic import Discriminator, Field, Tag

from worker import expressions
from worker.document._faults import Fault, fault, number
from worker.document._fields import Integer, NumberOrExpression, Part, Vector
from worker.document.limits import MAX_EXPRESSION_CHARS
from worker.errors import InvalidDocument, join_path

__all__ = [
    "DISCOUNT_NAME",
    "MAX_PERIODS",
    "PERIOD_NAME",
    "GridHorizon",
    "ParamValue",
    "TabularHorizon",
    "grid_horizon_faults",
    "period_list_faults",
    "tabular_horizon_faults",
    "varies_by_period",
]

MAX_PERIODS = 10_000
"""Most periods of a finite horizon (count): the result holds a value array per period."""

PERIOD_NAME = "period"
"""The name expressions use for the period, counted from 0."""

DISCOUNT_NAME = "discount"
"""The name ``model.horizon.discount`` uses for the document's ``discount``."""


def _number_or_list(value: Any) -> str | None:
    if isinstance(value, (int, float)) and not isinstance(value, bool):
        return "<number>"
    if isinstance(value, str):
        return "<expression>"
    return "<list>" if isinstance(value, list) else "<number>"


ParamValue = Annotated[
    Union[
        Annotated[float, Tag("<number>")],
        Annotated[list[float], Field(min_length=1, max_length=MAX_PERIODS), Tag("<list>")],
        # Resolved to numbers by worker.document.params before validation; listed so the schema shows it.
        Annotated[str, Field(min_length=1, max_length=MAX_EXPRESSION_CHARS), Tag("<expression>")],
    ],
    Discriminator(
        _number_or_list,
        custom_error_type="fixq_param",
        custom_error_message=(
            "expected a number, an expression of other params, or (with a horizon) a list of numbers, one per period"
        ),
    ),
]
"""A grid model's param: a number, an expression of other params (a string, evaluated before validation by
:func:`worker.document.params.resolve_params`), or with a horizon a list with one number per period."""


class GridHorizon(Part):
    """A finite number of periods, solved by backward induction from a terminal value. Expressions may
    then use `period` (0 for the first period), and params may be lists with one value per period."""

    periods: Annotated[Integer, Field(ge=1, le=MAX_PERIODS)] = Field(
        description=f"Number of periods, 1 to {MAX_PERIODS:,}; the value and the policy are given for each."
    )
    terminal_value: NumberOrExpression = Field(
        default=0.0,
        description=(
            "The value after the last period (a bequest, a scrap value): a number, or an expression of the "
            "states, shocks and params (lists of per-period values excepted: there is no period after the last; "
            "`period` is the number of periods). Default 0; solver.initial, when given, is used instead (an "
            "earlier job's value, say)."
        ),
    )
    discount: NumberOrExpression | None = Field(
        default=None,
        description=(
            "The discount applied in each period to the next period's value, when it changes with the period: "
            "a number or an expression of params and `period`, in which `discount` is the document's discount "
            "(\"discount * survival\" with survival a param list of survival probabilities). It must be "
            "positive or 0 in every period (0: the next period's value does not count, as with a survival "
            "probability of 0 at the last age); values of 1 or more are allowed (a finite horizon needs no "
            "contraction). Default: the document's discount in every period."
        ),
    )


class TabularHorizon(Part):
    """A finite number of periods, solved by backward induction from a terminal value."""

    periods: Annotated[Integer, Field(ge=1, le=MAX_PERIODS)] = Field(
        description=f"Number of periods, 1 to {MAX_PERIODS:,}; the value and the policy are given for each."
    )
    terminal_value: float | Vector = Field(
        default=0.0,
        description=(
            "The value after the last period: a number for every state, or one per state. Default 0; solver.initial, "
            "when given, is used instead."
        ),
    )
    discount: Vector | None = Field(
        default=None,
        description=(
            "The discount applied in each period to the next period's value, one positive number or 0 per "
            "period (values of 1 or more are allowed; 0: the next period's value does not count). Default: the "
            "document's discount in every period."
        ),
    )


def varies_by_period(model: Any) -> bool:
    """Whether a grid model's reward, feasibility, laws of motion or draw probabilities change with the
    period (params given per period, or ``period`` in its expressions)."""
    if getattr(model, "horizon", None) is None or model.kind != "grid":
        return False
    if any(isinstance(value, list) for value in model.params.values()):
        return True
    texts = [*model.define.values(), *model.next.values(), model.reward, *model.feasible]
    texts += [entry for shock in model.shocks.values() if getattr(shock, "iid", None) is not None
              and isinstance(shock.iid.probs, (list, tuple)) for entry in shock.iid.probs if isinstance(entry, str)]
    return any(PERIOD_NAME in expressions.parse(text, path="model").names for text in texts)


def period_list_faults(params: dict[str, Any], horizon: GridHorizon | None) -> list[Fault]:
    """Faults of params given as lists: they need a horizon, and one entry per period (paths relative to the model)."""
    faults = []
    for name, value in params.items():
        if not isinstance(value, list):
            continue
        where = join_path("params", name)
        if horizon is None:
            faults.append(fault(where, "a list of values, one per period, needs a finite horizon (model.horizon); "
                                "without one a param is a number"))
        elif len(value) != horizon.periods:
            faults.append(fault(where, f"has {len(value):,} values, but model.horizon.periods is "
                                f"{horizon.periods:,}: give one value per period"))
    return faults


def grid_horizon_faults(model: Any) -> list[Fault]:
    """Faults of a grid model's horizon against the model (paths relative to the model)."""
    horizon = model.horizon
    faults = period_list_faults(model.params, horizon)
    if horizon is None:
        return faults
    taken = {"params": model.params, "states": model.states, "shocks": model.shocks, "choices": model.choices,
             "define": model.define}
    for section, names in taken.items():
        if PERIOD_NAME in names:
            faults.append(fault(join_path(section, PERIOD_NAME), f"with a horizon, `{PERIOD_NAME}` names the period "
                                "(counted from 0); give this one another name"))
    lists = [name for name, value in model.params.items() if isinstance(value, list)]
    scalars = [name for name in model.params if name not in lists]
    if isinstance(horizon.terminal_value, str):
        # A draw after the choice is integrated out within a period: the value after the last has no axis for it.
        seen = [name for name, shock in model.shocks.items() if not shock.after_choice]
        drawn = [name for name in model.shocks if name not in seen]
        where = join_path("horizon", "terminal_value")
        known = [*scalars, *model.states, *seen, PERIOD_NAME]
        found = _names_faults(horizon.terminal_value, known, lists, where)
        used = sorted(_names(horizon.terminal_value, where) & set(drawn))
        if used:
            names = ", ".join(f"`{name}`" for name in used)
            found = [fault(where, f"uses {names}, drawn after the choice: the terminal value is a value of the states "
                           "and the shocks seen before the choice (a draw after it is integrated out within its "
                           "period)")]
        faults += found
    if isinstance(horizon.discount, str):
        faults += _names_faults(horizon.discount, [*model.params, PERIOD_NAME, DISCOUNT_NAME], [],
                                join_path("horizon", "discount"))
        if DISCOUNT_NAME in model.params:
            faults.append(fault(join_path("params", DISCOUNT_NAME), f"with model.horizon.discount, `{DISCOUNT_NAME}` "
                                "names the document's discount; give this param another name"))
    elif horizon.discount is not None and not horizon.discount >= 0:
        faults.append(fault(join_path("horizon", "discount"), f"the discount must be positive or 0, got "
                            f"{number(horizon.discount)}"))
    return faults


def _names(text: str, where: str) -> set[str]:
    """The names ``text`` uses (empty when it does not parse: :func:`_names_faults` says why)."""
    try:
        return set(expressions.parse(text, path=where).names)
    except InvalidDocument:
        return set()


def _names_faults(text: str, known: list[str], lists: list[str], where: str) -> list[Fault]:
    try:
        expression = expressions.parse(text, path=where)
        used = sorted(expression.names & set(lists))
        if used:
            names = ", ".join(f"`{name}`" for name in used)
            return [fault(where, f"uses {names}, given per period: there is no period after the last, so the "
                          "terminal value may use params that are numbers only")]
        expressions.check_names(expression, known, path=where)
    except InvalidDocument as exc:
        return exc.errors
    return []


def tabular_horizon_faults(model: Any) -> list[Fault]:
    """Faults of a tabular model's horizon: the terminal value's length and the discounts (paths relative to it)."""
    horizon = model.horizon
    if horizon is None:
        return []
    faults = []
    terminal = horizon.terminal_value
    if isinstance(terminal, np.ndarray) and terminal.shape != (model.n_states,):
        faults.append(fault(join_path("horizon", "terminal_value"), f"has {terminal.size:,} values, but the model "
                            f"has {model.n_states:,} states: give one per state, or one number for all"))
    discount = horizon.discount
    if discount is not None:
        where = join_path("horizon", "discount")
        if discount.shape != (horizon.periods,):
            faults.append(fault(where, f"has {discount.size:,} values, but model.horizon.periods is "
                                f"{horizon.periods:,}: give one discount per period"))
        bad = np.flatnonzero(~(discount >= 0))
        if bad.size:
            faults.append(fault(join_path(where, int(bad[0])), "the discount must be positive in every period, or 0, "
                                f"got {number(float(discount[bad[0]]))}"))
    return faults
