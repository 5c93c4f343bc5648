"""The front door of the numerics: ``solve(document) -> result document``.

``solve`` validates the document (``worker.document.parse_document``),
estimates its size and refuses it over the memory cap or when its kernels
would be too large to compile (``worker.kernel_limits.check_structure``), compiles it (tabular
here, grid through ``worker.gridmodel``, imported only when needed so that
``import worker`` never loads numba), picks the initial values, dispatches to
``worker.solvers.METHODS[solver.method]`` and builds the result document
from the one :class:`~worker.solvers.SolveOutcome`.  With ``limits`` it
also bounds the solve's time and, on request, enforces its estimate as a
memory limit (:mod:`worker.memory`).
"""

from __future__ import annotations

import hashlib
import json
import time
from typing import Any, Callable

import numpy as np

from worker.allocator import keep_freed_memory
from worker.axis_order import apply_axis_order, model_axis_order, to_internal
from worker.coarse_solve import coarse_start, left_after
from worker.convergence_log import dropped
from worker.environment import MAX_PROBLEM_MB, max_problem_bytes
from worker.errors import InvalidDocument, TooLarge
from worker.euler_result import euler_diagnostics
from worker.memory import memory_limit
from worker.problem import CompiledProblem
from worker.report import shock_chains, simulate_report, stationary_report
from worker.solvers import METHODS, Checkpoint, SolveOutcome
from worker.tabular import STATE_AXIS

__all__ = ["compile_document", "solve", "time_limit"]

_MIB = 2**20

def compile_document(document: dict[str, Any], *, limits: dict[str, Any] | None = None) -> tuple[Any, CompiledProblem]:
    """Validate, size-check and compile a problem document.

    Parameters
    ----------
    document : dict
        The raw problem document (parsed JSON, or a dict with packed arrays or ndarrays).
    limits : dict, optional
        ``{"max_bytes": int}``; default :func:`max_problem_bytes`.

    Returns
    -------
    (ProblemDocument, CompiledProblem)

    Raises
    ------
    InvalidDocument, InfeasibleModel
        The document is wrong (errors name the field paths).
    TooLarge
        The size estimate exceeds the cap; ``context["estimate"]`` holds it.
    """
    from worker.document import parse_document

    doc = parse_document(document)
    cap = {"max_bytes": int((limits or {}).get("max_bytes") or max_problem_bytes())}
    _check_size(doc, cap)
    return doc, _compile(doc, cap)


def _check_size(doc: Any, limits: dict[str, int]) -> dict[str, Any]:
    from worker.drawcheck import check_draw_tables
    from worker.estimate import estimate, grid_plan
    from worker.kernel_limits import check_structure
    from worker.tastecheck import check_taste_tables

    check_structure(doc)
    check_taste_tables(doc, limits=limits)
    model = doc.model
    # A discrete grid model's plan, computed once for the draws' check and the estimate.
    plan = (grid_plan(model, limits=limits, method=doc.solver.method)
            if model.kind != "tabular" and model.continuous_choice() is None else None)
    check_draw_tables(doc, limits=limits, plan=plan)
    cap = limits["max_bytes"]
    size = estimate(doc, limits=limits, plan=plan)
    if size["bytes"] > cap:
        raise TooLarge.at(
            "model",
            f"this problem needs about {size['bytes'] / _MIB:,.0f} MiB ({size['points']:,} points × "
            f"{size['choice_points']:,} choice points), over the memory cap of {cap / _MIB:,.0f} MiB "
            f"({MAX_PROBLEM_MB}); use coarser grids or fewer choices",
            estimate=size,
        )
    return size


def _compile(doc: Any, limits: dict[str, int]) -> CompiledProblem:
    if doc.model.kind == "tabular":
        from worker.tabular import compile_tabular

        return compile_tabular(doc)
    from worker.gridmodel import compile_grid

    return compile_grid(doc, limits=limits)


def solve(
    document: dict[str, Any],
    *,
    on_progress: Callable[[dict[str, Any]], None] | None = None,
    checkpoint: Checkpoint | None = None,
    should_stop: Callable[[], bool] | None = None,
    warm_start: dict[str, Any] | None = None,
    limits: dict[str, Any] | None = None,
) -> dict[str, Any]:
    """Validate, compile and solve a problem document; return the result document.

    Parameters
    ----------
    document : dict
        A problem document.
    on_progress : callable, optional
        Called with each log entry as it is made.
    checkpoint : object with ``load() -> dict | None`` and ``save(state)``, optional
        Resumed from when its fingerprint matches this document; saved every
        ``solver.checkpoint_s`` seconds of solving.
    should_stop : callable, optional
        Polled before every iteration and between evaluation steps; when true the solve raises ``Canceled``.
    warm_start : dict, optional
        ``{"axes", "value"}`` of an earlier result, for ``solver.initial: {"job": ID}``.
    limits : dict, optional
        ``{"max_bytes": int, "max_seconds": float | None, "enforce_memory": bool}``, every key optional.
        ``max_bytes``: the memory cap the estimate must be within (bytes; default from
        ``FIXQ_MAX_PROBLEM_MB``).  ``max_seconds``: a deployment's longest solve (seconds); the solve
        stops with status ``time_limit`` at the smaller of it and ``solver.time_limit_s``.
        ``enforce_memory``: run under :func:`worker.memory.memory_limit` of the estimate, so that a
        solve outgrowing its estimate fails with ``TooLarge`` and the process lives on (default False).

    Returns
    -------
    dict
        Plain JSON-ready Python: ``status``, ``method``, ``error_bound``,
        ``iterations``, ``evaluation_steps`` (Howard: evaluation steps in
        all), ``linear_solves`` (policy iteration: exact evaluations),
        ``seconds``,
        ``axes``, ``value`` and ``policy``/``policy_index`` (nested lists of
        shape ``shape``), ``log``, ``diagnostics``, ``stationary``,
        ``simulation`` (``None`` when not asked for).

        ``diagnostics`` holds the problem's own diagnostics (edge hits, …)
        and: ``observed_rate`` (see ``worker.solvers.observed_rate``),
        ``warnings``, ``resumed_from_iteration``, ``log_dropped`` (iterations
        the bounded ``log`` does not hold, see ``worker.convergence_log``), ``verification`` (with
        hints: the unrestricted step that checked them, which is not an
        iteration; see :class:`~worker.solvers.SolveOutcome`; else None) and
        ``bracket``.  The bracket describes the final Bellman step ``v → Tv``: ``v* − Tv``
        lies in ``[lower, upper]`` at every state (MacQueen–Porteus), the
        returned value is ``Tv + shift`` with ``shift = (lower + upper)/2``,
        so ``error_bound = (upper − lower)/2 + rounding_allowance``;
        ``standard_bound = β/(1−β)·‖Tv − v‖∞ + rounding_allowance`` is the
        error bound ``Tv`` alone would carry.

    Raises
    ------
    InvalidDocument, InfeasibleModel, TooLarge
        Bad input, with field paths; ``TooLarge`` also when an enforced memory limit ran out.
    Canceled
        ``should_stop`` returned true.
    """
    from worker.document import parse_document

    keep_freed_memory()  # once per process: repeated solves reuse freed pages (worker.allocator)
    limits = limits or {}
    doc = parse_document(document)
    cap = {"max_bytes": int(limits.get("max_bytes") or max_problem_bytes())}
    size = _check_size(doc, cap)
    if doc.search is not None:
        return _search(document, doc, cap, warm_start, on_progress, checkpoint, should_stop,
                       limits.get("max_seconds"))
    if not limits.get("enforce_memory"):
        return _solve(doc, cap, warm_start, on_progress, checkpoint, should_stop, limits.get("max_seconds"))
    with memory_limit(size["bytes"], what="this solve", context={"estimate": size}):
        return _solve(doc, cap, warm_start, on_progress, checkpoint, should_stop, limits.get("max_seconds"))


def time_limit(document_limit_s: float | None, max_seconds: float | None) -> float | None:
    """The effective time limit: the smaller of the document's and the deployment's (None: neither is set)."""
    limits = [float(limit) for limit in (document_limit_s, max_seconds) if limit is not None]
    return min(limits) if limits else None


def _solve(
    doc: Any,
    cap: dict[str, int],
    warm_start: dict[str, Any] | None,
    on_progress: Callable[[dict[str, Any]], None] | None,
    checkpoint: Checkpoint | None,
    should_stop: Callable[[], bool] | None,
    max_seconds: float | None,
) -> dict[str, Any]:
    problem = _compile(doc, cap)
    spec = doc.solver
    if doc.model.horizon is not None:
        return _solve_horizon(doc, problem, warm_start, on_progress, checkpoint, should_stop,
                              time_limit(spec.time_limit_s, max_seconds))
    limit = time_limit(spec.time_limit_s, max_seconds)
    initial, coarse = _start(doc, problem, cap, warm_start, checkpoint, should_stop, limit)
    outcome = METHODS[spec.method](
        problem,
        initial,
        tolerance=spec.tolerance,
        max_iterations=spec.max_iterations,
        time_limit_s=left_after(limit, coarse),
        checkpoint_s=spec.checkpoint_s,
        evaluation_steps=spec.evaluation_steps,
        on_progress=on_progress,
        checkpoint=checkpoint,
        should_stop=should_stop,
        fingerprint="" if checkpoint is None else _fingerprint(doc),
    )
    return _result(doc, problem, outcome, coarse=coarse)


def _search(
    document: dict[str, Any],
    doc: Any,
    cap: dict[str, int],
    warm_start: dict[str, Any] | None,
    on_progress: Callable[[dict[str, Any]], None] | None,
    checkpoint: Checkpoint | None,
    should_stop: Callable[[], bool] | None,
    max_seconds: float | None,
) -> dict[str, Any]:
    """A document with ``search``: :func:`worker.search.run_search`, each trial solved here from the last."""
    from worker.search import run_search

    limit = time_limit(doc.solver.time_limit_s, max_seconds)
    # The time limit is the whole search's: each trial gets what is left of it.
    deadline = None if limit is None else time.monotonic() + limit

    def trial(trial_doc: Any, initial: np.ndarray | None, tolerance: float, problem: CompiledProblem | None = None,
              trust_hints: bool = False, checkpoint: Any = None) -> tuple[CompiledProblem, SolveOutcome]:
        problem = _compile(trial_doc, cap) if problem is None else problem  # given: compiled, its params swapped
        left = None if deadline is None else max(deadline - time.monotonic(), 1e-3)
        start = initial if initial is not None else _start(trial_doc, problem, cap, warm_start, None, should_stop,
                                                           left)[0]
        spec = trial_doc.solver
        left = None if deadline is None else max(deadline - time.monotonic(), 1e-3)
        extra = {"trust_hints": True} if trust_hints else {}
        outcome = METHODS[spec.method](
            problem, start, tolerance=tolerance, max_iterations=spec.max_iterations,
            time_limit_s=left, checkpoint_s=spec.checkpoint_s,
            evaluation_steps=spec.evaluation_steps, on_progress=None, checkpoint=checkpoint, should_stop=should_stop,
            fingerprint="" if checkpoint is None else checkpoint.fingerprint(trust_hints), **extra,
        )
        return problem, outcome

    return run_search(document, doc, trial, _result, on_progress=on_progress, checkpoint=checkpoint,
                      fingerprint="" if checkpoint is None else _fingerprint(doc))


def _solve_horizon(
    doc: Any,
    problem: CompiledProblem,
    warm_start: dict[str, Any] | None,
    on_progress: Callable[[dict[str, Any]], None] | None,
    checkpoint: Checkpoint | None,
    should_stop: Callable[[], bool] | None,
    time_limit_s: float | None,
) -> dict[str, Any]:
    """Backward induction for a document with ``model.horizon`` (see :mod:`worker.periods`).

    ``solver.initial``, when given, is the value after the last period (it replaces the terminal
    value): values, or an earlier job's value — of an infinite horizon, or the first period of a
    finite one (a life solved in two spans, the later first).
    """
    from worker.periods import PERIOD_AXIS, horizon_result, period_plan
    from worker.solvers.backward import backward_induction

    terminal = None
    if doc.solver.initial not in (None, "zeros"):
        if warm_start is not None and PERIOD_AXIS in (warm_start.get("axes") or {}):
            axes = {name: values for name, values in warm_start["axes"].items() if name != PERIOD_AXIS}
            warm_start = {"axes": axes, "value": (warm_start.get("value") or [None])[0]}
        terminal = _initial_values(doc, problem, warm_start)
    plan = period_plan(doc, problem, terminal=terminal)
    outcome = backward_induction(
        problem, plan, time_limit_s=time_limit_s, checkpoint_s=doc.solver.checkpoint_s, on_progress=on_progress,
        checkpoint=checkpoint, should_stop=should_stop, fingerprint="" if checkpoint is None else _fingerprint(doc),
    )
    return horizon_result(doc, problem, plan, outcome, _plain)


def _fingerprint(doc: Any) -> str:
    """A hash of the validated problem, for checkpoints (hex BLAKE2b, 32 bytes).

    The document's fields (submission keys such as ``label`` left out, like
    ``worker.document.document_hash``) are hashed as JSON with every array
    replaced by its shape and dtype, and the arrays' raw bytes are fed to
    the hash directly: re-encoding a large packed array, as the canonical
    document hash does, would cost seconds and gigabytes on big tabular
    problems, for no gain here.
    """
    from worker.document import SUBMISSION_KEYS

    digest = hashlib.blake2b(digest_size=32)

    def skeleton(node: Any) -> Any:
        if isinstance(node, np.ndarray):
            array = np.ascontiguousarray(node)
            digest.update(memoryview(array).cast("B"))
            return {"array": list(array.shape), "dtype": array.dtype.str}
        if isinstance(node, dict):
            return {str(key): skeleton(value) for key, value in node.items()}
        if isinstance(node, (list, tuple)):
            return [skeleton(item) for item in node]
        return node

    outline = skeleton(doc.model_dump(exclude=set(SUBMISSION_KEYS)))
    digest.update(json.dumps(outline, default=repr).encode())
    return digest.hexdigest()


def _start(doc: Any, problem: CompiledProblem, cap: dict[str, int], warm_start: dict[str, Any] | None,
           checkpoint: Checkpoint | None, should_stop: Callable[[], bool] | None,
           limit: float | None) -> tuple[np.ndarray, dict[str, Any] | None]:
    """The solve's starting values and ``diagnostics.coarse_start`` (:func:`worker.coarse_solve.coarse_start`),
    else ``solver.initial``'s and None."""
    found = coarse_start(doc, problem, cap, checkpoint, should_stop, limit)
    return found if found is not None else (_initial_values(doc, problem, warm_start), None)


def _initial_values(doc: Any, problem: CompiledProblem, warm_start: dict[str, Any] | None) -> np.ndarray:
    """(n,) float64 starting values from ``solver.initial``."""
    from worker.document import InitialJob, InitialValues

    initial = doc.solver.initial
    if initial is None or initial == "zeros":
        return np.zeros(problem.n)
    if isinstance(initial, InitialValues):
        values = to_internal(np.asarray(initial.values, dtype=np.float64), model_axis_order(doc.model),
                             {name: len(values) for name, values in problem.axes.items()})
        return _checked_values(values, problem, "solver.initial.values")
    if isinstance(initial, InitialJob):
        path = "solver.initial.job"
        if warm_start is None:
            raise InvalidDocument.at(
                path,
                "starting from an earlier job needs the fixq service, which looks the job up; "
                "in-process callers pass its result as warm_start, or use initial: {\"values\": ...}",
            )
        return _warm_values(warm_start, problem, path)
    raise InvalidDocument.at("solver.initial", f"unknown initial values {initial!r}")


def _checked_values(values: np.ndarray, problem: CompiledProblem, path: str) -> np.ndarray:
    if values.shape not in (tuple(problem.shape), (problem.n,)):
        raise InvalidDocument.at(
            path,
            f"has shape {list(values.shape)}, but the value function of this model has shape "
            f"{list(problem.shape)} ({', '.join(problem.axes)})",
        )
    if not np.isfinite(values).all():
        raise InvalidDocument.at(path, "initial values must be finite numbers")
    return values.reshape(problem.n).copy()


def _warm_values(warm_start: dict[str, Any], problem: CompiledProblem, path: str) -> np.ndarray:
    from worker.interpolate import regrid

    old_axes = warm_start.get("axes")
    if not isinstance(old_axes, dict) or "value" not in warm_start:
        raise InvalidDocument.at(path, "the earlier job's result has no axes and value to start from")
    if isinstance(warm_start.get("axis_order"), list) and sorted(warm_start["axis_order"]) == sorted(old_axes):
        old_axes = {name: old_axes[name] for name in warm_start["axis_order"]}  # the stated order, not key order
    if STATE_AXIS in problem.axes and "state" in old_axes and STATE_AXIS not in old_axes:
        # Tabular results stored before the axis was named state_label call it "state".
        old_axes = {(STATE_AXIS if name == "state" else name): values for name, values in old_axes.items()}
    values = regrid(old_axes, warm_start["value"], problem.axes, path=path)
    return _checked_values(values, problem, path)


def _result(doc: Any, problem: CompiledProblem, outcome: SolveOutcome,
            distribution: tuple[np.ndarray, dict[str, Any]] | None = None, *,
            coarse: dict[str, Any] | None = None) -> dict[str, Any]:
    taste, probabilities = _taste_shocks(doc, problem, outcome)
    policy, policy_index = problem.describe_policy(outcome.policy)
    problem_diagnostics = _plain(problem.diagnostics(outcome.policy))
    warnings = list(outcome.warnings) + list(problem_diagnostics.pop("warnings", []))
    report = doc.report
    stationary = simulation = None
    if report.stationary:
        states = getattr(doc.model, "states", None)
        real_ends = {name: axis.real_ends for name, axis in states.items()} if isinstance(states, dict) else None
        stationary = stationary_report(problem, outcome.policy, real_ends, doc, distribution=distribution)
        warnings += stationary.pop("warnings", [])
    if report.simulation is not None:
        simulation = simulate_report(problem, outcome.policy, report.simulation)
        warnings += simulation.pop("warnings", [])
    euler = {} if taste else euler_diagnostics(doc, problem, outcome, stationary, problem_diagnostics)
    if taste and doc.report.euler_errors:
        problem_diagnostics.setdefault("notes", []).append(
            "Euler-equation errors were not measured: with taste shocks the choice is random, not a policy rule"
        )
    diagnostics = {
        **problem_diagnostics,
        **taste,
        **euler,
        "observed_rate": outcome.observed_rate,
        "warnings": warnings,
        "resumed_from_iteration": outcome.resumed_from_iteration,
        "verification": outcome.verification,
        "bracket": dict(outcome.bracket),
        "log_dropped": dropped(outcome.log),
        **({} if coarse is None else {"coarse_start": coarse}),
    }
    head = _plain(
        {
            "status": outcome.status,
            "method": doc.solver.method,
            "error_bound": outcome.error_bound,
            "iterations": outcome.iterations,
            "evaluation_steps": outcome.evaluation_steps,
            "linear_solves": outcome.linear_solves,
            "seconds": outcome.seconds + (0.0 if coarse is None else coarse["seconds"]),
            "axes": problem.axes,
        }
    )
    tail = {**_plain({"log": outcome.log, "diagnostics": diagnostics, "stationary": stationary,
                      "simulation": simulation}), "chains": shock_chains(doc)}
    # The big nested lists come from ndarray.tolist() (``describe_policy`` and ``shock_chains`` promise the
    # same), so they are plain already: walking them again cost a quarter of a 1,000 x 7 hinted solve.
    value = np.asarray(outcome.value, dtype=np.float64).reshape(problem.shape).tolist()
    result = {**head, "value": value, "policy": policy, "policy_index": policy_index, **probabilities, **tail}
    return apply_axis_order(result, model_axis_order(doc.model))


def _taste_shocks(doc: Any, problem: CompiledProblem, outcome: SolveOutcome) -> tuple[dict[str, Any], dict[str, Any]]:
    """With taste shocks: ``({"taste_shocks": diagnostics}, {"choice_probabilities": nested lists})``.

    The probabilities are the logit of the choice-specific values at the returned value (the midpoint,
    the most accurate value the solve has), from one more Bellman step; ``outcome.policy`` becomes that
    step's most probable choice, so that the policy, the probabilities, the stationary distribution and
    the simulation all describe the same choice rule.  Without taste shocks: ``({}, {})``.
    """
    scale = getattr(problem, "taste_scale", None)
    if scale is None:
        return {}, {}
    from worker.taste import diagnostics, shocked_choices

    _, policy = problem.bellman_step(np.asarray(outcome.value, dtype=np.float64))
    outcome.policy = np.asarray(policy, dtype=np.int64)
    axes = problem.choice_axes()
    probabilities = problem.choice_probabilities(outcome.policy)
    shape = (*problem.shape, *(len(values) for values in axes.values()))
    notes = {
        **diagnostics(scale, float(doc.discount), shocked_choices(problem)),
        "choices": _plain(axes),
        "probabilities_at": "the choice-specific values at the returned value",
    }
    return {"taste_shocks": notes}, {"choice_probabilities": probabilities.reshape(shape).tolist()}


_PLAIN_TYPES = (float, int, str, bool, type(None))
"""Leaves :func:`_plain` returns as they are (exact types: a numpy float64 is a float subclass, made plain)."""


def _plain(obj: Any) -> Any:
    """Numpy scalars and arrays → Python numbers and lists, recursively."""
    if type(obj) in _PLAIN_TYPES:
        return obj
    if isinstance(obj, dict):
        return {str(key): _plain(value) for key, value in obj.items()}
    if isinstance(obj, (list, tuple)):
        if obj and all(type(x) in (float, int, str) for x in obj):
            return list(obj)
        return [_plain(x) for x in obj]
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, np.generic):
        return obj.item()
    return obj
