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
    "EULER_BYTES_PER_ELEMENT",
    "SIMULATION_BYTES_PER_DRAW",
    "STATIONARY_BYTES_PER_ENTRY",
    "STATIONARY_BYTES_PER_STATE",
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
    "BASE_BYTES",
    "euler_elements",
    "policy_matrix_bytes",
    "report_bytes",
    "solve_bytes",
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
SOLVER_BYTES_PER_STATE = 160
"""Vectors of length n the solver, the Bellman step and the outcome keep alive (bytes per point; traced peaks
measured by ``bench/bench_estimates.py``: about 120 with reward tables, 230 with hinted searches)."""
BASE_BYTES = 24 * 2**10
"""What any solve allocates whatever its size: the validated document, the log, the result's dictionaries
(bytes; 24 KiB; the traced peak of a ten-state tabular solve is about 30 KiB)."""
STATIONARY_BYTES_PER_STATE = 300
"""The stationary report per point: the distribution, its marginals and lists, the solve's vectors (bytes;
measured: 540 per point with 5 shock points, 1,100 with 7 and interpolated nodes, including the entries)."""
STATIONARY_BYTES_PER_ENTRY = 50
"""The stationary report per entry of the policy's matrix: the matrix, its transpose and their solve (bytes)."""
SIMULATION_BYTES_PER_DRAW = 24
"""The simulation per simulated period of one path (bytes; measured 24–28 at 200 × 100 and 1,000 × 500)."""
EULER_BYTES_PER_ELEMENT = 64
"""Temporaries of the Euler-error measurement per element of a chunk (bytes: about eight float64 arrays;
measured 66 on the beekeeper example)."""
EULER_TEST_POINTS_PER_GRID_POINT = 10
"""As :data:`worker.euler.TEST_POINTS_PER_GRID_POINT` (not imported: ``worker.euler`` imports this module's
importers; ``tests/worker/test_estimates_accuracy.py`` checks they agree)."""
EULER_CHUNK_ELEMENTS = 2**18
"""As ``worker.euler._CHUNK_ELEMENTS``: (test point, shock, next shock) triples evaluated at once (count)."""

DIRECT_SOLVE_MAX_POINTS = 2_000
"""Policy iteration solves ``(I − βP_σ) v = r_σ`` by sparse LU up to this many points (count): its fill-in is
then at most ``n²`` entries (48 MiB).  Above it, a random 20,000-point chain filled an LU to 1.1 GB in 84 s, so
larger problems use restarted GMRES, whose memory is ``KRYLOV_RESTART + 4`` vectors."""
KRYLOV_RESTART = 30
"""Policy iteration above ``DIRECT_SOLVE_MAX_POINTS``: GMRES steps per restart cycle (count)."""
KRYLOV_RESIDUAL_SHARE = 1e-3
"""Policy iteration above ``DIRECT_SOLVE_MAX_POINTS``: the residual target of GMRES as a share of
``tolerance · (1 − β)`` (dimensionless)."""


def policy_matrix_bytes(n: int, entries: int) -> int:
    """A policy's sparse transition matrix with ``entries`` stored entries, in CSR (bytes)."""
    return entries * 12 + 8 * (n + 1)


def solve_bytes(n: int, entries: int, method: str) -> int:
    """What the solver keeps while it iterates: its vectors and, for policy iteration, the policy's matrix and
    its exact evaluation (bytes).  ``entries``: stored entries of a policy's matrix."""
    memory = n * SOLVER_BYTES_PER_STATE
    if method == "policy_iteration":
        memory += policy_matrix_bytes(n, entries) + linear_solve_bytes(n, entries)
    return memory


def euler_elements(doc: Any, grid_points: int, shocks: int) -> int:
    """Elements of one chunk of the Euler-error measurement (0 when it is not asked for): its test points
    (``EULER_TEST_POINTS_PER_GRID_POINT`` per grid interval) times the pairs of today's and tomorrow's shocks,
    at most ``EULER_CHUNK_ELEMENTS``."""
    if not getattr(doc.report, "euler_errors", False) or grid_points < 2:
        return 0
    per_interval = math.ceil(EULER_TEST_POINTS_PER_GRID_POINT * grid_points / (grid_points - 1))
    return min(per_interval * (grid_points - 1) * shocks * shocks, max(EULER_CHUNK_ELEMENTS, shocks * shocks))


def report_bytes(doc: Any, n: int, entries: int, euler: int = 0) -> int:
    """The result document and the reports asked for (bytes): the value and policy as nested lists, the
    stationary distribution (a policy's matrix with ``entries`` entries and its solve), the simulated paths,
    and ``euler`` elements of the Euler-error measurement's temporaries (:func:`euler_elements`)."""
    report = doc.report
    memory = n * RESULT_BYTES_PER_STATE
    if report.stationary:
        memory += n * STATIONARY_BYTES_PER_STATE + entries * STATIONARY_BYTES_PER_ENTRY
    if report.simulation is not None:
        memory += int(report.simulation.periods) * int(report.simulation.paths) * SIMULATION_BYTES_PER_DRAW
        memory += 0 if report.stationary else policy_matrix_bytes(n, entries)
    return memory + euler * EULER_BYTES_PER_ELEMENT


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
    distribution by period as well.
    """
    horizon = getattr(doc.model, "horizon", None)
    if horizon is None:
        return 0
    per_point = 16 + RESULT_BYTES_PER_STATE
    if doc.report.cohort is not None:
        per_point += 8 + RESULT_BYTES_PER_STATE // 3
    return int(horizon.periods) * n * per_point
