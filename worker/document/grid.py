"""The grid model: states on grids, choices, and expressions; with its checks.

The shocks of a grid model are in :mod:`worker.document.shock_specs`.
Nothing here builds a grid: sizes and bounds come from closed forms, and
:meth:`GridAxis.grid` and :meth:`ChoiceSpec.grid` build through
:mod:`worker.grids` only when the numerics ask.
"""

from __future__ import annotations

from typing import Annotated, Any, Literal

import numpy as np
from pydantic import Field, PrivateAttr, model_validator

from worker import expressions
from worker.document._faults import Fault, fault, form_faults, increasing_faults, raise_faults
from worker.document._fields import (
    Expression,
    Expressions,
    Name,
    NumberOrExpression,
    Part,
    Points,
    Positive,
    RealEnds,
    Spacing,
    Vector,
)
from worker.document.axis_order import AXIS_ORDER_DESCRIPTION, AxisOrder, axis_order_faults, in_axis_order
from worker.document.continuous_faults import continuous_faults, continuous_model_faults
from worker.document.define_order import dependency_order
from worker.document.draw_faults import draw_faults
from worker.document.grid_ranges import range_faults
from worker.document.horizon import PERIOD_NAME, GridHorizon, ParamValue, grid_horizon_faults
from worker.document.limits import CONTINUOUS_SCAN_POINTS, DEFAULT_EXPONENT, MAX_AXES, MAX_ENTRIES, MAX_POINTS
from worker.document.shock_specs import ShockSpec
from worker.document.taste_shocks import TasteShocks, taste_choice_faults
from worker.errors import InvalidDocument, join_path

RANGE_KEYS = ("min", "max", "points", "spacing", "exponent")
"""Keys of a grid given by its range."""


_GRID_DESCRIPTIONS = {
    "min": "Smallest grid value.",
    "max": "Largest grid value; must be greater than min.",
    "points": f"Number of grid points, 2 to {MAX_POINTS:,}.",
    "spacing": (
        'How the points are spread between min and max: "uniform" (evenly, the default), "log" '
        '(constant ratio between neighbours; needs min > 0) or "power" (min + (max - min) * u^exponent '
        "for evenly spread u in [0, 1]; exponent above 1 puts more points near min)."
    ),
    "exponent": f'Exponent of "power" spacing, a positive number (default {DEFAULT_EXPONENT:g}).',
}


def _grid_field(key: str) -> Any:
    return Field(default=None, description=_GRID_DESCRIPTIONS[key])


class GridAxis(Part):
    """The grid of an endogenous state: either min, max and points (with a spacing), or an explicit
    list of values."""

    min: float | None = _grid_field("min")
    max: float | None = _grid_field("max")
    points: Points | None = _grid_field("points")
    spacing: Spacing | None = _grid_field("spacing")
    exponent: Positive | None = _grid_field("exponent")
    values: Vector | None = Field(
        default=None,
        description=(
            "The grid values themselves, strictly increasing, at least 2 of them (instead of min, max and "
            "points)."
        ),
    )
    real_ends: RealEnds = Field(
        default_factory=list,
        description=(
            'Ends of the grid that are real limits of the state (a borrowing limit, a capacity): "min", "max" '
            "or both. Stationary mass piling up at the top of a grid is warned about (the grid may cut the "
            "state short) unless \"max\" is listed here, and a policy choosing an end of the grid at 1% of "
            "the points or more (a next_of choice, grid or continuous) unless that end is listed."
        ),
    )

    @property
    def size(self) -> int:
        """Number of grid points (no grid is built)."""
        return self.points if self.values is None else int(self.values.size)

    @property
    def bounds(self) -> tuple[float, float]:
        """Smallest and largest grid value."""
        return (self.min, self.max) if self.values is None else (float(self.values[0]), float(self.values[-1]))

    def grid(self, *, path: str = "") -> np.ndarray:
        """The grid, shape ``(size,)`` float64, strictly increasing (via :mod:`worker.grids`)."""
        if self.values is not None:
            return self.values.copy()
        from worker.grids import build_grid

        return build_grid(self.spacing, self.min, self.max, self.points, self.exponent or DEFAULT_EXPONENT, path=path)

    @model_validator(mode="after")
    def _check_axis(self) -> GridAxis:
        form, faults = form_faults(
            self,
            {"range": RANGE_KEYS, "values": ("values",)},
            "either `min`, `max` and `points` (and optionally `spacing`), or `values`",
        )
        if form == "range":
            faults = range_faults(self, other="or give `values`", default_exponent=DEFAULT_EXPONENT)
        elif form == "values":
            if self.values.size < 2:
                faults = [fault("values", f"a grid needs at least 2 values, got {self.values.size}")]
            else:
                faults = increasing_faults(self.values, "values")
        raise_faults(faults)
        return self


class ChoiceSpec(Part):
    """A choice made each period: tomorrow's value of a state picked from that state's grid
    (next_of), a finite menu of values, or a grid of its own (min, max, points); or, with
    continuous, any value of an interval."""

    next_of: Name | None = Field(
        default=None,
        description="The name of a state: the choice is tomorrow's value of that state, picked from the state's grid.",
    )
    values: Vector | None = Field(
        default=None, description="A finite menu of values to choose from, strictly increasing."
    )
    min: NumberOrExpression | None = Field(
        default=None,
        description=(
            "Smallest grid value; for a continuous choice, the lower end of the interval, a number or an "
            "expression of today's states, shocks and params."
        ),
    )
    max: NumberOrExpression | None = Field(
        default=None,
        description=(
            "Largest grid value, greater than min; for a continuous choice, the upper end of the interval, a "
            "number or an expression of today's states, shocks and params (cash on hand, say)."
        ),
    )
    points: Points | None = Field(
        default=None,
        description=(
            f"Number of grid points, 2 to {MAX_POINTS:,}; for a continuous choice with min and max, the points "
            f"of the scan that starts a search without hints (default {CONTINUOUS_SCAN_POINTS})."
        ),
    )
    spacing: Spacing | None = _grid_field("spacing")
    exponent: Positive | None = _grid_field("exponent")
    continuous: bool = Field(
        default=False,
        description=(
            "Choose any value of an interval instead of a point of a grid: with next_of, tomorrow's value of "
            "that state anywhere between its grid's ends; with min and max, any number between them. "
            "Tomorrow's value is interpolated between grid points as model.interpolation says. A model has at "
            "most one continuous choice; it is searched for each combination of the other choices' values."
        ),
    )

    real_ends: RealEnds = Field(
        default_factory=list,
        description=(
            'Ends of the choice\'s own grid (min, max and points, or a menu of values) that are real limits of '
            'the choice (no fewer than zero hours, a full shift): "min", "max" or both. A policy choosing an '
            "end at 1% of the points or more is warned about (the best choice may lie beyond the grid) unless "
            "that end is listed. For a next_of choice list them on the state (model.states.NAME.real_ends); a "
            "continuous choice between min and max gets no such warning."
        ),
    )

    _target: GridAxis | None = PrivateAttr(default=None)

    @property
    def size(self) -> int:
        """Number of alternatives (for ``next_of``, the size of that state's grid; for a continuous
        choice, the points of its scan)."""
        if self.next_of is not None:
            if self._target is None:
                raise ValueError("the size of a next_of choice is known only inside a validated GridModel")
            return self._target.size
        if self.continuous:
            return self.points or CONTINUOUS_SCAN_POINTS
        return self.points if self.values is None else int(self.values.size)

    def grid(self, *, path: str = "") -> np.ndarray:
        """The alternatives, shape ``(size,)`` float64 (for ``next_of``, the state's grid)."""
        if self.next_of is not None:
            if self._target is None:
                raise ValueError("the grid of a next_of choice is known only inside a validated GridModel")
            return self._target.grid(path=path)
        if self.values is not None:
            return self.values.copy()
        if self.continuous:
            # The bounds may be expressions of the state: the scan's points are fractions of the interval.
            return np.linspace(0.0, 1.0, self.size)
        from worker.grids import build_grid

        return build_grid(self.spacing, self.min, self.max, self.points, self.exponent or DEFAULT_EXPONENT, path=path)

    @model_validator(mode="after")
    def _check_choice(self) -> ChoiceSpec:
        if self.real_ends and (self.next_of is not None or self.continuous):
            where = (f"list them on the state: model.states.{self.next_of}.real_ends" if self.next_of is not None
                     else "a continuous choice between min and max is never warned about its ends")
            raise_faults([fault("real_ends", f"this choice has no grid of its own; {where}")])
        if self.continuous:
            raise_faults(continuous_faults(self))
            return self
        written = [key for key in ("min", "max") if isinstance(getattr(self, key), str)]
        if written:
            raise_faults([
                fault(key, "must be a number here; expressions are allowed only in the bounds of a continuous "
                      "choice (add \"continuous\": true)")
                for key in written
            ])
        form, faults = form_faults(
            self,
            {"next_of": ("next_of",), "values": ("values",), "range": RANGE_KEYS},
            "exactly one of: `next_of`; `values`; or `min`, `max` and `points` (and optionally `spacing`)",
        )
        if form == "range":
            faults = range_faults(self, other="or give `next_of` or `values`", default_exponent=DEFAULT_EXPONENT)
        elif form == "values":
            faults = (
                increasing_faults(self.values, "values")
                if self.values.size
                else [fault("values", "the menu must not be empty")]
            )
        raise_faults(faults)
        return self


class Hints(Part):
    """Promises about the model that let the solver search faster. The final policy is always verified
    against the full search (the verification is not an iteration); a broken promise is reported and the
    solve falls back to the full search."""

    monotone: bool = Field(
        default=False,
        description="The chosen next value of a state never falls as that state rises (beside other choices: for "
        "each fixed combination of them).",
    )
    concave: bool = Field(
        default=False,
        description="The objective is single-peaked (concave) in each choice, so the search can stop past the peak.",
    )


class GridModel(Part):
    """A model with states on grids, Markov shocks, and choices, defined by expressions.

    Expressions may use numbers, the names of params, states, shocks, choices and defines,
    + - * / ** (power), comparisons (< <= > >= == !=), and or not, and the functions
    log exp sqrt abs min max where clip. Nothing else."""

    kind: Literal["grid"] = Field(description='Always "grid" for this kind of model.')
    params: Annotated[dict[Name, ParamValue], Field(max_length=MAX_ENTRIES)] = Field(
        default_factory=dict,
        description=(
            "Named constants usable in every expression: a number, or a string holding an expression of other "
            "params (a wage from the interest rate), evaluated once in dependency order; with a horizon, a param "
            "may also be a list with one value per period (an income profile, survival probabilities)."
        ),
    )
    states: Annotated[dict[Name, GridAxis], Field(min_length=1, max_length=MAX_AXES)] = Field(
        description=(
            "The endogenous states, each with its grid; together they form a product grid. Unless axis_order says "
            "otherwise, their order is the order of the axes of the value array (states first, then shocks)."
        )
    )
    shocks: Annotated[dict[Name, ShockSpec], Field(max_length=MAX_AXES)] = Field(
        default_factory=dict,
        description=(
            "Exogenous shocks, each a Markov chain that evolves independently of the choices, or an iid draw "
            'revealed after the choice ("timing": "after_choice").'
        ),
    )
    choices: Annotated[dict[Name, ChoiceSpec], Field(min_length=1, max_length=MAX_AXES)] = Field(
        description="What is chosen each period."
    )
    next: Annotated[dict[str, Expression], Field(max_length=MAX_AXES)] = Field(
        default_factory=dict,
        description=(
            "For each state not chosen through next_of: an expression for its value tomorrow, from today's "
            "states, shocks and choices. Values between grid points are split between the two neighbouring "
            "points by linear interpolation; values outside the grid are moved to its nearest end and counted "
            "in the diagnostics."
        ),
    )
    define: Annotated[dict[Name, Expression], Field(max_length=MAX_ENTRIES)] = Field(
        default_factory=dict,
        description=(
            "Named intermediate expressions. A define may use other defines in any order: they are evaluated in "
            "the order their dependencies require (a cycle is refused, naming the defines on it)."
        ),
    )
    reward: Expression = Field(description="The reward paid this period, an expression.")
    feasible: Annotated[Expressions, Field(max_length=MAX_ENTRIES)] = Field(
        default_factory=list,
        description=(
            "Conditions (expressions) that must all hold for a choice to be allowed in a state; one condition may "
            "be given as a string."
        ),
    )
    hints: Hints = Field(default_factory=Hints, description="Optional speed promises.")
    horizon: GridHorizon | None = Field(
        default=None,
        description=(
            "A finite number of periods, solved by backward induction (absent: an infinite horizon). The value "
            "and the policy then have a first axis, period."
        ),
    )
    interpolation: Literal["linear", "monotone_cubic"] = Field(
        default="linear",
        description=(
            'How tomorrow\'s value is read between grid points for a continuous choice: "linear" (the default; '
            "the error bound then certifies the interpolated problem) or \"monotone_cubic\" (Fritsch–Carlson, "
            "shape-preserving and far more accurate for smooth models; up to three states, as a tensor product "
            "of one-dimensional interpolants; its error bound is computed the same way but is not a proof)."
        ),
    )
    taste_shocks: TasteShocks | None = Field(
        default=None,
        description=(
            "Optional taste shocks on every combination of the choices, or of those listed in its `choices` "
            "(grid-restricted choices only): the "
            "result then carries choice_probabilities, shape the value's axes then the choices."
        ),
    )

    axis_order: AxisOrder | None = Field(default=None, description=AXIS_ORDER_DESCRIPTION)

    def continuous_choice(self) -> str | None:
        """The name of the model's continuous choice, or None."""
        return next((name for name, choice in self.choices.items() if choice.continuous), None)

    def axis_sizes(self) -> dict[str, int]:
        """Size of each axis of the value array, in array-axis order: states, then shocks."""
        sizes = {name: axis.size for name, axis in self.states.items()}
        sizes.update((name, shock.size) for name, shock in self.shocks.items() if not shock.after_choice)
        return sizes

    @model_validator(mode="after")
    def _check_model(self) -> GridModel:
        ordered, cycle = dependency_order(self.define)
        raise_faults(cycle)
        # Every later reader (the checks, the numerics, the generated code) then sees each define after those it uses.
        self.__dict__["define"] = ordered
        raise_faults(grid_model_faults(self))
        if self.axis_order is not None:
            # Named axes fix the internal layout too, so the states' and shocks' key order changes nothing.
            self.__dict__["states"], self.__dict__["shocks"] = in_axis_order(self.states, self.shocks, self.axis_order)
        for choice in self.choices.values():
            if choice.next_of in self.states:
                choice._target = self.states[choice.next_of]
        return self


def grid_model_faults(model: Any) -> list[Fault]:
    """Faults of a grid model's names, laws of motion and expressions (paths relative to it)."""
    return (
        _name_faults(model) + _motion_faults(model) + _expressions_faults(model) + continuous_model_faults(model)
        + draw_faults(model) + grid_horizon_faults(model) + axis_order_faults(model)
        + taste_choice_faults(model.taste_shocks, list(model.choices))
    )


def _name_faults(model: Any) -> list[Fault]:
    faults = []
    seen: dict[str, str] = {}
    for section in ("params", "states", "shocks", "choices", "define"):
        for name in getattr(model, section):
            if name in seen:
                faults.append(
                    fault(
                        join_path(section, name),
                        f"the name `{name}` is already used in {seen[name]}; names must be unique across params, "
                        "states, shocks, choices and define",
                    )
                )
            else:
                seen[name] = section
    return faults


def _motion_faults(model: Any) -> list[Fault]:
    faults = []
    chooser: dict[str, str] = {}
    states = ", ".join(model.states)
    for name, choice in model.choices.items():
        target = choice.next_of
        if target is None:
            continue
        where = join_path("choices", name, "next_of")
        if target not in model.states:
            faults.append(fault(where, f"`{target}` is not a state; next_of must name one of: {states}"))
        elif target in chooser:
            faults.append(
                fault(
                    where,
                    f"state `{target}` is already chosen by choice `{chooser[target]}`; a state can be the next_of of "
                    "only one choice",
                )
            )
        else:
            chooser[target] = name
    for name in model.next:
        where = join_path("next", name)
        if name not in model.states:
            faults.append(
                fault(where, f"`{name}` is not a state; next gives tomorrow's value of a state (states: {states})")
            )
        elif name in chooser:
            faults.append(
                fault(
                    where,
                    f"state `{name}` is already chosen through next_of by choice `{chooser[name]}`, so it must not "
                    "also have a next expression",
                )
            )
    faults += [
        fault(
            join_path("next", name),
            f'state `{name}` has no law of motion: give next.{name}, an expression for its value tomorrow, or a '
            f'choice with next_of "{name}"',
        )
        for name in model.states
        if name not in chooser and name not in model.next
    ]
    return faults


def _expressions_faults(model: Any) -> list[Fault]:
    """Faults of every expression: its grammar and the names it uses (the defines are in dependency order)."""
    known = [*model.params, *model.states, *model.shocks, *model.choices, *model.define]
    if model.horizon is not None:
        known.append(PERIOD_NAME)
    faults = []
    for name, text in model.define.items():
        faults += _expression_faults(text, known, join_path("define", name))
    for name, text in model.next.items():
        faults += _expression_faults(text, known, join_path("next", name))
    faults += _expression_faults(model.reward, known, "reward")
    for i, text in enumerate(model.feasible):
        faults += _expression_faults(text, known, join_path("feasible", i))
    return faults


def _expression_faults(text: str, known: list[str], where: str) -> list[Fault]:
    """Faults of one expression: its grammar, and names it uses that are unknown."""
    try:
        expressions.check_names(expressions.parse(text, path=where), known, path=where)
    except InvalidDocument as exc:
        return exc.errors
    return []
