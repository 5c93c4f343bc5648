"""What every submitted document goes through before anything is stored or queued.

:func:`admit` validates (``worker.document.parse_document``), refuses a grid
model whose kernels would be too large to compile
(``worker.kernel_limits.check_structure``) or whose tables with taste shocks
would exceed the precompute budget (``worker.tastecheck``), estimates
(``worker.estimate.estimate``), refuses a problem over ``max_problem_mb``,
runs the cheap grid feasibility check when the worker package offers one, and
checks that a warm start names a finished job the caller may read, whose
value function's axes (names, labels) fit this model's
(``worker.interpolate.check_start``, against the summary the job's record
keeps).  It never builds the problem and never imports the numba kernels, so
bad input is answered at the door (422 / 413) and never reaches a worker.
"""

from __future__ import annotations

import importlib
from collections.abc import Callable
from typing import Any

from service.settings import Settings
from service.store import JobStore, is_job_id
from worker.document import InitialJob, ProblemDocument, parse_document
from worker.drawcheck import check_draw_tables
from worker.errors import InvalidDocument, TooLarge
from worker.estimate import estimate
from worker.interpolate import check_start
from worker.kernel_limits import check_structure
from worker.tastecheck import check_taste_tables

__all__ = ["Admitted", "admit"]

_MIB = 2**20
FEASIBILITY_CHECK = ("worker.feasibility", "check_feasibility")
"""Module and function of the cheap grid feasibility check, ``check(doc, budget_s=...) -> dict``
raising ``InfeasibleModel``; used when that module exists.  It must not import numba."""
FEASIBILITY_BUDGET_S = 0.5
"""Seconds the door spends proving every state has an allowed choice; past it the worker decides."""


class Admitted:
    """A document that passed the door: the validated form and its size estimate."""

    __slots__ = ("document", "estimate", "feasibility")

    def __init__(self, document: ProblemDocument, size: dict[str, Any], feasibility: dict[str, Any] | None) -> None:
        self.document = document
        self.estimate = size
        self.feasibility = feasibility


def admit(
    raw: dict[str, Any],
    settings: Settings,
    *,
    store: JobStore | None = None,
    may_see: Callable[[dict[str, Any]], bool] | None = None,
    earlier: Admitted | None = None,
) -> Admitted:
    """Validate, estimate and size-check ``raw``; raise ``InvalidDocument`` or ``TooLarge``.

    With ``store``, a warm start (``solver.initial.job``) must name a ``done``
    job whose record ``may_see`` accepts.  ``earlier``: a document admitted
    before whose validated ``model`` object ``raw`` carries in place of its
    own (a sweep's combinations, ``service.submission``); its feasibility
    result stands, as the check reads the model alone.
    """
    document = parse_document(raw)
    check_structure(document)
    cap = int(settings.max_problem_mb * _MIB)
    check_taste_tables(document, limits={"max_bytes": cap})
    check_draw_tables(document, limits={"max_bytes": cap})
    size = estimate(document, limits={"max_bytes": cap})
    if size["bytes"] > cap:
        raise TooLarge.at(
            "model",
            f"this problem needs about {size['bytes'] / _MIB:,.0f} MiB ({size['points']:,} points × "
            f"{size['choice_points']:,} choice points), over the cap max_problem_mb = {settings.max_problem_mb:g} MiB; "
            "use coarser grids or fewer choices",
            estimate=size,
        )
    feasibility = None
    check = _feasibility_check() if document.model.kind == "grid" else None
    if earlier is not None and earlier.document.model is document.model:
        feasibility = earlier.feasibility
    elif check is not None:
        feasibility = check(document, budget_s=FEASIBILITY_BUDGET_S)
    if store is not None:
        _check_warm_start(document, store, may_see or (lambda record: True))
    return Admitted(document, size, feasibility)


def _feasibility_check() -> Callable[..., dict[str, Any]] | None:
    module_name, function = FEASIBILITY_CHECK
    try:
        module = importlib.import_module(module_name)
    except ModuleNotFoundError as exc:
        if exc.name != module_name:
            raise
        return None
    return getattr(module, function, None)


def _check_warm_start(document: ProblemDocument, store: JobStore, may_see: Callable[[dict[str, Any]], bool]) -> None:
    initial = document.solver.initial
    if not isinstance(initial, InitialJob):
        return
    path = "solver.initial.job"
    record = store.get_job(initial.job) if is_job_id(initial.job) else None
    if record is None or not may_see(record):
        raise InvalidDocument.at(path, f"there is no job {initial.job!r} to start from")
    if record["state"] != "done":
        raise InvalidDocument.at(path, f"job {initial.job} is {record['state']}; a warm start needs a job that is done")
    if not store.redis.exists(store.keys.result(initial.job)):
        raise InvalidDocument.at(path, f"the result of job {initial.job} has expired; start from another job")
    earlier = store.result_axes(initial.job)
    if earlier is not None:  # None: finished before records kept it; the worker checks the axes then
        check_start(earlier, document, path=path)
