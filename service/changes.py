"""The drift between two solves: what moved from one finished job to another.

``compare(now, since)`` reads two result documents (and the documents that
made them) and answers what ``GET /v1/jobs/{id}/changes?since=OTHER``
returns: the largest change in the value function and where it happened,
the share of points whose policy changed (per choice, with the largest
changes and the ranges of each axis where it changed), the change in each
stationary and simulated mean, whether the two solved the same structure
(grids, shocks, choices, horizon) or only different numbers, and the two
certified error bounds, so a change within them reads as noise.

Axes are matched by name, never by position: a result's axis order is its
``axis_order`` when it has one, else the order of its ``axes``.  When a grid
differs, the older job (``since``) is carried onto the newer job's grid by
multilinear interpolation (linear along each numeric axis in turn); points
of the newer grid outside the older grid's range are not compared, and
counted.  Two jobs whose axes cannot be matched at all (other state
variables or shocks, tabular against grid, another number of periods, other
state labels) raise :class:`NotComparable`, naming what differs.

Nothing here touches Redis or HTTP; the router, the plot and the tests share it.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

from service.changes_structure import NotComparable, document_changes, structure_changes
from worker.grids import build_grid, locate

__all__ = ["Comparison", "NotComparable", "axis_order", "compare"]

POLICY_REL_TOL = 1e-9
"""Relative difference (of the larger magnitude, at least 1) below which two chosen values on the same grid are
equal: both come from the same grid, so this only absorbs float formatting."""
CONTINUOUS_REL_STEP = 1e-6
"""A continuous choice with no grid of its own counts as changed when it moved by more than this share of the
range of its newer values (common practice for 'equal up to solver tolerance')."""
LARGEST_POINTS = 5
"""Points listed per choice among its largest policy changes."""
LABELS_LISTED = 20
"""Most state labels listed where a tabular policy changed."""


@dataclass
class Comparison:
    """The answer of the changes endpoint, and the value change itself for the picture.

    ``value_change`` has the shape of the newer job's axes (in ``axes`` order): now − since, NaN where the
    points could not be compared (outside the older grid, or no value in one of the two).
    """

    answer: dict[str, Any]
    axes: dict[str, list[Any]] = field(default_factory=dict)
    value_change: np.ndarray | None = None


def axis_order(result: dict[str, Any]) -> list[str]:
    """The names of a result's array axes, in order: its ``axis_order``, else the keys of its ``axes``."""
    order = result.get("axis_order")
    axes = result.get("axes") or {}
    if isinstance(order, list) and sorted(order) == sorted(axes):
        return [str(name) for name in order]
    return list(axes)


def compare(
    now: dict[str, Any],
    since: dict[str, Any],
    now_document: dict[str, Any] | None = None,
    since_document: dict[str, Any] | None = None,
) -> Comparison:
    """Compare the result ``now`` with the older result ``since`` on the grid of ``now``.

    Parameters
    ----------
    now, since : result documents (``axes``, ``value``, ``policy``, ``error_bound``, ``stationary``, ...).
    now_document, since_document : the problem documents that made them (for states, shocks and choices).

    Raises
    ------
    NotComparable
        When the two cannot be aligned axis by axis (its ``errors`` name what differs).
    """
    now_document, since_document = now_document or {}, since_document or {}
    order = axis_order(now)
    now_axes = {name: list(now["axes"][name]) for name in order}
    since_axes = {name: list((since.get("axes") or {})[name]) for name in axis_order(since)}
    structure = structure_changes(now_axes, since_axes, now_document, since_document)
    aligner = _Aligner(since_axes, now_axes, tabular=_is_tabular(now, now_document))
    interpolated = aligner.interpolates

    now_value = _array(now.get("value"), now_axes, "value of the newer job")
    since_value = aligner.carry(_array(since.get("value"), since_axes, "value of the older job"))
    value_change = now_value - since_value
    compared = ~aligner.outside & np.isfinite(value_change)
    bounds = {"now": now.get("error_bound"), "since": since.get("error_bound")}
    value = _value_block(value_change, compared, now_value, since_value, now_axes)
    answer: dict[str, Any] = {
        "same_structure": not structure,
        "structure_changes": structure,
        "document_changes": document_changes(now_document, since_document),
        "interpolated": interpolated,
        "axis_order": order,
        "points": int(value_change.size),
        "points_compared": int(compared.sum()),
        "outside_older_grid": int(aligner.outside.sum()),
        "value": value,
        "error_bounds": {**bounds, "sum": _bound_sum(bounds)},
        "policy": _policies(now, since, _side(now_document, now_axes), _side(since_document, since_axes), aligner),
        "stationary_means": _mean_changes(_stationary_means(now), _stationary_means(since)),
        "simulated_means": _mean_changes(_simulated_means(now), _simulated_means(since)),
    }
    answer["within_error_bounds"] = _within(value.get("sup_norm"), answer["error_bounds"]["sum"])
    answer["notes"] = _notes(answer)
    return Comparison(answer, now_axes, np.where(compared, value_change, np.nan))


@dataclass(frozen=True)
class _Side:
    """One job's choices and axes, for the resolution of its policy."""

    choices: dict[str, Any]
    axes: dict[str, list[Any]]


class _Aligner:
    """Carries arrays on the older job's axes onto the newer job's axes (by name), with the outside mask."""

    def __init__(self, old: dict[str, list[Any]], new: dict[str, list[Any]], *, tabular: bool) -> None:
        self.old, self.new, self.tabular = old, new, tabular
        self.outside = np.zeros(tuple(len(v) for v in new.values()), dtype=bool)
        # True once a numeric axis differs; labels that are only reordered are matched, not interpolated.
        self.interpolates = False
        for axis, name in enumerate(new):
            if old[name] == new[name] or not _numeric(old[name]):
                continue
            self.interpolates = True
            grid = np.asarray(old[name], dtype=float)
            points = np.asarray(new[name], dtype=float)
            off = (points < grid.min()) | (points > grid.max())
            shape = [1] * self.outside.ndim
            shape[axis] = -1
            self.outside |= off.reshape(shape)

    def carry(self, array: np.ndarray) -> np.ndarray:
        """``array`` (on the old axes, in their order) on the new axes, in theirs; float or object arrays."""
        names = list(self.old)
        array = np.transpose(array, [names.index(name) for name in self.new])
        for axis, name in enumerate(self.new):
            old, new = self.old[name], self.new[name]
            if old == new:
                continue
            if not _numeric(old) or array.dtype == object:
                position = {label: i for i, label in enumerate(old)}
                unmatched = [label for label in new if label not in position]
                if unmatched:
                    message = f"axis {name!r} of the older job has no entry for {unmatched[:5]}"
                    raise NotComparable([{"path": f"axes.{name}", "message": message}])
                array = np.take(array, [position[label] for label in new], axis=axis)
            else:
                array = _interpolate_axis(array, axis, np.asarray(old, float), np.asarray(new, float))
        return array


def _interpolate_axis(array: np.ndarray, axis: int, old: np.ndarray, new: np.ndarray) -> np.ndarray:
    """Linear interpolation of ``array`` along ``axis`` from the points ``old`` to ``new`` (held flat outside)."""
    if old.size == 1:
        return np.repeat(array, new.size, axis=axis)
    order = np.argsort(old, kind="stable")  # an explicit shock chain may list its values in any order
    array, old = np.take(array, order, axis=axis), old[order]
    lower, weight, _ = locate(old, new)
    shape = [1] * array.ndim
    shape[axis] = -1
    weight = weight.reshape(shape)
    below, above = np.take(array, lower, axis=axis), np.take(array, lower + 1, axis=axis)
    # An exact hit keeps its value even when its neighbour has none (NaN): 0 * NaN would spread it.
    mixed = below * (1.0 - weight) + above * weight
    mixed = np.where(weight == 0.0, below, mixed)
    return np.where(weight == 1.0, above, mixed)


def _array(data: Any, axes: dict[str, list[Any]], what: str, *, labels: bool = False) -> np.ndarray:
    shape = tuple(len(v) for v in axes.values())
    try:
        array = np.array(data, dtype=object if labels else float)
    except (TypeError, ValueError):
        raise NotComparable([{"path": what, "message": f"the {what} is not an array of numbers"}]) from None
    if array.shape != shape:
        message = f"the {what} has shape {list(array.shape)}, but its axes give {list(shape)}"
        raise NotComparable([{"path": what, "message": message}])
    return array


def _value_block(
    change: np.ndarray, compared: np.ndarray, now: np.ndarray, since: np.ndarray, axes: dict[str, list[Any]]
) -> dict[str, Any]:
    if not compared.any():
        return {"sup_norm": None, "largest_change": None, "at": None, "now": None, "since": None, "mean_change": None}
    magnitude = np.where(compared, np.abs(change), -1.0)
    flat = int(np.argmax(magnitude))
    where = np.unravel_index(flat, change.shape)
    return {
        "sup_norm": float(magnitude.flat[flat]),
        "largest_change": float(change.flat[flat]),
        "at": _point(axes, where),
        "now": float(now.flat[flat]),
        "since": float(since.flat[flat]),
        "mean_change": float(change[compared].mean()),
    }


def _side(document: dict[str, Any], axes: dict[str, list[Any]]) -> _Side:
    return _Side(dict((document.get("model") or {}).get("choices") or {}), axes)


def _policies(
    now: dict[str, Any], since: dict[str, Any], now_side: _Side, since_side: _Side, aligner: _Aligner
) -> dict[str, Any]:
    now_policy, since_policy = now.get("policy") or {}, since.get("policy") or {}
    tabular, axes, interpolated = aligner.tabular, now_side.axes, aligner.interpolates
    out: dict[str, Any] = {}
    for choice in now_policy:
        if choice not in since_policy:
            continue
        labels = tabular or not _all_numeric(now_policy[choice])
        new = _array(now_policy[choice], axes, f"policy.{choice} of the newer job", labels=labels)
        old = _array(since_policy[choice], aligner.old, f"policy.{choice} of the older job", labels=labels)
        old = aligner.carry(old)
        if labels:
            changed, size = new != old, np.zeros(new.shape)
            rule = "the chosen action differs"
        else:
            size = np.abs(new - old)
            both_missing = np.isnan(new) & np.isnan(old)
            threshold, rule = _policy_threshold(choice, new, old, now_side, since_side, interpolated)
            changed = ~both_missing & ~(size <= threshold)
            size = np.where(both_missing, 0.0, np.nan_to_num(size, nan=np.inf))
        changed &= ~aligner.outside
        count = int(changed.sum())
        points = int((~aligner.outside).sum())
        out[choice] = {
            "changed_share": count / points if points else None,
            "changed_points": count,
            "points": points,
            "rule": rule,
            "largest": _largest(changed, size, new, old, axes),
            "ranges": _ranges(changed, axes),
        }
    return out


def _policy_threshold(
    choice: str, new: np.ndarray, old: np.ndarray, now_side: _Side, since_side: _Side, interpolated: bool
) -> tuple[Any, str]:
    """How far a chosen value may move and still count as unchanged, and the rule in words.

    On another grid a chosen value can only be as fine as the coarser of the two choice grids: a move of up to
    half a step of the coarser one (near the value) is resolution, not a change.
    """
    scale = POLICY_REL_TOL * np.maximum(1.0, np.maximum(np.abs(np.nan_to_num(new)), np.abs(np.nan_to_num(old))))
    if not interpolated:
        return scale, "the chosen value differs (same grid)"
    new_grid = _choice_grid(now_side.choices.get(choice) or {}, now_side.axes)
    old_grid = _choice_grid(since_side.choices.get(choice) or {}, since_side.axes)
    if new_grid is not None and old_grid is not None and new_grid.size > 1 and old_grid.size > 1:
        step = np.maximum(_local_step(new_grid, new), _local_step(old_grid, old))
        return step / 2 + scale, (
            "the older policy, interpolated onto this grid, is more than half a step of the coarser of the two "
            "grids of this choice away"
        )
    finite = new[np.isfinite(new)]
    span = float(finite.max() - finite.min()) if finite.size else 0.0
    return CONTINUOUS_REL_STEP * max(span, 1.0), (
        f"the older policy, interpolated onto this grid, differs by more than {CONTINUOUS_REL_STEP:g} of the range "
        "of this choice (a choice with no grid of its own)"
    )


def _choice_grid(spec: dict[str, Any], axes: dict[str, list[Any]]) -> np.ndarray | None:
    """The points a choice picks from in the newer job; a continuous choice of tomorrow's state: that state's grid."""
    if spec.get("next_of") in axes:
        return np.sort(np.asarray(axes[spec["next_of"]], dtype=float))
    if spec.get("continuous"):
        return None
    if isinstance(spec.get("values"), list) and _numeric(spec["values"]):
        return np.sort(np.asarray(spec["values"], dtype=float))
    bounds = (spec.get("min"), spec.get("max"), spec.get("points"))
    if _numeric(list(bounds)):
        spacing = spec.get("spacing") or "uniform"
        options = {"exponent": spec["exponent"]} if spec.get("exponent") is not None else {}
        return build_grid(spacing, float(bounds[0]), float(bounds[1]), int(bounds[2]), **options)
    return None


def _local_step(grid: np.ndarray, values: np.ndarray) -> np.ndarray:
    """The wider of the two grid steps next to each value (the one step it lies in, between grid points)."""
    steps = np.diff(grid)
    right = np.clip(np.searchsorted(grid, np.nan_to_num(values), side="right"), 1, grid.size - 1)
    left = np.clip(right - 1, 1, grid.size - 1)
    return np.maximum(steps[right - 1], steps[left - 1])


def _largest(
    changed: np.ndarray, size: np.ndarray, new: np.ndarray, old: np.ndarray, axes: dict[str, list[Any]]
) -> list[dict[str, Any]]:
    flat = np.flatnonzero(changed)
    if flat.size == 0:
        return []
    order = flat[np.argsort(-size.flat[flat], kind="stable")[:LARGEST_POINTS]]
    return [
        {
            "at": _point(axes, np.unravel_index(int(i), changed.shape)),
            "since": _plain(old.flat[i]),
            "now": _plain(new.flat[i]),
        }
        for i in order
    ]


def _ranges(changed: np.ndarray, axes: dict[str, list[Any]]) -> dict[str, Any]:
    """Per axis: [lowest, highest] of the axis values where the policy changed (labels: the list of them)."""
    if not changed.any():
        return {}
    out: dict[str, Any] = {}
    for axis, (name, values) in enumerate(axes.items()):
        others = tuple(i for i in range(changed.ndim) if i != axis)
        hit = changed.any(axis=others) if others else changed
        picked = [values[i] for i in np.flatnonzero(hit)]
        out[name] = [min(picked), max(picked)] if _numeric(values) else picked[:LABELS_LISTED]
    return out


def _stationary_means(result: dict[str, Any]) -> dict[str, float]:
    return dict(((result.get("stationary") or {}).get("means")) or {})


def _simulated_means(result: dict[str, Any]) -> dict[str, float]:
    summary = (result.get("simulation") or {}).get("summary") or {}
    return {name: block.get("mean") for name, block in summary.items() if isinstance(block, dict)}


def _mean_changes(now: dict[str, Any], since: dict[str, Any]) -> dict[str, Any] | None:
    """Per name both jobs have a mean of: both means and the change; None unless both have means."""
    if not now or not since:
        return None
    out: dict[str, Any] = {}
    for name in now:
        if name in since and _numeric([now[name], since[name]]):
            out[name] = {"since": since[name], "now": now[name], "change": now[name] - since[name]}
    return out


def _bound_sum(bounds: dict[str, Any]) -> float | None:
    if not _numeric([bounds["now"], bounds["since"]]):
        return None
    return float(bounds["now"]) + float(bounds["since"])


def _within(sup_norm: float | None, bound_sum: float | None) -> bool | None:
    if sup_norm is None or bound_sum is None:
        return None
    return sup_norm <= bound_sum


def _notes(answer: dict[str, Any]) -> list[str]:
    notes = []
    sup, bound = answer["value"]["sup_norm"], answer["error_bounds"]["sum"]
    if answer["within_error_bounds"]:
        notes.append(
            f"The largest value change ({sup:.3g}) is within the sum of the two certified error bounds ({bound:.3g}):"
            " it cannot be told apart from solver tolerance, so it is noise."
        )
    elif answer["within_error_bounds"] is False:
        notes.append(
            f"The largest value change ({sup:.3g}) is larger than the two certified error bounds together "
            f"({bound:.3g}): the solutions differ."
        )
    if answer["interpolated"]:
        notes.append(
            "The grids differ: the older job's value and policy were interpolated (multilinear, along each numeric "
            "axis) onto the newer job's grid. The certified error bounds do not cover interpolation error."
        )
    if answer["outside_older_grid"]:
        notes.append(
            f"{answer['outside_older_grid']} points of the newer grid lie outside the older grid's range and were "
            "not compared."
        )
    return notes


def _point(axes: dict[str, list[Any]], index: tuple[Any, ...]) -> dict[str, Any]:
    return {name: values[int(i)] for (name, values), i in zip(axes.items(), index, strict=True)}


def _plain(value: Any) -> Any:
    if isinstance(value, (np.floating, float)):
        return None if np.isnan(value) else float(value)
    if isinstance(value, np.integer):
        return int(value)
    return value


def _is_tabular(result: dict[str, Any], document: dict[str, Any]) -> bool:
    kind = (document.get("model") or {}).get("kind")
    return kind == "tabular" if kind else list(result.get("policy") or {}) == ["action"]


def _numeric(values: list[Any]) -> bool:
    return all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in values)


def _all_numeric(data: Any) -> bool:
    if isinstance(data, list):
        return all(_all_numeric(item) for item in data)
    return data is None or (isinstance(data, (int, float)) and not isinstance(data, bool))
