"""The problem document (version 1): pydantic v2 models of the public contract.

:func:`parse_document` is the one way in: it refuses hostile nesting before
pydantic sees the document, validates it, runs every check that needs no
model evaluation, and raises :class:`~worker.errors.InvalidDocument` (or its
subclass :class:`~worker.errors.InfeasibleModel`, or
:class:`~worker.errors.TooLarge`) listing *all* faults it found, each as
``{"path", "message"}``.  Field names equal the JSON keys; the contract of the
validated objects is in DEVELOPERS.md, "The validated document".

Checks inside one object run as soon as that object's own keys are valid, so
one broken state grid does not hide a bad ``solver``; checks that span the
model (names, laws of motion, expressions) run when the model's parts are
valid, and checks that need the whole document (the shape of
``solver.initial.values``, ``report.simulate.start``) when everything else is.

Nothing here builds a grid or a chain, so the cost of validation does not
grow with the sizes a document asks for (the estimator in
``worker.estimate`` judges those).  Class docstrings and field descriptions
become the JSON Schema served at ``/v1/schema``: they are written for people
who never read Python.
"""

from __future__ import annotations

import functools
import hashlib
import math
import urllib.parse
from typing import Annotated, Any, Literal, Union

import annotated_types
import numpy as np
import orjson
from pydantic import (
    AfterValidator,
    BaseModel,
    BeforeValidator,
    ConfigDict,
    Discriminator,
    FailFast,
    Field,
    PrivateAttr,
    Tag,
    ValidationError,
    model_validator,
)
from pydantic_core import PydanticCustomError

from worker.document import _checks as checks
from worker.document._checks import fault
from worker.arrays import DTYPES
from worker.defaults import DEFAULT_CHECKPOINT_S, DEFAULT_EVALUATION_STEPS, DEFAULT_MAX_ITERATIONS, DEFAULT_TOLERANCE
from worker.expressions import MAX_LENGTH as _EXPRESSION_LENGTH
from worker.errors import InvalidDocument, join_path

__all__ = [
    "AR1Spec",
    "ChoiceSpec",
    "GridAxis",
    "GridModel",
    "Hints",
    "IIDSpec",
    "InitialJob",
    "InitialValues",
    "METHOD_NAMES",
    "MarkovSpec",
    "NotifySpec",
    "ProblemDocument",
    "ReportSpec",
    "ShockSpec",
    "SimulateSpec",
    "SolverSpec",
    "SparseTransition",
    "TabularModel",
    "canonical_json",
    "document_hash",
    "json_schema",
    "parse_document",
]

METHOD_NAMES = ("value_iteration", "howard", "policy_iteration")
"""Solver methods, as written in documents (``worker.solvers.METHODS`` has the same keys)."""

DOCUMENT_VERSION = 1
"""The only ``version`` this module reads."""

MAX_DEPTH = 64
"""Deepest nesting of lists and objects in a document (levels)."""

MAX_KEYS = 1_000
"""Most keys in any one object of a document (count; the largest are params and define)."""

MAX_POINTS = 10_000_000
"""Most points on one grid axis, chain, menu or tabular label list (count)."""

MAX_ARRAY_ELEMENTS = 100_000_000
"""Most elements in one numeric array (count; 800 MB as float64)."""

MAX_EXPRESSION_CHARS = _EXPRESSION_LENGTH
"""Longest expression (characters)."""

MAX_AXES = 16
"""Most states, shocks or choices in a grid model (count of each)."""

MAX_ENTRIES = MAX_KEYS
"""Most params, defines or feasible expressions in a grid model (count of each)."""

MAX_EVALUATION_STEPS = 100_000
"""Most policy-evaluation sweeps between improvements (count)."""

MAX_ITERATIONS = 10_000_000
"""Largest accepted ``max_iterations`` (count)."""

DEFAULT_WIDTH = 3.0
"""Tauchen grid half-width (unconditional standard deviations; common practice)."""

DEFAULT_EXPONENT = 2.0
"""Exponent of ``power`` spacing (dimensionless)."""

MAX_SIMULATION_PERIODS = 100_000
"""Most periods in one simulated path (count)."""

MAX_SIMULATION_PATHS = 100_000
"""Most simulated paths (count)."""

MAX_SIMULATION_DRAWS = 10_000_000
"""Most periods × paths in one simulation (count)."""

MAX_LABEL_CHARS = 200
"""Longest document label or tabular state/action label (characters)."""

MAX_TAGS = 32
"""Most tags on a document (count)."""

MAX_URL_CHARS = 2_048
"""Longest ``notify.url`` (characters)."""

MAX_SECRET_CHARS = 256
"""Longest ``notify.secret`` (characters)."""

MAX_REPORTED = 100
"""Most faults in one error (count); more are summed up in a last fault."""

CANONICAL_INLINE_ELEMENTS = 4_096
"""Arrays up to this many elements appear as nested lists in the canonical
form, larger ones packed (count)."""

SUBMISSION_KEYS = ("label", "tags", "priority", "notify")
"""Top-level keys that describe the submission, not the problem: left out of the hash."""

_EXP_LIMIT = math.log(np.finfo(np.float64).max)
"""Largest value whose ``exp`` is finite in float64 (about 709.78)."""

_ORDERED = {("model", "states"), ("model", "shocks"), ("model", "choices"), ("model", "define")}
"""Objects whose key order means something (array axes; define order)."""


Integer = Annotated[int, BeforeValidator(checks.integral)]
Name = Annotated[
    str,
    AfterValidator(checks.check_name),
    checks.SchemaExtra(pattern="^[A-Za-z_][A-Za-z0-9_]*$", maxLength=checks.MAX_NAME_CHARS),
]
Expression = Annotated[str, Field(min_length=1, max_length=MAX_EXPRESSION_CHARS)]
Points = Annotated[
    Integer,
    checks.check(lambda n: n >= 2, "a grid needs at least 2 points, got {value}"),
    checks.check(lambda n: n <= MAX_POINTS, f"at most {MAX_POINTS:,} points per axis are accepted, got {{value}}"),
    checks.SchemaExtra(minimum=2, maximum=MAX_POINTS),
]
Positive = Annotated[float, Field(gt=0)]
Spacing = Literal["uniform", "log", "power"]


_SIZES = {"max_elements": MAX_ARRAY_ELEMENTS, "inline_elements": CANONICAL_INLINE_ELEMENTS}
Vector = checks.array_field(1, **_SIZES)
Matrix = checks.array_field(2, **_SIZES)
NullableMatrix = checks.array_field(2, allow_null=True, **_SIZES)
Cube = checks.array_field(3, **_SIZES)
Rows4 = checks.array_field(2, row_length=4, **_SIZES)
AnyArray = checks.array_field(None, **_SIZES)


class _Part(BaseModel):
    model_config = ConfigDict(
        extra="forbid",
        strict=True,
        allow_inf_nan=False,
        arbitrary_types_allowed=True,
        protected_namespaces=(),
    )


def _labels_or_count(value: Any) -> str | None:
    if isinstance(value, list):
        return "<labels>"
    if isinstance(value, int) and not isinstance(value, bool) or isinstance(value, float) and value.is_integer():
        return "<count>"
    return None


class _FailFast(FailFast):
    """Stop a list at its first bad item (so a million bad labels cost one error); hashable,
    as members of a ``Union`` must be."""

    __hash__ = object.__hash__


Label = Annotated[str, Field(min_length=1, max_length=MAX_LABEL_CHARS)]
LabelsOrCount = Annotated[
    Union[
        Annotated[list[Label], annotated_types.Len(1, MAX_POINTS), _FailFast(), Tag("<labels>")],
        Annotated[Integer, annotated_types.Interval(ge=1, le=MAX_POINTS), Tag("<count>")],
    ],
    Discriminator(
        _labels_or_count,
        custom_error_type="fixq_labels",
        custom_error_message="expected a list of labels (strings) or a count (a whole number)",
    ),
]


class SparseTransition(_Part):
    """Transition probabilities as a list of non-zero entries."""

    entries: Rows4 = Field(
        description=(
            "One row [s, a, s_next, p] per non-zero probability: from state index s under action index a, "
            "tomorrow's state is s_next with probability p. Indices count from 0. Entries repeating the same "
            "(s, a, s_next) are added together. Nested lists or a packed array of shape [N, 4]."
        )
    )


def _transition_form(value: Any) -> str | None:
    if isinstance(value, dict):
        return "<sparse>" if "entries" in value else "<dense>" if "base64" in value or "dtype" in value or "shape" in value else None
    if isinstance(value, SparseTransition):
        return "<sparse>"
    return "<dense>" if isinstance(value, (list, np.ndarray)) else None


class TabularModel(_Part):
    """A finite Markov decision problem: a list of states, a list of actions, the reward of each
    action in each state, and the probabilities of tomorrow's state."""

    kind: Literal["tabular"] = Field(description='Always "tabular" for this kind of model.')
    states: LabelsOrCount = Field(
        description="The states: a list of distinct labels, or their number (then they are labelled 0, 1, 2, ...)."
    )
    actions: LabelsOrCount = Field(
        description="The actions: a list of distinct labels, or their number (then they are labelled 0, 1, 2, ...)."
    )
    reward: NullableMatrix = Field(
        description=(
            "reward[s][a]: the reward of taking action a in state s, paid this period. null means the action "
            "is not allowed in that state (in a packed array, NaN stands for null). Every state needs at least "
            "one allowed action. Shape [states, actions]."
        )
    )
    transition: Annotated[
        Union[Annotated[Cube, Tag("<dense>")], Annotated[SparseTransition, Tag("<sparse>")]],
        Discriminator(
            _transition_form,
            custom_error_type="fixq_transition",
            custom_error_message=(
                "expected a dense array (nested lists or a packed array) or a sparse object {\"entries\": ...}"
            ),
        ),
    ] = Field(
        description=(
            "transition[s][a][s_next]: the probability that tomorrow's state is s_next after action a in "
            "state s; shape [states, actions, states]. Or, sparse, an object with entries. For every allowed "
            "(state, action) pair the probabilities must be non-negative and sum to 1 (within 1e-9); rows of "
            "pairs that are not allowed are ignored."
        )
    )

    @property
    def n_states(self) -> int:
        """Number of states."""
        return self.states if isinstance(self.states, int) else len(self.states)

    @property
    def n_actions(self) -> int:
        """Number of actions."""
        return self.actions if isinstance(self.actions, int) else len(self.actions)

    def state_labels(self) -> list[str] | list[int]:
        """The state labels; a count ``n`` gives ``[0, ..., n-1]``."""
        return list(range(self.states)) if isinstance(self.states, int) else list(self.states)

    def action_labels(self) -> list[str] | list[int]:
        """The action labels; a count ``n`` gives ``[0, ..., n-1]``."""
        return list(range(self.actions)) if isinstance(self.actions, int) else list(self.actions)

    @model_validator(mode="after")
    def _check_model(self) -> TabularModel:
        checks.raise_faults(checks.tabular_faults(self))
        return self


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


class GridAxis(_Part):
    """The grid of an endogenous state: either min, max and points (with a spacing), or an explicit
    list of values."""

    min: float | None = _grid_field("min")
    max: float | None = _grid_field("max")
    points: Points | None = _grid_field("points")
    spacing: Spacing | None = _grid_field("spacing")
    exponent: Positive | None = _grid_field("exponent")
    values: Vector | None = Field(
        default=None,
        description="The grid values themselves, strictly increasing, at least 2 of them (instead of min, max and points).",
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
        form, faults = checks.form_faults(
            self, {"range": checks.RANGE_KEYS, "values": ("values",)}, "either `min`, `max` and `points` (and optionally `spacing`), or `values`"
        )
        if form == "range":
            faults = checks.range_faults(self, other="or give `values`", default_exponent=DEFAULT_EXPONENT)
        elif form == "values":
            if self.values.size < 2:
                faults = [fault("values", f"a grid needs at least 2 values, got {self.values.size}")]
            else:
                faults = checks.increasing_faults(self.values, "values")
        checks.raise_faults(faults)
        return self


class ChoiceSpec(_Part):
    """A choice made each period: tomorrow's value of a state picked from that state's grid
    (next_of), a finite menu of values, or a grid of its own (min, max, points)."""

    next_of: Name | None = Field(
        default=None,
        description="The name of a state: the choice is tomorrow's value of that state, picked from the state's grid.",
    )
    values: Vector | None = Field(default=None, description="A finite menu of values to choose from, strictly increasing.")
    min: float | None = _grid_field("min")
    max: float | None = _grid_field("max")
    points: Points | None = _grid_field("points")
    spacing: Spacing | None = _grid_field("spacing")
    exponent: Positive | None = _grid_field("exponent")

    _target: GridAxis | None = PrivateAttr(default=None)

    @property
    def size(self) -> int:
        """Number of alternatives (for ``next_of``, the size of that state's grid)."""
        if self.next_of is not None:
            if self._target is None:
                raise ValueError("the size of a next_of choice is known only inside a validated GridModel")
            return self._target.size
        return self.points if self.values is None else int(self.values.size)

    def grid(self, *, path: str = "") -> np.ndarray:
        """The alternatives, shape ``(size,)`` float64 (for ``next_of``, the state's grid)."""
        if self.next_of is not None:
            if self._target is None:
                raise ValueError("the grid of a next_of choice is known only inside a validated GridModel")
            return self._target.grid(path=path)
        if self.values is not None:
            return self.values.copy()
        from worker.grids import build_grid

        return build_grid(self.spacing, self.min, self.max, self.points, self.exponent or DEFAULT_EXPONENT, path=path)

    @model_validator(mode="after")
    def _check_choice(self) -> ChoiceSpec:
        form, faults = checks.form_faults(
            self,
            {"next_of": ("next_of",), "values": ("values",), "range": checks.RANGE_KEYS},
            "exactly one of: `next_of`; `values`; or `min`, `max` and `points` (and optionally `spacing`)",
        )
        if form == "range":
            faults = checks.range_faults(self, other="or give `next_of` or `values`", default_exponent=DEFAULT_EXPONENT)
        elif form == "values":
            faults = checks.increasing_faults(self.values, "values") if self.values.size else [fault("values", "the menu must not be empty")]
        checks.raise_faults(faults)
        return self


class AR1Spec(_Part):
    """An AR(1) process y' = (1 - rho) * mean + rho * y + e, with e normal with mean 0 and standard
    deviation sigma, replaced by a finite Markov chain."""

    rho: Annotated[
        float,
        checks.check(
            lambda r: -1 < r < 1,
            "rho must lie strictly between -1 and 1, got {value}: with |rho| >= 1 the process is not stationary "
            "(its variance grows without bound), so there is no long-run distribution for a finite chain to match",
        ),
        checks.SchemaExtra(exclusiveMinimum=-1, exclusiveMaximum=1),
    ] = Field(description="Persistence, strictly between -1 and 1.")
    sigma: Annotated[
        float,
        checks.check(
            lambda s: s > 0,
            "sigma, the standard deviation of the innovation e, must be positive, got {value} "
            "(for a shock that never moves, use markov with one value)",
        ),
        checks.SchemaExtra(exclusiveMinimum=0),
    ] = Field(description="Standard deviation of the innovation e (not of y itself); positive, in the units of y.")
    points: Points = Field(description=f"Number of chain values, 2 to {MAX_POINTS:,}.")
    method: Literal["rouwenhorst", "tauchen"] = Field(
        default="rouwenhorst",
        description=(
            'How the chain is built: "rouwenhorst" (Rouwenhorst 1995; matches the conditional mean and variance '
            'exactly, the better choice for persistent processes; the default) or "tauchen" (Tauchen 1986; an '
            "evenly spaced grid of half-width `width` unconditional standard deviations)."
        ),
    )
    width: Positive | None = Field(
        default=None,
        description=(
            f'Only for "tauchen": half-width of the grid in unconditional standard deviations of y '
            f"(default {DEFAULT_WIDTH:g}). Rouwenhorst's grid always spans sqrt(points - 1) of them."
        ),
    )
    mean: float = Field(default=0.0, description="Long-run mean of y (before any transform).")

    @model_validator(mode="after")
    def _check_ar1(self) -> AR1Spec:
        if self.width is not None and self.method != "tauchen":
            raise checks.faults_error(
                [fault("width", "width is used only with method \"tauchen\"; Rouwenhorst's grid spans sqrt(points - 1) unconditional standard deviations")]
            )
        if self.method == "tauchen" and self.width is None:
            self.width = DEFAULT_WIDTH
        return self

    def half_width(self) -> float:
        """Distance from ``mean`` to the outermost chain value (no chain is built)."""
        spread = self.sigma / math.sqrt(1.0 - self.rho * self.rho)
        return spread * (math.sqrt(self.points - 1) if self.method == "rouwenhorst" else self.width)


class MarkovSpec(_Part):
    """A finite Markov chain given explicitly."""

    values: Vector = Field(description="The values the shock can take, strictly increasing.")
    matrix: Matrix = Field(
        description=(
            "matrix[i][j]: the probability that tomorrow's value is values[j] when today's is values[i]. "
            "Square, one row and column per value; each row non-negative and summing to 1 (within 1e-9)."
        )
    )

    @model_validator(mode="after")
    def _check_markov(self) -> MarkovSpec:
        n = self.values.size
        faults = [fault("values", "there must be at least one value")] if n == 0 else checks.increasing_faults(self.values, "values")
        shape = self.matrix.shape
        if shape[0] != shape[1]:
            faults.append(fault("matrix", f"the matrix must be square, got shape {list(shape)}"))
        elif shape[0] != n:
            faults.append(fault("matrix", f"the matrix is {shape[0]} by {shape[1]} but there are {n} values: it needs one row and column per value"))
        else:
            faults += checks.stochastic_faults(self.matrix, "matrix")
        checks.raise_faults(faults)
        return self


class IIDSpec(_Part):
    """A shock drawn afresh each period, independently of its past, from a finite distribution."""

    values: Vector = Field(description="The values the shock can take, strictly increasing.")
    probs: Vector = Field(description="probs[i]: the probability of values[i]; non-negative, summing to 1 (within 1e-9).")

    @model_validator(mode="after")
    def _check_iid(self) -> IIDSpec:
        n = self.values.size
        faults = [fault("values", "there must be at least one value")] if n == 0 else checks.increasing_faults(self.values, "values")
        if self.probs.size != n:
            faults.append(fault("probs", f"there are {n} values but {self.probs.size} probabilities: give one per value"))
        else:
            faults += checks.stochastic_faults(self.probs[None, :], "probs", single_row=True)
        checks.raise_faults(faults)
        return self


class ShockSpec(_Part):
    """An exogenous shock: a Markov chain that evolves on its own, whatever is chosen. Give exactly
    one of ar1, markov or iid."""

    ar1: AR1Spec | None = Field(default=None, description="An AR(1) process, discretised.")
    markov: MarkovSpec | None = Field(default=None, description="An explicit Markov chain.")
    iid: IIDSpec | None = Field(default=None, description="Independent draws from a finite distribution.")
    transform: Literal["exp", "none"] = Field(
        default="none",
        description='Applied to the chain values before use: "exp" (values become exp(value), e.g. a log-AR(1) productivity) or "none" (the default).',
    )

    @property
    def size(self) -> int:
        """Number of chain values (no chain is built)."""
        if self.ar1 is not None:
            return self.ar1.points
        return int((self.markov or self.iid).values.size)

    @property
    def bounds(self) -> tuple[float, float]:
        """Smallest and largest chain value, after the transform (no chain is built)."""
        if self.ar1 is not None:
            half = self.ar1.half_width()
            lo, hi = self.ar1.mean - half, self.ar1.mean + half
        else:
            values = (self.markov or self.iid).values
            lo, hi = float(values[0]), float(values[-1])
        return (math.exp(lo), math.exp(hi)) if self.transform == "exp" else (lo, hi)

    def chain(self, *, path: str = "") -> tuple[np.ndarray, np.ndarray]:
        """The chain: values ``(n,)`` (transform applied) and row-stochastic ``P`` ``(n, n)`` (via :mod:`worker.shocks`)."""
        from worker import shocks

        if self.ar1 is not None:
            spec, where = self.ar1, join_path(path, "ar1")
            if spec.method == "tauchen":
                values, matrix = shocks.tauchen(spec.rho, spec.sigma, spec.points, spec.width, spec.mean, path=where)
            else:
                values, matrix = shocks.rouwenhorst(spec.rho, spec.sigma, spec.points, spec.mean, path=where)
        elif self.markov is not None:
            values, matrix = shocks.markov_chain(self.markov.values, self.markov.matrix, path=join_path(path, "markov"))
        else:
            values, matrix = shocks.iid_chain(self.iid.values, self.iid.probs, path=join_path(path, "iid"))
        return shocks.apply_transform(values, self.transform, path=path), matrix

    @model_validator(mode="after")
    def _check_shock(self) -> ShockSpec:
        form, faults = checks.form_faults(self, {"ar1": ("ar1",), "markov": ("markov",), "iid": ("iid",)}, "exactly one of `ar1`, `markov` or `iid`")
        if form and self.transform == "exp":
            top = self.ar1.mean + self.ar1.half_width() if self.ar1 is not None else float((self.markov or self.iid).values[-1])
            if not top < _EXP_LIMIT:
                faults.append(fault("transform", f"exp of the largest chain value ({checks.number(top)}) overflows float64; values must stay below {_EXP_LIMIT:.2f}"))
        checks.raise_faults(faults)
        return self


class Hints(_Part):
    """Promises about the model that let the solver search faster. The final policy is always checked
    with one unrestricted step; a broken promise is reported and the solve falls back to the full search."""

    monotone: bool = Field(default=False, description="The chosen next value of a state never falls as that state rises.")
    concave: bool = Field(default=False, description="The objective is single-peaked (concave) in each choice, so the search can stop past the peak.")


class GridModel(_Part):
    """A model with states on grids, Markov shocks, and choices, defined by expressions.

    Expressions may use numbers, the names of params, states, shocks, choices and defines,
    + - * / ** (power), comparisons (< <= > >= == !=), and or not, and the functions
    log exp sqrt abs min max where clip. Nothing else."""

    kind: Literal["grid"] = Field(description='Always "grid" for this kind of model.')
    params: Annotated[dict[Name, float], Field(max_length=MAX_ENTRIES)] = Field(
        default_factory=dict, description="Named constants usable in every expression."
    )
    states: Annotated[dict[Name, GridAxis], Field(min_length=1, max_length=MAX_AXES)] = Field(
        description=(
            "The endogenous states, each with its grid; together they form a product grid. Their order is the "
            "order of the axes of the value array (states first, then shocks)."
        )
    )
    shocks: Annotated[dict[Name, ShockSpec], Field(max_length=MAX_AXES)] = Field(
        default_factory=dict, description="Exogenous shocks, each a Markov chain that evolves independently of the choices."
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
        description="Named intermediate expressions, in order: each may use the defines listed before it.",
    )
    reward: Expression = Field(description="The reward paid this period, an expression.")
    feasible: Annotated[list[Expression], Field(max_length=MAX_ENTRIES)] = Field(
        default_factory=list,
        description="Conditions (expressions) that must all hold for a choice to be allowed in a state.",
    )
    hints: Hints = Field(default_factory=Hints, description="Optional speed promises.")

    def axis_sizes(self) -> dict[str, int]:
        """Size of each axis of the value array, in array-axis order: states, then shocks."""
        sizes = {name: axis.size for name, axis in self.states.items()}
        sizes.update((name, shock.size) for name, shock in self.shocks.items())
        return sizes

    @model_validator(mode="after")
    def _check_model(self) -> GridModel:
        checks.raise_faults(checks.grid_model_faults(self))
        for choice in self.choices.values():
            if choice.next_of in self.states:
                choice._target = self.states[choice.next_of]
        return self


class InitialValues(_Part):
    """Start from the given value function."""

    values: AnyArray = Field(
        description=(
            "One value per grid point: an array with one axis per state and then per shock (tabular: one value "
            "per state), or the same number of values as one flat list in that order (the last axis varying fastest)."
        )
    )


class InitialJob(_Part):
    """Start from the value function of an earlier job."""

    job: Annotated[
        str,
        checks.check(
            lambda j: 1 <= len(j) <= 128 and j.isascii() and all(c.isalnum() or c in "_-" for c in j),
            "a job id is 1 to 128 letters, digits, _ or -, got {value}",
        ),
        checks.SchemaExtra(pattern="^[A-Za-z0-9_-]{1,128}$"),
    ] = Field(
        description="The id of an earlier finished job; its value function is carried onto this grid (interpolated when the grids differ)."
    )


def _initial_form(value: Any) -> str | None:
    if isinstance(value, str):
        return "<zeros>"
    if isinstance(value, (dict, InitialValues, InitialJob)):
        keys = set(value) if isinstance(value, dict) else set(type(value).model_fields)
        return "<values>" if keys == {"values"} else "<job>" if keys == {"job"} else None
    return None


class SolverSpec(_Part):
    """How to solve: the method, the accuracy wanted, and limits."""

    method: Literal[METHOD_NAMES] = Field(
        default="howard",
        description=(
            'The algorithm: "value_iteration" (repeat the Bellman step until the error bound is met), "howard" '
            "(modified policy iteration: evaluation_steps sweeps of the current policy between improvements; the "
            'default) or "policy_iteration" (each policy evaluated exactly by solving a linear system).'
        ),
    )
    tolerance: Positive = Field(
        default=DEFAULT_TOLERANCE,
        description=(
            "Target for the certified largest distance between the returned value function and the exact fixed "
            "point of the discretised problem, in the units of the value function. Any positive number is "
            "accepted; one below what float64 arithmetic can reach runs to max_iterations."
        ),
    )
    evaluation_steps: Annotated[Integer, Field(ge=1, le=MAX_EVALUATION_STEPS)] = Field(
        default=DEFAULT_EVALUATION_STEPS,
        description=f'For "howard": policy-evaluation sweeps between improvements, 1 to {MAX_EVALUATION_STEPS:,}. Ignored by the other methods.',
    )
    max_iterations: Annotated[Integer, Field(ge=1, le=MAX_ITERATIONS)] = Field(
        default=DEFAULT_MAX_ITERATIONS,
        description=f"Most improvement (Bellman) steps, 1 to {MAX_ITERATIONS:,}; a solve that reaches it ends with status max_iterations.",
    )
    time_limit_s: Positive | None = Field(
        default=None,
        description="Wall-clock limit in seconds; a solve that reaches it ends with status time_limit. null (the default): no limit.",
    )
    checkpoint_s: Positive = Field(
        default=DEFAULT_CHECKPOINT_S,
        description="Seconds of solving between checkpoints, from which an interrupted solve resumes.",
    )
    initial: Annotated[
        Union[
            Annotated[Literal["zeros"], Tag("<zeros>")],
            Annotated[InitialValues, Tag("<values>")],
            Annotated[InitialJob, Tag("<job>")],
        ],
        Discriminator(
            _initial_form,
            custom_error_type="fixq_initial",
            custom_error_message='must be "zeros", an object {"values": ARRAY} or an object {"job": JOB_ID}',
        ),
    ] = Field(
        default="zeros",
        description='Where iteration starts: "zeros" (the default), {"values": ARRAY}, or {"job": ID} to start from an earlier job\'s value function.',
    )


def _start_form(value: Any) -> str | None:
    if isinstance(value, dict):
        return "<values>"
    if isinstance(value, str):
        return "<label>"
    if isinstance(value, int) and not isinstance(value, bool) or isinstance(value, float) and value.is_integer():
        return "<index>"
    return None


class SimulateSpec(_Part):
    """Simulate paths under the optimal policy."""

    periods: Annotated[Integer, Field(ge=1, le=MAX_SIMULATION_PERIODS)] = Field(
        description=f"Length of each path in periods, 1 to {MAX_SIMULATION_PERIODS:,}."
    )
    paths: Annotated[Integer, Field(ge=1, le=MAX_SIMULATION_PATHS)] = Field(
        description=f"Number of paths, 1 to {MAX_SIMULATION_PATHS:,}; periods times paths may be at most {MAX_SIMULATION_DRAWS:,}."
    )
    seed: Annotated[Integer, Field(ge=0, le=2**64 - 1)] = Field(
        default=0, description="Seed of the random numbers, a whole number from 0; the same seed gives the same paths."
    )
    start: (
        Annotated[
            Union[
                Annotated[dict[str, float], annotated_types.MaxLen(2 * MAX_AXES), Tag("<values>")],
                Annotated[str, Tag("<label>")],
                Annotated[Integer, Tag("<index>")],
            ],
            Discriminator(
                _start_form,
                custom_error_type="fixq_start",
                custom_error_message="expected an object of state and shock values, a state label or a state index",
            ),
        ]
        | None
    ) = Field(
        default=None,
        description=(
            "Where every path starts. Grid models: an object giving a value for every state and shock, each "
            "within its grid (a value between grid points starts at the nearest one). Tabular models: a state "
            "label or a state index (from 0). Omitted: each path starts from a draw of the long-run distribution "
            "under the optimal policy."
        ),
    )

    @model_validator(mode="after")
    def _check_size(self) -> SimulateSpec:
        if self.periods * self.paths > MAX_SIMULATION_DRAWS:
            raise checks.faults_error(
                [fault("", f"periods × paths is {self.periods * self.paths:,}; at most {MAX_SIMULATION_DRAWS:,} simulated periods are allowed")]
            )
        return self


class ReportSpec(_Part):
    """Extra results computed from the solution."""

    stationary: bool = Field(
        default=False,
        description="Also compute the long-run (stationary) distribution of states and shocks under the optimal policy, with means of states and choices.",
    )
    simulate: SimulateSpec | None = Field(default=None, description="Also simulate paths under the optimal policy.")


def _check_url(url: str) -> str:
    parts = urllib.parse.urlsplit(url)
    if parts.scheme not in ("http", "https") or not parts.hostname or any(c.isspace() for c in url):
        raise PydanticCustomError("fixq_url", "expected an http:// or https:// URL with a host name")
    return url


class NotifySpec(_Part):
    """Ask the service to call a URL when the job ends."""

    url: Annotated[str, Field(max_length=MAX_URL_CHARS), AfterValidator(_check_url)] = Field(
        description=f"An http:// or https:// URL (at most {MAX_URL_CHARS:,} characters) that receives a POST when the job ends."
    )
    secret: Annotated[str, Field(min_length=1, max_length=MAX_SECRET_CHARS)] | None = Field(
        default=None,
        description=f"Optional shared secret (1 to {MAX_SECRET_CHARS} characters) with which the notification is signed, so the receiver can check it came from this service.",
    )


TagText = Annotated[
    str,
    checks.check(
        lambda t: 1 <= len(t) <= 64 and t.isascii() and all(c.isalnum() or c in "_.:-" for c in t),
        "a tag must be 1 to 64 characters of letters, digits and _ . : -, got {value}",
    ),
    checks.SchemaExtra(pattern="^[A-Za-z0-9_.:-]{1,64}$"),
]


class ProblemDocument(_Part):
    """A discounted dynamic program to solve, version 1 of the problem-document format."""

    version: Annotated[
        Integer,
        checks.check(lambda v: v == DOCUMENT_VERSION, f"unsupported document version {{value}}: this service reads version {DOCUMENT_VERSION}"),
        checks.SchemaExtra(const=DOCUMENT_VERSION),
    ] = Field(description=f"Version of the document format; must be {DOCUMENT_VERSION}.")
    label: Annotated[str, Field(max_length=MAX_LABEL_CHARS)] | None = Field(
        default=None, description=f"A free-text name for the job, at most {MAX_LABEL_CHARS} characters."
    )
    tags: Annotated[list[TagText], Field(max_length=MAX_TAGS)] = Field(
        default_factory=list,
        description=f"Up to {MAX_TAGS} tags for finding jobs later, each 1 to 64 characters of letters, digits and _ . : -.",
    )
    discount: Annotated[
        float,
        checks.check(
            lambda b: 0 < b < 1,
            "the discount factor must lie strictly between 0 and 1, got {value}: with a discount of 1 or more the "
            "Bellman operator is not a contraction, so iteration need not converge; with 0 or less the problem is "
            "degenerate (the future does not count, or counts with the wrong sign)",
        ),
        checks.SchemaExtra(exclusiveMinimum=0, exclusiveMaximum=1),
    ] = Field(
        description=(
            "The discount factor β applied to next period's value, strictly between 0 and 1 (per period). "
            "With β of 1 or more the Bellman operator is not a contraction and iteration need not converge."
        )
    )
    model: Annotated[Union[TabularModel, GridModel], Field(discriminator="kind")] = Field(
        description='The model: "tabular" (finite states and actions given as arrays) or "grid" (states on grids, defined by expressions).'
    )
    solver: SolverSpec = Field(default_factory=SolverSpec, description="How to solve; every key has a default.")
    report: ReportSpec = Field(default_factory=ReportSpec, description="Extra results.")
    priority: Literal["high", "normal", "low"] = Field(default="normal", description='Queue priority: "high", "normal" (the default) or "low".')
    notify: NotifySpec | None = Field(default=None, description="Optional call-back when the job ends.")

    def value_shape(self) -> tuple[int, ...]:
        """Shape of the value array: grid axis sizes (states, then shocks), or ``(n_states,)``."""
        if isinstance(self.model, TabularModel):
            return (self.model.n_states,)
        return tuple(self.model.axis_sizes().values())

    @model_validator(mode="after")
    def _check_document(self) -> ProblemDocument:
        faults = self._initial_faults() + self._start_faults()
        checks.raise_faults(faults)
        return self

    def _initial_faults(self) -> list[checks.Fault]:
        if not isinstance(self.solver.initial, InitialValues):
            return []
        shape, got = self.value_shape(), self.solver.initial.values.shape
        if got == shape or got == (math.prod(shape),):
            return []
        return [
            fault(
                "solver.initial.values",
                f"has shape {list(got)}, but the value array has shape {list(shape)} ({math.prod(shape):,} values; a flat list of that many is also accepted)",
            )
        ]

    def _start_faults(self) -> list[checks.Fault]:
        simulate = self.report.simulate
        if simulate is None or simulate.start is None:
            return []
        return checks.start_faults(self.model, simulate.start, "report.simulate.start")


def parse_document(raw: Any) -> ProblemDocument:
    """Validate a problem document and run every check that needs no model evaluation.

    Parameters
    ----------
    raw : the decoded JSON document (dicts, lists, numbers, strings; ndarrays
        are accepted where arrays go).

    Raises
    ------
    InfeasibleModel
        The only faults are states with no allowed action.
    TooLarge
        An array exceeds the element cap (the other faults are listed too).
    InvalidDocument
        Any other fault; ``errors`` lists all of them.
    """
    hostile = checks.structure_fault(raw, max_depth=MAX_DEPTH, max_keys=MAX_KEYS)
    if hostile is not None:
        raise InvalidDocument([hostile])
    try:
        return ProblemDocument.model_validate(raw)
    except ValidationError as exc:
        errors = exc.errors(include_url=False)
    # Only the listed errors are translated: a document with a million unknown keys costs no more.
    faults = checks.translate(errors[:MAX_REPORTED], ProblemDocument)
    raise checks.exception_for(faults, MAX_REPORTED, unlisted=max(len(errors) - MAX_REPORTED, 0))


def _canonical(document: ProblemDocument, include_submission: bool) -> Any:
    data = document.model_dump(mode="json", exclude_none=True, exclude=None if include_submission else set(SUBMISSION_KEYS))
    return checks.sorted_keys(data, _ORDERED)


def canonical_json(raw_document: dict[str, Any] | ProblemDocument, *, include_submission: bool = False) -> bytes:
    """The canonical form of a document: compact JSON of the validated document.

    Defaults are filled in, keys sorted (except inside ``model.states``,
    ``shocks``, ``choices`` and ``define``, whose order is part of the
    problem), arrays written as nested lists up to
    :data:`CANONICAL_INLINE_ELEMENTS` elements and packed beyond.  The result
    is itself a valid document.  ``label``, ``tags``, ``priority`` and
    ``notify`` are left out unless ``include_submission``.
    """
    document = raw_document if isinstance(raw_document, ProblemDocument) else parse_document(raw_document)
    return orjson.dumps(_canonical(document, include_submission))


def document_hash(raw: dict[str, Any] | ProblemDocument) -> str:
    """SHA-256 (hex) of :func:`canonical_json`: equal for documents that pose the same problem."""
    return hashlib.sha256(canonical_json(raw)).hexdigest()


@functools.cache
def _schema() -> bytes:
    schema = ProblemDocument.model_json_schema()
    defs = schema.setdefault("$defs", {})
    defs["PackedArray"] = {
        "type": "object",
        "description": (
            "A numeric array sent compactly: the elements in C order (last index fastest), each little-endian, "
            "base64-encoded (standard alphabet, padded)."
        ),
        "properties": {
            "dtype": {"enum": list(DTYPES), "description": "Element type of the encoded bytes."},
            "shape": {
                "type": "array",
                "items": {"type": "integer", "minimum": 0},
                "maxItems": 32,
                "description": "Length of each dimension.",
            },
            "base64": {"type": "string", "contentEncoding": "base64", "description": "The encoded bytes."},
        },
        "required": ["dtype", "shape", "base64"],
        "additionalProperties": False,
    }
    defs["NestedNumbers"] = {
        "type": "array",
        "description": "Numbers in nested lists, one level per dimension.",
        "items": {"anyOf": [{"type": "number"}, {"$ref": "#/$defs/NestedNumbers"}]},
    }
    schema = checks.finish_schema(schema)
    out = {
        "$schema": "https://json-schema.org/draft/2020-12/schema",
        "title": "fixq problem document, version 1",
        **{key: value for key, value in schema.items() if key != "title"},
    }
    return orjson.dumps(out)


def json_schema() -> dict[str, Any]:
    """The JSON Schema (2020-12) of problem documents, as served at ``/v1/schema``."""
    return orjson.loads(_schema())
