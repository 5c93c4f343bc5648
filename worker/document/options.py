"""How to solve and what to report: the ``solver``, ``report`` and ``notify`` objects.

The defaults come from :mod:`worker.defaults`, the method names from the
solvers' registry (:data:`worker.solvers.METHODS`), so the document, its JSON
Schema and the solvers cannot disagree.
"""

from __future__ import annotations

import urllib.parse
from typing import Annotated, Any, Literal, Union

import annotated_types
from pydantic import (
    AfterValidator,
    AliasChoices,
    ConfigDict,
    Discriminator,
    Field,
    PrivateAttr,
    Tag,
    model_validator,
)
from pydantic_core import PydanticCustomError

from worker.defaults import (
    DEFAULT_CHECKPOINT_S,
    DEFAULT_EVALUATION_STEPS,
    DEFAULT_MAX_ITERATIONS,
    DEFAULT_TOLERANCE,
)
from worker.document._faults import fault, faults_error
from worker.document._fields import (
    AnyArray,
    Integer,
    Part,
    Positive,
    SchemaExtra,
    check,
)
from worker.document.limits import (
    MAX_AXES,
    MAX_EVALUATION_STEPS,
    MAX_ITERATIONS,
    MAX_SECRET_CHARS,
    MAX_SIMULATION_DRAWS,
    MAX_SIMULATION_PATHS,
    MAX_SIMULATION_PERIODS,
    MAX_URL_CHARS,
)
from worker.solvers import METHODS
from worker.solvers.backward import METHOD as BACKWARD_INDUCTION

METHOD_NAMES = tuple(sorted((*METHODS, BACKWARD_INDUCTION)))
"""Solver methods, as written in documents: the keys of the solvers' registry, and the backward induction a
finite horizon is solved by."""

DEPRECATED_SIMULATION_KEY = "simulate"
"""The older name of ``report.simulation``, still accepted so that stored documents keep working."""


class InitialValues(Part):
    """Start from the given value function."""

    values: AnyArray = Field(
        description=(
            "One value per grid point: an array with one axis per state and then per shock (tabular: one value "
            "per state), or the same number of values as one flat list in that order (the last axis varying fastest)."
        )
    )


class InitialJob(Part):
    """Start from the value function of an earlier job."""

    job: Annotated[
        str,
        check(
            lambda j: 1 <= len(j) <= 128 and j.isascii() and all(c.isalnum() or c in "_-" for c in j),
            "a job id is 1 to 128 ASCII letters (A-Z, a-z), digits, _ or -, got {value}",
        ),
        SchemaExtra(pattern="^[A-Za-z0-9_-]{1,128}$"),
    ] = Field(
        description=(
            "The id of an earlier finished job; its value function is carried onto this grid (interpolated when the "
            "grids differ)."
        )
    )


def _initial_form(value: Any) -> str | None:
    if isinstance(value, str):
        return "<zeros>"
    if isinstance(value, (dict, InitialValues, InitialJob)):
        keys = set(value) if isinstance(value, dict) else set(type(value).model_fields)
        return "<values>" if keys == {"values"} else "<job>" if keys == {"job"} else None
    return None


class SolverSpec(Part):
    """How to solve: the method, the accuracy wanted, and limits."""

    method: Literal[METHOD_NAMES] = Field(
        default="howard",
        description=(
            'The algorithm: "value_iteration" (one iteration after another until the error bound meets the '
            "tolerance), \"howard\" (Howard's method, i.e. modified policy iteration: after each iteration, "
            "evaluation steps of the current policy, see evaluation_steps; the default), \"policy_iteration\" "
            "(each policy evaluated exactly by solving a linear system) or \"endogenous_grid\" (Carroll's "
            "endogenous grid method, for a model with one state, a continuous next_of choice and a reward that "
            "depends on it through one define; its value certified by Howard's method from the policy found). "
            "A model with a finite horizon (model.horizon) is always solved by \"backward_induction\", which may be "
            "named here (without a horizon it is refused); with a horizon, \"endogenous_grid\" takes each "
            "period's policy by one round of the endogenous grid method, each period's value still the exact "
            "step of the fitted Bellman operator."
        ),
    )
    tolerance: Positive = Field(
        default=DEFAULT_TOLERANCE,
        description=(
            "Target for the error bound: the certified largest distance between the returned value function and "
            "the exact fixed point of the discretised problem, in the units of the value function. "
            "Any positive number is accepted; one below what float64 arithmetic can reach runs to max_iterations."
        ),
    )
    evaluation_steps: Annotated[Integer, Field(ge=1, le=MAX_EVALUATION_STEPS)] = Field(
        default=DEFAULT_EVALUATION_STEPS,
        description=(
            f'For "howard": the base number of evaluation steps (one step applies v = r + β P v once under the '
            f"current policy) in the evaluation phase between two iterations, 1 to {MAX_EVALUATION_STEPS:,}. The phase "
            "adapts: while the policy still changes it runs a fifth of this number (at least one step); once an "
            "iteration changes nothing it runs up to twenty times this number, ending early when the values have "
            "settled. Ignored by the other methods."
        ),
    )
    max_iterations: Annotated[Integer, Field(ge=1, le=MAX_ITERATIONS)] = Field(
        default=DEFAULT_MAX_ITERATIONS,
        description=(
            f"Most iterations (one iteration applies the Bellman operator once and improves the policy), 1 to "
            f"{MAX_ITERATIONS:,}; a solve that reaches it ends with status max_iterations."
        ),
    )
    time_limit_s: Positive | None = Field(
        default=None,
        description=(
            "Wall-clock limit in seconds; a solve that reaches it ends with status time_limit. null (the default): no "
            "limit."
        ),
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
        description=(
            'Where iteration starts: "zeros" (the default), {"values": ARRAY}, or {"job": ID} to start from an '
            'earlier job\'s value function. With a finite horizon (model.horizon) it is the value after the last '
            'period instead of terminal_value: values shaped like one period\'s value, or an earlier job (an '
            'infinite-horizon one, or a finite one whose first period follows this horizon\'s last).'
        ),
    )


def _start_form(value: Any) -> str | None:
    if isinstance(value, dict):
        return "<values>"
    if isinstance(value, str):
        return "<label>"
    if isinstance(value, int) and not isinstance(value, bool) or isinstance(value, float) and value.is_integer():
        return "<index>"
    return None


StartPoint = Annotated[
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
"""One point of the state space: grid models an object of state and shock values, tabular models a label or index."""


class CohortSpec(Part):
    """Follow a cohort through a finite horizon: its distribution over the points in every period, from a
    start in period 0, under the optimal policy of each period."""

    start: StartPoint | None = Field(
        default=None,
        description=(
            "Where the whole cohort starts in period 0. Grid models: an object giving a value for every state and "
            "shock, each within its grid (the nearest grid point is used). Tabular models: a state label or index."
        ),
    )
    distribution: AnyArray | None = Field(
        default=None,
        description=(
            "Instead of start: the cohort's distribution over the points in period 0, an array shaped like the "
            "value of one period (or flat), non-negative and summing to 1 (within 1e-9; it is rescaled)."
        ),
    )

    @model_validator(mode="after")
    def _one_start(self) -> CohortSpec:
        if (self.start is None) == (self.distribution is None):
            raise faults_error([fault("", "give either start or distribution: where the cohort is in period 0")])
        return self


class SimulateSpec(Part):
    """Simulate paths under the optimal policy."""

    periods: Annotated[Integer, Field(ge=1, le=MAX_SIMULATION_PERIODS)] = Field(
        description=f"Length of each path in periods, 1 to {MAX_SIMULATION_PERIODS:,}."
    )
    paths: Annotated[Integer, Field(ge=1, le=MAX_SIMULATION_PATHS)] = Field(
        description=(
            f"Number of paths, 1 to {MAX_SIMULATION_PATHS:,}; periods times paths may be at most "
            f"{MAX_SIMULATION_DRAWS:,}."
        )
    )
    seed: Annotated[Integer, Field(ge=0, le=2**64 - 1)] = Field(
        default=0, description="Seed of the random numbers, a whole number from 0; the same seed gives the same paths."
    )
    start: StartPoint | None = Field(
        default=None,
        description=(
            "Where every path starts. Grid models: an object giving a value for every state and shock, each "
            "within its grid (a value between grid points starts at the nearest one; with a continuous choice "
            "the states start at the values given). Tabular models: a state "
            "label or a state index (from 0). Omitted: each path starts from a draw of the long-run distribution "
            "under the optimal policy."
        ),
    )

    @model_validator(mode="after")
    def _check_size(self) -> SimulateSpec:
        if self.periods * self.paths > MAX_SIMULATION_DRAWS:
            raise faults_error(
                [
                    fault(
                        "",
                        f"periods × paths is {self.periods * self.paths:,}; at most {MAX_SIMULATION_DRAWS:,} "
                        "simulated periods are allowed",
                    )
                ]
            )
        return self


def _deprecated_alias_schema(schema: dict[str, Any]) -> None:
    # The alias stays in the JSON Schema, marked deprecated, so that stored documents still validate against it.
    properties = schema.get("properties", {})
    if "simulation" in properties:
        properties[DEPRECATED_SIMULATION_KEY] = {
            **properties["simulation"],
            "deprecated": True,
            "description": "Deprecated alias of simulation; give one or the other.",
        }


class ReportSpec(Part):
    """Extra results computed from the solution."""

    model_config = ConfigDict(json_schema_extra=_deprecated_alias_schema)

    stationary: bool = Field(
        default=False,
        description=(
            "Also compute the long-run (stationary) distribution of states and shocks under the optimal policy, with "
            "means of states and choices. Infinite horizon only: with model.horizon it is refused (use report.cohort)."
        ),
    )
    simulation: SimulateSpec | None = Field(
        default=None,
        validation_alias=AliasChoices("simulation", DEPRECATED_SIMULATION_KEY),
        description=(
            "Also simulate paths under the optimal policy. The key simulate is accepted as a deprecated alias; "
            "the canonical form writes simulation."
        ),
    )

    cohort: CohortSpec | None = Field(
        default=None,
        description=(
            "With a finite horizon (model.horizon): the distribution of a cohort over the points in every period "
            "from period 0, and the mean of every state, shock and choice by period (the result's cohort)."
        ),
    )

    euler_errors: bool = Field(
        default=False,
        description=(
            "Also measure the accuracy of the policy by Euler-equation errors (Judd 1992) at test points between "
            "the grid points, for grid models with state variables chosen through next_of (each choice its own "
            "equation) and a differentiable reward: diagnostics.euler_errors. On "
            "a grid-restricted choice it shows how coarse the grid is; it costs about as much as a hinted solve."
        ),
    )

    _simulation_key: str = PrivateAttr(default="simulation")

    @property
    def simulation_key(self) -> str:
        """The key the document used for :attr:`simulation` (``simulate`` is the deprecated one),
        for paths in messages."""
        return self._simulation_key

    @model_validator(mode="wrap")
    @classmethod
    def _one_simulation_key(cls, data: Any, handler: Any) -> ReportSpec:
        deprecated = isinstance(data, dict) and DEPRECATED_SIMULATION_KEY in data
        if deprecated and "simulation" in data:
            raise faults_error(
                [
                    fault(
                        DEPRECATED_SIMULATION_KEY,
                        "give simulation only: simulate is its deprecated alias, not a second simulation",
                    )
                ]
            )
        spec = handler(data)
        if deprecated:
            spec._simulation_key = DEPRECATED_SIMULATION_KEY
        return spec


def _check_url(url: str) -> str:
    parts = urllib.parse.urlsplit(url)
    if parts.scheme not in ("http", "https") or not parts.hostname or any(c.isspace() for c in url):
        raise PydanticCustomError("fixq_url", "expected an http:// or https:// URL with a host name")
    return url


class NotifySpec(Part):
    """Ask the service to call a URL when the job ends."""

    url: Annotated[str, Field(max_length=MAX_URL_CHARS), AfterValidator(_check_url)] = Field(
        description=(
            f"An http:// or https:// URL (at most {MAX_URL_CHARS:,} characters) that receives a POST when the job "
            "ends."
        )
    )
    secret: Annotated[str, Field(min_length=1, max_length=MAX_SECRET_CHARS)] | None = Field(
        default=None,
        description=(
            f"Optional shared secret (1 to {MAX_SECRET_CHARS} characters) with which the notification is signed, so "
            "the receiver can check it came from this service."
        ),
    )
