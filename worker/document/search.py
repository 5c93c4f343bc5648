"""The ``search`` section: unknowns with brackets and conditions that must equal zero.

A search solves the model again for each trial value of its unknowns (params, or ``discount``) until
every condition is zero within the tolerance; the conditions are expressions over params and aggregates
of the stationary distribution (:mod:`worker.aggregates`).  The numerics are in :mod:`worker.search`.
"""

from __future__ import annotations

from typing import Annotated, Any

from pydantic import Field, model_validator

from worker.aggregates import DISCOUNT, parse_condition
from worker.document._faults import Fault, fault, number, raise_faults
from worker.document._fields import Expression, Integer, Name, Part
from worker.document.params import param_expressions
from worker.errors import InvalidDocument, join_path
from worker.expressions import parse

__all__ = ["DISCOUNT", "MAX_TRIALS", "Bracket", "SearchSpec", "search_faults", "unknown_expression_faults"]

MAX_TRIALS = 500
"""Most solves one search may make."""


class Bracket(Part):
    """The interval in which an unknown is sought; the conditions must change sign across it."""

    min: float = Field(description="Lower end of the interval.")
    max: float = Field(description="Upper end of the interval; greater than min.")

    @model_validator(mode="after")
    def _check_bracket(self) -> Bracket:
        if not self.min < self.max:
            raise_faults([fault("max", f"must be greater than min ({number(self.min)}), got {number(self.max)}")])
        return self


class SearchSpec(Part):
    """Unknowns to find so that every condition equals zero: an equilibrium or a calibration in one job."""

    unknowns: Annotated[dict[Name, Bracket], Field(min_length=1, max_length=8)] = Field(
        description=(
            'The unknowns, each a param of the model (given as a number) or "discount", with the interval in '
            "which to seek it. One unknown is found by a bracketing root finder (brentq), several by a bounded "
            "Newton method."
        )
    )
    conditions: Annotated[list[Expression], Field(min_length=1, max_length=8)] = Field(
        description=(
            "Expressions that must equal zero, one per unknown: over params and the aggregates mean(x), sd(x), "
            "quantile(x, q) and mass(condition) of the stationary distribution, where x and condition are "
            "expressions of params, states, shocks, choices and defines. With taste shocks the choice is random: "
            "an x or condition that uses a choice, or a define that depends on one, is taken over (point, choice) "
            "pairs weighted by the stationary mass times the choice probability."
        )
    )
    tolerance: Annotated[float, Field(gt=0)] = Field(
        default=1e-7, description="Each condition must be within this of zero at the point returned (absolute)."
    )
    max_trials: Annotated[Integer, Field(ge=3, le=MAX_TRIALS)] = Field(
        default=60, description=f"Most solves the search may make, 3 to {MAX_TRIALS} (default 60)."
    )


def search_faults(search: SearchSpec, model: Any, has_horizon: bool) -> list[Fault]:
    """Faults of ``search`` against the model, with paths from the document root."""
    if model.kind != "grid":
        return [fault("search", "a search needs a grid model: its conditions are aggregates over the grid")]
    if has_horizon:
        return [fault("search", "a search needs an infinite horizon: its conditions use the stationary "
                      "distribution, which a finite horizon does not have")]
    faults: list[Fault] = []
    if DISCOUNT in model.params:
        # A condition's `discount` is the document's discount factor: a param of that name was silently shadowed
        # (mean(a) - 10 * discount met 10 x 0.95, not 10 x the param's 0.5).
        faults.append(fault(join_path("model.params", DISCOUNT), "in a document with a search, `discount` names the "
                            "discount factor (in conditions, and as an unknown): give this param another name"))
    if len(search.conditions) != len(search.unknowns):
        faults.append(fault("search.conditions", f"give one condition per unknown: {len(search.unknowns)} "
                            f"unknown(s), {len(search.conditions)} condition(s)"))
    for name, bracket in search.unknowns.items():
        where = join_path("search.unknowns", name)
        if name == DISCOUNT:
            if not (0 < bracket.min and bracket.max < 1):
                faults.append(fault(where, "the discount factor is sought inside (0, 1): give 0 < min < max < 1"))
        elif name not in model.params:
            faults.append(fault(where, f"`{name}` is not a param of the model (nor \"discount\")"))
        elif isinstance(model.params[name], list):
            faults.append(fault(where, f"`{name}` has one value per period; an unknown is one number"))

    params = [*model.params, DISCOUNT]
    at_points = [*model.params, *model.states, *(n for n, s in model.shocks.items() if not s.after_choice),
                 *model.choices, *model.define]
    reserved = set(at_points) | {DISCOUNT}
    late = _drawn_after_choice(model)
    for k, text in enumerate(search.conditions):
        where = join_path("search.conditions", k)
        try:
            condition = parse_condition(text, path=where, reserved=reserved)
        except InvalidDocument as exc:
            faults += exc.errors
            continue
        outer = sorted(n for n in condition.outer.names if n not in condition.aggregates and n not in params)
        if outer:
            faults.append(fault(where, "outside mean, sd, quantile and mass a condition uses params only: "
                                + ", ".join(f"`{n}`" for n in outer) + " must be inside an aggregate"))
        drawn = sorted(condition.point_names() & late)
        if drawn:
            # Refused here, before any solve (a trial's solve found it at the first condition it evaluated).
            faults.append(fault(where, "cannot be evaluated over the stationary distribution: "
                                + ", ".join(f"`{n}`" for n in drawn) + " is a draw revealed after the choice, or a "
                                "define that depends on one"))
        inner = sorted(condition.point_names() - set(at_points) - late)
        if inner:
            faults.append(fault(where, "unknown name(s) " + ", ".join(f"`{n}`" for n in inner) + " inside an "
                                "aggregate: known are params, states, shocks, choices and defines"))
        if not condition.aggregates and not condition.outer.names:
            faults.append(fault(where, "a condition must depend on something: it has no names"))
    return faults


def _drawn_after_choice(model: Any) -> set[str]:
    """The shocks drawn after the choice, and the defines that depend on one (directly or through other
    defines): names that have no value at a point of the stationary distribution."""
    late = {name for name, shock in model.shocks.items() if shock.after_choice}
    uses: dict[str, set[str]] = {}
    for name, text in model.define.items():
        try:
            uses[name] = set(parse(str(text), path=join_path("model.define", name)).names)
        except InvalidDocument:
            uses[name] = set()  # faulted where the defines are checked
    grown = bool(late)
    while grown:
        grown = False
        for name, names in uses.items():
            if name not in late and names & late:
                late.add(name)
                grown = True
    return late


def unknown_expression_faults(raw: Any) -> list[Fault]:
    """Unknowns of a raw document's search that name a param given as an expression (the params are resolved to
    numbers before validation, so this reads the raw document).  Refused at the door; before, only the search
    refused them, so the job was queued and then failed."""
    search = raw.get("search") if isinstance(raw, dict) else None
    unknowns = search.get("unknowns") if isinstance(search, dict) else None
    if not isinstance(unknowns, dict):
        return []
    texts = param_expressions(raw)
    return [fault(join_path("search.unknowns", name), f"`{name}` is given as an expression; an unknown is a "
                  "param given as a number") for name in unknowns if name in texts]
