"""``/v1/jobs/{id}/plots``: pictures of a job, and what can be pictured.

* ``convergence.svg|png`` — from the convergence log, at any time (a running
  job's picture shows the iterations so far);
* ``value.svg|png``, ``policy.svg|png`` — from the result, once ``done``
  (``?shock_index=I`` picks the shock point of a heatmap by its flat index,
  ``?choice=NAME`` the policy's choice by its name); an expired result is
  410, as on ``/result``;
* ``euler_errors.svg|png`` — the profile of ``diagnostics.euler_errors``
  across the state, once ``done``; 404 when the result has none;
* ``choice_probabilities.svg|png`` — a model with taste shocks: the
  probabilities of one choice's values (``?choice=NAME``, ``?shock_index=I``;
  see :mod:`service.choice_plots`); 404 when the result has none;
* ``life_cycle.svg|png`` — a finite horizon's cohort (``report.cohort``): the
  mean of each state variable and choice by period; 404 without one;
* ``GET /v1/jobs/{id}/plots`` — a small JSON summary of a solved job: which
  picture layout applies, the choices and shock points to pick from, and the
  result's status and diagnostics without its arrays (``euler_errors``
  without its ``profile``; ``euler_profile`` is true when there is one to
  picture; ``periods`` counts a finite horizon's periods, ``life_cycle`` is
  true when there is a cohort to picture).  The dashboard reads it instead of downloading a possibly large
  result.
"""

from __future__ import annotations

from types import ModuleType
from typing import Annotated, Any, Literal

from fastapi import APIRouter, Query
from fastapi.responses import Response

from service.deps import Owner, StoreDep
from service.problems import Problem
from service.store import JobStore
from worker.axis_order import apply_axis_order

__all__ = ["router"]

router = APIRouter(prefix="/v1/jobs", tags=["plots"])

LOG_PAGE = 1000
"""Log entries fetched from the store per round trip."""
DONE_MAX_AGE_S = 3600
"""How long a browser may reuse a picture of a finished job, in seconds (it never changes)."""

Picture = Literal["convergence", "value", "policy", "euler_errors", "choice_probabilities", "life_cycle"]
Format = Literal["svg", "png"]
MEDIA_TYPES = {"svg": "image/svg+xml", "png": "image/png"}


@router.get("/{job_id}/plots")
def plot_summary(job_id: str, store: StoreDep, owner: Owner) -> dict[str, Any]:
    """What the value and policy pictures of a solved job can show, and its diagnostics."""
    plots = _plots()
    job = readable_job(store, owner, job_id)
    result = _result(store, job)
    document = store.get_document(job_id)
    layout = plots.axis_layout(result, document)
    axes = result.get("axes") or {}
    shock_labels = plots.shock_labels(axes, layout.shocks)
    return {
        "id": job_id,
        "layout": "bars" if layout.tabular else ("lines" if len(layout.states) == 1 else "heatmap"),
        "states": list(layout.states),
        "shocks": list(layout.shocks),
        "shock_labels": shock_labels if layout.shocks else [],
        "choices": list(result.get("policy") or {}),
        "tolerance": ((document or {}).get("solver") or {}).get("tolerance"),
        **{
            key: result.get(key)
            for key in ("status", "method", "error_bound", "iterations", "evaluation_steps", "linear_solves", "seconds")
        },
        "diagnostics": _without_profile(result.get("diagnostics") or {}),
        "euler_profile": bool(((result.get("diagnostics") or {}).get("euler_errors") or {}).get("profile")),
        "choice_probabilities": result.get("choice_probabilities") is not None,
        "stationary": _without(result.get("stationary"), "distribution"),
        "simulation": _without(result.get("simulation"), "first_path"),
        "periods": len(axes.get("period") or []) if "period" in axes else None,
        "life_cycle": bool(_life_cycle_series(result, document)),
    }


@router.get(
    "/{job_id}/plots/{picture}.{fmt}",
    response_class=Response,
    responses={200: {"content": {"image/svg+xml": {}, "image/png": {}}}},
)
def plot(
    job_id: str,
    picture: Picture,
    fmt: Format,
    store: StoreDep,
    owner: Owner,
    choice: Annotated[
        str | None,
        Query(
            description="Policy and choice-probability pictures: the name of the choice to draw (a tabular "
            "model's one choice is named action; default: the first)."
        ),
    ] = None,
    shock_index: Annotated[
        int | None,
        Query(
            ge=0,
            description="Heatmaps: the flat index (C order over the shocks) of the shock point to draw (default 0).",
        ),
    ] = None,
) -> Response:
    """A picture of a job: its convergence log, value function, policy or Euler-equation errors, as SVG or PNG."""
    plots = _plots()
    job = readable_job(store, owner, job_id)
    title = job.get("label") or None
    if picture == "convergence":
        log = _whole_log(store, job_id)
        document = store.get_document(job_id) or {}
        tolerance = (document.get("solver") or {}).get("tolerance")
        body = plots.convergence_plot(log, tolerance=tolerance, title=title, fmt=fmt)
        cache = (
            f"private, max-age={DONE_MAX_AGE_S}" if job.get("state") in ("done", "failed", "canceled") else "no-store"
        )
    else:
        result = _result(store, job)
        layout = plots.axis_layout(result, store.get_document(job_id))
        from service.period_plots import is_tabular_horizon, tabular_horizon_plot

        if picture in ("value", "policy") and is_tabular_horizon(result, layout):
            body = tabular_horizon_plot(result, picture, choice=choice, title=title, fmt=fmt)
        elif picture == "life_cycle":
            from service.cohort_plot import life_cycle_plot

            body = life_cycle_plot(result, store.get_document(job_id), title=title, fmt=fmt)
        elif picture == "value":
            body = plots.value_plot(result, layout=layout, shock_index=shock_index, title=title, fmt=fmt)
        elif picture == "euler_errors":
            body = plots.euler_plot(result, layout=layout, title=title, fmt=fmt)
        elif picture == "choice_probabilities":
            from service.choice_plots import choice_probability_plot

            body = choice_probability_plot(
                result, layout=layout, choice=choice, shock_index=shock_index, title=title, fmt=fmt
            )
        else:
            body = plots.policy_plot(
                result, layout=layout, choice=choice, shock_index=shock_index, title=title, fmt=fmt
            )
        cache = f"private, max-age={DONE_MAX_AGE_S}"
    return Response(body, media_type=MEDIA_TYPES[fmt], headers={"Cache-Control": cache})


def _life_cycle_series(result: dict[str, Any], document: dict[str, Any] | None) -> dict[str, list[float]]:
    from service.cohort_plot import life_cycle_series

    return life_cycle_series(result, document)


def _plots() -> ModuleType:
    # matplotlib takes about a second to import: the API loads it with the first
    # picture asked for, not at start-up.
    from service import plots

    return plots


def readable_job(store: JobStore, owner: Any, job_id: str) -> dict[str, Any]:
    """The job record if it exists and the caller may see it; else 404 (another's job is not revealed)."""
    job = store.get_job(job_id)
    if job is None or not owner.may_see(job):
        raise Problem(404, "not-found", f"no job {job_id!r}")
    return job


def _result(store: JobStore, job: dict[str, Any]) -> dict[str, Any]:
    result = store.get_result(job["id"]) if job.get("state") == "done" else None
    if result is None:
        state = job.get("state")
        if state == "done":
            raise Problem(410, "expired", f"the result of job {job['id']} has expired (results are kept result_ttl_s)")
        raise Problem(
            409, "not-ready", f"the job is {state}: value and policy pictures exist once it is done", state=state
        )
    # model.axis_order may put a shock before a state: the pictures read the states first, then the shocks.
    layout = _plots().axis_layout(result, store.get_document(job["id"]))
    return result if layout.tabular else apply_axis_order(result, [*layout.states, *layout.shocks])


def _whole_log(store: JobStore, job_id: str) -> list[dict[str, Any]]:
    log: list[dict[str, Any]] = []
    while True:
        page = store.get_log(job_id, start=len(log), limit=LOG_PAGE)
        log.extend(page)
        if len(page) < LOG_PAGE:
            return log


def _without(block: dict[str, Any] | None, key: str) -> dict[str, Any] | None:
    return None if block is None else {k: v for k, v in block.items() if k != key}


def _without_profile(diagnostics: dict[str, Any]) -> dict[str, Any]:
    """The diagnostics with ``euler_errors.profile`` left out: its arrays are for the picture."""
    if not isinstance(diagnostics.get("euler_errors"), dict):
        return diagnostics
    return {**diagnostics, "euler_errors": _without(diagnostics["euler_errors"], "profile")}
