"""A coarse start: a solve from zeros on fine state grids begins from the same model solved on coarser grids.

Any starting value is valid for a contraction, so the start changes only the time a solve takes, never its
fixed point or its certificate (the error bound is the last Bellman step's, as always).  From zeros a
continuous-choice solve spends most of its iterations, each a search over the choice at every fine grid point,
finding the neighbourhood of the answer.  The same model on grids of a quarter of the points
(:data:`COARSE_SHARE`) costs about a quarter as much an iteration and lands in that neighbourhood too; its value,
carried onto the fine grids by the monotone cubic interpolant (:func:`carried_value`), leaves the fine solve a
few iterations to settle the details the coarse grids could not hold
(common practice: grid refinement, the simplest multigrid scheme for value iteration; measured below).  The
coarse solve starts the same way from a coarser one while its grids are still large enough, so the levels
shrink geometrically and the total adds about a third of one coarse level to the fine solve.

When
----
A grid model with an infinite horizon and a continuous choice, solved by ``howard``, ``value_iteration`` or
``policy_iteration`` from zeros (``solver.initial`` left out or ``"zeros"``), with at least one state grid of
:data:`COARSE_MIN_POINTS` points or more, and no checkpoint to resume from (a resumed job starts from its
checkpoint).  Each such state's grid gets a quarter of its points, at least :data:`COARSE_LEAST_POINTS`: a grid
given by ``min``, ``max`` and ``points`` keeps its ends and spacing, one given by ``values`` keeps every fourth
value and the last; smaller grids, shocks, choices and everything else stay as they are.  The coarse solve uses
the document's method and tolerance, none of its reports, and the solve's remaining time; it trusts the hints
(no verification: the fine solve verifies them, and a start need not be right, only close).  Grid-restricted
models are left alone: with hints their iterations are cheap already.

What the result says: ``diagnostics.coarse_start`` (the coarse grids' points, the levels, their iterations and
seconds, which the result's ``seconds`` includes); ``iterations`` and ``log`` are the fine solve's own.

Measured on the accuracy benchmark's household (``bench/bench_accuracy.py``, 7 income points, tolerance 1e-8;
2026-12-05, one run each on the shared 2-core machine, see bench/RESULTS.md): ``monotone_cubic`` at 1,000
asset points, 13 iterations from zeros against 6 after a 64-point coarse solve; at 5,000 points 41 iterations
(2.27 s) against 4 (0.24 s with the coarse solve).
"""

from __future__ import annotations

from typing import Any

import numpy as np

from worker.grids import locate

__all__ = ["COARSE_FINE_ITERATIONS", "COARSE_LEAST_POINTS", "COARSE_MIN_POINTS", "COARSE_SHARE", "carried_value",
           "coarse_document", "coarse_levels", "starts_coarse"]

COARSE_MIN_POINTS = 160
"""A state grid with at least this many points is coarsened for the start (count)."""
COARSE_SHARE = 4
"""A coarse grid has this share of the fine grid's points: one in ``COARSE_SHARE`` (count)."""
COARSE_LEAST_POINTS = 40
"""Fewest points of a coarsened grid (count)."""
COARSE_FINE_ITERATIONS = 3
"""Iterations of a solve after its coarse start, as the time estimate counts them (count; measured 2 to 4, 3 on
most, on the sixteen continuous shapes of ``bench/bench_estimates.py --continuous`` at 200 to 5,000 points,
2026-12-05; 3 to 6 on the accuracy benchmark's household at 400 to 100,000 points; 6 was used before,
:mod:`worker.continuous_estimate`)."""
_METHODS = ("howard", "value_iteration", "policy_iteration")


def starts_coarse(doc: Any) -> bool:
    """Whether a solve of the validated document ``doc`` from zeros begins with a coarse start (see the module
    docstring; the caller checks for a checkpoint to resume from)."""
    model = doc.model
    if model.kind != "grid" or model.horizon is not None or doc.solver.method not in _METHODS:
        return False
    if doc.solver.initial not in (None, "zeros"):
        return False
    if not any(choice.continuous for choice in model.choices.values()):
        return False
    return any(axis.size >= COARSE_MIN_POINTS for axis in model.states.values())


def coarse_document(doc: Any) -> Any:
    """A copy of ``doc`` on coarser state grids, without reports or search: the coarse level's document."""
    states = {}
    sizes = coarse_levels([axis.size for axis in doc.model.states.values()])[0]
    for (name, axis), size in zip(doc.model.states.items(), sizes):
        n = axis.size
        if n < COARSE_MIN_POINTS:
            states[name] = axis
        elif axis.values is None:
            states[name] = axis.model_copy(update={"points": size})
        else:
            keep = np.unique(np.r_[np.arange(0, n, COARSE_SHARE), n - 1])
            states[name] = axis.model_copy(update={"values": axis.values[keep]})
    choices = {}
    for name, choice in doc.model.choices.items():
        choices[name] = choice.model_copy()
        if choice.next_of in states:
            choices[name]._target = states[choice.next_of]  # as the model's validation links them
    model = doc.model.model_copy(update={"states": states, "choices": choices})
    report = type(doc.report)()
    update: dict[str, Any] = {"model": model, "report": report}
    if "search" in type(doc).model_fields:
        update["search"] = None
    return doc.model_copy(update=update)


def coarse_levels(sizes: list[int]) -> list[list[int]]:
    """The grid sizes of every coarse level below state grids of ``sizes`` points, the first level first (a grid
    given by ``values`` keeps about as many, one more where the last value is not among every fourth)."""
    levels = []
    while any(size >= COARSE_MIN_POINTS for size in sizes):
        sizes = [max(COARSE_LEAST_POINTS, -(-size // COARSE_SHARE)) if size >= COARSE_MIN_POINTS else size
                 for size in sizes]
        levels.append(sizes)
    return levels


def carried_value(coarse_axes: dict[str, Any], coarse_value: np.ndarray, axes: dict[str, Any]) -> np.ndarray:
    """The coarse level's value (flat, over ``coarse_axes`` in their order) carried onto ``axes`` (the same names in
    the same order, the same shock axes): flat (n,).  Along each coarsened state by the monotone cubic of
    Fritsch & Carlson (1980) (:func:`worker.continuous.interp_kernels.monotone_slopes`, the solve's own), which
    gave the fine solve fewer iterations than a multilinear carry on the accuracy benchmark (3 against 5 at
    1,000 points, ``monotone_cubic``; see the module docstring)."""
    from worker.continuous.interp_kernels import cubic_values, monotone_slopes

    value = np.asarray(coarse_value, dtype=np.float64).reshape([len(values) for values in coarse_axes.values()])
    for axis, name in enumerate(coarse_axes):
        old = np.asarray(coarse_axes[name], dtype=np.float64)
        new = np.asarray(axes[name], dtype=np.float64)
        if old.shape == new.shape and np.array_equal(old, new):
            continue
        rows = np.ascontiguousarray(np.moveaxis(value, axis, -1))
        shape = rows.shape
        rows = rows.reshape(-1, old.size)
        slopes = np.empty_like(rows)
        monotone_slopes(old, rows, slopes)
        lower, share, _ = locate(old, new)
        out = np.empty(rows.shape[0] * new.size)
        cubic_values(old, rows, slopes, np.repeat(np.arange(rows.shape[0]), new.size),
                     np.tile(lower, rows.shape[0]), np.tile(np.clip(share, 0.0, 1.0), rows.shape[0]), out)
        value = np.moveaxis(out.reshape(*shape[:-1], new.size), -1, axis)
    return np.ascontiguousarray(value).reshape(-1)
