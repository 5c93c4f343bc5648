"""Value iteration, Howard's method and policy iteration, with certified error bounds.

:data:`METHODS` is the registry (method name → solver); the problem document
reads its method names from it, so this package imports neither numba nor
the document format.  All three methods share one loop
(:func:`worker.solvers.loop.iterate`): an *iteration* ``v → Tv`` (one
Bellman step, with its greedy policy σ), a stopping test on the error bound
of that step, then a method-specific evaluation
(:mod:`worker.solvers.evaluation`):

* ``value_iteration`` — ``v ← Tv``;
* ``howard`` — Howard's method (modified policy iteration): ``v ← Tv``, then
  evaluation steps ``v ← r_σ + β P_σ v``, a fifth of ``evaluation_steps``
  while the policy changes, up to twenty times it once it is stable (see
  :func:`worker.solvers.evaluation.phase_plan`);
* ``policy_iteration`` — ``v ← v_σ``, the exact solution of
  ``(I − β P_σ) v = r_σ`` (one linear solve: sparse LU on small problems,
  restarted GMRES above ``worker.costs.DIRECT_SOLVE_MAX_POINTS``, where
  an LU's fill-in is unbounded; see
  :func:`worker.solvers.evaluation.exact_evaluation`).

Error bound
-----------
For any ``v``, with ``d = Tv − v`` and ``k = β / (1 − β)``, the
MacQueen–Porteus bounds hold statewise in real arithmetic::

    Tv + k·min(d)  ≤  v*  ≤  Tv + k·max(d)

The value returned is the midpoint ``Tv + k·(min d + max d)/2`` and its
certified sup-norm distance to ``v*`` is half the bracket width,
``k·(max d − min d)/2``, which never exceeds the textbook bound
``k·‖d‖∞`` for ``Tv`` itself.  Both get a floating-point allowance
``ROUNDING_ULPS · ε · max(‖Tv‖∞, ‖v‖∞) / (1 − β)`` (ε the float64 machine
epsilon): an error δ in the computed ``Tv`` moves the bracket by at most
``δ/(1 − β)``.  The allowance is a stated allowance for the rounding of one
Bellman step (sums of a row's terms, the reward addition, the midpoint
shift), not a proof for every summation order; with it the error bound is
never below the true error in the tests across many random problems.
Because the allowance is never zero for a non-zero value, a tolerance below
it simply runs to ``max_iterations``.

The bracket needs only two properties of ``T``: it is monotone and
``T(v + c) = Tv + βc`` for a constant ``c``.  The smoothed (log-sum-exp)
operator of taste shocks has both (see :mod:`worker.taste`), so the same
bracket certifies it; its policy evaluation mixes the choices by the step's
logit probabilities with an entropy term, which keeps ``P_σ`` row-stochastic.

Statuses are data, not exceptions: ``converged`` (error bound ≤ tolerance),
``max_iterations``, ``time_limit``.  A stop flag raises
:class:`worker.errors.Canceled`.
"""

from __future__ import annotations

from typing import Callable

import numpy as np

from worker.defaults import DEFAULT_EVALUATION_STEPS, DEFAULT_MAX_ITERATIONS, DEFAULT_TOLERANCE
from worker.errors import InvalidDocument
from worker.problem import CompiledProblem
from worker.solvers.evaluation import evaluation_steps as _evaluation_steps
from worker.solvers.evaluation import exact_evaluation, no_evaluation
from worker.solvers.loop import Step, iterate, meets, options
from worker.solvers.outcome import RATE_FLOOR_ULPS, ROUNDING_ULPS, Checkpoint, Entry, SolveOutcome, observed_rate

__all__ = [
    "GENERAL_METHODS", "METHODS", "RATE_FLOOR_ULPS", "ROUNDING_ULPS", "Checkpoint", "SolveOutcome", "observed_rate",
]


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
    trust_hints: bool = False,
) -> SolveOutcome:
    """Plain contraction iteration ``v ← Tv`` (``evaluation_steps`` is ignored)."""
    settings = options(
        tolerance, max_iterations, time_limit_s, checkpoint_s, 0, on_progress, checkpoint, should_stop, fingerprint,
        trust_hints=trust_hints,
    )
    return iterate(problem, initial, settings, "value_iteration", no_evaluation, meets(settings.tolerance))


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
    trust_hints: bool = False,
) -> SolveOutcome:
    """Howard's method (modified policy iteration): iterate, then evaluation steps
    (``evaluation_steps`` as the base; see :func:`worker.solvers.evaluation.phase_plan`)."""
    settings = options(
        tolerance, max_iterations, time_limit_s, checkpoint_s, evaluation_steps, on_progress, checkpoint,
        should_stop, fingerprint, trust_hints=trust_hints,
    )
    return iterate(problem, initial, settings, "howard", _evaluation_steps, meets(settings.tolerance))


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
    trust_hints: bool = False,
) -> SolveOutcome:
    """Exact evaluation by a linear solve; stops when the policy is stable
    (unchanged, or improving on its own value by no more than rounding) and
    the step's error bound meets the tolerance."""
    settings = options(
        tolerance, max_iterations, time_limit_s, checkpoint_s, 0, on_progress, checkpoint, should_stop, fingerprint,
        trust_hints=trust_hints,
    )

    def accept(step: Step) -> bool:
        stable = step.changes == 0 or not step.improves
        return stable and step.error_bound <= settings.tolerance

    return iterate(problem, initial, settings, "policy_iteration", exact_evaluation, accept)


def _endogenous_grid(problem: CompiledProblem, initial: np.ndarray, **options: object) -> SolveOutcome:
    """The endogenous grid method, for problems that offer it (``solve_endogenous_grid``), certified by
    Howard's method from the method's policy value; see :mod:`worker.continuous.egm`."""
    solve = getattr(problem, "solve_endogenous_grid", None)
    if solve is None or getattr(problem, "egm_form", None) is None:
        raise InvalidDocument.at(
            "solver.method",
            "the endogenous grid method applies to a grid model whose one choice is continuous and next_of its one "
            "state; use howard, value_iteration or policy_iteration",
        )
    return solve(initial, _howard, **options)


METHODS: dict[str, Callable[..., SolveOutcome]] = {
    "endogenous_grid": _endogenous_grid,
    "howard": _howard,
    "policy_iteration": _policy_iteration,
    "value_iteration": _value_iteration,
}
"""Method name → solver ``fn(problem, initial, *, tolerance, max_iterations,
time_limit_s, checkpoint_s, evaluation_steps, on_progress, checkpoint,
should_stop, fingerprint) -> SolveOutcome``.  ``worker.document.METHOD_NAMES``
is read from it."""

GENERAL_METHODS = ("howard", "policy_iteration", "value_iteration")
"""The methods that solve every compiled problem (``endogenous_grid`` needs a model of its form)."""
