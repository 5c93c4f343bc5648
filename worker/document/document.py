"""The whole problem document and :func:`parse_document`, the one way in.

:func:`parse_document` refuses hostile nesting before pydantic sees the
document, validates it, runs every check that needs no model evaluation, and
raises :class:`~worker.errors.InvalidDocument` (or its subclass
:class:`~worker.errors.InfeasibleModel`, or :class:`~worker.errors.TooLarge`)
listing *all* faults it found, each as ``{"path", "message"}``.  Field names
equal the JSON keys; the contract of the validated objects is in
DEVELOPERS.md, "The validated document".

Checks inside one object run as soon as that object's own keys are valid, so
one broken state grid does not hide a bad ``solver``; checks that span the
model (names, laws of motion, expressions) run when the model's parts are
valid, and checks that need the whole document (the shape of
``solver.initial.values``, ``report.simulation.start``) when everything else is.

Nothing here builds a grid or a chain, so the cost of validation does not
grow with the sizes a document asks for (the estimator in
``worker.estimate`` judges those).  Class docstrings and field descriptions
become the JSON Schema served at ``/v1/schema``: they are written for people
who never read Python.
"""

from __future__ import annotations

import math
from typing import Annotated, Any, Literal, Union

from pydantic import AfterValidator, BeforeValidator, Field, ValidationError, ValidationInfo, model_validator
from pydantic_core import PydanticCustomError

from worker.document._faults import (
    Fault,
    exception_for,
    fault,
    number,
    raise_faults,
    shown,
    structure_fault,
)
from worker.document._fields import Integer, Part, SchemaExtra, check, one_as_list
from worker.document._translate import translate
from worker.document.continuous_faults import endogenous_grid_faults, policy_iteration_faults
from worker.document.grid import GridModel
from worker.document.limits import (
    DOCUMENT_VERSION,
    MAX_DEPTH,
    MAX_KEYS,
    MAX_LABEL_CHARS,
    MAX_REPORTED,
    MAX_TAGS,
    ROW_SUM_TOLERANCE,
)
from worker.document.options import InitialValues, NotifySpec, ReportSpec, SolverSpec
from worker.document.params import resolve_params
from worker.document.search import SearchSpec, search_faults, unknown_expression_faults
from worker.document.tabular import TabularModel
from worker.document.tags import TAG_RULE, TagText
from worker.document.unknown_keys import hidden_faults
from worker.document.value_faults import value_hidden_faults
from worker.errors import InvalidDocument, join_path

PRIORITIES = ("high", "normal", "low")
"""Queue priorities a document may ask for (key ``priority``), most urgent first: the order in which
workers drain their queues."""

DEFAULT_PRIORITY = "normal"
"""The priority of a document that gives none."""

SUBMISSION_KEYS = ("label", "tags", "priority", "notify")
"""Top-level keys that describe the submission, not the problem: left out of the hash."""


def _or(words: tuple[str, ...]) -> str:
    quoted = [f'"{word}"' for word in words]
    return ", ".join(quoted[:-1]) + " or " + quoted[-1]


_DISCOUNT_POSITIVE = (
    "the discount factor must lie strictly between 0 and 1 (with a finite horizon: be positive), got {value}: with "
    "0 or less the problem is degenerate (the future does not count, or counts with the wrong sign)"
)
_DISCOUNT_BELOW_ONE = (
    "the discount factor must lie strictly between 0 and 1, got {value}: with a discount of 1 or more the "
    "Bellman operator is not a contraction, so iteration need not converge; with 0 or less the problem is "
    "degenerate (the future does not count, or counts with the wrong sign). A model with a finite horizon "
    "(model.horizon) may have any positive discount"
)


HORIZON_CONTEXT = "horizon"
"""Key of the validation context saying whether the raw document's model has a horizon (see :func:`parse_document`)."""


def _below_one_without_horizon(value: float, info: ValidationInfo) -> float:
    """Refuse a discount of 1 or more when the validation context says the model has no horizon.

    The discount is validated before the model, so it cannot look at the model; :func:`parse_document`
    tells it from the raw document, and this fault is then reported beside the model's own faults.
    Without that context the check waits for :meth:`ProblemDocument._discount_faults`.
    """
    context = info.context or {}
    if value >= 1 and context.get(HORIZON_CONTEXT) is False:
        raise PydanticCustomError("fixq_check", _DISCOUNT_BELOW_ONE, {"value": shown(value)})
    return value


class ProblemDocument(Part):
    """A discounted dynamic program to solve, version 1 of the problem-document format."""

    version: Annotated[
        Integer,
        check(
            lambda v: v == DOCUMENT_VERSION,
            f"unsupported document version {{value}}: this service reads version {DOCUMENT_VERSION}",
        ),
        SchemaExtra(const=DOCUMENT_VERSION),
    ] = Field(description=f"Version of the document format; must be {DOCUMENT_VERSION}.")
    label: Annotated[str, Field(max_length=MAX_LABEL_CHARS)] | None = Field(
        default=None, description=f"A free-text name for the job, at most {MAX_LABEL_CHARS} characters."
    )
    tags: Annotated[
        list[TagText],
        BeforeValidator(one_as_list, json_schema_input_type=TagText | list[TagText]),
        Field(max_length=MAX_TAGS),
    ] = Field(
        default_factory=list,
        description=(
            f"Up to {MAX_TAGS} tags for finding jobs later, each {TAG_RULE}; one tag may be given as a string."
        ),
    )
    discount: Annotated[
        float,
        check(lambda b: 0 < b, _DISCOUNT_POSITIVE),
        AfterValidator(_below_one_without_horizon),
        SchemaExtra(exclusiveMinimum=0),
    ] = Field(
        description=(
            "The discount factor β applied to next period's value, strictly between 0 and 1 (per period). "
            "With β of 1 or more the Bellman operator is not a contraction and iteration need not converge. "
            "A model with a horizon (model.horizon) needs only β > 0: backward induction takes one step per "
            "period and seeks no fixed point."
        )
    )
    model: Annotated[Union[TabularModel, GridModel], Field(discriminator="kind")] = Field(
        description=(
            'The model: "tabular" (finite states and actions given as arrays) or "grid" (states on grids, defined by '
            'expressions).'
        )
    )
    solver: SolverSpec = Field(default_factory=SolverSpec, description="How to solve; every key has a default.")
    report: ReportSpec = Field(default_factory=ReportSpec, description="Extra results.")
    search: SearchSpec | None = Field(
        default=None,
        description=(
            "Optional: unknowns (params or the discount) to find so that conditions on the stationary "
            "distribution hold, e.g. an interest rate that clears the capital market."
        ),
    )
    priority: Literal[PRIORITIES] = Field(
        default=DEFAULT_PRIORITY,
        description=f'Queue priority: {_or(PRIORITIES)} (default "{DEFAULT_PRIORITY}").',
    )
    notify: NotifySpec | None = Field(default=None, description="Optional call-back when the job ends.")

    def value_shape(self) -> tuple[int, ...]:
        """Shape of the value array as documents send and results give it: grid axis sizes (in
        ``model.axis_order``, else states then shocks), or ``(n_states,)``."""
        if isinstance(self.model, TabularModel):
            return (self.model.n_states,)
        sizes = self.model.axis_sizes()
        return tuple(sizes[name] for name in (self.model.axis_order or sizes))

    @model_validator(mode="after")
    def _check_document(self) -> ProblemDocument:
        faults = (self._discount_faults() + self._method_faults() + self._initial_faults() + self._terminal_faults()
                  + self._start_faults() + self._cohort_faults() + self._stationary_faults() + self._search_faults())
        raise_faults(faults)
        return self

    def _discount_faults(self) -> list[Fault]:
        if self.discount < 1 or self.model.horizon is not None:
            return []
        return [fault("discount", _DISCOUNT_BELOW_ONE.format(value=number(self.discount)))]

    def _method_faults(self) -> list[Fault]:
        if self.solver.method == "endogenous_grid":
            return endogenous_grid_faults(self.model)
        if self.solver.method == "policy_iteration":
            return policy_iteration_faults(self.model)
        if self.solver.method != "backward_induction" or self.model.horizon is not None:
            return []
        return [fault("solver.method", "backward induction solves a model with a finite horizon: give model.horizon, "
                      "or use howard, value_iteration or policy_iteration for an infinite one")]

    def _terminal_faults(self) -> list[Fault]:
        horizon = self.model.horizon
        given = horizon is not None and "terminal_value" in horizon.model_fields_set
        if not given or self.solver.initial in (None, "zeros"):
            return []
        return [fault("model.horizon.terminal_value", "with a horizon, solver.initial is the value after the last "
                      "period: give it once, as terminal_value or as solver.initial")]

    def _initial_faults(self) -> list[Fault]:
        if not isinstance(self.solver.initial, InitialValues):
            return []
        shape, got = self.value_shape(), self.solver.initial.values.shape
        if got == shape or got == (math.prod(shape),):
            return []
        return [
            fault(
                "solver.initial.values",
                f"has shape {list(got)}, but the value array has shape {list(shape)} ({math.prod(shape):,} values; a "
                "flat list of that many is also accepted)",
            )
        ]

    def _start_faults(self) -> list[Fault]:
        simulation = self.report.simulation
        horizon = self.model.horizon
        faults = []
        where = join_path("report", self.report.simulation_key)
        if simulation is not None and horizon is not None:
            if simulation.periods > horizon.periods:
                faults.append(fault(join_path(where, "periods"), f"paths run from period 0 through the horizon, at "
                                    f"most model.horizon.periods = {horizon.periods:,} periods, not "
                                    f"{simulation.periods:,}"))
            if simulation.start is None and self.report.cohort is None:
                faults.append(fault(join_path(where, "start"), "with a finite horizon there is no long-run "
                                    "distribution to start from: give start, or report.cohort (paths then start "
                                    "from the cohort's period-0 distribution)"))
        if simulation is None or simulation.start is None:
            return faults
        return faults + start_faults(self.model, simulation.start, join_path(where, "start"))

    def _search_faults(self) -> list[Fault]:
        if self.search is None:
            return []
        return search_faults(self.search, self.model, self.model.horizon is not None)

    def _stationary_faults(self) -> list[Fault]:
        # The mirror of _cohort_faults: a finite horizon has no long-run distribution; refused at the door as a
        # cohort without a horizon is (before, it was accepted and only a note said so).
        if not self.report.stationary or self.model.horizon is None:
            return []
        return [fault("report.stationary", "a model with a finite horizon (model.horizon) has no stationary "
                      "distribution: leave report.stationary out, and use report.cohort for the distribution of a "
                      "cohort in every period")]

    def _cohort_faults(self) -> list[Fault]:
        cohort = self.report.cohort
        if cohort is None:
            return []
        if self.model.horizon is None:
            return [fault("report.cohort", "a cohort is followed through a finite horizon: give model.horizon (or "
                          "use report.stationary for the long-run distribution of an infinite horizon)")]
        if cohort.start is not None:
            return start_faults(self.model, cohort.start, "report.cohort.start")
        shape, got = self.value_shape(), cohort.distribution.shape
        where = "report.cohort.distribution"
        if got != shape and got != (math.prod(shape),):
            return [fault(where, f"has shape {list(got)}, but one period's value has shape {list(shape)} (a flat "
                          f"list of {math.prod(shape):,} is also accepted)")]
        if (cohort.distribution < 0).any():
            return [fault(where, "probabilities must not be negative")]
        total = float(cohort.distribution.sum())
        if abs(total - 1.0) > ROW_SUM_TOLERANCE:
            return [fault(where, f"sums to {total!r}; a distribution sums to 1 (within {ROW_SUM_TOLERANCE:g})")]
        return []


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
    hostile = structure_fault(raw, max_depth=MAX_DEPTH, max_keys=MAX_KEYS)
    if hostile is not None:
        raise InvalidDocument([hostile])
    expressions = unknown_expression_faults(raw)
    raw = resolve_params(raw)
    try:
        document = _validate(raw)
    except ValidationError as exc:
        errors = exc.errors(include_url=False)
    else:
        if expressions:
            raise exception_for(expressions, MAX_REPORTED, unlisted=0)
        return document
    # Only the listed errors are translated: a document with a million unknown keys costs no more.
    faults = expressions + translate(errors[:MAX_REPORTED], ProblemDocument)
    if len(errors) < MAX_REPORTED:  # what the unknown keys kept from being checked, listed with them
        faults += hidden_faults(raw, errors, ProblemDocument, _validate, MAX_REPORTED)
        faults += value_hidden_faults(raw, errors)  # what a bad value inside the grid model kept from being checked
    raise exception_for(faults, MAX_REPORTED, unlisted=max(len(errors) - MAX_REPORTED, 0))


def _validate(raw: Any) -> ProblemDocument:
    return ProblemDocument.model_validate(raw, context={HORIZON_CONTEXT: _has_horizon(raw)})


def _has_horizon(raw: Any) -> bool:
    """Whether the raw document's model has a horizon; the model may be given already validated (sweeps)."""
    model = raw.get("model") if isinstance(raw, dict) else None
    if isinstance(model, dict):
        return model.get("horizon") is not None
    return getattr(model, "horizon", None) is not None


def start_faults(model: Any, start: Any, where: str) -> list[Fault]:
    """Faults of ``report.simulation.start`` against the model (paths from the document root)."""
    if model.kind == "tabular":
        if isinstance(start, dict):
            return [fault(where, "for a tabular model, start is a state label or a state index")]
        if isinstance(start, int):
            if not 0 <= start < model.n_states:
                return [
                    fault(
                        where,
                        f"state index {start} is out of range: with {model.n_states} states it must be 0 to "
                        f"{model.n_states - 1}",
                    )
                ]
            return []
        if not isinstance(model.states, list) or start not in model.states:
            return [fault(where, f'"{start[:80]}" is not a state label')]
        return []
    if not isinstance(start, dict):
        return [fault(where, "for a grid model, start is an object giving a value for every state and shock")]
    axes = {**model.states, **{name: shock for name, shock in model.shocks.items() if not shock.after_choice}}
    faults = [
        fault(join_path(where, name), f"`{name}` is drawn after the choice, within each period: a start gives the "
              "states and the shocks seen before the choice" if name in model.shocks
              else f"`{name}` is not a state or shock of the model")
        for name in start
        if name not in axes
    ]
    faults += [
        fault(join_path(where, name), f"missing a starting value for `{name}`") for name in axes if name not in start
    ]
    for name, value in start.items():
        if name in axes:
            lo, hi = axes[name].bounds
            if not lo <= value <= hi:
                faults.append(
                    fault(
                        join_path(where, name),
                        f"{number(value)} lies outside the grid of `{name}`, [{number(lo)}, {number(hi)}]",
                    )
                )
    return faults
