"""The reports of the result document: ``stationary``, ``simulation``, ``cohort`` and ``search``.

Written by :func:`worker.report.stationary_report` and :func:`worker.report.simulate_report` (with
:mod:`worker.taste_paths` and :mod:`worker.continuous.paths`), :mod:`worker.cohort` for a finite
horizon, and :func:`worker.search.run_search`.
"""

from __future__ import annotations

from typing import Literal

from pydantic import Field, create_model

from worker.report import DIRECT_MAX_STATES, PERCENTILES, POWER_FIRST_STEPS, TOP_MASS_WARNING
from worker.result_document._types import NestedNumbers, NumberOrLabel, Reported, absent_unless

__all__ = ["CohortReport", "SearchOutcome", "SeriesSummary", "SimulationReport", "StationaryReport", "StopStatus"]

StopStatus = Literal["converged", "max_iterations", "time_limit"]
"""How a solve ended (the result's ``status``)."""


class EndMass(Reported):
    """The stationary mass at the two ends of a state variable's grid."""

    min: float = Field(description="Mass (0 to 1) at the grid's lowest point.")
    max: float = Field(
        description=f"Mass (0 to 1) at the grid's highest point (a warning comes with more than "
        f"{TOP_MASS_WARNING:.0%}, unless real_ends lists max)."
    )


class StationaryReport(Reported):
    """report.stationary: the long-run distribution of the points under the optimal policy. With one recurrent
    class it is the chain's stationary distribution; with several, the mixture the chain settles into from a
    uniform start."""

    distribution: NestedNumbers = Field(
        description="The probability of every point, nested like value (the axes' order and lengths); sums to 1."
    )
    means: dict[str, float | None] = Field(
        description="Per axis (state variable, shock; tabular: state_label, the state's index), per choice "
        "(tabular: action, the chosen action's index; with taste shocks its expected index) and per define (grid "
        "models), its mean under the distribution (with taste shocks, a choice's and a define's over the points "
        "and the choices drawn there, weighted by their probabilities); null for a define that is not finite "
        "somewhere the distribution has mass."
    )
    sd: dict[str, float | None] = Field(description="The same names' standard deviations under the distribution "
                                        "(with taste shocks, over the points and the choices drawn there).")
    ends: dict[str, EndMass] = Field(
        description="Grid models: per state variable, the mass at the ends of its grid ({} for tabular models)."
    )
    method: Literal["direct", "gmres", "power", "refined"] = Field(
        description=f"How it was computed: direct (sparse LU, up to {DIRECT_MAX_STATES:,} points, or beyond when "
        "the states' order bounds its fill), gmres "
        "(preconditioned, one closed class), power (power iteration on the lazy chain) or refined (a search's "
        "trial: iterative refinement of the pinned system with the sparse LU of the trial before)."
    )
    residual: float = Field(description="‖πP − π‖₁, the distribution's residual (rounding-small for method direct).")
    steps: int = Field(
        description="Power-iteration steps taken (0 for direct; above the direct limit, up to "
        f"{POWER_FIRST_STEPS:,} come first, so gmres shows them too), or refinement steps for refined."
    )


SeriesSummary = create_model(
    "SeriesSummary",
    __base__=Reported,
    __doc__="One simulated series summarised over every recorded period of every path.",
    mean=(float, Field(description="The mean.")),
    sd=(float, Field(description="The standard deviation (population: divided by the number of draws).")),
    **{f"p{p}": (float, Field(description=f"The {p}th percentile.")) for p in PERCENTILES},
)


class SimulationReport(Reported):
    """report.simulation: paths drawn under the optimal policy, summarised, with the first path in full."""

    periods: int = Field(description="Periods recorded per path, the first being the start.")
    paths: int = Field(description="Number of paths.")
    seed: int = Field(description="The seed of the random numbers (the same seed gives the same paths).")
    summary: dict[str, SeriesSummary] = Field(  # type: ignore[valid-type]
        description="Per axis (state variable, shock; tabular: state_label, as an index) and per choice (tabular: "
        "action, as an index; with taste shocks the drawn choice), its summary."
    )
    first_path: dict[str, list[NumberOrLabel]] = Field(
        description="Path 0: per axis its values period by period (tabular: state labels), per choice the chosen "
        "values (tabular: action labels; with a finite horizon every series as numbers, tabular ones as indices)."
    )
    by_period: dict[str, list[float]] = absent_unless(
        description="Finite horizon only: per axis and per choice, the mean over the paths in each period.",
    )
    interpolated: Literal[True] = absent_unless(
        description="Continuous choice only: true, the paths' states lie off the grid and the policy was "
        "interpolated between grid points.",
    )


class CohortReport(Reported):
    """report.cohort (finite horizon): a cohort followed from period 0 under each period's policy."""

    distribution: NestedNumbers = Field(
        description="The cohort's distribution over the points in every period: [period] then the axes of value "
        "after period; each period's sums to 1."
    )
    means: dict[str, list[float]] = Field(
        description="Per axis and per choice (tabular: as an index), its mean in each period, from period 0."
    )


class SearchTrial(Reported):
    """One solve of the search, at one value of the unknowns."""

    unknowns: dict[str, float] = Field(description="The unknowns' values tried.")
    residuals: list[float] = Field(description="Each condition's value there, in the order of search.conditions.")
    inner_tolerance: float = Field(
        description="solver.tolerance of this solve (the first trials are solved more loosely)."
    )
    inner_status: StopStatus = Field(description="How this solve ended.")
    iterations: int = Field(description="Its iterations.")
    error_bound: float = Field(description="Its error bound.")
    stationary_residual: float = Field(description="‖πP − π‖₁ of its stationary distribution.")
    certified: bool = Field(
        default=True,
        description="A certifying trial (the document compiled afresh, solved at solver.tolerance with its hints "
        "verified), from which alone an answer is taken; false: a guiding trial, which only chose the next trial.",
    )
    seconds: float = Field(description="Time (s) this trial took.")


class SignChange(Reported):
    """The two closest trials whose first residuals have opposite signs."""

    below: dict[str, float] = Field(
        description="The lower trial: the unknown's name → its value, and residual → the first condition's value."
    )
    above: dict[str, float] = Field(description="The upper trial, the same way.")


class SearchOutcome(Reported):
    """A document with search: where the search stopped. The rest of the result is the solve at the unknowns
    below, at solver.tolerance."""

    status: Literal["converged", "not_met", "max_trials", "max_iterations", "time_limit"] = Field(
        description="converged (every condition within search.tolerance of 0), not_met, max_trials (search."
        "max_trials solves used up), or the status of a last solve that did not converge (max_iterations, "
        "time_limit). Anything but converged comes with a warning, and the point is not a solution."
    )
    unknowns: dict[str, float] = Field(description="The unknowns' values at the point reported.")
    residuals: list[float] = Field(description="Each condition's value there.")
    tolerance: float = Field(description="search.tolerance.")
    sign_change: SignChange | None = Field(
        description="One unknown: the closest trials on either side of zero; null with several unknowns or none."
    )
    trials: list[SearchTrial] = Field(description="Every solve made, in order.")
