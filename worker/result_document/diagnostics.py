"""``diagnostics`` of the result document: how the solve went and what to check before trusting it.

Written by :func:`worker.solve._result` (infinite horizon) and :func:`worker.periods.horizon_result`
(finite horizon) from the solver's outcome and the compiled problem's own diagnostics
(:mod:`worker.griddiagnostics` for grid models, :mod:`worker.continuous.problem` for a continuous
choice; a tabular model adds none), :func:`worker.taste.diagnostics` and :mod:`worker.euler`.
"""

from __future__ import annotations

from typing import Literal, Union

from pydantic import Field

from worker.coarse_start import COARSE_MIN_POINTS, COARSE_SHARE
from worker.result_document._types import NestedOptionalNumbers, NumberOrLabel, Reported, absent_unless
from worker.solvers.loop import LOCAL_PHASES
from worker.solvers.outcome import RATE_WINDOW, ROUNDING_ULPS

__all__ = ["Diagnostics"]


class ErrorBracket(Reported):
    """The MacQueen–Porteus bracket of the last Bellman step v → Tv: v* − Tv lies in [lower, upper] at every
    point, and the returned value is Tv + shift. With a finite horizon: lower, upper and shift are 0 and both
    bounds are the rounding allowance accumulated over the periods."""

    lower: float = Field(description="Lower end of the bracket on v* − Tv (the same unit as the value).")
    upper: float = Field(description="Upper end of the bracket on v* − Tv.")
    shift: float = Field(description="(lower + upper) / 2, added to Tv to give the returned value.")
    standard_bound: float = Field(
        description="β/(1−β)·‖Tv − v‖∞ plus the rounding allowance: the error bound Tv alone would carry, for "
        "comparison with error_bound = (upper − lower)/2 plus the allowance."
    )
    rounding_allowance: float = Field(
        description=f"The allowance for float64 rounding included in both bounds ({ROUNDING_ULPS:g} ulps of the "
        "largest value, divided by 1 − β): a stated allowance, not a proof for every summation order."
    )


class LocalSearch(Reported):
    """After the first check found the hints false: the local phases that searched from the verified policy
    (the concave hint's bracket without the monotone narrowing), each checked by an unrestricted step."""

    phases: int = Field(
        description="Local phases: another one follows a check that found better choices at fewer states than the "
        f"check before it (at most {LOCAL_PHASES})."
    )
    iterations: int = Field(description="Local iterations taken, over all phases (each is also a log entry).")
    hints_held: bool = Field(
        description="True when the check of the last phase found no better choice outside the local search (the "
        "solve then ended with it, or went on unrestricted); false: the solve went on without hints."
    )
    first_states_better: int = Field(description="Points where the first check found a better choice.")
    first_policy_changes: int = Field(description="The first check's policy_changes.")


class Verification(Reported):
    """With speed hints (infinite horizon): the unrestricted Bellman step, at the value of the last hinted
    iteration, that checks the hints' promise. Not an iteration, unless the hints failed and the solve went on
    from it (then it is also the next log entry)."""

    distance: float = Field(description="‖Tv − v‖∞ of the unrestricted step.")
    error_bound: float = Field(description="The error bound of the unrestricted step's midpoint.")
    policy_changes: int = Field(description="Points whose choice differs from the last hinted iteration's.")
    seconds: float = Field(description="Solving time (s) when the verification ended, counted across resumes.")
    hints_held: bool = Field(
        description="False when some point found a better choice outside the hinted search (a warning says so and "
        "the solve went on: searching locally from the verified policy where the model's search can, see "
        "local_search, else without hints)."
    )
    local_search: LocalSearch = absent_unless(
        description="When the first check failed and the solve went on with a local search: those phases and their "
        "checks (the figures above are then the last check's); absent otherwise."
    )


class HorizonVerification(Reported):
    """With speed hints and a finite horizon: each period's hinted search checked by the unrestricted step at
    the same value of the next period (the value kept is always the unrestricted step's)."""

    periods: int = Field(description="Periods checked.")
    hints_held: bool = Field(description="False when the hinted search missed a better choice in some period.")
    periods_broken: int = Field(description="Periods where the hinted search missed a better choice.")
    policy_changes: int = Field(
        description="Points, summed over the periods, whose unrestricted choice differs from the hinted one."
    )
    seconds: float = Field(description="Solving time (s) when the last period was done.")


class HintsUsed(Reported):
    """The speed hints a grid model's solve used (after checking which apply)."""

    monotone: bool = Field(description="The monotone hint was used.")
    concave: bool = Field(description="The concave hint was used.")


class EdgeHits(Reported):
    """How often the final policy picks an end of a grid-restricted choice's grid."""

    lowest: float = Field(description="Share of points (0 to 1) choosing the lowest value.")
    highest: float = Field(description="Share of points (0 to 1) choosing the highest value.")


class PointCount(Reported):
    """A count and the share it is of the points."""

    count: int = Field(description="How many.")
    share: float = Field(description="count as a share (0 to 1) of the points.")


class PairCount(Reported):
    """A count over (state, choice) pairs."""

    count: int = Field(description="How many.")
    share: float = Field(description="count as a share (0 to 1) of the pairs named in of.")
    of: str = Field(description="What the share is of, in words.")


class ClampedNext(Reported):
    """Grid models whose laws of motion (next) give a state variable off its grid: how often tomorrow's value
    fell outside the grid and was moved to the nearest end."""

    states: list[str] = Field(description="The state variables with a law of motion (not set by a next_of choice).")
    policy: PointCount = Field(description="Points where, under the final policy, tomorrow's value left the grid.")
    all_pairs: PairCount | None = Field(
        description="The same over every allowed (state, choice) pair; null when there were too many to count."
    )
    note: str = absent_unless(description="Why all_pairs is null; absent otherwise.")


class CoarseStart(Reported):
    """A solve from zeros on fine state grids that began from the same model solved on coarser grids (see
    README.md's "Continuous choices")."""

    points: dict[str, int] = Field(description="The first coarse level's grid points, per state coarsened.")
    levels: int = Field(description=f"Coarse levels solved, each on one in {COARSE_SHARE} of the points of the one "
                        "above.")
    iterations: int = Field(description="Iterations of every coarse level together (not in the result's iterations).")
    seconds: float = Field(description="Time of the coarse levels (included in the result's seconds).")


class PairExample(Reported):
    """One (state, choice) pair, in words."""

    state: str = Field(description="The point, e.g. `k = 1.5, z = 0.9`.")
    choice: str = Field(description="The choice, e.g. `k_next = 2`.")


class NonfiniteRewards(Reported):
    """Feasible (state, choice) pairs where the reward or a next value was NaN or +inf: they were treated as not
    allowed (and a warning says so). Absent when there were none."""

    count: int = Field(description="How many pairs.")
    scope: str = Field(description="Which pairs were looked at, in words.")
    example: PairExample = Field(description="The first such pair.")


class Timings(Reported):
    """Seconds spent outside the iterations."""

    prepare_s: float = Field(description="Reading the model and filling its tables (s).")
    compile_s: float = Field(description="Compiling or loading the model's kernels (s).")
    euler_s: float = absent_unless(
        description="Measuring the Euler-equation errors (s); absent when they were not measured."
    )


class EndogenousGrid(Reported):
    """solver.method endogenous_grid: the method's own rounds before the solver certified its policy."""

    rounds: int = Field(description="Rounds of the endogenous grid method.")
    leaps: int = Field(
        description="Leaps the rounds made over the geometric tail of their moves (Aitken's extrapolation while the "
        "moves shrink at a steady rate; a leap is not a round, and the answer is a round's)."
    )
    last_change: float = Field(description="The largest move of a choice in the last round.")
    seconds: float = Field(description="Time (s) spent in the rounds.")
    greedy_gap: float = Field(
        description="The largest distance between the method's policy (the one reported) and the fitted problem's "
        "own maximising policy at the returned value; 0 when the problem was found not concave and Howard's "
        "method's policy was returned instead (a warning says so)."
    )


class EndogenousGridByPeriod(Reported):
    """solver.method endogenous_grid with a finite horizon: one round of the method per period."""

    periods: int = Field(description="Periods whose policy is the method's round (from the next period's policy).")
    searched_periods: list[int] = Field(
        description="Periods solved by the ordinary search instead: the last, when the terminal value has no slope "
        "the method can use (or a kink in the state); a period whose continuation is not concave (its round's "
        "endogenous states do not rise with the choice, or its expected marginal value rises), and every earlier "
        "one (a warning names the first such period and shock point)."
    )
    seconds: float = Field(description="Time (s) spent in the rounds.")
    greedy_gap: float = Field(
        description="The largest distance, over the periods, between the method's policy (the one reported) and the "
        "fitted problem's own maximising policy at that period's value."
    )
    value_gap: float = Field(
        description="The most the method's policy loses, over the periods, against the fitted maximum (the value "
        "reported): V_t − (reward + β_t E V_{t+1}) at the method's choice, never negative beyond rounding."
    )
    greedy_gap_by_period: list[float] = Field(description="greedy_gap of each period, from the first solved.")


class ContinuousChoice(Reported):
    """A continuous choice: how its maximum was searched for and how tomorrow's value was interpolated."""

    choice: str = Field(description="The continuous choice's name.")
    interpolation: Literal["linear", "monotone_cubic"] = Field(description="model.interpolation.")
    certified: bool = Field(
        description="True when the error bound is a proof for the fitted problem (linear interpolation); "
        "monotone_cubic interpolation is not linear in the value, so its bound is not."
    )
    search: Literal["brent_from_bracket", "branch_and_bound", "scan_and_refine"] = Field(
        description="brent_from_bracket (with the concave hint: Brent's method from a bracket); without it, "
        "branch_and_bound (a next_of choice where the bound holds: runs of grid intervals that an upper bound proves "
        "cannot beat the best choice found are skipped, the others searched interval by interval, locally inside "
        "each) or scan_and_refine (elsewhere: a scan of the interval, then a refinement of the best point scanned; a "
        "maximum hidden between two scanned points can be missed). A hinted solve's verifying step searches as "
        "an unhinted one."
    )
    monotone_narrowing: bool = Field(description="The monotone hint narrowed each search's interval.")
    clamped_next: int = Field(
        description="Points where tomorrow's state under the policy lay outside its grid and was moved to the "
        "nearer end (a count; grid models without a continuous choice report diagnostics.clamped_next, an object)."
    )
    at_lower_end: int = absent_unless(
        description="next_of choices: points choosing the lowest value of the state's grid."
    )
    at_upper_end: int = absent_unless(
        description="next_of choices: points choosing the highest value of the state's grid."
    )
    searched_for_each: list[str] = absent_unless(
        description="With other choices beside the continuous one: their names; the continuous choice is searched "
        "for each combination of their values, and the best combination kept."
    )
    combinations: int = absent_unless(description="With other choices: how many combinations of their values.")
    endogenous_grid: EndogenousGrid | EndogenousGridByPeriod = absent_unless(
        description="With solver.method endogenous_grid (finite horizon: by period)."
    )


class TasteShockInfo(Reported):
    """model.taste_shocks: what the value includes and the choices choice_probabilities covers."""

    scale: float = Field(description="The taste shocks' scale σ.")
    shocked_choices: list[str] = Field(
        description="The choices that carry the shocks (model.taste_shocks.choices; default every choice; tabular: "
        '["action"]). The others are maximised exactly given them: choice_probabilities is 0 wherever they are '
        "not the best for the shocked choices' values."
    )
    distribution: str = Field(description="The taste shocks' distribution, in words.")
    euler_constant_included: bool = Field(
        description="False: the shocks are centred, so the value does not include σ × Euler's constant per period."
    )
    location_zero_offset: float | list[float] = Field(
        description="σ × Euler's constant / (1 − discount): add it to every value for shocks of location zero "
        "(finite horizon: one number per period, o_t = σγ + β_t·o_{t+1}, added to that period's values)."
    )
    note: str = Field(description="What the value includes, in words.")
    choices: dict[str, list[NumberOrLabel]] = Field(
        description="The choices' values, in the order of the last axes of choice_probabilities (tabular: "
        '{"action": labels}).'
    )
    probabilities_at: str = Field(description="Which values the choice probabilities were computed from.")


class EulerProfile(Reported):
    """The Euler-equation errors across the state, for a plot."""

    state: str = Field(description="The state variable the choice sets (the profile runs along it).")
    at: list[float] = Field(description="Values of the state, increasing.")
    log10_error: NestedOptionalNumbers = Field(
        description="log10 errors, [len(at)][shock points] (shock points in C order); null where nothing was measured."
    )
    pooled: int = Field(
        description="Test points per entry: 1, or with many test points the worst of that many consecutive ones."
    )
    over: list[str] = absent_unless(
        description="Several states only: the other state variables; each entry is the worst error over their grid "
        "points (the test points lie at them)."
    )


class EulerByPeriod(Reported):
    """Finite horizon: the Euler-equation errors of each period measured (lists of equal length)."""

    period: list[int] = Field(description="The periods measured (every period but the last).")
    max_log10: list[float | None] = Field(description="Each period's largest log10 error.")
    mean_log10: list[float | None] = Field(description="Each period's mean log10 error.")


class EulerChoiceErrors(Reported):
    """One choice's Euler-equation errors, in a model with several choices that each set tomorrow's value of a
    state: its own Euler equation, the other choices held at the policy's."""

    state: str = Field(description="The state variable the choice sets (its test points lie along it).")
    define: str = Field(description="The define through which the reward depends on the choice.")
    max_log10: float | None = Field(description="The largest log10 error; null when no point was measured.")
    mean_log10: float | None = Field(description="The mean log10 error; null when no point was measured.")
    points: int = Field(description="Test points measured.")
    constrained: int = Field(description="Test points skipped because a limit of the choice may bind there.")
    undefined: int = Field(description="Test points skipped because a derivative was not a finite number.")
    profile: EulerProfile | None = Field(description="The errors along the state.")
    weighted_mean_log10: float | None = Field(
        default=None,
        description="With report.stationary: the mean weighted by the stationary distribution; absent otherwise.",
    )


class EulerErrors(Reported):
    """report.euler_errors: the unit-free accuracy of the policy (Judd 1992) at test points between the grid
    points, log10 of |1 − c̃/c| where c̃ is the value of define that makes the Euler equation hold."""

    max_log10: float | None = Field(description="The largest log10 error; null when no point was measured.")
    mean_log10: float | None = Field(description="The mean log10 error; null when no point was measured.")
    points: int = Field(description="Test points measured.")
    constrained: int = Field(description="Test points skipped because a limit of the choice may bind there.")
    undefined: int = Field(description="Test points skipped because a derivative was not a finite number.")
    define: str = Field(description="The define through which the reward depends on the choice (c above).")
    profile: EulerProfile | None = Field(description="The errors across the state.")
    weighted_mean_log10: float | None = Field(
        default=None,
        description="With report.stationary (infinite horizon): the mean weighted by the stationary distribution; "
        "absent otherwise.",
    )
    by_period: EulerByPeriod = absent_unless(description="Finite horizon only.")
    by_choice: dict[str, EulerChoiceErrors] = absent_unless(
        description="Several choices that each set tomorrow's value of a state (and no other choice; one of them may "
        "be continuous, read by the fitted problem's own search): each one's own errors, by the choice's name. The "
        "keys above then pool them (the largest, the mean over every point "
        "measured, the sums); define and profile are those of the choice with the largest error (finite horizon: "
        "in the first period measured; each choice's own over all periods here)."
    )


class HorizonDiagnostics(Reported):
    """model.horizon: the periods and their discounts."""

    periods: int = Field(description="T, the number of periods.")
    discount: list[float] = Field(description="β_t of each period, from period 0.")
    rounding_allowance: list[float] = Field(
        description="The rounding allowance accumulated down to each period solved, from the first period solved."
    )


class Diagnostics(Reported):
    """How the solve went. The keys up to log_dropped are in every result; the others only for the models their
    descriptions name."""

    observed_rate: float | None = Field(
        description="The measured contraction rate: the geometric mean of the ratios of successive log "
        f"distances (at most the last {RATE_WINDOW} pairs above rounding noise). For value iteration at most β; "
        "for Howard's method and policy iteration the rate per iteration. Null when no pair qualifies, and with a "
        "finite horizon."
    )
    warnings: list[str] = Field(
        description="Things to check before trusting the answer, in plain words (grid ends reached, hints that did "
        "not hold, a search that did not meet its tolerance, ...)."
    )
    resumed_from_iteration: int | None = Field(
        description="The checkpoint's iteration when the solve resumed from one (a worker was lost); else null. For "
        "a search, a log entry's iteration is a trial's number: this is the number of trials its checkpoint held "
        "complete (answered from it without solving again), 0 when it was saved inside the first trial; "
        "resumed_trial_iteration then says where within the next trial the resume started."
    )
    verification: Union[Verification, HorizonVerification, None] = Field(
        description="With speed hints: the unrestricted check of the hinted search; null without hints."
    )
    bracket: ErrorBracket = Field(description="The bracket behind the error bound.")
    log_dropped: int = Field(
        description="Iterations the bounded log does not hold (every early one is kept, then a sampling, then the "
        "latest)."
    )
    notes: list[str] = absent_unless(
        description="How the model was solved, in plain words (reward storage, choices maximised within the period, "
        "backward induction, ...), and why a measurement asked for was skipped. Grid models and finite horizons "
        "always; other models only with such a note."
    )
    reward_storage: Literal["tables", "on_the_fly"] = absent_unless(
        description="Grid models without a continuous choice: tables (rewards precomputed for every (point, "
        "choice) pair) or on_the_fly (computed inside the kernels).",
    )
    hints: HintsUsed = absent_unless(description="Grid models without a continuous choice.")
    edge_hits: dict[str, EdgeHits] = absent_unless(
        description="Grid models without a continuous choice: per choice, how often an end is chosen."
    )
    maximised_within_period: list[str] = absent_unless(
        description="Grid models without a continuous choice: the choices that affect nothing tomorrow, maximised "
        "out within the period.",
    )
    clamped_next: ClampedNext = absent_unless(
        description="Grid models with a state variable moved by a law of motion (next)."
    )
    nonfinite_rewards: NonfiniteRewards = absent_unless(
        description="Grid models where some feasible reward was NaN or +inf."
    )
    timings: Timings = absent_unless(description="Grid models (a continuous choice included).")
    continuous_choice: ContinuousChoice = absent_unless(description="Grid models with a continuous choice.")
    taste_shocks: TasteShockInfo = absent_unless(description="With model.taste_shocks (infinite horizon).")
    euler_errors: EulerErrors = absent_unless(
        description="With report.euler_errors, where the model has the form they need (notes say why not otherwise)."
    )
    horizon: HorizonDiagnostics = absent_unless(description="With model.horizon.")
    resumed_trial_iteration: int = absent_unless(
        description="A search resumed from a checkpoint saved inside a trial (number resumed_from_iteration + 1): "
        "the iteration that trial's solve went on from (its own solver's checkpoint iteration)."
    )
    coarse_start: CoarseStart = absent_unless(
        description=f"A solve from zeros of a model with a continuous choice and a state grid of {COARSE_MIN_POINTS} "
        "points or more."
    )
