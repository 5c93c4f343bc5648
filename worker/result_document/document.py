"""The result document itself: :class:`ResultDocument` and the entries of its convergence log.

Written by :func:`worker.solve._result` (an infinite horizon; a search adds ``search``) and
:func:`worker.periods.horizon_result` (a finite horizon).
"""

from __future__ import annotations

from typing import Literal, Union

from pydantic import Field

from worker.document.options import METHOD_NAMES
from worker.report import CHAIN_TRANSITION_MAX_POINTS
from worker.result_document._types import (
    NestedIntegers,
    NestedLabels,
    NestedNumbers,
    NumberOrLabel,
    Reported,
    absent_unless,
)
from worker.result_document.diagnostics import Diagnostics
from worker.result_document.reports import CohortReport, SearchOutcome, SimulationReport, StationaryReport, StopStatus

__all__ = ["LogEntry", "ResultDocument"]


class LogEntry(Reported):
    """One iteration of the convergence log (with a finite horizon, one period)."""

    iteration: int = Field(description="The iteration, from 1 (finite horizon: periods done so far).")
    distance: float = Field(description="‖Tv − v‖∞ of the iteration's Bellman step.")
    error_bound: float = Field(
        description="The error bound of that step's midpoint (a hinted step: the bound of the restricted "
        "operator; finite horizon: the rounding allowance accumulated so far)."
    )
    policy_changes: int = Field(
        description="Points whose choice differs from the previous iteration's (the first counts them all)."
    )
    seconds: float = Field(description="Solving time (s) when the iteration ended, counted across resumes.")
    period: int = absent_unless(description="Finite horizon only: the period solved.")
    periods: int = absent_unless(description="Finite horizon only: T, the number of periods.")


class ShockChain(Reported):
    """One shock as the solve discretised it."""

    values: list[float] = Field(description="The shock's values, after its transform, in the order of its axis.")
    transition: list[list[float]] | None = Field(
        description=f"transition[i][j]: the probability of values[j] tomorrow given values[i] today (an iid shock: "
        f"every row the same); null above {CHAIN_TRANSITION_MAX_POINTS} values, to keep results small."
    )


class ResultDocument(Reported):
    """The answer to a problem document, as GET /v1/jobs/{id}/result sends it once the job is done.

    Arrays of the value function and the policy are nested lists in the order of axes (state variables, then
    shocks; tabular: the one axis state_label; a finite horizon puts period first), the last axis varying
    fastest. With a search, everything but search describes the last solve, at the unknowns it reports. The
    discretized model is an approximation: check the answer's sensitivity to the grids and the tolerance before
    it feeds a decision."""

    status: StopStatus = Field(
        description="converged (the error bound met solver.tolerance; a finite horizon: every period solved), "
        "max_iterations or time_limit (stopped before; the value is still certified to within error_bound)."
    )
    method: Literal[METHOD_NAMES] = Field(  # type: ignore[valid-type]
        description="The method that solved it (backward_induction for a finite horizon, whatever solver.method said)."
    )
    error_bound: float = Field(
        description="Certified sup-norm distance between value and the exact fixed point of the discretized "
        "problem (a continuous choice: of the fitted problem, a proof only where diagnostics.continuous_choice."
        "certified; finite horizon: to the exact backward-induction values), rounding allowance included."
    )
    iterations: int = Field(
        description="Iterations (Bellman steps with the policy they imply) in all, counted "
        "across resumes (finite horizon: the periods solved)."
    )
    evaluation_steps: int = Field(description="Howard's method: evaluation steps applied in all; 0 otherwise.")
    linear_solves: int = Field(description="Policy iteration: exact policy evaluations (linear solves); 0 otherwise.")
    seconds: float = Field(
        description="Solving time (s), counted across resumes (a search: its last solve's; search.trials has "
        "every trial's)."
    )
    axis_order: list[str] = Field(
        description="The names of the axes of value (and of policy, policy_index, choice_probabilities and the "
        "distributions), in order: the keys of axes in the same order. model.axis_order fixes it; without it, "
        "the state variables in the document's order, then the shocks (finite horizon: period first)."
    )
    axes: dict[str, list[NumberOrLabel]] = Field(
        description="Each axis's values, in the order of value's axes: state variables' grid points, then shocks' "
        "values (tabular: state_label, the state labels; finite horizon: period first, the periods solved)."
    )
    value: NestedNumbers = Field(description="The value function: nested lists whose lengths are those of axes.")
    policy: dict[str, Union[NestedNumbers, NestedLabels]] = Field(
        description="Per choice, the chosen value at every point, shaped like value (tabular: action, the chosen "
        "action's label; with taste shocks, the most probable choice)."
    )
    policy_index: dict[str, NestedIntegers] | None = Field(
        description="Per choice, the chosen value's index in its grid (tabular: the action's index), shaped like "
        "value; null for a continuous choice, which has no grid."
    )
    choice_probabilities: NestedNumbers = absent_unless(
        description="With model.taste_shocks: the probability of each combination of the choices at every point, "
        "nested as value's axes and then diagnostics.taste_shocks.choices in order.",
    )
    log: list[LogEntry] = Field(
        description="The convergence log, one entry per iteration: all the early ones, then a sampling, then the "
        "latest (diagnostics.log_dropped counts those left out). A search's: the last solve's."
    )
    diagnostics: Diagnostics = Field(description="How the solve went, and what to check before trusting it.")
    stationary: StationaryReport | None = Field(
        description="With report.stationary (infinite horizon); null otherwise."
    )
    simulation: SimulationReport | None = Field(description="With report.simulation; null otherwise.")
    cohort: CohortReport | None = Field(
        default=None, description="Finite horizon: with report.cohort, else null; absent without a horizon."
    )
    search: SearchOutcome = absent_unless(description="With a search in the document; absent otherwise.")
    chains: dict[str, ShockChain] = Field(
        description="Each shock drawn before the choice, as discretised (Tauchen, Rouwenhorst, a Markov chain or an "
        "iid distribution), by name; {} for tabular models and models without such shocks."
    )
