"""Reports on a solved policy: its stationary distribution and simulated paths.

Both work on ``P_σ``, the (n, n) transition matrix of the final policy, so
they serve tabular and grid problems alike.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import scipy.sparse as sp

from worker.costs import DIRECT_SOLVE_MAX_POINTS
from worker.errors import InvalidDocument, join_path
from worker.problem import CompiledProblem
from worker.shocks import stationary_distribution
from worker.stationary_lu import natural_lu_fits, natural_pinned_lu, ordered_pinned_lu

__all__ = [
    "DIRECT_MAX_STATES",
    "TOP_MASS_WARNING",
    "ILU_DROP_TOLERANCE",
    "ILU_FILL_FACTOR",
    "PERCENTILES",
    "POWER_MAX_STEPS",
    "POWER_TOLERANCE",
    "CHAIN_TRANSITION_MAX_POINTS",
    "long_run_distribution",
    "shock_chains",
    "simulate_report",
    "stationary_report",
]

DIRECT_MAX_STATES = DIRECT_SOLVE_MAX_POINTS
"""Chains with at most this many states are solved by a sparse LU in SuperLU's own column ordering, whose fill
nothing bounds but ``n²`` (4 million entries, 48 MiB, at 2,000 states), the cap of policy iteration's own LU
for the same reason.  Larger chains: an LU in the states' own order when their envelope
bounds its fill (:func:`worker.stationary_lu.natural_pinned_lu`), else GMRES with an incomplete-LU
preconditioner (one closed class), else power iteration, whose memory stays O(nonzeros).

Measured 2026-12-05 (this cap was 20,000 before): a random chain of 5,000 states with 5 successors each filled
SuperLU's LU to about 13 million entries (2.9 s, a peak of 255 MiB, where the size estimate said 8 MiB), and at
10,000 states it ran past a job's memory limit after 19 s, where power iteration settles either in under 10 ms;
a 28,000-state savings chain's LU fills in to 40 million entries (8 s), and the preconditioned GMRES settles it
to a residual of 3e-14 in 1.1 s.  Savings chains of 7,000–19,600 states take the states' own order in half the
time SuperLU's ordering took (0.13 s against 0.26 s at 14,000 states, 0.26 s against 0.52 s at 19,600)."""
CHAIN_TRANSITION_MAX_POINTS = 100
"""A shock's transition matrix is returned in the result's ``chains`` up to this many values (10,000 entries);
a longer chain's ``transition`` is null (its values are always returned)."""
PINNED_TOLERANCE = 1e-12
"""Largest residual ``‖πP − π‖₁`` accepted from the pinned sparse LU (a pin of tiny mass can leave more; the
general solve of :func:`worker.shocks.stationary_distribution` then takes over)."""
ILU_DROP_TOLERANCE = 1e-3
"""``spilu``'s drop tolerance for the GMRES preconditioner (measured fastest of 1e-3 to 1e-5)."""
ILU_FILL_FACTOR = 5
"""``spilu``'s fill factor for the GMRES preconditioner."""
POWER_TOLERANCE = 1e-10
"""Power iteration stops when the residual ``‖πP − π‖₁`` is at most this
(unitless: a total-variation distance of probability vectors)."""
POWER_MAX_STEPS = 200_000
"""Power iteration gives up (with a warning) after this many steps."""
POWER_FIRST_STEPS = 1000
"""Above ``DIRECT_MAX_STATES``, power steps tried before the incomplete LU (count): a chain that mixes fast
settles within them for less than the factorisation costs (a 60,000-state growth chain: 540 steps, 0.5 s,
against 1.5–3 s for the incomplete LU and GMRES; measured), and a slow one (a 28,000-state savings chain
near r = 1/β − 1 needs 10⁴–10⁵) loses little."""
PIN_PROBE_STEPS = 50
"""Lazy power steps from uniform that pick the pinned state of the direct solve (count; see ``_pinned``)."""
GMRES_MAX_CYCLES = 20
"""Restart cycles (of 50 steps) GMRES may run before power iteration takes over (count)."""
_POWER_CHECK_EVERY = 10
"""Lazy steps between two residual checks."""
PERCENTILES = (5, 25, 50, 75, 95)
"""Percentiles reported for every simulated series."""


def long_run_distribution(matrix: sp.csr_matrix) -> tuple[np.ndarray, dict[str, Any]]:
    """The long-run distribution of a chain started uniformly over its states.

    With one recurrent class this is the chain's unique stationary
    distribution.  With several, it is the mixture the chain settles into from
    a uniform start: each recurrent class receives the mass that reaches it
    (absorption probabilities) spread by its own stationary distribution —
    the Cesàro limit of ``u P^t``, ``u`` uniform.  Periodic chains are fine.

    Up to ``DIRECT_MAX_STATES`` states the limit is solved exactly
    (:func:`worker.shocks.stationary_distribution`, a sparse LU).  Above, a
    chain with one closed class is solved by a sparse LU in the states' own
    order when their envelope bounds it (:mod:`worker.stationary_lu`), else,
    after power steps, by GMRES preconditioned with an
    incomplete LU (:func:`_preconditioned`); when that is not possible or
    leaves a residual above ``POWER_TOLERANCE``, the limit is approached by
    power iteration on the lazy chain ``(I + P)/2`` (which has the same limit
    and is aperiodic) from the uniform distribution, until
    ``‖πP − π‖₁ ≤ POWER_TOLERANCE``.  The residual is reported either way.

    Parameters
    ----------
    matrix : (n, n) row-stochastic sparse matrix

    Returns
    -------
    pi : (n,) float64, summing to 1
    info : dict
        ``method`` (``"direct"``, ``"gmres"`` or ``"power"``), ``residual`` (‖πP − π‖₁),
        ``steps`` (power steps; 0 for direct), ``warnings``.
    """
    matrix = sp.csr_matrix(matrix, dtype=np.float64)
    n = matrix.shape[0]
    transposed = sp.csr_matrix(matrix.T)
    warnings: list[str] = []
    pi = None
    if n <= DIRECT_MAX_STATES:
        # One closed class (the usual case) by one sparse LU of the pinned system; else the general solve.
        pi = _pinned(matrix, transposed, n, direct=True)
        if pi is None or float(np.abs(transposed @ pi - pi).sum()) > PINNED_TOLERANCE:
            pi = stationary_distribution(matrix)
        method, steps = "direct", 0
    else:
        # An LU in the states' own order when their envelope bounds it (worker.stationary_lu): 0.3 s where the
        # power steps, the incomplete LU and GMRES took 6.7 s on a 28,000-state savings chain (measured).
        pi = _pinned(matrix, transposed, n, direct=True, natural_only=True) if natural_lu_fits(matrix) else None
        method, steps = "direct", 0
        if pi is None or float(np.abs(transposed @ pi - pi).sum()) > PINNED_TOLERANCE:
            pi, method, steps = _iterative(matrix, transposed, n)
    residual = float(np.abs(transposed @ pi - pi).sum())
    if method == "power" and residual > POWER_TOLERANCE:
        warnings.append(
            f"the stationary distribution did not settle within {POWER_MAX_STEPS} power steps "
            f"(residual {residual:.3g}); the chain of this policy mixes very slowly"
        )
    return pi, {"method": method, "residual": residual, "steps": steps, "warnings": warnings}


def _iterative(matrix: sp.csr_matrix, transposed: sp.csr_matrix, n: int) -> tuple[np.ndarray, str, int]:
    """Above ``DIRECT_MAX_STATES`` without an LU: power steps, then GMRES with an incomplete LU, then power steps
    again; ``(π, method, power steps)``."""
    # A chain that mixes fast settles in a few hundred power steps, cheaper than an incomplete LU.
    pi, steps = _lazy_power(transposed, n, max_steps=POWER_FIRST_STEPS)
    if float(np.abs(transposed @ pi - pi).sum()) <= POWER_TOLERANCE:
        return pi, "power", steps
    solved = _preconditioned(matrix, transposed, n, pi if steps >= PIN_PROBE_STEPS else None)
    if solved is not None and float(np.abs(transposed @ solved - solved).sum()) <= POWER_TOLERANCE:
        return solved, "gmres", steps
    pi, more = _lazy_power(transposed, n, start=pi)
    return pi, "power", steps + more


def _preconditioned(
    matrix: sp.csr_matrix, transposed: sp.csr_matrix, n: int, guess: np.ndarray | None = None
) -> np.ndarray | None:
    """The stationary distribution of a chain with one closed class by GMRES, or None (several closed
    classes, or GMRES did not settle)."""
    return _pinned(matrix, transposed, n, direct=False, guess=guess)


def _pinned(
    matrix: sp.csr_matrix, transposed: sp.csr_matrix, n: int, *, direct: bool, guess: np.ndarray | None = None,
    natural_only: bool = False,
) -> np.ndarray | None:
    """The stationary distribution of a chain with one closed class, or None (several closed classes, or the
    solve failed): by a sparse LU when ``direct``, else by GMRES preconditioned with an incomplete LU (at most
    ``GMRES_MAX_CYCLES`` restart cycles, started from ``guess`` when given; the caller checks the residual).
    ``natural_only``: the LU only in the states' own order, within its bound
    (:func:`worker.stationary_lu.natural_pinned_lu`); else None.

    ``π (I − P) = 0`` with ``π_k = 1`` for a state ``k`` of the closed class is a nonsingular system in the
    other entries (the transient ones come out 0); its solution is normalised to sum to 1.  ``k`` is the
    closed class's state of most mass under ``guess`` or, without one, after ``PIN_PROBE_STEPS`` lazy power
    steps from uniform: pinning a state of tiny mass (a grid end the policy never reaches, say) leaves a
    system so badly scaled that even a sparse LU's answer missed by a residual of 0.25 (a 60,000-state
    growth chain, measured), and GMRES then ran its whole budget (300 s) for nothing.
    """
    from scipy.sparse import csgraph
    from scipy.sparse import linalg as sla

    count, label = csgraph.connected_components(matrix, directed=True, connection="strong")
    rows, cols = matrix.nonzero()
    leaky = np.unique(label[rows[label[rows] != label[cols]]])
    closed = np.setdiff1d(np.arange(count), leaky)
    if closed.size != 1:
        return None
    members = np.flatnonzero(label == closed[0])
    if guess is None:
        guess, _ = _lazy_power(transposed, n, max_steps=PIN_PROBE_STEPS)
    k = int(members[np.argmax(guess[members])])
    if direct:
        # The states' own order when their band bounds the fill (worker.stationary_lu).
        pi = natural_pinned_lu(matrix, k) if natural_only else ordered_pinned_lu(matrix, k)
        if pi is None:
            return None
        pi = np.maximum(pi, 0.0)
        return pi / pi.sum()
    system = sp.csc_matrix(sp.identity(n, format="csr") - transposed)
    keep = np.r_[0:k, k + 1:n]
    reduced = sp.csc_matrix(system[keep][:, keep])
    rhs = -system[keep][:, [k]].toarray().ravel()
    try:
        ilu = sla.spilu(reduced, drop_tol=ILU_DROP_TOLERANCE, fill_factor=ILU_FILL_FACTOR)
    except RuntimeError:  # an exactly singular pivot: leave it to power iteration
        return None
    start = guess[keep] / guess[k] if guess[k] > 0 else None
    solution, _ = sla.gmres(reduced, rhs, x0=start, M=sla.LinearOperator(reduced.shape, ilu.solve), rtol=1e-13,
                            atol=0, restart=50, maxiter=GMRES_MAX_CYCLES)
    if not np.isfinite(solution).all():
        return None
    pi = np.maximum(np.insert(solution, k, 1.0), 0.0)
    return pi / pi.sum()


def _lazy_power(
    transposed: sp.csr_matrix, n: int, *, max_steps: int = POWER_MAX_STEPS, start: np.ndarray | None = None
) -> tuple[np.ndarray, int]:
    """Power iteration ``π ← (π + πP)/2`` from ``start`` (default uniform), until the residual is at most
    ``POWER_TOLERANCE`` or ``max_steps`` steps; returns (π, steps)."""
    pi = np.full(n, 1.0 / n) if start is None else np.array(start, dtype=np.float64)
    steps = 0
    while steps < max_steps:
        for _ in range(min(_POWER_CHECK_EVERY, max_steps - steps)):
            moved = transposed @ pi
            residual = float(np.abs(moved - pi).sum())
            pi = 0.5 * (pi + moved)
            steps += 1
        if residual <= POWER_TOLERANCE:
            break
    return pi / pi.sum(), steps


def _as_shape(array: np.ndarray, shape: tuple[int, ...]) -> list[Any]:
    return np.asarray(array, dtype=np.float64).reshape(shape).tolist()


def _series(problem: CompiledProblem, policy: np.ndarray) -> dict[str, np.ndarray]:
    """Per state/shock axis and per choice, its (n,) numeric value."""
    series = {name: np.asarray(values, dtype=np.float64) for name, values in problem.state_values().items()}
    for name, values in problem.choice_values(policy).items():
        series[name] = np.asarray(values, dtype=np.float64)
    return series


TOP_MASS_WARNING = 0.01
"""Stationary mass at the top of a state's grid above which the report warns that the grid may cut the state
short (a share of the distribution; common practice)."""


def stationary_report(
    problem: CompiledProblem, policy: np.ndarray, real_ends: dict[str, list[str]] | None = None, doc: Any = None,
    distribution: tuple[np.ndarray, dict[str, Any]] | None = None,
) -> dict[str, Any]:
    """The stationary distribution of (states, shocks) under ``policy``.

    Parameters
    ----------
    problem : CompiledProblem
    policy : (n,) int64
    distribution : ``(π, info)`` of the policy's chain when already solved (a search's certifying trial,
        :func:`worker.search_trials.trial_distribution`); else :func:`long_run_distribution` solves it.

    Returns
    -------
    dict
        ``distribution``: nested lists of shape ``problem.shape`` (see
        :func:`long_run_distribution` for which distribution when the policy's
        chain has several recurrent classes); ``means`` and ``sd``: the mean and
        standard deviation of every state/shock axis, every choice and (given the
        validated ``doc``) every define under it (null where a define is not finite
        somewhere the distribution has mass);
        ``ends`` (grid models): per endogenous state, the mass at the ``min``
        and ``max`` of its grid; ``method``, ``residual``, ``steps``;
        ``warnings`` (also when more than `TOP_MASS_WARNING` of the mass sits at
        the top of a state's grid, unless ``real_ends`` lists ``"max"`` for it).
    """
    if distribution is None:
        pi, info = long_run_distribution(problem.policy_matrix(policy))
    else:
        pi, info = distribution[0], {**distribution[1], "warnings": list(distribution[1]["warnings"])}
    series = _series(problem, policy)
    if doc is not None:
        from worker.aggregates import define_series

        series.update((name, values) for name, values in define_series(doc, problem, policy).items()
                      if name not in series)
    pairs = {}
    if getattr(problem, "taste_scale", None) is not None:  # a random choice: moments over (point, choice) pairs
        from worker.taste_moments import pair_series

        pairs = pair_series(problem, policy, pi, doc)
    means, sds = {}, {}
    for name, values in series.items():
        held, weights = pairs[name] if name in pairs else (values[pi > 0], pi[pi > 0])
        if not np.isfinite(held).all():  # a define may be undefined where no mass is
            means[name] = sds[name] = None
            continue
        means[name] = float(weights @ held)
        sds[name] = float(np.sqrt(max(weights @ (held - means[name]) ** 2, 0.0)))
    ends = _ends(problem, pi, real_ends or {}, info["warnings"])
    return {"distribution": _as_shape(pi, problem.shape), "means": means, "sd": sds, "ends": ends, **info}


def _ends(problem: CompiledProblem, pi: np.ndarray, real_ends: dict[str, list[str]],
          warnings: list[str]) -> dict[str, dict[str, float]]:
    """Mass at each end of every endogenous state's grid (grid models; empty otherwise)."""
    names = list(getattr(getattr(problem, "model_data", None), "states", None) or [])
    shaped = np.asarray(pi).reshape(problem.shape)
    out = {}
    for k, name in enumerate(names):
        marginal = shaped.sum(axis=tuple(i for i in range(shaped.ndim) if i != k))
        out[name] = {"min": float(marginal[0]), "max": float(marginal[-1])}
        if marginal[-1] > TOP_MASS_WARNING and "max" not in real_ends.get(name, ()):
            top = problem.axes[name][-1]
            warnings.append(
                f"{100 * marginal[-1]:.3g}% of the stationary distribution sits at the top of the grid of `{name}` "
                f"({top:.6g}): the grid may cut the state short; raise its max, or list \"max\" in "
                f"model.states.{name}.real_ends if it is a real limit"
            )
    return out


def simulate_report(
    problem: CompiledProblem, policy: np.ndarray, spec: Any, *, path: str = "report.simulation"
) -> dict[str, Any]:
    """Simulated paths of the chain under ``policy``, summarised.

    Each path starts at ``spec.start`` (the nearest grid point on each axis;
    tabular: a state label or index) or, when absent, at a draw from the
    stationary distribution, and records ``spec.periods`` states, the first
    being the start.  Successors are drawn from the CSR rows of ``P_σ`` for
    all paths at once: one uniform draw per path is located by
    ``searchsorted`` in the cumulative sums of the row's probabilities
    (``numpy.random.default_rng(spec.seed)``; the same seed gives the same
    paths).  Zero-probability entries are never drawn.

    Returns
    -------
    dict
        ``periods``, ``paths``, ``seed``; ``summary``: per state/shock axis and
        choice, ``mean``, ``sd`` and ``p5 … p95`` over every recorded period
        of every path; ``first_path``: per axis its values along path 0
        (tabular: state labels), per choice the chosen values.
    """
    if getattr(problem, "choose_at", None) is not None:
        from worker.continuous.paths import simulate_paths

        return simulate_paths(problem, policy, spec, path, long_run_distribution, _summarise)
    periods, paths = int(spec.periods), int(spec.paths)
    seed = spec.seed
    rng = np.random.default_rng(seed)
    matrix = sp.csr_matrix(problem.policy_matrix(policy), dtype=np.float64)
    matrix.sum_duplicates()
    start = spec.start
    warnings: list[str] = []
    if start is None:
        pi, info = long_run_distribution(matrix)
        warnings.extend(info["warnings"])
        first = _draw_from(np.cumsum(pi), rng.random(paths))
    else:
        first = np.full(paths, _start_state(problem, start, path + ".start"), dtype=np.int64)

    if getattr(problem, "taste_scale", None) is not None:
        from worker.taste_paths import simulate_taste_paths

        summary, first_path = simulate_taste_paths(problem, policy, first, periods, rng, _summarise)
        return {"periods": periods, "paths": paths, "seed": seed, "summary": summary, "first_path": first_path,
                "warnings": warnings}
    cumulative = np.cumsum(matrix.data)
    row_base = np.concatenate([[0.0], cumulative])[matrix.indptr[:-1]]
    row_total = np.concatenate([[0.0], cumulative])[matrix.indptr[1:]] - row_base
    states = np.empty((paths, periods), dtype=np.int64)
    states[:, 0] = first
    for t in range(1, periods):
        here = states[:, t - 1]
        target = row_base[here] + rng.random(paths) * row_total[here]
        entry = np.searchsorted(cumulative, target, side="right")
        entry = np.clip(entry, matrix.indptr[here], matrix.indptr[here + 1] - 1)
        states[:, t] = matrix.indices[entry]

    series = _series(problem, policy)
    summary = {name: _summarise(values[states]) for name, values in series.items()}
    return {
        "periods": periods,
        "paths": paths,
        "seed": seed,
        "summary": summary,
        "first_path": _first_path(problem, policy, states[0]),
        "warnings": warnings,
    }


def _draw_from(cumulative: np.ndarray, uniforms: np.ndarray) -> np.ndarray:
    index = np.searchsorted(cumulative, uniforms * cumulative[-1], side="right")
    return np.minimum(index, cumulative.size - 1).astype(np.int64)


def _summarise(samples: np.ndarray) -> dict[str, float]:
    flat = samples.ravel()
    quantiles = np.percentile(flat, PERCENTILES)
    out = {"mean": float(flat.mean()), "sd": float(flat.std())}
    out.update({f"p{p}": float(q) for p, q in zip(PERCENTILES, quantiles)})
    return out


def _first_path(problem: CompiledProblem, policy: np.ndarray, states: np.ndarray) -> dict[str, list[Any]]:
    out: dict[str, list[Any]] = {}
    index = np.unravel_index(states, problem.shape)
    for k, (name, axis) in enumerate(problem.axes.items()):
        labels = np.empty(len(axis), dtype=object)
        labels[:] = list(axis)
        out[name] = labels[index[k]].tolist()
    chosen, _ = problem.describe_policy(policy)
    for name, nested in chosen.items():
        flat = np.empty(problem.n, dtype=object)
        flat[:] = _flatten(nested, problem.shape)
        out[name] = flat[states].tolist()
    return out


def _flatten(nested: Any, shape: tuple[int, ...]) -> list[Any]:
    if len(shape) == 1:
        return list(nested)
    return [leaf for part in nested for leaf in _flatten(part, shape[1:])]


def _start_state(problem: CompiledProblem, start: Any, path: str) -> int:
    """Flat index of the grid point nearest to ``start``.

    ``start`` is a mapping from axis name to a value (every axis needed), or,
    for a one-axis problem, the value itself.  Label axes (tabular states)
    match a label exactly, or an integer index.
    """
    names = list(problem.axes)
    if not isinstance(start, dict):
        if len(names) != 1:
            raise InvalidDocument.at(path, f"give a value for each of {', '.join(names)}")
        start = {names[0]: start}
    unknown = sorted(set(start) - set(names))
    missing = [name for name in names if name not in start]
    errors = [
        {"path": f"{path}.{name}", "message": f"not an axis; the axes are {', '.join(names)}"} for name in unknown
    ]
    errors += [{"path": f"{path}.{name}", "message": "a start value is needed for this axis"} for name in missing]
    if errors:
        raise InvalidDocument(errors)
    index = []
    for name in names:
        axis = list(problem.axes[name])
        value = start[name]
        index.append(_nearest(axis, value, f"{path}.{name}"))
    return int(np.ravel_multi_index(tuple(index), problem.shape))


def _nearest(axis: list[Any], value: Any, path: str) -> int:
    numeric = all(isinstance(x, (int, float)) and not isinstance(x, bool) for x in axis)
    if value in axis and not isinstance(value, bool):
        return axis.index(value)
    if not numeric:
        if isinstance(value, int) and not isinstance(value, bool) and 0 <= value < len(axis):
            return value
        raise InvalidDocument.at(path, f"{value!r} is not one of the labels of this axis")
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not np.isfinite(value):
        raise InvalidDocument.at(path, f"expected a finite number, got {value!r}")
    return int(np.argmin(np.abs(np.asarray(axis, dtype=np.float64) - float(value))))


def shock_chains(doc: Any) -> dict[str, dict[str, Any]]:
    """The result's ``chains``: every shock drawn before the choice, as the solve discretised it —
    ``{NAME: {"values": [...], "transition": [[...]]}}`` (values after the transform; ``transition[i][j]`` the
    probability of values[j] tomorrow given values[i] today; null above `CHAIN_TRANSITION_MAX_POINTS` values).
    Empty for a model without such shocks (and for tabular models)."""
    shocks = getattr(doc.model, "shocks", None) or {}
    out: dict[str, dict[str, Any]] = {}
    for name, spec in shocks.items():
        if spec.after_choice:
            continue
        values, matrix = spec.chain(path=join_path("model", "shocks", name))
        transition, rows = np.asarray(matrix, dtype=np.float64), None
        if values.size <= CHAIN_TRANSITION_MAX_POINTS:  # identical (iid) rows: one row's floats, copied per row
            same = transition.shape[0] > 1 and (transition == transition[:1]).all()
            rows = [list(row) for row in [transition[0].tolist()] * len(transition)] if same else transition.tolist()
        out[name] = {"values": np.asarray(values, dtype=np.float64).tolist(), "transition": rows}
    return out
