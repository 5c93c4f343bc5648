"""The measured costs and the sizing formulas the estimates share (memory per point, iterations, linear solves).

:mod:`worker.estimate` sizes a document from them, and so does
:mod:`worker.continuous_estimate`; keeping them here lets both import them
without importing each other.  Every figure is a measurement on the
development machine or marked as a guess.
"""

from __future__ import annotations

import math
from typing import Any

__all__ = [
    "BOUND_NS",
    "CHOICE_BYTES",
    "DIRECT_SOLVE_MAX_POINTS",
    "EXACT_POINTS_PER_ROOT_CHOICE",
    "HOWARD_STEPS_PER_OCTAVE",
    "KRYLOV_RESIDUAL_SHARE",
    "KRYLOV_RESTART",
    "MATVEC_NS",
    "NUMPY_PAIR_NS",
    "POINT_NS",
    "RESULT_BYTES_PER_STATE",
    "SOLVER_BYTES_PER_STATE",
    "STATIC_CLIMB_POINTS",
    "TABLE_READ_NS",
    "grid_common_bytes",
    "horizon_bytes",
    "iteration_steps",
    "linear_solve_bytes",
    "linear_solve_seconds",
    "linear_solve_words",
]

TABLE_READ_NS = 3.0
"""Cost of one (state, choice) pair in a compiled table scan (nanoseconds)."""
NUMPY_PAIR_NS = 40.0
"""Cost of evaluating one (state, choice) pair of a typical model with numpy (nanoseconds)."""
POINT_NS = 40.0
"""Cost of one pointwise evaluation of a typical model in compiled code (nanoseconds; one
``pow`` with a runtime exponent dominates)."""
BOUND_NS = 150.0
"""Cost of one interval bound over a block of choices in compiled code (nanoseconds)."""
STATIC_CLIMB_POINTS = 4
"""Points a climb along a static choice evaluates per table entry, from the neighbouring entry's best (count;
"common practice" guess: the start, a step each way and one more)."""
EXACT_POINTS_PER_ROOT_CHOICE = 5.0
"""The exact block search evaluates about this many points times √(choices) per state: interval
bounds cannot skip blocks near the optimum, within a distance that grows like √(choices)
(measured on growth models: about 150 points at 1,000 choices, 700 at 20,000)."""
HOWARD_STEPS_PER_OCTAVE = 3.0
"""Howard needs about this many iterations per doubling of the choice grid: on fine grids
the greedy policy keeps moving for many iterations (measured: 30 at 1,000 choices, 48 at 20,000)."""
MATVEC_NS = 2.0
"""Cost per stored entry of a sparse matrix–vector product (nanoseconds)."""
CHOICE_BYTES = 17
"""Work arrays per flat choice: a visiting order (int64), a mark (bool), an index (int64) (bytes)."""
RESULT_BYTES_PER_STATE = 120
"""Result-document lists (value, policy, policy index as Python objects) per state (bytes)."""
SOLVER_BYTES_PER_STATE = 96
"""Vectors of length n the solver and the Bellman step keep alive (about twelve float64s per state)."""

DIRECT_SOLVE_MAX_POINTS = 2_000
"""Policy iteration solves ``(I − βP_σ) v = r_σ`` by sparse LU up to this many points (count): its fill-in is
then at most ``n²`` entries (48 MiB).  Above it, a random 20,000-point chain filled an LU to 1.1 GB in 84 s, so
larger problems use restarted GMRES, whose memory is ``KRYLOV_RESTART + 4`` vectors."""
KRYLOV_RESTART = 30
"""Policy iteration above ``DIRECT_SOLVE_MAX_POINTS``: GMRES steps per restart cycle (count)."""
KRYLOV_RESIDUAL_SHARE = 1e-3
"""Policy iteration above ``DIRECT_SOLVE_MAX_POINTS``: the residual target of GMRES as a share of
``tolerance · (1 − β)`` (dimensionless)."""


def grid_common_bytes(n: int, shocks: int, nodes: int, method: str) -> int:
    """Memory every reward storage needs: solver vectors, the policy's nodes and sparse matrix, the result."""
    policy_nodes = n * nodes * 16
    matrix = n * nodes * shocks * 12 + 8 * (n + 1)
    if method == "policy_iteration":
        matrix += linear_solve_bytes(n, n * nodes * shocks)
    chain = 8 * shocks * shocks
    return n * (SOLVER_BYTES_PER_STATE + RESULT_BYTES_PER_STATE) + policy_nodes + matrix + chain


def linear_solve_bytes(n: int, entries: int) -> int:
    """Memory of one exact evaluation of policy iteration, ``P_σ`` with ``entries`` stored entries.

    Direct (``n ≤ DIRECT_SOLVE_MAX_POINTS``): ``I − βP_σ`` in CSC and its LU,
    whose fill-in is at most ``n²`` entries of 12 bytes each, plus SuperLU's
    work arrays.  Iterative: ``I − βP_σ`` is applied, never formed; GMRES keeps
    ``KRYLOV_RESTART + 4`` vectors and the residual check two more.
    """
    if n <= DIRECT_SOLVE_MAX_POINTS:
        return 2 * (entries + n) * 12 + n * n * 12 + 64 * n
    return (KRYLOV_RESTART + 6) * 8 * n + (entries + n) * 12


def linear_solve_seconds(n: int, entries: int, beta: float, tolerance: float) -> float:
    """Time of one exact evaluation: an LU's ``n³/3`` floating-point operations at most (1 ns each), or the GMRES
    mat-vecs a rate of β needs to bring the residual to the target (an upper guess for chains that mix slowly)."""
    if n <= DIRECT_SOLVE_MAX_POINTS:
        return n**3 / 3 * 1e-9
    scale = 1.0 / (1.0 - beta)
    target = max(KRYLOV_RESIDUAL_SHARE * tolerance * (1.0 - beta) / scale, 1e-16)
    matvecs = math.ceil(math.log(target) / math.log(beta))
    return matvecs * (entries + 2 * n + KRYLOV_RESTART * n) * MATVEC_NS * 1e-9


def linear_solve_words(n: int) -> str:
    if n <= DIRECT_SOLVE_MAX_POINTS:
        return f"exact evaluations by sparse LU (at most {DIRECT_SOLVE_MAX_POINTS:,} points: fill-in at most n²)"
    return (
        f"exact evaluations by restarted GMRES ({KRYLOV_RESTART} steps a cycle; above {DIRECT_SOLVE_MAX_POINTS:,} "
        "points an LU's fill-in is unbounded), mat-vecs guessed for a chain that mixes at rate β"
    )


def iteration_steps(doc: Any, choices: int) -> tuple[int, int, str]:
    """(iterations, evaluation steps per iteration, basis) guessed from β, the tolerance, the method
    and the number of choice points."""
    horizon = doc.model.horizon
    if horizon is not None:
        return horizon.periods, 0, (
            f"{horizon.periods:,} periods of backward induction, one exact Bellman step each (with hints, seeded by "
            "a hinted one)"
        )
    beta = float(doc.discount)
    solver = doc.solver
    tolerance = float(solver.tolerance)
    scale = 1.0 / (1.0 - beta)
    # Distance ‖Tv − v‖ must fall from about `scale` to tolerance·(1 − β)/β.
    target = max(tolerance * (1.0 - beta) / beta / scale, 1e-16)
    per_step = math.log(beta)
    evaluation = 0
    if solver.method == "value_iteration":
        steps = math.ceil(math.log(target) / per_step)
    elif solver.method == "policy_iteration":
        steps = 12
    else:
        evaluation = int(solver.evaluation_steps)
        steps = math.ceil(math.log(target) / (per_step * (evaluation + 1))) + 2
        steps = max(steps, math.ceil(HOWARD_STEPS_PER_OCTAVE * math.log2(max(choices, 2))))
    steps = min(max(steps, 1), int(solver.max_iterations))
    basis = (
        f"{steps} iterations ({solver.method}, β = {beta:g}, tolerance {tolerance:g}, value function of "
        f"order 1/(1 − β); Howard at least {HOWARD_STEPS_PER_OCTAVE:g} per doubling of the choices)"
        + (f", {evaluation} evaluation steps each" if evaluation else "")
    )
    return steps, evaluation, basis


def horizon_bytes(doc: Any, n: int) -> int:
    """The value and policy of every period of a finite horizon, kept for the result (bytes; 0 without one).

    Per period and point: the value and the policy (8 bytes each) in the solve, and the result's
    nested lists of them (about ``RESULT_BYTES_PER_STATE``); with ``report.cohort`` the cohort's
    distribution by period as well; with taste shocks the choice probabilities by period (one per
    choice, in the solve and in the result).
    """
    horizon = getattr(doc.model, "horizon", None)
    if horizon is None:
        return 0
    per_point = 16 + RESULT_BYTES_PER_STATE
    if doc.report.cohort is not None:
        per_point += 8 + RESULT_BYTES_PER_STATE // 3
    if getattr(doc.model, "taste_shocks", None) is not None:
        model = doc.model
        choices = model.n_actions if model.kind == "tabular" else math.prod(c.size for c in model.choices.values())
        per_point += choices * (8 + RESULT_BYTES_PER_STATE)
    return int(horizon.periods) * n * per_point
