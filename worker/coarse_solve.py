"""The coarse start's solve: the coarse levels below a fine solve, each from its own coarse start.

What a coarse start is, when a solve has one and how its value is carried onto the fine grids:
:mod:`worker.coarse_start` (which the time estimate reads too, so it builds and solves nothing).
"""

from __future__ import annotations

import time
from typing import Any, Callable

import numpy as np

from worker.coarse_start import carried_value, coarse_document, starts_coarse
from worker.errors import InfeasibleModel, InvalidDocument

__all__ = ["coarse_start", "left_after"]


def coarse_start(doc: Any, problem: Any, cap: dict[str, int], checkpoint: Any, should_stop: Callable[[], bool] | None,
                 limit: float | None) -> tuple[np.ndarray, dict[str, Any]] | None:
    """The coarse start of a solve of ``doc`` (compiled: ``problem``) and ``diagnostics.coarse_start``; None where
    there is none (:func:`starts_coarse`, or ``checkpoint`` holds a state to resume from, or the coarse grids do
    not suit the model: the fine solve then starts from ``solver.initial`` and says what is wrong, if anything).
    The coarse level starts from its own coarse start; ``cap`` bounds its memory (``worker.solve``'s), ``limit``
    its time (seconds, None: no limit)."""
    if not starts_coarse(doc) or (checkpoint is not None and _holds_state(checkpoint)):
        return None
    from worker.gridmodel import compile_grid
    from worker.solvers import METHODS

    started = time.perf_counter()
    coarse = coarse_document(doc)
    try:
        coarse_problem = compile_grid(coarse, limits=cap)
        below = coarse_start(coarse, coarse_problem, cap, None, should_stop, limit)
        start = np.zeros(coarse_problem.n) if below is None else below[0]
        spec = coarse.solver
        outcome = METHODS[spec.method](
            coarse_problem, start, tolerance=spec.tolerance, max_iterations=spec.max_iterations,
            time_limit_s=left_after(limit, None if below is None else below[1]), checkpoint_s=None,
            evaluation_steps=spec.evaluation_steps, on_progress=None, checkpoint=None, should_stop=should_stop,
            fingerprint="", trust_hints=True,
        )
    except (InvalidDocument, InfeasibleModel):
        return None
    deeper = {"levels": 0, "iterations": 0} if below is None else below[1]
    figures = {
        "points": {name: len(coarse_problem.axes[name]) for name in doc.model.states},
        "levels": deeper["levels"] + 1,
        "iterations": deeper["iterations"] + outcome.iterations,
        "seconds": time.perf_counter() - started,
    }
    return carried_value(coarse_problem.axes, outcome.value, problem.axes), figures


def _holds_state(checkpoint: Any) -> bool:
    """Whether ``checkpoint`` holds a state the solve will resume from, asked without loading it where the
    checkpoint can say so (``has_state()``: the service's answers from Redis without decoding the state or
    rewriting the job's log; the solve's own ``load`` is then the only one), else by ``load()``."""
    has_state = getattr(checkpoint, "has_state", None)
    return bool(has_state()) if callable(has_state) else bool(checkpoint.load())


def left_after(limit: float | None, coarse: dict[str, Any] | None) -> float | None:
    """What is left of the time limit ``limit`` (seconds) after the coarse start ``coarse`` (None: no limit)."""
    if limit is None or coarse is None:
        return limit
    return max(limit - coarse["seconds"], 1e-3)
