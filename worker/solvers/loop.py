"""The loop every solution method shares: iterate, bound, stop, evaluate, checkpoint.

An *iteration* is one Bellman step ``v → Tv`` (with its greedy policy σ),
the stopping test on the error bound of that step, then a method-specific
evaluation that moves ``v`` (:mod:`worker.solvers.evaluation`).  The error
bound of a step is the MacQueen–Porteus bracket described in
:mod:`worker.solvers`.
"""

from __future__ import annotations

import time
from dataclasses import dataclass
from typing import Any, Callable

import numpy as np

from worker.convergence_log import ConvergenceLog
from worker.defaults import DEFAULT_CHECKPOINT_S
from worker.errors import Canceled, InvalidDocument
from worker.problem import CompiledProblem
from worker.solvers.outcome import EPS, ROUNDING_ULPS, Checkpoint, Entry, SolveOutcome, observed_rate

__all__ = ["STOP_POLL_S", "Accept", "Evaluate", "Options", "Run", "Step", "iterate", "meets", "options"]

STOP_POLL_S = 0.005
"""Seconds between two polls of ``should_stop`` during evaluation steps
(it is always polled before an iteration)."""


@dataclass
class Step:
    """One Bellman step ``v → Tv`` and its bracket."""

    tv: np.ndarray
    policy: np.ndarray
    distance: float
    lower: float
    upper: float
    rounding: float
    changes: int
    restricted: bool
    origin: np.ndarray | None = None
    """The ``v`` the step was taken from (kept for problems with taste shocks, whose evaluation uses the
    choice probabilities of this step)."""

    @property
    def error_bound(self) -> float:
        return 0.5 * (self.upper - self.lower) + self.rounding

    @property
    def improves(self) -> bool:
        """True when ``Tv`` beats ``v`` somewhere by more than rounding."""
        return self.upper > self.rounding


@dataclass
class Options:
    """The settings of one solve, as the methods receive them."""

    tolerance: float
    max_iterations: int
    time_limit_s: float | None
    checkpoint_s: float
    evaluation_steps: int
    on_progress: Callable[[Entry], None] | None
    checkpoint: Checkpoint | None
    should_stop: Callable[[], bool] | None
    fingerprint: str
    trust_hints: bool = False
    """Skip the unrestricted step that verifies the hints at the end (a search's guiding trials, whose
    answers are never returned: the trial that is returned is solved again with it)."""


def options(
    tolerance: float,
    max_iterations: int,
    time_limit_s: float | None,
    checkpoint_s: float | None,
    evaluation_steps: int,
    on_progress: Callable[[Entry], None] | None,
    checkpoint: Checkpoint | None,
    should_stop: Callable[[], bool] | None,
    fingerprint: str,
    *,
    trust_hints: bool = False,
) -> Options:
    """The :class:`Options` of a method's keyword arguments, normalised."""
    return Options(
        tolerance=float(tolerance),
        max_iterations=max(1, int(max_iterations)),
        time_limit_s=None if time_limit_s is None else float(time_limit_s),
        checkpoint_s=DEFAULT_CHECKPOINT_S if checkpoint_s is None else float(checkpoint_s),
        evaluation_steps=max(0, int(evaluation_steps)),
        on_progress=on_progress,
        checkpoint=checkpoint,
        should_stop=should_stop,
        fingerprint=fingerprint,
        trust_hints=bool(trust_hints),
    )


class Run:
    """The mutable state of one solve: iterate, counters, log, clocks, hooks."""

    def __init__(self, problem: CompiledProblem, initial: np.ndarray, options: Options, method: str) -> None:
        self.problem = problem
        self.options = options
        self.method = method
        self.beta = float(problem.discount)
        self.v = np.array(initial, dtype=np.float64).reshape(problem.n)
        self.iteration = 0
        self.evaluation_steps = 0
        self.linear_solves = 0
        self.log: list[Entry] = ConvergenceLog()
        self.policy: np.ndarray | None = None
        self.restricted = bool(problem.hints_active)
        self.verification: dict[str, Any] | None = None
        self.warnings: list[str] = []
        self.pending_steps: int | None = None
        self.taste = getattr(problem, "taste_scale", None) is not None
        self.origin: np.ndarray | None = None
        self.resumed_from: int | None = None
        self.seconds_before = 0.0
        self._resume()
        self.started = time.perf_counter()
        self.last_save = self.elapsed()
        self.step_block = 1  # evaluation steps per fused call, carried from phase to phase (never changes the result)
        self.last_poll = self.started

    def _resume(self) -> None:
        store = self.options.checkpoint
        if store is None:
            return
        state = store.load()
        if not state or state.get("fingerprint") != self.options.fingerprint or state.get("method") != self.method:
            return
        value = np.asarray(state["value"], dtype=np.float64)
        if value.shape != (self.problem.n,) or not np.isfinite(value).all():
            return
        self.v = value.copy()
        self.iteration = int(state["iteration"])
        self.evaluation_steps = int(state["evaluation_steps"])
        self.linear_solves = int(state.get("linear_solves", 0))
        self.log = ConvergenceLog([dict(entry) for entry in state["log"]][: self.iteration])
        policy = state.get("policy")
        self.policy = None if policy is None else _policy_array(policy)
        self.restricted = bool(state.get("restricted", self.restricted))
        verification = state.get("verification")
        self.verification = None if verification is None else dict(verification)
        self.warnings = list(state.get("warnings", []))
        # Checkpoints written before the key was renamed call it sweeps_done.
        done = state.get("evaluation_steps_done", state.get("sweeps_done"))
        self.pending_steps = None if done is None or self.policy is None else int(done)
        origin = state.get("evaluation_origin")
        self.origin = None if origin is None else np.asarray(origin, dtype=np.float64)
        if self.taste and self.pending_steps is not None and not self._restore_probabilities():
            self.pending_steps = None
        self.seconds_before = float(state.get("seconds", 0.0))
        self.resumed_from = self.iteration

    def _restore_probabilities(self) -> bool:
        """Taste shocks: redo the Bellman step of the interrupted phase, so that its remaining evaluation
        steps use the very probabilities the interrupted solve used (the step is deterministic); False
        when the checkpoint cannot give them back."""
        if self.origin is None or self.origin.shape != (self.problem.n,) or self.policy is None:
            return False
        _, policy = self.problem.bellman_step(self.origin)
        return bool(np.array_equal(_policy_array(policy), self.policy))

    def elapsed(self) -> float:
        """Solving seconds, counted across resumes."""
        return self.seconds_before + (time.perf_counter() - self.started)

    def out_of_time(self) -> bool:
        limit = self.options.time_limit_s
        return limit is not None and self.elapsed() >= limit

    def poll(self, *, force: bool = False) -> None:
        """Raise :class:`Canceled` when the stop flag is set."""
        should_stop = self.options.should_stop
        if should_stop is None:
            return
        now = time.perf_counter()
        if not force and now - self.last_poll < STOP_POLL_S:
            return
        self.last_poll = now
        if should_stop():
            raise Canceled(
                f"the solve was canceled after iteration {self.iteration}",
                iteration=self.iteration,
                log=list(self.log),
            )

    def save_if_due(self, *, steps_done: int | None = None) -> None:
        """Save a checkpoint when ``checkpoint_s`` of solving time has passed."""
        store = self.options.checkpoint
        if store is None or self.elapsed() - self.last_save < self.options.checkpoint_s:
            return
        seconds = self.elapsed()
        store.save(
            {
                "fingerprint": self.options.fingerprint,
                "method": self.method,
                "value": self.v.copy(),
                "iteration": self.iteration,
                "evaluation_steps": self.evaluation_steps,
                "linear_solves": self.linear_solves,
                "log": list(self.log),
                "policy": None if self.policy is None else self.policy.copy(),
                "evaluation_steps_done": steps_done,
                **(
                    {"evaluation_origin": self.origin.copy()}
                    if self.taste and steps_done is not None and self.origin is not None
                    else {}
                ),
                "restricted": self.restricted,
                "verification": None if self.verification is None else dict(self.verification),
                "warnings": list(self.warnings),
                "seconds": seconds,
            }
        )
        self.last_save = seconds

    def bellman(self, restricted: bool) -> Step:
        """A Bellman step at the current iterate, measured against the last policy; nothing is recorded."""
        tv, policy = self.problem.bellman_step(self.v, restricted=restricted, policy_guess=self.policy)
        tv = np.asarray(tv, dtype=np.float64)
        policy = _policy_array(policy)
        if not np.isfinite(tv).all():
            bad = np.flatnonzero(~np.isfinite(tv))
            raise InvalidDocument.at(
                "model",
                f"the Bellman step is not finite at {bad.size} states (first: flat state {int(bad[0])}): "
                "the reward or transition gives inf or NaN for every allowed choice there",
            )
        d = tv - self.v
        d_min, d_max = float(d.min()), float(d.max())
        k = self.beta / (1.0 - self.beta)
        scale = max(float(np.abs(tv).max()), float(np.abs(self.v).max()))
        changes = self.problem.n if self.policy is None else _changes(self.problem, policy, self.policy)
        return Step(
            tv=tv,
            policy=policy,
            distance=max(-d_min, d_max),
            lower=k * d_min,
            upper=k * d_max,
            rounding=ROUNDING_ULPS * EPS * scale / (1.0 - self.beta),
            changes=changes,
            restricted=restricted,
            origin=self.v if self.taste else None,
        )

    def record(self, step: Step) -> None:
        """Count ``step`` as an iteration: log it and report progress."""
        self.iteration += 1
        self.policy = step.policy
        self.origin = step.origin
        entry = {
            "iteration": self.iteration,
            "distance": step.distance,
            "error_bound": step.error_bound,
            "policy_changes": step.changes,
            "seconds": self.elapsed(),
        }
        self.log.append(entry)
        if self.options.on_progress is not None:
            self.options.on_progress(dict(entry))

    def improve(self) -> Step:
        """One iteration at the current iterate (hinted while the hints are in use)."""
        step = self.bellman(self.restricted)
        self.record(step)
        return step

    def verify(self, hinted: Step) -> Step:
        """The unrestricted Bellman step at the value of the hinted iteration ``hinted``: not an iteration.

        Compares it with the hinted step (a state whose value rises by more
        than rounding found a better choice outside the hinted search),
        records it as ``verification`` and ends the use of hints.
        """
        step = self.bellman(False)
        self.restricted = False
        scale = max(float(np.abs(step.tv).max()), float(np.abs(self.v).max()))
        broken = int(np.count_nonzero(step.tv > hinted.tv + ROUNDING_ULPS * EPS * scale))
        if broken:
            self.warnings.append(
                f"the {_hint_names(self.problem)} hint did not hold for this model: {broken} states found "
                "better choices outside the hinted search; re-solved without hints"
            )
        self.verification = {
            "distance": step.distance,
            "error_bound": step.error_bound,
            "policy_changes": step.changes,
            "seconds": self.elapsed(),
            "hints_held": not broken,
        }
        return step

    def kept(self, hinted: Step, checked: Step) -> Step:
        """The hinted step ``hinted``, kept as the solve's last step after the unrestricted step ``checked`` at
        the same ``v`` found the hints held (no point better by more than rounding), with a bracket that
        answers for both.

        Both steps' entries are values of allowed choices, found by two searches of the same objective (the
        hinted one narrowed, the unrestricted one over the whole interval); where the objective is flat
        around its maximum they stop at choices a little apart (on the Aiyagari bench up to about 1e-6 of
        the asset grid's width at some 950 of 1,400 points, values equal to 1e-14), and which of the two
        is higher at a point is rounding.  Ending with the unrestricted step's choices made a solve's policy
        depend on that rounding; keeping the hinted step's makes it the hinted iterations' own, so a
        search's certifying trial agrees with the guiding trials before it (:mod:`worker.search_trials`).

        The bracket: with ``m = max(hinted, checked)`` per point (each entry the value of an allowed choice,
        so ``m`` is a step of one policy, no farther from the exact operator's ``Tv`` than either step), the
        MacQueen–Porteus upper bound ``m + k·max(m − v)`` is as valid as the unrestricted step's alone was;
        ``m ≤ hinted + e`` with ``e = max(0, max(checked − hinted))`` (at most the verification's rounding
        allowance, as the hints held).  The lower bound ``hinted + k·min(hinted − v)`` holds for the hinted
        policy's own step.  So ``v*`` lies within ``[hinted + lower, hinted + upper]`` with ``lower =
        k·min(hinted − v)`` and ``upper = e + k·max(m − v)``; the midpoint is the value returned and half the
        width (plus the rounding allowance) its error bound.  Where the two steps agree to rounding it
        differs from the unrestricted step's bound by rounding only (measured on the Aiyagari bench's single
        jobs: by 1e-9 to 5e-6 of it, about 1e-14, either way; on the grid tests, not at all); where the hinted
        search found more than the unrestricted one, the bracket is the better values'.  ``verification``
        keeps the unrestricted step's own figures.  The kept step's policy is the last iteration's, so it
        changes no point.
        """
        e = max(0.0, float((checked.tv - hinted.tv).max()))
        m = np.maximum(hinted.tv, checked.tv)
        k = self.beta / (1.0 - self.beta)
        step = Step(tv=hinted.tv, policy=hinted.policy, distance=hinted.distance, lower=hinted.lower,
                    upper=e + k * float((m - self.v).max()), rounding=max(hinted.rounding, checked.rounding),
                    changes=0, restricted=False, origin=hinted.origin)
        return step

    def outcome(self, step: Step, status: str) -> SolveOutcome:
        shift = 0.5 * (step.lower + step.upper)
        value = step.tv + shift
        k = self.beta / (1.0 - self.beta)
        return SolveOutcome(
            value=value,
            policy=step.policy,
            status=status,
            iterations=self.iteration,
            evaluation_steps=self.evaluation_steps,
            linear_solves=self.linear_solves,
            log=self.log,
            error_bound=step.error_bound,
            bracket={
                "lower": step.lower,
                "upper": step.upper,
                "shift": shift,
                "standard_bound": k * step.distance + step.rounding,
                "rounding_allowance": step.rounding,
            },
            observed_rate=observed_rate(self.log, float(np.abs(value).max())),
            warnings=self.warnings,
            resumed_from_iteration=self.resumed_from,
            seconds=self.elapsed(),
            verification=None if self.verification is None else dict(self.verification),
        )


def _policy_array(policy: np.ndarray) -> np.ndarray:
    """A policy as the solvers keep it: int64 indices, or float64 values for a continuous choice."""
    array = np.asarray(policy)
    return array.astype(np.float64) if array.dtype.kind == "f" else array.astype(np.int64)


def _changes(problem: CompiledProblem, policy: np.ndarray, before: np.ndarray) -> int:
    """Points whose choice changed; a continuous choice must move by more than ``policy_resolution``."""
    if policy.dtype.kind == "f" and policy.ndim == 2:  # a continuous choice's values, and the others' combination
        resolution = float(getattr(problem, "policy_resolution", 0.0))
        return int(np.count_nonzero(~(np.abs(policy[:, 0] - before[:, 0]) <= resolution)
                                    | (policy[:, 1] != before[:, 1])))
    if policy.dtype.kind == "f":
        resolution = float(getattr(problem, "policy_resolution", 0.0))
        return int(np.count_nonzero(~(np.abs(policy - before) <= resolution)))
    return int(np.count_nonzero(policy != before))


def _hint_names(problem: CompiledProblem) -> str:
    hints = problem.hints
    names = [name for name, on in (("monotone", hints.monotone), ("concave", hints.concave)) if on]
    return "/".join(f"`{name}`" for name in names or ["monotone", "concave"])


Evaluate = Callable[[Run, np.ndarray, int], None]
"""``evaluate(run, policy, steps_done)``: move ``run.v`` after an iteration."""
Accept = Callable[[Step], bool]
"""``accept(step)``: may the solve stop as converged at this step?"""


def meets(tolerance: float) -> Accept:
    """The plain stopping rule: the step's error bound is within ``tolerance``."""
    return lambda step: step.error_bound <= tolerance


def _stop(run: Run, step: Step, accept: Accept) -> str | None:
    if accept(step):
        return "converged"
    if run.iteration >= run.options.max_iterations:
        return "max_iterations"
    if run.out_of_time():
        return "time_limit"
    return None


def iterate(
    problem: CompiledProblem, initial: np.ndarray, options: Options, method: str, evaluate: Evaluate, accept: Accept
) -> SolveOutcome:
    """The loop every method shares.

    Each iteration appends a log entry ``{"iteration", "distance"
    (‖Tv − v‖∞), "error_bound" (the error bound of that step's midpoint;
    for a hinted step, the bound of the restricted operator),
    "policy_changes" (states whose greedy choice differs from the previous
    iteration's; the first counts all), "seconds" (cumulative solving
    time)}`` and passes it to ``on_progress``.

    ``time_limit_s`` counts solving seconds across resumes.  It is checked
    after each iteration, between evaluation steps and between the restart
    cycles of an iterative linear solve; an evaluation cut short by it is
    followed by one more iteration, so the returned value always carries
    the error bound of its own step.  ``should_stop`` is polled before every
    iteration and at most every ``STOP_POLL_S`` between evaluation steps or
    restart cycles.  Checkpoints are saved at most every ``checkpoint_s``
    solving seconds, after an evaluation or between evaluation steps (with
    the steps done so far, so a resumed solve finishes the interrupted phase
    and then repeats exactly what the interrupted one would have done).

    With hints active, iterations are hinted until one would stop the solve
    (converged, ``max_iterations`` or the time limit).  Then one unrestricted
    Bellman step at the same ``v`` verifies the hints' promise
    (:meth:`Run.verify`); it is not an iteration, and the reported error bound
    always rests on it or on a later unrestricted step.  When the hints held,
    the solve's step is then the hinted one, with a bracket that answers for
    both (:meth:`Run.kept`); else the unrestricted one.  When it meets the
    stopping rule, or the solve had to stop anyway, the solve ends with it.
    Otherwise (the hints did not hold) the solve goes on unrestricted from
    it, and it counts as the next iteration.  With ``trust_hints`` there is
    no verification: the solve ends with the hinted step (``verification``
    None), for guiding trials of a search only.
    """
    run = Run(problem, initial, options, method)
    if run.pending_steps is not None and run.policy is not None:
        evaluate(run, run.policy, run.pending_steps)
        run.save_if_due()
    while True:
        run.poll(force=True)
        step = run.improve()
        stop = _stop(run, step, accept)
        if stop is not None and step.restricted and not options.trust_hints:
            checked = run.verify(step)
            held = run.verification is not None and run.verification["hints_held"]
            step = run.kept(step, checked) if held and not run.taste else checked
            if accept(step):
                return run.outcome(step, "converged")
            if stop != "converged":
                return run.outcome(step, stop)
            run.record(step)
            stop = _stop(run, step, accept)
        if stop is not None:
            return run.outcome(step, stop)
        run.v = step.tv
        evaluate(run, step.policy, 0)
        run.save_if_due()
