"""The measured costs and the sizing formulas the estimates share (memory per point, iterations, linear solves).

:mod:`worker.estimate` sizes a document from them, and so does
:mod:`worker.continuous_estimate`; keeping them here lets both import them
without importing each other (a finite horizon's own costs are in
:mod:`worker.horizon_costs`).  Every figure is a measurement on the
development machine or marked as a guess.
"""

from __future__ import annotations

import math
from typing import Any

from worker.stationary_lu import NATURAL_ENVELOPE, NATURAL_MAX_ENTRIES

__all__ = [
    "CHUNK_ELEMENTS",
    "CHUNK_TEMPORARIES",
    "EXACT_LEVEL_NS",
    "EXPECTATION_NS",
    "EULER_BYTES_PER_ELEMENT",
    "SIMULATION_BYTES_PER_DRAW",
    "STATIONARY_BYTES_PER_ENTRY",
    "STATIONARY_BYTES_PER_STATE",
    "STATIONARY_LU_ENTRY_NS",
    "STATIONARY_ENVELOPE_SHARE",
    "STATIONARY_LU_SHARE",
    "CHOICE_BYTES",
    "DIRECT_SOLVE_MAX_POINTS",
    "DRAWS_FIXED_S",
    "FIXED_S",
    "GRID_FIXED_S",
    "HOWARD_BASE_ITERATIONS",
    "HOWARD_ITERATIONS_PER_OCTAVE",
    "FEASIBILITY_COLUMNS",
    "HINTED_POINTS",
    "THREAD_EFFICIENCY",
    "SCAN_NODE_NS",
    "INTERPOLATED_PAIR_NS",
    "ITERATION_S",
    "STATIONARY_GRID_S",
    "TABULAR_STEP_S",
    "MOVING_STEPS_DIVISOR",
    "SETTLE_SHARE",
    "STABLE_STEPS_FACTOR",
    "KRYLOV_RESIDUAL_SHARE",
    "KRYLOV_RESTART",
    "LU_ENTRY_NS",
    "LU_FIXED_S",
    "TABULAR_LU_SHARE",
    "VALUE_SPAN_SHARE",
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
    "report_seconds",
    "report_bytes",
    "solve_bytes",
    "iteration_steps",
    "linear_solve_bytes",
    "lu_entries",
    "stationary_lu_entries",
    "every_state_moves",
    "GRID_LU_FILL",
    "LU_ENTRY_BYTES",
    "linear_solve_seconds",
    "linear_solve_words",
]

TABLE_READ_NS = 0.7
"""Cost of one (state, choice) pair in a compiled table scan (nanoseconds; measured on one thread: 0.65 on
tables of 0.2 and 20 million entries)."""
NUMPY_PAIR_NS = 9.0
"""Cost of evaluating one (state, choice) pair of a typical model with numpy (nanoseconds; measured on one
thread: 9–13 filling the tables of the growth, farm and fishery models of ``bench/bench_estimates.py``)."""
POINT_NS = 40.0
"""Cost of one pointwise evaluation of a typical model in compiled code (nanoseconds; one
``pow`` with a runtime exponent dominates)."""
EXACT_LEVEL_NS = 38.0
"""The exact block search per state and level of its blocks (``2 · log2(choices/16) + 10`` levels): the interval
bounds and the points evaluated near the optimum, seeded by the hinted policy (nanoseconds; measured on one
thread at a solved value: 370–1,140 ns per state at 160 to 2,000 choices)."""
STATIC_CLIMB_POINTS = 4
"""Points a climb along a static choice evaluates per table entry, from the neighbouring entry's best (count;
"common practice" guess: the start, a step each way and one more)."""
HOWARD_BASE_ITERATIONS = 3.0
HOWARD_ITERATIONS_PER_OCTAVE = 1.5
"""Howard and policy iteration take about ``HOWARD_BASE_ITERATIONS`` plus this many iterations per doubling of
the choices (count; measured by ``bench/bench_estimates.py``: 3 to 8 at 2 to 6 choices, 7 to 17 at 90 to 240,
14 at 1,000 and 20 at 2,000)."""
MOVING_STEPS_DIVISOR = 5
STABLE_STEPS_FACTOR = 20
"""As :data:`worker.solvers.evaluation.MOVING_STEPS_DIVISOR` and ``STABLE_STEPS_FACTOR`` (not imported: that
module imports this one; ``tests/worker/test_estimates_accuracy.py`` checks they agree)."""
SETTLE_SHARE = 0.15
"""Howard's last evaluation phase runs until the increments' span settles: about this share of the steps a
contraction at rate β would need (dimensionless; measured 0 to 0.45 on the bundled examples, since chains
that mix contract the span faster than β)."""
VALUE_SPAN_SHARE = 0.25
"""Value iteration stops when the MacQueen–Porteus bracket, ``β/(1 − β)`` times the span of ``Tv − v``, is within
twice the tolerance; the span shrinks at β times the rate at which the policy's chain mixes, so a grid model
takes about this share of the steps a contraction at rate β would need from a span of order 1 (dimensionless).
Its chain depends on the policy through the next states, which the sizes do not tell: measured on the 13 grid
documents of ``tests/_estimate_set.py`` without a horizon, by value iteration, 0.06 (bike shop: its demand
draws reset the stock) to 0.62 (household savings), geometric mean 0.26 — so this figure may be 4 times the
steps, or 0.4 of them.  A tabular model's steps come from its chains instead (:mod:`worker.mixing`)."""
ITERATION_S = 5e-5
"""Fixed cost of one iteration: the log entry, the bracket, the policy comparison, the polls (seconds)."""
TABULAR_STEP_S = 5e-6
"""Fixed cost of one evaluation step of a tabular model: a sparse product called from Python (seconds)."""
FIXED_S = 7e-4
"""Fixed cost of any solve: validation, the size check, the result's dictionaries (seconds; a ten-state tabular
solve takes about 2 ms in all, 1.2 of them its stationary report)."""
GRID_FIXED_S = 1.5e-4
"""Fixed cost of a grid model's compilation: its data, the kernels' module from the cache, a warm-up (seconds;
measured: a warm solve of one iteration without reports took 0.86 ms on the courier example, 270 points with
taste shocks, of which ``FIXED_S`` 0.7)."""
DRAWS_FIXED_S = 1e-4
"""Fixed cost of draws after the choice: their probabilities checked at every point, their tables (seconds;
measured: the one-iteration solve of the bike shop, 31 points with demand drawn after the order, took 0.95 ms,
its table fill included)."""
SCAN_NODE_NS = 12.0
"""An exact pointwise step of a model with an interpolated state, per point, choice and interpolation node:
bounds through interpolated tomorrows are loose and the search comes near a scan of every choice
(nanoseconds; measured on one thread of a quiet machine: 9 on the fishery and 16 on the roastery examples
solved without tables; 25 and 42 on a loaded one)."""
FEASIBILITY_COLUMNS = 2
"""Choices per state the feasibility scan of a pointwise model typically evaluates before every state has an
allowed one (count: its first passes try one, then two; a model whose allowed choices are rare goes on, with
passes of up to ``CHUNK_ELEMENTS`` pairs)."""
THREAD_EFFICIENCY = 0.8
"""Each thread beyond the first adds this share of one to the speed of the threaded parts of a large solve
(dimensionless; :data:`worker.threadpool.THREAD_MIN_PAIRS` measured 1.8× on two threads at 7 million pairs)."""
HINTED_POINTS = 5
"""Choices per state a hinted search of a grid evaluates with the monotone hint alone (count; with the concave
hint it stops at the first that does worse, counted as one: measured 18–35 ns per state on growth and
household models)."""
INTERPOLATED_PAIR_NS = 40.0
"""Filling the tables, per pair and state moved by a ``next`` expression: its nodes and weights (nanoseconds)."""
RESULT_NS = 100.0
"""The result's nested lists per point (nanoseconds)."""
STATIONARY_S = 1e-3
STATIONARY_GRID_S = 2e-4
"""The stationary report of a grid model, on top of ``STATIONARY_S``: the marginals by state and shock (seconds)."""
STATIONARY_ENTRY_NS = 450.0
"""The stationary report: a fixed cost (seconds) and the cost per entry of the policy's matrix (nanoseconds; one
pinned sparse LU, :func:`worker.stationary_lu.pinned_lu`, and the marginals).  Measured as a warm solve with the report
less one without it: 0.6 ms on the ten-state machine example, 0.9 ms on the bike shop (31 points, 310 entries),
1.9 ms on the household (4,000 entries), 5.4 ms on the roastery (7,200) and 6.6 ms on the plant (11,760)."""
SIMULATION_NS = 500.0
"""The simulation per simulated period of one path (nanoseconds; measured 13 ms for 200 × 100)."""
EULER_ELEMENT_NS = 600.0
"""The Euler-error measurement per element of its chunks (nanoseconds; measured on the beekeeper example: 500 on
a quiet machine, 1,400 on a loaded one; tomorrow's choice interpolated, Newton steps on the first-order
condition)."""
MATVEC_NS = 1.0
"""Cost per stored entry of a sparse matrix–vector product, or per interpolation node of a grid model's
policy step (nanoseconds)."""
EXPECTATION_NS = 0.2
"""A grid model's expected continuation ``EV = P · V`` per (grid state, shock, next shock) product (nanoseconds;
a dense matrix product, once per Bellman or evaluation step)."""
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
STATIONARY_LU_SHARE = 0.035
"""Above ``DIRECT_SOLVE_MAX_POINTS`` states a grid model's stationary LU, made in the states' own order within its
envelope (:func:`worker.stationary_lu.natural_pinned_lu`), holds at most about this share of ``n²`` entries
(dimensionless; the largest measured, rounded up: ``bench/bench_lu_fill.py --stationary``, 2026-12-05, one-state
chains of 2,500 to 14,000 states, grid and continuous choices, 3 to 20 shock points: 0.0038 to 0.034; the 2 %
used before was below the household's 0.025 at 2,500 and 5,000 states).  The envelope widens with the grid,
so the fill grows like ``n²``, not like the matrix's entries (5 to 23 times them there)."""
STATIONARY_ENVELOPE_SHARE = 0.1
"""The envelope of the chain of a grid model whose every state moves (two or more states, each set by a
choice or a ``next`` expression), as a share of ``n²``, at least (dimensionless; measured 0.10 to 0.19 on seven
two-state chains of 4,800 to 12,800 states, ``bench/bench_lu_fill.py --stationary``): the states' own order
interleaves a slow state's moves with the fast ones', so a row reaches back a slow step's stride.  Where this
share of ``n²`` exceeds what :func:`worker.stationary_lu.natural_pinned_lu` allows, no LU is made (the
iterative solves instead; it made none on any of the seven)."""
STATIONARY_LU_ENTRY_NS = 50.0
"""That LU's time per entry of its factors (nanoseconds; measured 30–52 on the same chains, 0.13 s at 14,000
states)."""
SIMULATION_BYTES_PER_DRAW = 24
"""The simulation per simulated period of one path (bytes; measured 24–28 at 200 × 100 and 1,000 × 500)."""
EULER_BYTES_PER_ELEMENT = 64
"""Temporaries of the Euler-error measurement per element of a chunk (bytes: about eight float64 arrays;
measured 66 on the beekeeper example)."""
EULER_TEST_POINTS_PER_GRID_POINT = 10
"""As :data:`worker.euler.TEST_POINTS_PER_GRID_POINT` (not imported: ``worker.euler`` imports this module's
importers; ``tests/worker/test_estimates_accuracy.py`` checks they agree)."""
CHUNK_ELEMENTS = 1 << 20
"""(state, choice) pairs evaluated per numpy chunk while precomputing or checking (elements)."""
CHUNK_TEMPORARIES = 5
"""float64 temporaries of chunk size alive at once while evaluating a model's expressions, per chunk in flight
(count; traced peaks of the bundled examples: 3 to 8, and 10 per draw with draws after the choice; 2.5 per
chunk filling the 20-million-pair tables of ``bench/bench_estimates.py`` on 1, 2 and 4 threads)."""
EULER_CHUNK_ELEMENTS = 2**18
"""As ``worker.euler._CHUNK_ELEMENTS``: (test point, shock, next shock) triples evaluated at once (count)."""

LU_FIXED_S = 1e-4
"""A direct exact evaluation's fixed cost: ``I − βP_σ`` built in CSC, the solver set up (seconds; measured 0.09 ms
for a 10-state system, and 0.1 ms at 31 states, here)."""
LU_ENTRY_NS = 100.0
"""A sparse LU of a grid model's policy system, per stored entry and point (nanoseconds; measured by
``bench/bench_estimates.py`` with policy iteration: about 2 ms a solve at 802 points and 9,624 entries (taste
shocks with draws), under 0.5 ms at 270 points and 1,620 entries: a policy's rows reach a few grid points, so the
fill-in stays small)."""
TABULAR_LU_SHARE = 0.2
"""A tabular model's transitions may reach any state, so its LU may fill in: its time is this share of the
dense bound ``n³/3`` ns (dimensionless; measured 9 ms a solve at 500 states with random transitions, against
42 ms)."""
GRID_LU_FILL = 3.0
"""A sparse LU of a grid model's policy system ``I − βP_σ`` holds about this many entries per entry of the system
(dimensionless; at most ``n²``).  The policy is not known before solving, so neither is the system's pattern: a
grid point's row reaches its interpolation nodes times the shocks its chain row reaches, and SuperLU's default
column ordering (COLAMD) keeps the fill-in small.  Measured by ``bench/bench_lu_fill.py`` (the seven grid
documents of ``tests/_estimate_set.py`` that policy iteration solves by sparse LU): 0.96 to 6.6 times the
estimate's ``n · nodes · shocks`` entries plus the diagonal, more with a Markov chain of more points (its rows
fill the blocks of a grid point's shocks), geometric mean 2.5; 3 leans to the side the job's memory limit does
not catch (an overstatement)."""
LU_ENTRY_BYTES = 12
"""SuperLU's storage per entry of an LU factor: the value and its row index (bytes).  Held by the C library,
outside Python's allocators; ``bench/bench_lu_fill.py`` compares it with the resident memory a solve adds."""
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


def solve_bytes(n: int, entries: int, method: str, *, exact: int | None = None) -> int:
    """What the solver keeps while it iterates: its vectors and, for policy iteration, its exact evaluation
    (bytes): ``exact`` when the caller sized it, else the policy's matrix with ``entries`` stored entries and the
    solve of its system (:func:`linear_solve_bytes`, the fill-in of a grid model's)."""
    memory = n * SOLVER_BYTES_PER_STATE
    if method == "policy_iteration":
        memory += policy_matrix_bytes(n, entries) + linear_solve_bytes(n, entries) if exact is None else exact
    return memory


def euler_elements(doc: Any, grid_points: int, shocks: int) -> int:
    """Elements of one chunk of the Euler-error measurement (0 when it is not asked for): its test points
    (``EULER_TEST_POINTS_PER_GRID_POINT`` per grid interval) times the pairs of today's and tomorrow's shocks,
    at most ``EULER_CHUNK_ELEMENTS``."""
    if not getattr(doc.report, "euler_errors", False) or grid_points < 2:
        return 0
    per_interval = math.ceil(EULER_TEST_POINTS_PER_GRID_POINT * grid_points / (grid_points - 1))
    return min(per_interval * (grid_points - 1) * shocks * shocks, max(EULER_CHUNK_ELEMENTS, shocks * shocks))


def report_bytes(doc: Any, n: int, entries: int, euler: int = 0, *, bandwidth: int | None = None) -> int:
    """The result document and the reports asked for (bytes): the value and policy as nested lists, the
    stationary distribution (a policy's matrix with ``entries`` entries, its solve and its LU,
    :func:`stationary_lu_entries`; ``bandwidth``: a tabular model's), the simulated paths, and ``euler``
    elements of the Euler-error measurement's temporaries (:func:`euler_elements`)."""
    report = doc.report
    memory = n * RESULT_BYTES_PER_STATE
    if report.stationary:
        memory += n * STATIONARY_BYTES_PER_STATE + entries * STATIONARY_BYTES_PER_ENTRY
        lu = stationary_lu_entries(n, entries, bandwidth, all_move=every_state_moves(doc))
        memory += lu * LU_ENTRY_BYTES
    if report.simulation is not None:
        memory += int(report.simulation.periods) * int(report.simulation.paths) * SIMULATION_BYTES_PER_DRAW
        memory += 0 if report.stationary else policy_matrix_bytes(n, entries)
    return memory + euler * EULER_BYTES_PER_ELEMENT


def stationary_lu_entries(n: int, entries: int, bandwidth: int | None = None, *,
                          all_move: bool = False) -> int:
    """Entries of the LU a stationary report makes of a chain of ``n`` states whose matrix stores ``entries``
    (:func:`worker.report.long_run_distribution`; a search's trials make the same): up to
    ``DIRECT_SOLVE_MAX_POINTS`` states SuperLU's own, :func:`lu_entries`; above, one in the states' own order,
    made only within ``NATURAL_ENVELOPE`` times the system's entries and ``NATURAL_MAX_ENTRIES`` (else none: the
    iterative solves, whose incomplete LU is smaller): the band's bound with a ``bandwidth`` (a tabular model's),
    else ``STATIONARY_LU_SHARE`` of ``n²``; none when ``all_move`` (a grid model of two or more states,
    :func:`every_state_moves`) and ``STATIONARY_ENVELOPE_SHARE`` of ``n²`` is past that limit."""
    if n <= DIRECT_SOLVE_MAX_POINTS:
        return lu_entries(n, entries, bandwidth)
    limit = min(NATURAL_ENVELOPE * (entries + n), NATURAL_MAX_ENTRIES)
    if bandwidth is None and all_move and STATIONARY_ENVELOPE_SHARE * n * n > limit:
        return 0
    typical = lu_entries(n, entries, bandwidth) if bandwidth is not None else math.ceil(STATIONARY_LU_SHARE * n * n)
    return min(typical, limit)


def every_state_moves(doc: Any) -> bool:
    """Whether ``doc`` is a grid model of two or more states, each set by a choice (``next_of``) or a ``next``
    expression: the pattern :data:`STATIONARY_ENVELOPE_SHARE` was measured on.  A state that keeps its value (a
    fixed type, whose ``next`` is its own name) splits the chain into blocks whose LU may be made, so it is
    priced as one state's."""
    model = doc.model
    if getattr(model, "kind", None) != "grid" or len(model.states) < 2:
        return False
    set_by_choice = {choice.next_of for choice in model.choices.values() if choice.next_of is not None}
    moved_by_law = {name for name, law in model.next.items() if str(law).replace(" ", "") != name}
    return all(name in moved_by_law or name in set_by_choice for name in model.states)


def lu_entries(n: int, entries: int, bandwidth: int | None = None) -> int:
    """Entries of the sparse LU of an ``n``-square system with ``entries`` stored entries besides the diagonal.

    With a ``bandwidth`` (a tabular model's transitions, in the states' order, read from the document): the
    size of a banded LU with partial pivoting, ``n · (3·bandwidth + 3)`` (L keeps the lower bandwidth and its
    diagonal, U the sum of both bandwidths; Golub and Van Loan, *Matrix Computations*, §4.3; SuperLU's column
    ordering may stray from it a little), at most ``n²``: a chain that reaches anywhere fills its LU nearly dense
    (0.6 to 1.0 of ``n²`` measured on the random tabular chains of the estimate set).
    Without one (a grid model, whose policy decides the pattern): ``GRID_LU_FILL`` per entry and diagonal
    entry, at most ``n²``.
    """
    if bandwidth is not None:
        return min(n * n, n * (3 * bandwidth + 3))
    return min(n * n, math.ceil(GRID_LU_FILL * (entries + n)))


def linear_solve_bytes(n: int, entries: int, bandwidth: int | None = None) -> int:
    """Memory of one exact evaluation of policy iteration, ``P_σ`` with ``entries`` stored entries.

    Direct (``n ≤ DIRECT_SOLVE_MAX_POINTS``): ``I − βP_σ`` in CSC (built from the identity and the scaled matrix,
    then converted) and its LU factor, :func:`lu_entries` of ``LU_ENTRY_BYTES`` each (SuperLU's own memory, which
    Python's tracing does not see), plus SuperLU's work arrays.  Iterative: ``I − βP_σ`` is applied, never
    formed; GMRES keeps ``KRYLOV_RESTART + 4`` vectors and the residual check two more.
    """
    if n <= DIRECT_SOLVE_MAX_POINTS:
        return 2 * (entries + n) * 12 + lu_entries(n, entries, bandwidth) * LU_ENTRY_BYTES + 64 * n
    return (KRYLOV_RESTART + 6) * 8 * n + (entries + n) * 12


def linear_solve_seconds(n: int, entries: int, beta: float, tolerance: float, *, anywhere: bool = False) -> float:
    """Time of one exact evaluation: a sparse LU (``LU_FIXED_S`` plus ``LU_ENTRY_NS`` per stored entry and point;
    with transitions that may reach ``anywhere``, a tabular model's, ``TABULAR_LU_SHARE`` of the dense bound of
    ``n³/3`` operations at 1 ns each), or the GMRES mat-vecs a rate of β needs to bring the residual to the target
    (an upper guess for chains that mix slowly)."""
    if n <= DIRECT_SOLVE_MAX_POINTS:
        if anywhere:
            return LU_FIXED_S + TABULAR_LU_SHARE * n**3 / 3 * 1e-9
        return LU_FIXED_S + (entries + n) * LU_ENTRY_NS * 1e-9
    scale = 1.0 / (1.0 - beta)
    target = max(KRYLOV_RESIDUAL_SHARE * tolerance * (1.0 - beta) / scale, 1e-16)
    matvecs = math.ceil(math.log(target) / math.log(beta))
    return matvecs * (entries + 2 * n + KRYLOV_RESTART * n) * MATVEC_NS * 1e-9


def linear_solve_words(n: int) -> str:
    if n <= DIRECT_SOLVE_MAX_POINTS:
        return (f"exact evaluations by sparse LU (at most {DIRECT_SOLVE_MAX_POINTS:,} points; its fill-in estimated "
                "from the system's entries, at most n²)")
    return (
        f"exact evaluations by restarted GMRES ({KRYLOV_RESTART} steps a cycle; above {DIRECT_SOLVE_MAX_POINTS:,} "
        "points an LU's fill-in is unbounded), mat-vecs guessed for a chain that mixes at rate β"
    )


def iteration_steps(
    doc: Any, choices: int, *, moving_divisor: int | None = None, mixing: tuple[float, float, str] | None = None
) -> tuple[int, int, str]:
    """(iterations, evaluation steps in all, basis) guessed from β, the tolerance, the method and the choices.

    Howard and policy iteration: ``HOWARD_BASE_ITERATIONS + HOWARD_ITERATIONS_PER_OCTAVE · log2(choices)``
    iterations (the greedy policy keeps moving longer on finer choice grids).  Howard's evaluation phases
    follow :func:`worker.solvers.evaluation.phase_plan`: ``m // moving_divisor`` steps after each iteration
    that moved the policy, then the steps until the increments settle, guessed as ``SETTLE_SHARE`` of the
    steps a contraction at rate β needs to bring the span to ``tolerance · (1 − β)/β``.  Value iteration:
    ``VALUE_SPAN_SHARE`` of the steps at rate β that bring the bracket from a span of order 1 to the tolerance,
    or, with ``mixing`` (a tabular model's ``(rate ρ, first span, words)``, :mod:`worker.mixing`), the steps at
    rate ``β · ρ`` from that first span.
    """
    horizon = doc.model.horizon
    if horizon is not None:
        return horizon.periods, 0, (
            f"{horizon.periods:,} periods of backward induction, one exact Bellman step each (with hints, seeded by "
            "a hinted one)"
        )
    beta = float(doc.discount)
    solver = doc.solver
    tolerance = float(solver.tolerance)
    evaluation = 0
    if solver.method == "value_iteration":
        # It stops on the bracket: β/(1 − β) · span(Tv − v) within 2 · tolerance, from a span of order 1; the span
        # shrinks faster than β when the chain mixes, so a share of the steps at rate β.
        bracket = max(2.0 * tolerance * (1.0 - beta) / beta, 1e-16)
        if mixing is None:
            steps = math.ceil(VALUE_SPAN_SHARE * math.log(bracket) / math.log(beta))
            how = (f"value iteration: {VALUE_SPAN_SHARE:g} of the steps at rate β that bring the bracket from a "
                   f"reward span of order 1 to the tolerance {tolerance:g}")
        else:
            rate, first, words = mixing
            contraction = beta * max(rate, 1e-6)
            steps = 1 + max(1, math.ceil(math.log(bracket / first) / math.log(contraction))) if first > bracket else 2
            how = (f"value iteration: the steps at rate β · {rate:.2f} ({words}, measured on the document's "
                   f"transitions) that bring the bracket from the first span {first:.3g} to the tolerance "
                   f"{tolerance:g}")
    else:
        steps = math.ceil(HOWARD_BASE_ITERATIONS + HOWARD_ITERATIONS_PER_OCTAVE * math.log2(max(choices, 2)))
        how = (f"{solver.method}: {HOWARD_BASE_ITERATIONS:g} + {HOWARD_ITERATIONS_PER_OCTAVE:g} per doubling of "
               f"the {choices:,} choices")
        if solver.method == "howard" and int(solver.evaluation_steps) > 0:
            m = int(solver.evaluation_steps)
            settle_target = max(tolerance * (1.0 - beta) / beta, 1e-16)
            settle = min(STABLE_STEPS_FACTOR * m, math.ceil(SETTLE_SHARE * math.log(settle_target) / math.log(beta)))
            evaluation = (steps - 1) * max(1, m // (moving_divisor or MOVING_STEPS_DIVISOR)) + settle
    steps = min(max(steps, 1), int(solver.max_iterations))
    basis = f"{steps} iterations ({how}, β = {beta:g})" + (
        f", {evaluation} evaluation steps in all" if evaluation else "")
    return steps, evaluation, basis



def report_seconds(doc: Any, n: int, entries: int, euler: int = 0, *, grid: bool = True,
                   bandwidth: int | None = None) -> float:
    """Time of the result and the reports asked for (seconds): the fixed cost of any solve, the stationary
    distribution (above ``DIRECT_SOLVE_MAX_POINTS`` states its LU, :func:`stationary_lu_entries`), the simulation
    and ``euler`` elements of the Euler-error measurement."""
    report = doc.report
    seconds = FIXED_S + n * RESULT_NS * 1e-9
    if report.stationary:
        seconds += STATIONARY_S + (STATIONARY_GRID_S if grid else 0.0) + entries * STATIONARY_ENTRY_NS * 1e-9
        if n > DIRECT_SOLVE_MAX_POINTS:
            lu = stationary_lu_entries(n, entries, bandwidth, all_move=every_state_moves(doc))
            seconds += lu * STATIONARY_LU_ENTRY_NS * 1e-9
    if report.simulation is not None:
        seconds += STATIONARY_S + int(report.simulation.periods) * int(report.simulation.paths) * SIMULATION_NS * 1e-9
    return seconds + euler * EULER_ELEMENT_NS * 1e-9
