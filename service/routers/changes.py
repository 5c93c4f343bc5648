"""``/v1/jobs/{id}/changes``: what moved between two finished jobs, as JSON or as a picture.

* ``GET /v1/jobs/{id}/changes?since=OTHER`` — the drift report of
  :mod:`service.changes`: job ``id`` is the newer solve, ``OTHER`` the older
  one; the comparison is made on the newer job's grid;
* ``GET /v1/jobs/{id}/plots/changes.svg|png?since=OTHER`` — the value
  function's change (newer − older) on the newer job's grid, drawn as the
  value is drawn (``?shock_index=I`` picks a heatmap's shock point).

Both jobs must be visible to the caller (404 otherwise, as for any job) and
done (409 naming the state of the one that is not); an expired result is
410; two jobs whose axes cannot be matched are 422 with ``errors`` naming
what differs.  This router is included before the plots router, whose
``/plots/{picture}`` would otherwise take ``changes``.
"""

from __future__ import annotations

from typing import Annotated, Any, Literal

from fastapi import APIRouter, Query
from fastapi.responses import Response
from pydantic import BaseModel, ConfigDict, Field

from service.changes import Comparison, NotComparable, compare
from service.deps import Caller, Owner, StoreDep
from service.problems import Problem
from service.routers.jobs import solved_job
from service.store import JobStore

__all__ = ["router"]

router = APIRouter(prefix="/v1/jobs", tags=["jobs"])

MEDIA_TYPES = {"svg": "image/svg+xml", "png": "image/png"}
DONE_MAX_AGE_S = 3600
"""How long a browser may reuse a picture of two finished jobs, in seconds (neither changes)."""
VALUE_CHANGE = "change in value"
"""The name the picture gives the value change (its axis label)."""


class ValueChange(BaseModel):
    """The largest change in the value function (newer − older) and where it happens."""

    sup_norm: float | None = Field(description="The largest absolute change over the compared points.")
    largest_change: float | None = Field(description="That change with its sign.")
    at: dict[str, Any] | None = Field(description="The point: the value of each axis there.")
    now: float | None = Field(description="The newer job's value at that point.")
    since: float | None = Field(description="The older job's value at that point (interpolated when the grids differ).")
    mean_change: float | None = Field(description="The mean change over the compared points.")


class PolicyChange(BaseModel):
    """Where one choice's policy changed."""

    changed_share: float | None = Field(description="The share of compared points whose chosen value changed.")
    changed_points: int
    points: int = Field(description="The points compared.")
    rule: str = Field(description="When a point counts as changed.")
    largest: list[dict[str, Any]] = Field(description="The largest changes: at (the point), since, now.")
    ranges: dict[str, list[Any]] = Field(
        description="Per axis, [lowest, highest] of its values where the policy changed (labels: the list)."
    )


class MeanChange(BaseModel):
    """One mean of the stationary distribution or of the simulation, in both jobs."""

    since: float
    now: float
    change: float


class ErrorBounds(BaseModel):
    """The certified error bounds of the two solves, and their sum: a value change below it is noise."""

    now: float | None
    since: float | None
    sum: float | None


class Changes(BaseModel):
    """What moved from the older job (`since`) to the newer one (`id`), on the newer job's grid."""

    model_config = ConfigDict(extra="allow")
    id: str
    since: str
    compared_on: str = Field(description="The job whose grid the comparison is made on (the newer one, `id`).")
    jobs: dict[str, dict[str, Any]] = Field(description="now and since: label, times, status and error bound.")
    same_structure: bool = Field(description="True when grids, shocks, choices and horizon are all the same.")
    structure_changes: list[dict[str, Any]] = Field(description="What differs in structure: part, name, what.")
    document_changes: dict[str, Any] = Field(description="Other document paths that differ: paths (path, now, "
                                             "since) and more (how many were left out).")  # fmt: skip
    interpolated: bool = Field(description="True when the older job was interpolated onto the newer grid.")
    axis_order: list[str]
    points: int
    points_compared: int
    outside_older_grid: int = Field(description="Points of the newer grid outside the older grid's range.")
    value: ValueChange
    error_bounds: ErrorBounds
    within_error_bounds: bool | None = Field(description="True when the largest value change is at most their sum.")
    policy: dict[str, PolicyChange]
    stationary_means: dict[str, MeanChange] | None
    simulated_means: dict[str, MeanChange] | None
    notes: list[str]


Since = Annotated[
    str, Query(min_length=1, max_length=64, description="The id of the older job to compare with (done, yours).")
]


@router.get(
    "/{job_id}/changes",
    response_model=Changes,
    responses={
        409: {"content": {"application/problem+json": {}}, "description": "One of the two jobs is not done."},
        422: {"content": {"application/problem+json": {}}, "description": "The two cannot be matched axis by axis."},
    },
)
def get_changes(job_id: str, since: Since, owner: Owner, store: StoreDep) -> dict[str, Any]:
    """The drift from job `since` to this job: value, policy, means, structure and the two error bounds."""
    comparison, records = _compare(store, owner, job_id, since)
    now, older = records
    jobs = {"id": job_id, "since": since, "compared_on": job_id}
    times = {"now": _times(now), "since": _times(older)}
    answer = {**jobs, "jobs": times, **comparison.answer}
    if (older.get("submitted_at") or "") > (now.get("submitted_at") or ""):
        answer["notes"] = [*answer["notes"], (
            f"Job {since} was submitted after job {job_id}: the changes read from {since} to {job_id}, on the grid of "
            f"{job_id}. Swap the two to compare the other way."
        )]  # fmt: skip
    return answer


@router.get(
    "/{job_id}/plots/changes.{fmt}",
    response_class=Response,
    responses={200: {"content": {"image/svg+xml": {}, "image/png": {}}}},
)
def changes_plot(
    job_id: str,
    fmt: Literal["svg", "png"],
    since: Since,
    owner: Owner,
    store: StoreDep,
    shock_index: Annotated[
        int | None, Query(ge=0, description="Heatmaps: the flat index (C order over the shocks) of the shock point.")
    ] = None,
) -> Response:
    """A picture of the value function's change since job `since`, on this job's grid."""
    from service import plots  # matplotlib loads with the first picture, not at start-up

    comparison, (now, _) = _compare(store, owner, job_id, since)
    document = store.get_document(job_id)
    axes = comparison.axes
    change = comparison.value_change.tolist() if comparison.value_change is not None else []
    words = " (the older one interpolated onto this grid)" if comparison.answer["interpolated"] else ""
    title = f"value of job {job_id} − value of job {since}{words}"
    layout = plots.axis_layout({"axes": axes}, document)
    if layout.tabular:
        body = plots.value_plot({"axes": axes, "value": change}, layout=layout, title=title, fmt=fmt)
    else:
        picture = {"axes": axes, "policy": {VALUE_CHANGE: change}}
        body = plots.policy_plot(
            picture, layout=layout, choice=VALUE_CHANGE, shock_index=shock_index, title=title, fmt=fmt
        )
    return Response(body, media_type=MEDIA_TYPES[fmt], headers={"Cache-Control": f"private, max-age={DONE_MAX_AGE_S}"})


def _compare(store: JobStore, owner: Caller, job_id: str, since: str) -> tuple[Comparison, tuple[dict, dict]]:
    records = (solved_job(store, job_id, owner), solved_job(store, since, owner))
    results = [store.get_result(record["id"]) for record in records]
    for record, result in zip(records, results, strict=True):
        if result is None:
            detail = f"the result of job {record['id']} has expired (results are kept result_ttl_s)"
            raise Problem(410, "expired", detail)
    try:
        comparison = compare(results[0], results[1], store.get_document(job_id), store.get_document(since))
    except NotComparable as exc:
        raise Problem(
            422, "not-comparable", f"jobs {job_id} and {since} cannot be compared point by point: {exc}",
            title="not comparable", errors=exc.errors,
        ) from None  # fmt: skip
    return comparison, records


def _times(record: dict[str, Any]) -> dict[str, Any]:
    return {key: record.get(key) for key in ("label", "submitted_at", "finished_at", "status", "error_bound")}
