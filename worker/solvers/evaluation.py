"""What each method does after an iteration: nothing, Howard's evaluation steps, or a linear solve."""

from __future__ import annotations

import time

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from worker.costs import DIRECT_SOLVE_MAX_POINTS, KRYLOV_RESIDUAL_SHARE, KRYLOV_RESTART
from worker.problem import PolicySteps
from worker.solvers.loop import Run

__all__ = [
    "KRYLOV_FLOOR_ULPS",
    "KRYLOV_STALL_CYCLES",
    "MOVING_STEPS_DIVISOR",
    "STABLE_STEPS_FACTOR",
    "STEP_BLOCK_S",
    "evaluation_steps",
    "exact_evaluation",
    "krylov_solve",
    "no_evaluation",
    "phase_plan",
]

STEP_BLOCK_S = 0.004
"""Seconds of fused evaluation steps per kernel call, between two polls of the stop flag and the clocks."""
MOVING_STEPS_DIVISOR = 5
"""Howard: while the policy changes, an evaluation phase is ``evaluation_steps`` divided by this (count)."""
STABLE_STEPS_FACTOR = 20
"""Howard: once the policy stops changing, the evaluation phase may run this many times
``evaluation_steps`` evaluation steps (count; it ends earlier when the steps have settled)."""

KRYLOV_FLOOR_ULPS = 64.0
"""Policy iteration, iterative solve: the residual floor in units of ``ε · ‖r_σ‖∞ / (1 − β)`` (count)."""
KRYLOV_STALL_CYCLES = 5
"""Policy iteration, iterative solve: restart cycles in a row without a tenth less residual before it gives up
(count; the Bellman step that follows still certifies the value)."""


def no_evaluation(run: Run, policy: np.ndarray, steps_done: int) -> None:
    """Value iteration: ``v ← Tv`` already happened."""


def phase_plan(run: Run) -> tuple[int, float]:
    """Howard: ``(most evaluation steps, span stop)`` of the evaluation phase after the last iteration.

    The rule (modified policy iteration with an adaptive evaluation length)
    reads ``evaluation_steps`` as the base length ``m``:

    * while the last iteration changed the policy somewhere, the phase is
      ``max(1, m // MOVING_STEPS_DIVISOR)`` steps: a policy that is still
      moving is not worth evaluating precisely (on the growth benchmark the
      number of iterations did not grow from 50 down to 10 steps).  A problem
      may set its own ``moving_steps_divisor``: a continuous choice, whose
      Bellman step costs tens of evaluation steps and whose policy keeps
      moving a little until the end, uses 1;
    * once an iteration changed no policy entry, the policy is probably
      optimal and the next iteration can certify only if ``v`` is close to
      ``v_σ``: the phase runs up to ``STABLE_STEPS_FACTOR · m`` steps and
      ends early after the first step whose increment ``Δ`` has span
      ``max Δ − min Δ ≤ tolerance · (1 − β)/β``.  If the policy then stays the
      same, the next iteration's ``d = Tv − v`` is one more such step, whose
      MacQueen–Porteus half-width ``β/(1−β) · span/2`` is within half the
      tolerance (spans of successive steps never grow for a stochastic ``P_σ``).

    ``m = 0`` means no evaluation steps at all.  Both cases depend only on
    the log and the options, so a resumed solve repeats the same phase.
    """
    base = run.options.evaluation_steps
    changes = run.log[-1]["policy_changes"] if run.log else run.problem.n
    if base == 0:
        return 0, -np.inf
    if changes:
        divisor = getattr(run.problem, "moving_steps_divisor", MOVING_STEPS_DIVISOR)
        return max(1, base // divisor), -np.inf
    return STABLE_STEPS_FACTOR * base, run.options.tolerance * (1.0 - run.beta) / run.beta


def evaluation_steps(run: Run, policy: np.ndarray, steps_done: int) -> None:
    """Howard: ``v ← r_σ + β P_σ v`` for the rest of the phase :func:`phase_plan` sets.

    Problems whose ``policy_steps`` is not None (grid problems) run blocks of
    evaluation steps in one kernel call, each block sized to about
    ``STEP_BLOCK_S``; others get one sparse mat-vec per step.  Between
    blocks (or steps) the stop flag is polled, the time limit checked and a
    checkpoint saved when due, with ``steps_done`` counting every step of the
    phase so far.
    """
    total, span_stop = phase_plan(run)
    if steps_done >= total:
        return
    fused = run.problem.policy_steps
    if fused is not None:
        _fused_steps(run, fused, policy, steps_done, total, span_stop)
        return
    matrix = run.problem.policy_matrix(policy)
    reward = run.problem.policy_reward(policy)
    beta = run.beta
    v = run.v
    for done in range(steps_done + 1, total + 1):
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
            run.save_if_due(steps_done=done)


def _fused_steps(
    run: Run, fused: PolicySteps, policy: np.ndarray, steps_done: int, total: int, span_stop: float
) -> None:
    done = steps_done
    block = run.step_block
    while done < total:
        started = time.perf_counter()
        run.v, applied, span = fused(run.v, policy, min(block, total - done), span_stop)
        seconds = time.perf_counter() - started
        done += applied
        run.evaluation_steps += applied
        run.poll()
        if run.out_of_time() or span <= span_stop:
            return
        if done < total:
            run.save_if_due(steps_done=done)
        # Blocks grow or shrink toward STEP_BLOCK_S of work; their size never changes the result.
        per_step = seconds / max(applied, 1)
        block = max(1, min(4 * block, int(STEP_BLOCK_S / max(per_step, 1e-9))))
        run.step_block = block


def exact_evaluation(run: Run, policy: np.ndarray, steps_done: int) -> None:
    """Policy iteration: ``v ← v_σ``, the solution of ``(I − β P_σ) v = r_σ``.

    A problem may solve it itself: ``exact_policy_value(policy)`` returns ``v_σ`` or None (a grid model with
    draws after the choice and iid shocks solves a system over its grid states, :mod:`worker.drawsteps`).
    Otherwise:

    Up to :data:`~worker.costs.DIRECT_SOLVE_MAX_POINTS` points a sparse LU
    solve, whose fill-in is then at most ``n²`` entries; above it restarted
    GMRES from the current ``v`` (:func:`krylov_solve`), whose memory is a
    fixed number of vectors of length ``n`` and which checks the stop flag and
    the time limit after every restart cycle.  Either way the Bellman step
    that follows certifies the result, so an evaluation cut short by the time
    limit still ends in a certified value.
    """
    exact = getattr(run.problem, "exact_policy_value", None)
    value = None if exact is None else exact(policy)  # a problem's own direct solve (worker.drawsteps), or None
    if value is not None:
        run.v = np.asarray(value, dtype=np.float64).reshape(run.problem.n)
        run.linear_solves += 1
        return
    matrix = run.problem.policy_matrix(policy)
    reward = np.asarray(run.problem.policy_reward(policy), dtype=np.float64)
    n = run.problem.n
    if n <= DIRECT_SOLVE_MAX_POINTS:
        system = (sp.identity(n, format="csc") - run.beta * matrix).tocsc()
        run.v = np.asarray(spla.spsolve(system, reward), dtype=np.float64).reshape(n)
    else:
        run.v = krylov_solve(run, sp.csr_matrix(matrix), reward)
    run.linear_solves += 1


def krylov_solve(run: Run, matrix: sp.csr_matrix, reward: np.ndarray) -> np.ndarray:
    """``(I − β P) x = r`` by GMRES restarted every ``KRYLOV_RESTART`` steps, from ``run.v``.

    Stops when the residual's largest entry is at most ``KRYLOV_RESIDUAL_SHARE``
    of ``tolerance · (1 − β)`` (then ``x`` is within that share of the tolerance
    of ``v_σ``), or at the rounding floor ``KRYLOV_FLOOR_ULPS · ε · ‖r‖∞ / (1 − β)``,
    or when ``KRYLOV_STALL_CYCLES`` cycles in a row did not reduce it by a tenth,
    or when the time limit is reached; the stop flag is polled after every cycle.
    """
    beta = run.beta
    n = reward.shape[0]

    def apply(x: np.ndarray) -> np.ndarray:
        return x - beta * (matrix @ x)

    operator = spla.LinearOperator((n, n), matvec=apply, dtype=np.float64)
    scale = float(np.abs(reward).max()) if n else 0.0
    target = max(
        KRYLOV_RESIDUAL_SHARE * run.options.tolerance * (1.0 - beta),
        KRYLOV_FLOOR_ULPS * np.finfo(np.float64).eps * scale / (1.0 - beta),
    )
    x = np.array(run.v, dtype=np.float64)
    residual = float(np.abs(reward - apply(x)).max())
    best, stalled = residual, 0
    while residual > target:
        x, _ = spla.gmres(operator, reward, x0=x, rtol=0.0, atol=target, restart=KRYLOV_RESTART, maxiter=1)
        residual = float(np.abs(reward - apply(x)).max())
        run.poll()
        if run.out_of_time():
            break
        if residual < 0.9 * best:
            best, stalled = residual, 0
        else:
            stalled += 1
            if stalled >= KRYLOV_STALL_CYCLES:
                break
    return np.asarray(x, dtype=np.float64)
