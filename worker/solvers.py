"""Value iteration, Howard and policy iteration, with certified error bounds.

All three methods share one loop (:func:`_iterate`): an *improvement step*
``v → Tv`` (the Bellman operator, with its greedy policy σ), a stopping test on
the certified bound of that step, then a method-specific *evaluation*:

* ``value_iteration`` — ``v ← Tv``;
* ``howard`` — ``v ← Tv``, then sweeps ``v ← r_σ + β P_σ v`` (modified
  policy iteration): ``evaluation_steps`` of them while the policy changes,
  more once it is stable (see :func:`_phase_plan`);
* ``policy_iteration`` — ``v ← v_σ``, the exact solution of
  ``(I − β P_σ) v = r_σ`` (one sparse linear solve).

Certified bound
---------------
For any ``v``, with ``d = Tv − v`` and ``k = β / (1 − β)``, the
MacQueen–Porteus bounds hold statewise::

    Tv + k·min(d)  ≤  v*  ≤  Tv + k·max(d)

The value returned is the midpoint ``Tv + k·(min d + max d)/2`` and its
certified sup-norm distance to ``v*`` is half the bracket width,
``k·(max d − min d)/2``, which never exceeds the textbook bound
``k·‖d‖∞`` for ``Tv`` itself.  Both get a floating-point allowance
``ROUNDING_ULPS · ε · max(‖Tv‖∞, ‖v‖∞) / (1 − β)`` (ε the float64 machine
epsilon): an error δ in the computed ``Tv`` moves the bracket by at most
``δ/(1 − β)``.  The allowance is a stated bound on the rounding of one
Bellman step (sums of a row's terms, the reward addition, the midpoint
shift), not a proof for every summation order; with it the bound is never
below the true error in the tests across many random problems.  Because the
allowance is never zero for a non-zero value, a tolerance below it simply
runs to ``max_iterations``.

Statuses are data, not exceptions: ``converged`` (bound ≤ tolerance),
``max_iterations``, ``time_limit``.  A stop flag raises
:class:`worker.errors.Canceled`.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field
from typing import Any, Callable, Protocol

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from worker.defaults import DEFAULT_CHECKPOINT_S, DEFAULT_EVALUATION_STEPS, DEFAULT_MAX_ITERATIONS, DEFAULT_TOLERANCE
from worker.errors import Canceled, InvalidDocument
from worker.problem import CompiledProblem

__all__ = [
    "DEFAULT_CHECKPOINT_S",
    "DEFAULT_EVALUATION_STEPS",
    "DEFAULT_MAX_ITERATIONS",
    "DEFAULT_TOLERANCE",
    "METHODS",
    "RATE_FLOOR_ULPS",
    "RATE_WINDOW",
    "ROUNDING_ULPS",
    "MOVING_SWEEPS_DIVISOR",
    "STABLE_SWEEPS_FACTOR",
    "STOP_POLL_S",
    "SWEEP_BLOCK_S",
    "Checkpoint",
    "SolveOutcome",
    "observed_rate",
]

ROUNDING_ULPS = 16.0
"""Rounding allowance of one Bellman step, in ulps of ``max(‖Tv‖∞, ‖v‖∞)``
(before the ``1/(1 − β)`` factor).  Common practice: a handful of ulps covers
a row sum, the reward addition and the midpoint shift."""
STOP_POLL_S = 0.005
"""Seconds between two polls of ``should_stop`` during evaluation sweeps
(it is always polled before an improvement step)."""
SWEEP_BLOCK_S = 0.004
"""Seconds of fused evaluation sweeps per kernel call, between two polls of the stop flag and the clocks."""
MOVING_SWEEPS_DIVISOR = 5
"""Howard: while the policy changes, an evaluation phase is ``evaluation_steps`` divided by this (count)."""
STABLE_SWEEPS_FACTOR = 20
"""Howard: once the policy stops changing, the evaluation phase may run this many times
``evaluation_steps`` sweeps (count; it ends earlier when the sweeps have settled)."""
RATE_WINDOW = 10
"""``observed_rate`` uses at most this many successive distance ratios."""
RATE_FLOOR_ULPS = 1e6
"""Distances below this many ulps of ``‖value‖∞`` are rounding noise and
are left out of ``observed_rate``."""

_EPS = float(np.finfo(np.float64).eps)

Entry = dict[str, Any]


class Checkpoint(Protocol):
    """Where a solve keeps its state (see DEVELOPERS.md, "The solve front door").

    A saved state holds ``fingerprint`` (str), ``method`` (str), ``value``
    ((n,) float64, the iterate), ``iteration``, ``evaluation_steps`` (ints),
    ``log`` (list of entries, ``iteration`` of them), ``policy`` ((n,) int64,
    the last greedy policy, or None), ``sweeps_done`` (int: Howard sweeps of
    the current phase already applied to ``value``; None at a phase
    boundary), ``restricted`` (bool: hints still in use), ``warnings`` (list
    of str) and ``seconds`` (float, solving time so far).  A state whose
    fingerprint, method or value shape does not match is ignored.
    """

    def load(self) -> dict[str, Any] | None: ...

    def save(self, state: dict[str, Any]) -> None: ...


@dataclass
class SolveOutcome:
    """What every method returns.

    Attributes
    ----------
    value : (n,) float64
        The MacQueen–Porteus midpoint of the last improvement step.
    policy : (n,) int64
        The greedy policy of the last improvement step.
    status : str
        ``converged``, ``max_iterations`` or ``time_limit``.
    iterations : int
        Improvement (Bellman) steps, counted across resumes.
    evaluation_steps : int
        Howard: evaluation sweeps; policy iteration: linear solves; value
        iteration: 0.
    log : list of dict
        One entry per improvement step (see :func:`_iterate`).
    error_bound : float
        Certified ``‖value − v*‖∞``: half the bracket width plus the rounding
        allowance, always from an unrestricted (hint-free) step.
    bracket : dict
        ``lower``, ``upper``: ``v* − Tv`` lies in ``[lower, upper]`` at every
        state for the last step's ``Tv``; ``shift = (lower + upper)/2`` was
        added to ``Tv`` to give ``value``; ``standard_bound`` is
        ``β/(1−β)·‖Tv − v‖∞`` plus the allowance (the bound ``Tv`` alone
        would have); ``rounding_allowance`` is the allowance included in both.
    observed_rate : float or None
        See :func:`observed_rate`.
    warnings : list of str
        Plain-English notes (e.g. a broken hint).
    resumed_from_iteration : int or None
        The checkpoint's iteration when the solve resumed from one.
    seconds : float
        Solving time, counted across resumes.
    """

    value: np.ndarray
    policy: np.ndarray
    status: str
    iterations: int
    evaluation_steps: int
    log: list[Entry]
    error_bound: float
    bracket: dict[str, float]
    observed_rate: float | None
    warnings: list[str] = field(default_factory=list)
    resumed_from_iteration: int | None = None
    seconds: float = 0.0


def observed_rate(log: list[Entry], scale: float) -> float | None:
    """The measured contraction rate of successive improvement distances.

    With ``d_t`` the ``distance`` (``‖Tv_t − v_t‖∞``) of log entry ``t``, the
    rate is the geometric mean of ``d_{t+1} / d_t`` over the last
    ``RATE_WINDOW`` consecutive pairs of entries whose distances are both
    above the rounding floor ``RATE_FLOOR_ULPS · ε · scale``.  For value
    iteration every ratio is at most β (contraction mapping theorem), so the
    rate is too; for Howard and policy iteration it is the rate per
    improvement step, usually far below β.  ``None`` when no pair qualifies.

    Parameters
    ----------
    log : list of dict
    scale : float
        ``‖value‖∞`` of the result, to place the rounding floor.
    """
    floor = RATE_FLOOR_ULPS * _EPS * scale
    distances = np.array([entry["distance"] for entry in log], dtype=np.float64)
    if distances.size < 2:
        return None
    above = distances > floor
    pairs = np.flatnonzero(above[:-1] & above[1:])[-RATE_WINDOW:]
    if not pairs.size:
        return None
    ratios = distances[pairs + 1] / distances[pairs]
    return float(np.exp(np.mean(np.log(ratios))))


@dataclass
class _Step:
    """One improvement step ``v → Tv`` and its bounds."""

    tv: np.ndarray
    policy: np.ndarray
    distance: float
    lower: float
    upper: float
    rounding: float
    changes: int
    restricted: bool

    @property
    def error_bound(self) -> float:
        return 0.5 * (self.upper - self.lower) + self.rounding

    @property
    def improves(self) -> bool:
        """True when ``Tv`` beats ``v`` somewhere by more than rounding."""
        return self.upper > self.rounding


@dataclass
class _Options:
    tolerance: float
    max_iterations: int
    time_limit_s: float | None
    checkpoint_s: float
    evaluation_steps: int
    on_progress: Callable[[Entry], None] | None
    checkpoint: Checkpoint | None
    should_stop: Callable[[], bool] | None
    fingerprint: str


class _Run:
    """The mutable state of one solve: iterate, counters, log, clocks, hooks."""

    def __init__(self, problem: CompiledProblem, initial: np.ndarray, options: _Options, method: str) -> None:
        self.problem = problem
        self.options = options
        self.method = method
        self.beta = float(problem.discount)
        self.v = np.array(initial, dtype=np.float64).reshape(problem.n)
        self.iteration = 0
        self.evaluation_steps = 0
        self.log: list[Entry] = []
        self.policy: np.ndarray | None = None
        self.restricted = bool(problem.hints_active)
        self.warnings: list[str] = []
        self.pending_sweeps: int | None = None
        self.resumed_from: int | None = None
        self.seconds_before = 0.0
        self._resume()
        self.started = time.perf_counter()
        self.last_save = self.elapsed()
        self.sweep_block = 1  # sweeps per fused call, carried from phase to phase (never changes the result)
        self.last_poll = self.started
        self.last_restricted_tv: np.ndarray | None = None

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
        self.log = [dict(entry) for entry in state["log"]][: self.iteration]
        policy = state.get("policy")
        self.policy = None if policy is None else np.asarray(policy, dtype=np.int64).copy()
        self.restricted = bool(state.get("restricted", self.restricted))
        self.warnings = list(state.get("warnings", []))
        sweeps = state.get("sweeps_done")
        self.pending_sweeps = None if sweeps is None or self.policy is None else int(sweeps)
        self.seconds_before = float(state.get("seconds", 0.0))
        self.resumed_from = self.iteration

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

    def save_if_due(self, *, sweeps_done: int | None = None) -> None:
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
                "log": list(self.log),
                "policy": None if self.policy is None else self.policy.copy(),
                "sweeps_done": sweeps_done,
                "restricted": self.restricted,
                "warnings": list(self.warnings),
                "seconds": seconds,
            }
        )
        self.last_save = seconds

    def improve(self) -> _Step:
        """One Bellman step at the current iterate; logs it and reports progress."""
        hinted = self.restricted
        restricted = hinted and self.iteration + 1 < self.options.max_iterations
        reference = self.last_restricted_tv
        if hinted and not restricted:
            # The last step allowed must be unrestricted; check the promise at this same v.
            reference = np.asarray(self.problem.bellman_step(self.v, restricted=True, policy_guess=self.policy)[0])
            self.restricted = False
        tv, policy = self.problem.bellman_step(self.v, restricted=restricted, policy_guess=self.policy)
        tv = np.asarray(tv, dtype=np.float64)
        policy = np.asarray(policy, dtype=np.int64)
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
        changes = self.problem.n if self.policy is None else int(np.count_nonzero(policy != self.policy))
        step = _Step(
            tv=tv,
            policy=policy,
            distance=max(-d_min, d_max),
            lower=k * d_min,
            upper=k * d_max,
            rounding=ROUNDING_ULPS * _EPS * scale / (1.0 - self.beta),
            changes=changes,
            restricted=restricted,
        )
        if not restricted and reference is not None:
            self._verify_hints(step, reference, scale)
        self.last_restricted_tv = tv if restricted else None
        self.iteration += 1
        self.policy = policy
        entry = {
            "iteration": self.iteration,
            "distance": step.distance,
            "error_bound": step.error_bound,
            "policy_changes": changes,
            "seconds": self.elapsed(),
        }
        self.log.append(entry)
        if self.options.on_progress is not None:
            self.options.on_progress(dict(entry))
        return step

    def _verify_hints(self, step: _Step, restricted_tv: np.ndarray, scale: float) -> None:
        """Compare an unrestricted step with the restricted one at the same ``v``."""
        slack = ROUNDING_ULPS * _EPS * scale
        broken = int(np.count_nonzero(step.tv > restricted_tv + slack))
        if broken:
            self.warnings.append(
                f"the {_hint_names(self.problem)} hint did not hold for this model: {broken} states found "
                "better choices outside the hinted search; re-solved without hints"
            )

    def outcome(self, step: _Step, status: str) -> SolveOutcome:
        shift = 0.5 * (step.lower + step.upper)
        value = step.tv + shift
        k = self.beta / (1.0 - self.beta)
        return SolveOutcome(
            value=value,
            policy=step.policy,
            status=status,
            iterations=self.iteration,
            evaluation_steps=self.evaluation_steps,
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
        )


def _hint_names(problem: CompiledProblem) -> str:
    hints = getattr(problem, "hints", None)
    names = [name for name in ("monotone", "concave") if getattr(hints, name, False)] or ["monotone", "concave"]
    return "/".join(f"`{name}`" for name in names)


Evaluate = Callable[[_Run, np.ndarray, int], None]
"""``evaluate(run, policy, sweeps_done)``: move ``run.v`` after an improvement."""
Accept = Callable[[_Step], bool]
"""``accept(step)``: may the solve stop as converged at this step?"""


def _iterate(
    problem: CompiledProblem, initial: np.ndarray, options: _Options, method: str, evaluate: Evaluate, accept: Accept
) -> SolveOutcome:
    """The loop every method shares.

    Each improvement step appends a log entry ``{"iteration", "distance"
    (‖Tv − v‖∞), "error_bound" (the certified bound of that step's midpoint;
    for a hint-restricted step, the bound of the restricted operator),
    "policy_changes" (states whose greedy choice differs from the previous
    step's; the first step counts all), "seconds" (cumulative solving time)}``
    and passes it to ``on_progress``.

    ``time_limit_s`` counts solving seconds across resumes.  It is checked
    after each improvement step and between sweeps; a sweep phase cut short
    by it is followed by one more improvement step, so the returned value
    always carries the bound of its own step.  ``should_stop`` is polled
    before every improvement step and at most every ``STOP_POLL_S`` between
    sweeps.  Checkpoints are saved at most every ``checkpoint_s`` solving
    seconds, after an evaluation or between sweeps (with ``sweeps_done``, so
    a resumed solve finishes the interrupted phase and then repeats exactly
    what the interrupted one would have done).

    With hints active, steps are restricted until one meets the stopping rule
    (or the solve must stop); then one unrestricted step at the same ``v``
    checks the promise, and the solve goes on unrestricted to the end, so the
    reported bound always comes from an unrestricted step.
    """
    run = _Run(problem, initial, options, method)
    if run.pending_sweeps is not None and run.policy is not None:
        evaluate(run, run.policy, run.pending_sweeps)
        run.save_if_due()
    while True:
        run.poll(force=True)
        step = run.improve()
        stop = None
        if accept(step):
            stop = "converged"
        elif run.iteration >= options.max_iterations:
            stop = "max_iterations"
        elif run.out_of_time():
            stop = "time_limit"
        if stop is not None and step.restricted:
            run.restricted = False
            continue
        if stop is not None:
            return run.outcome(step, stop)
        run.v = step.tv
        run.last_restricted_tv = None
        evaluate(run, step.policy, 0)
        run.save_if_due()


def _options(
    tolerance: float,
    max_iterations: int,
    time_limit_s: float | None,
    checkpoint_s: float | None,
    evaluation_steps: int,
    on_progress: Callable[[Entry], None] | None,
    checkpoint: Checkpoint | None,
    should_stop: Callable[[], bool] | None,
    fingerprint: str,
) -> _Options:
    return _Options(
        tolerance=float(tolerance),
        max_iterations=max(1, int(max_iterations)),
        time_limit_s=None if time_limit_s is None else float(time_limit_s),
        checkpoint_s=DEFAULT_CHECKPOINT_S if checkpoint_s is None else float(checkpoint_s),
        evaluation_steps=max(0, int(evaluation_steps)),
        on_progress=on_progress,
        checkpoint=checkpoint,
        should_stop=should_stop,
        fingerprint=fingerprint,
    )


def _meets(tolerance: float) -> Accept:
    """The plain stopping rule: the step's certified bound is within ``tolerance``."""
    return lambda step: step.error_bound <= tolerance


def _no_evaluation(run: _Run, policy: np.ndarray, sweeps_done: int) -> None:
    """Value iteration: ``v ← Tv`` already happened."""


def _phase_plan(run: _Run) -> tuple[int, float]:
    """Howard: ``(most sweeps, span stop)`` of the evaluation phase after the last improvement.

    The rule (modified policy iteration with an adaptive evaluation length;
    cf. Puterman 1994, §6.5, from memory) reads ``evaluation_steps`` as the
    base length ``m``:

    * while the last improvement changed the policy somewhere, the phase is
      ``max(1, m // MOVING_SWEEPS_DIVISOR)`` sweeps: a policy that is still
      moving is not worth evaluating precisely (on the growth benchmark the
      number of improvements did not grow from 50 down to 10 sweeps);
    * once an improvement changed no policy entry, the policy is probably
      optimal and the next improvement can certify only if ``v`` is close to
      ``v_σ``: the phase runs up to ``STABLE_SWEEPS_FACTOR · m`` sweeps and
      ends early after the first sweep whose increment ``Δ`` has span
      ``max Δ − min Δ ≤ tolerance · (1 − β)/β``.  If the policy then stays the
      same, the next improvement's ``d = Tv − v`` is one more such sweep, whose
      MacQueen–Porteus half-width ``β/(1−β) · span/2`` is within half the
      tolerance (spans of successive sweeps never grow for a stochastic ``P_σ``).

    ``m = 0`` means no sweeps at all.  Both cases depend only on the log and
    the options, so a resumed solve repeats the same phase.
    """
    base = run.options.evaluation_steps
    changes = run.log[-1]["policy_changes"] if run.log else run.problem.n
    if base == 0:
        return 0, -np.inf
    if changes:
        return max(1, base // MOVING_SWEEPS_DIVISOR), -np.inf
    return STABLE_SWEEPS_FACTOR * base, run.options.tolerance * (1.0 - run.beta) / run.beta


def _sweeps(run: _Run, policy: np.ndarray, sweeps_done: int) -> None:
    """Howard: ``v ← r_σ + β P_σ v`` for the rest of the phase :func:`_phase_plan` sets.

    Problems with a ``policy_sweeps(v, policy, sweeps, span_stop) -> (v, done,
    span)`` method (grid problems) run blocks of sweeps in one kernel call,
    each block sized to about ``SWEEP_BLOCK_S``; others get one sparse
    mat-vec per sweep.  Between blocks (or sweeps) the stop flag is polled,
    the time limit checked and a checkpoint saved when due, with
    ``sweeps_done`` counting every sweep of the phase so far.
    """
    total, span_stop = _phase_plan(run)
    if sweeps_done >= total:
        return
    fused = getattr(run.problem, "policy_sweeps", None)
    if fused is not None:
        _fused_sweeps(run, fused, policy, sweeps_done, total, span_stop)
        return
    matrix = run.problem.policy_matrix(policy)
    reward = run.problem.policy_reward(policy)
    beta = run.beta
    v = run.v
    for done in range(sweeps_done + 1, total + 1):
        previous = v
        v = matrix @ v
        v *= beta
        v += reward
        run.v = v
        run.evaluation_steps += 1
        run.poll()
        if run.out_of_time():
            return
        if span_stop > -np.inf:
            increment = v - previous
            if float(increment.max()) - float(increment.min()) <= span_stop:
                return
        if done < total:
            run.save_if_due(sweeps_done=done)


def _fused_sweeps(
    run: _Run, fused: Callable[..., tuple[np.ndarray, int, float]], policy: np.ndarray, sweeps_done: int,
    total: int, span_stop: float,
) -> None:
    done = sweeps_done
    block = run.sweep_block
    while done < total:
        started = time.perf_counter()
        run.v, swept, span = fused(run.v, policy, min(block, total - done), span_stop)
        seconds = time.perf_counter() - started
        done += swept
        run.evaluation_steps += swept
        run.poll()
        if run.out_of_time() or span <= span_stop:
            return
        if done < total:
            run.save_if_due(sweeps_done=done)
        # Blocks grow or shrink toward SWEEP_BLOCK_S of work; their size never changes the result.
        per_sweep = seconds / max(swept, 1)
        block = max(1, min(4 * block, int(SWEEP_BLOCK_S / max(per_sweep, 1e-9))))
        run.sweep_block = block


def _exact_evaluation(run: _Run, policy: np.ndarray, sweeps_done: int) -> None:
    """Policy iteration: ``v ← (I − β P_σ)⁻¹ r_σ`` by a sparse LU solve."""
    matrix = run.problem.policy_matrix(policy)
    reward = run.problem.policy_reward(policy)
    system = (sp.identity(run.problem.n, format="csc") - run.beta * matrix).tocsc()
    run.v = np.asarray(spla.spsolve(system, reward), dtype=np.float64).reshape(run.problem.n)
    run.evaluation_steps += 1


def _value_iteration(
    problem: CompiledProblem,
    initial: np.ndarray,
    *,
    tolerance: float = DEFAULT_TOLERANCE,
    max_iterations: int = DEFAULT_MAX_ITERATIONS,
    time_limit_s: float | None = None,
    checkpoint_s: float | None = None,
    evaluation_steps: int = DEFAULT_EVALUATION_STEPS,
    on_progress: Callable[[Entry], None] | None = None,
    checkpoint: Checkpoint | None = None,
    should_stop: Callable[[], bool] | None = None,
    fingerprint: str = "",
) -> SolveOutcome:
    """Plain contraction iteration ``v ← Tv`` (``evaluation_steps`` is ignored)."""
    options = _options(
        tolerance, max_iterations, time_limit_s, checkpoint_s, 0, on_progress, checkpoint, should_stop, fingerprint
    )
    return _iterate(problem, initial, options, "value_iteration", _no_evaluation, _meets(options.tolerance))


def _howard(
    problem: CompiledProblem,
    initial: np.ndarray,
    *,
    tolerance: float = DEFAULT_TOLERANCE,
    max_iterations: int = DEFAULT_MAX_ITERATIONS,
    time_limit_s: float | None = None,
    checkpoint_s: float | None = None,
    evaluation_steps: int = DEFAULT_EVALUATION_STEPS,
    on_progress: Callable[[Entry], None] | None = None,
    checkpoint: Checkpoint | None = None,
    should_stop: Callable[[], bool] | None = None,
    fingerprint: str = "",
) -> SolveOutcome:
    """Modified policy iteration: improve, then evaluation sweeps (``evaluation_steps`` as the base; see
    :func:`_phase_plan`)."""
    options = _options(
        tolerance, max_iterations, time_limit_s, checkpoint_s, evaluation_steps, on_progress, checkpoint,
        should_stop, fingerprint,
    )
    return _iterate(problem, initial, options, "howard", _sweeps, _meets(options.tolerance))


def _policy_iteration(
    problem: CompiledProblem,
    initial: np.ndarray,
    *,
    tolerance: float = DEFAULT_TOLERANCE,
    max_iterations: int = DEFAULT_MAX_ITERATIONS,
    time_limit_s: float | None = None,
    checkpoint_s: float | None = None,
    evaluation_steps: int = DEFAULT_EVALUATION_STEPS,
    on_progress: Callable[[Entry], None] | None = None,
    checkpoint: Checkpoint | None = None,
    should_stop: Callable[[], bool] | None = None,
    fingerprint: str = "",
) -> SolveOutcome:
    """Exact evaluation by a linear solve; stops when the policy is stable
    (unchanged, or improving on its own value by no more than rounding) and
    the step's bound meets the tolerance."""
    options = _options(
        tolerance, max_iterations, time_limit_s, checkpoint_s, 0, on_progress, checkpoint, should_stop, fingerprint
    )

    def accept(step: _Step) -> bool:
        stable = step.changes == 0 or not step.improves
        return stable and step.error_bound <= options.tolerance

    return _iterate(problem, initial, options, "policy_iteration", _exact_evaluation, accept)


METHODS: dict[str, Callable[..., SolveOutcome]] = {
    "howard": _howard,
    "policy_iteration": _policy_iteration,
    "value_iteration": _value_iteration,
}
"""Method name → solver ``fn(problem, initial, *, tolerance, max_iterations,
time_limit_s, checkpoint_s, evaluation_steps, on_progress, checkpoint,
should_stop, fingerprint) -> SolveOutcome``.  ``worker.document.schema.METHOD_NAMES``
lists the same names."""

