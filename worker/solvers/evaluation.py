"""What each method does after an iteration: nothing, Howard's evaluation steps, or a linear solve."""

from __future__ import annotations

import time

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from worker.problem import PolicySteps
from worker.solvers.loop import Run

__all__ = [
    "MOVING_STEPS_DIVISOR",
    "STABLE_STEPS_FACTOR",
    "STEP_BLOCK_S",
    "evaluation_steps",
    "exact_evaluation",
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


def no_evaluation(run: Run, policy: np.ndarray, steps_done: int) -> None:
    """Value iteration: ``v ← Tv`` already happened."""


def phase_plan(run: Run) -> tuple[int, float]:
    """Howard: ``(most evaluation steps, span stop)`` of the evaluation phase after the last iteration.

    The rule (modified policy iteration with an adaptive evaluation length)
    reads ``evaluation_steps`` as the base length ``m``:

    * while the last iteration changed the policy somewhere, the phase is
      ``max(1, m // MOVING_STEPS_DIVISOR)`` steps: a policy that is still
      moving is not worth evaluating precisely (on the growth benchmark the
      number of iterations did not grow from 50 down to 10 steps);
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
        return max(1, base // MOVING_STEPS_DIVISOR), -np.inf
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
    """Policy iteration: ``v ← (I − β P_σ)⁻¹ r_σ`` by a sparse LU solve."""
    matrix = run.problem.policy_matrix(policy)
    reward = run.problem.policy_reward(policy)
    system = (sp.identity(run.problem.n, format="csc") - run.beta * matrix).tocsc()
    run.v = np.asarray(spla.spsolve(system, reward), dtype=np.float64).reshape(run.problem.n)
    run.linear_solves += 1
