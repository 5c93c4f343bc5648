"""The loop every solution method shares: iterate, bound, stop, evaluate, checkpoint.

An *iteration* is one Bellman step ``v → Tv`` (with its greedy policy σ),
the stopping test on the error bound of that step, then a method-specific
evaluation that moves ``v`` (:mod:`worker.solvers.evaluation`).  The error
bound of a step is the MacQueen–Porteus bracket described in
:mod:`worker.solvers`.  With hints, restricted iterations (hinted, then after
a failed verification possibly local ones) are always checked by an
unrestricted step before the solve ends on them (:func:`iterate`).
"""

from __future__ import annotations

import time
from typing import Any, Callable

import numpy as np

from worker.convergence_log import ConvergenceLog
from worker.errors import Canceled, InvalidDocument
from worker.problem import CompiledProblem
from worker.solvers.outcome import EPS, ROUNDING_ULPS, Entry, SolveOutcome, observed_rate
from worker.solvers.step import Options, Step, options

__all__ = ["STOP_POLL_S", "Accept", "Evaluate", "Options", "Run", "Step", "iterate", "meets", "options"]

LOCAL_MIN_ITERATIONS = 10
"""A local phase after a failed verification may take as many iterations as the solve had taken when it
began, and at least this many (count; common practice: a phase started near the fixed point should converge in
fewer iterations than the whole solve before it); then it is verified, and the solve goes on without hints."""
LOCAL_PHASES = 3
"""Most local phases of one solve (count).  Another one starts only when the check of the one before found
better choices at fewer states than the check before it, and that phase converged within its cap (on the
accuracy benchmark at 5,000 points: 1,769 states, then 2, then none)."""
STOP_POLL_S = 0.005
"""Seconds between two polls of ``should_stop`` during evaluation steps
(it is always polled before an iteration)."""


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
        self.local_step = getattr(problem, "local_step", None)
        """The problem's local restricted step, or None: ``local_step(v, policy_guess=) -> (Tv, policy)``."""
        self.local: dict[str, int] | None = None
        """In a local phase: ``{"from": the iteration it began after, "phase": its number, "earlier": local
        iterations of the phases before, "last": states the check before it found better, "broken" and "changes":
        the first check's states found better and policy changes}``."""
        self.verification: dict[str, Any] | None = None
        self.broken = 0  # states the last verification found better outside the restricted search
        self.capped = False  # the last local phase reached its cap
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
        local = state.get("local")
        self.local = None if local is None else {key: int(local[key]) for key in _LOCAL_KEYS}
        if self.local is not None and self.local_step is None:
            self.local, self.restricted = None, False
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
                "local": None if self.local is None else dict(self.local),
                "verification": None if self.verification is None else dict(self.verification),
                "warnings": list(self.warnings),
                "seconds": seconds,
            }
        )
        self.last_save = seconds

    def bellman(self, restricted: bool, *, local: bool = False) -> Step:
        """A Bellman step at the current iterate, measured against the last policy; nothing is recorded.
        ``local``: the problem's local restricted step from the last policy (a restricted step)."""
        if local and self.local_step is not None and self.policy is not None:
            tv, policy = self.local_step(self.v, policy_guess=self.policy)
        else:
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
        """One iteration at the current iterate (hinted while the hints are in use, local in the local phase)."""
        step = self.bellman(self.restricted, local=self.restricted and self.local is not None)
        self.record(step)
        return step

    def verify(self, hinted: Step) -> Step:
        """The unrestricted Bellman step at the value of the hinted (or local) iteration ``hinted``: not an
        iteration.

        Compares it with that step (a state whose value rises by more than
        rounding found a better choice outside the restricted search), records
        it as ``verification`` (after a local phase with ``local_search``: the
        ``phases`` so far, their ``iterations``, whether this check found the
        last one held, and the first check's count of states better outside
        the hinted search and policy changes; ``hints_held`` stays False, the
        first check having found the hints false) and ends the use of hints
        until :meth:`go_local`.
        """
        step = self.bellman(False)
        self.restricted = False
        scale = max(float(np.abs(step.tv).max()), float(np.abs(self.v).max()))
        broken = int(np.count_nonzero(step.tv > hinted.tv + ROUNDING_ULPS * EPS * scale))
        self.broken = broken
        local, self.local = self.local, None
        first = broken if local is None else local["broken"]
        said = (f"the {_hint_names(self.problem)} hint did not hold for this model: {first} states found better "
                "choices outside the hinted search; ")
        self.verification = {
            "distance": step.distance,
            "error_bound": step.error_bound,
            "policy_changes": step.changes,
            "seconds": self.elapsed(),
            "hints_held": local is None and not broken,
        }
        if local is None:
            if broken:
                self.warnings.append(said + "re-solved without hints")
            return step
        done = self.iteration - local["from"]
        self.capped = done >= _local_cap(local["from"])
        phases = f" in {local['phase']} phases" if local["phase"] > 1 else ""
        self.warnings.append(
            said + f"searched locally from the verified policy ({local['earlier'] + done} iterations{phases}"
            + (", the last one up to its cap" if self.capped else "") + "), verified again: "
            + (f"did not hold at {broken} states; re-solved without hints" if broken else "held")
        )
        self.verification["local_search"] = {
            "phases": local["phase"],
            "iterations": local["earlier"] + done,
            "hints_held": not broken,
            "first_states_better": local["broken"],
            "first_policy_changes": local["changes"],
        }
        return step

    def go_local(self, before: dict[str, int] | None) -> None:
        """After a check found better choices and the solve goes on from its step: search locally from its
        policy (the problem's ``local_step``), when the problem offers one and this is the first check, or
        ``before`` (the local phase just checked) converged, had fewer than :data:`LOCAL_PHASES`, and its check
        found fewer states better than the check before it.  The warning of :meth:`verify` is written again
        when the phase is checked."""
        if self.local_step is None or not self.broken or self.verification is None:
            return
        search = self.verification.get("local_search")
        if search is None:
            first = {"phase": 1, "earlier": 0, "broken": self.broken, "changes": self.verification["policy_changes"]}
        elif before is None or self.capped or search["phases"] >= LOCAL_PHASES or self.broken >= before["last"]:
            return
        else:
            first = {"phase": search["phases"] + 1, "earlier": search["iterations"], "broken": before["broken"],
                     "changes": before["changes"]}
        self.warnings.pop()
        self.local = {"from": self.iteration, "last": self.broken, **first}
        self.restricted = True

    def local_capped(self) -> bool:
        """True when the local phase has taken its most iterations (see :data:`LOCAL_MIN_ITERATIONS`)."""
        return self.local is not None and self.iteration - self.local["from"] >= _local_cap(self.local["from"])

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


_LOCAL_KEYS = ("from", "phase", "earlier", "last", "broken", "changes")


def _local_cap(began: int) -> int:
    return max(LOCAL_MIN_ITERATIONS, began)


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
    Otherwise it counts as the next iteration and the solve goes on from it:
    unrestricted, unless the hints failed this first check and the problem
    offers a ``local_step`` (a restricted search from the last policy, without
    the narrowing by neighbours' choices: the concave hint's bracket grown
    from the verified choice).  Then the *local phase*: local iterations from
    the verified policy until one would stop the solve or the phase has taken
    ``max(LOCAL_MIN_ITERATIONS, iterations before it)``; a second unrestricted
    step verifies it the same way (``verification.local_search``), its result
    used as after the first.  If the solve must go on, it does so in another
    local phase from that step while the checks find fewer states better (at
    most ``LOCAL_PHASES``), else unrestricted.  Where the cubic interpolant of a fine grid is not exactly concave,
    the hinted search misses the better peak at some states; from the verified
    policy the local search mostly stays on it, at the cost of a hinted step
    rather than an unrestricted one.  With ``trust_hints`` there is
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
        if (stop is not None or run.local_capped()) and step.restricted and not options.trust_hints:
            before = run.local
            checked = run.verify(step)
            step = run.kept(step, checked) if not run.broken and not run.taste else checked
            if accept(step):
                return run.outcome(step, "converged")
            if stop is not None and stop != "converged":
                return run.outcome(step, stop)
            run.record(step)
            stop = _stop(run, step, accept)
            if stop is None:
                run.go_local(before)
        if stop is not None:
            return run.outcome(step, stop)
        run.v = step.tv
        evaluate(run, step.policy, 0)
        run.save_if_due()
