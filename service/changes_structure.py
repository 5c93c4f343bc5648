"""Whether two solves share a structure, and which numbers of their documents differ.

The structure of a solve is what its arrays are laid out on: the kind of
model, its state variables and shocks (the axes, with their grid values), a
finite horizon's periods, and its choices (their names and grids or menus).
:func:`structure_changes` lists what differs between two solves and raises
:class:`NotComparable` when the axes cannot be matched at all.
:func:`document_changes` lists the other paths of the two documents whose
values differ (params, discount, expressions, solver settings).
"""

from __future__ import annotations

from typing import Any

__all__ = ["NotComparable", "document_changes", "structure_changes"]

DOCUMENT_CHANGES_MAX = 25
"""Most differing document paths listed (the count of the rest is given)."""
SHOWN_VALUE_CHARS = 120
"""Longest value (as JSON-ish text) shown beside a differing path; longer ones are summarised."""
NOT_NUMBERS = ("label", "tags", "notify", "model.states", "model.shocks", "model.choices", "model.actions",
               "model.axis_order", "solver.initial")  # fmt: skip
"""Document paths left out of :func:`document_changes`: bookkeeping, the structure (listed on its own), and a
warm start's job id (a nightly pipeline changes it every night)."""


class NotComparable(Exception):
    """Two solves whose axes cannot be matched; ``errors`` is a list of ``{path, message}``."""

    def __init__(self, errors: list[dict[str, str]]) -> None:
        self.errors = errors
        super().__init__("; ".join(f"{e['path']}: {e['message']}" for e in errors))


def structure_changes(
    now_axes: dict[str, list[Any]],
    since_axes: dict[str, list[Any]],
    now_document: dict[str, Any],
    since_document: dict[str, Any],
) -> list[dict[str, Any]]:
    """What differs in structure between the newer solve and the older one (empty: the same structure).

    Each entry is ``{"part", "name", "what"}`` (``part``: states, shocks, choices, actions), with the two
    grids summarised (``now``, ``since``: points, min, max) for an axis.

    Raises
    ------
    NotComparable
        Tabular against grid, other state variables or shocks, another number of periods, other state labels.
    """
    now_model, since_model = now_document.get("model") or {}, since_document.get("model") or {}
    now_kind, since_kind = _kind(now_model, now_axes), _kind(since_model, since_axes)
    if now_kind != since_kind:
        message = (f"the newer job is a {now_kind} model and the older one a {since_kind} model: "
                   "their states have nothing in common to compare")  # fmt: skip
        raise NotComparable([{"path": "model.kind", "message": message}])
    _check_axis_names(now_axes, since_axes, now_model, since_model)
    if now_axes.get("period") != since_axes.get("period"):
        message = f"the newer job has {len(now_axes['period'])} periods and the older one {len(since_axes['period'])}"
        raise NotComparable([{"path": "model.horizon.periods", "message": message}])
    if now_kind == "tabular":
        return _tabular_changes(now_axes, since_axes, now_model, since_model)
    changes: list[dict[str, Any]] = []
    for name, values in now_axes.items():
        if values != since_axes[name]:
            part = "shocks" if name in (now_model.get("shocks") or {}) else "states"
            what = "its grid values differ" if part == "states" else "its values (the discretised chain) differ"
            changes.append(
                {"part": part, "name": name, "what": what, "now": _grid(values), "since": _grid(since_axes[name])}
            )
    now_choices, since_choices = now_model.get("choices") or {}, since_model.get("choices") or {}
    for name in now_choices:
        if name not in since_choices:
            changes.append({"part": "choices", "name": name, "what": "only the newer job has this choice"})
        elif now_choices[name] != since_choices[name]:
            changes.append({"part": "choices", "name": name, "what": "its grid, menu or kind differs",
                            "now": now_choices[name], "since": since_choices[name]})  # fmt: skip
    for name in since_choices:
        if name not in now_choices:
            changes.append({"part": "choices", "name": name, "what": "only the older job has this choice"})
    return changes


def _kind(model: dict[str, Any], axes: dict[str, list[Any]]) -> str:
    return str(model.get("kind") or ("tabular" if "state_label" in axes else "grid"))


def _check_axis_names(
    now_axes: dict[str, list[Any]], since_axes: dict[str, list[Any]], now_model: dict[str, Any],
    since_model: dict[str, Any],
) -> None:  # fmt: skip
    errors = []
    for name in now_axes:
        if name not in since_axes:
            errors.append(_missing(name, now_model, "newer", "older"))
    for name in since_axes:
        if name not in now_axes:
            errors.append(_missing(name, since_model, "older", "newer"))
    if errors:
        raise NotComparable(errors)


def _missing(name: str, model: dict[str, Any], has: str, lacks: str) -> dict[str, str]:
    if name == "period":
        return {"path": "model.horizon", "message": f"only the {has} job has a finite horizon (a period axis)"}
    part = "shocks" if name in (model.get("shocks") or {}) else "states"
    word = "shock" if part == "shocks" else "state variable"
    return {"path": f"model.{part}.{name}", "message": f"the {has} job has the {word} {name!r}; the {lacks} does not"}


def _tabular_changes(
    now_axes: dict[str, list[Any]], since_axes: dict[str, list[Any]], now_model: dict[str, Any],
    since_model: dict[str, Any],
) -> list[dict[str, Any]]:  # fmt: skip
    (axis, now_labels), since_labels = next(iter(now_axes.items())), next(iter(since_axes.values()))
    if sorted(map(str, now_labels)) != sorted(map(str, since_labels)) or len(set(now_labels)) != len(now_labels):
        only_now = [s for s in now_labels if s not in since_labels][:10]
        only_since = [s for s in since_labels if s not in now_labels][:10]
        message = f"the states differ: only in the newer job {only_now}, only in the older {only_since}"
        raise NotComparable([{"path": "model.states", "message": message}])
    changes: list[dict[str, Any]] = []
    if now_labels != since_labels:
        changes.append({"part": "states", "name": axis, "what": "the same states in another order (matched by label)"})
    if now_model.get("actions") != since_model.get("actions"):
        changes.append({"part": "actions", "name": "action", "what": "the actions differ",
                        "now": now_model.get("actions"), "since": since_model.get("actions")})  # fmt: skip
    return changes


def _grid(values: list[Any]) -> dict[str, Any]:
    return {"points": len(values), "min": min(values), "max": max(values)}


def document_changes(now: dict[str, Any], since: dict[str, Any]) -> dict[str, Any]:
    """The paths (``model.params.alpha``, ``discount``, ...) whose values differ, besides the structure.

    Returns ``{"paths": [{"path", "now", "since"}], "more": N}``; a value too long to show is summarised.
    """
    found: list[dict[str, Any]] = []
    _diff(now, since, "", found)
    return {"paths": found[:DOCUMENT_CHANGES_MAX], "more": max(0, len(found) - DOCUMENT_CHANGES_MAX)}


def _diff(now: Any, since: Any, path: str, found: list[dict[str, Any]]) -> None:
    if path in NOT_NUMBERS:
        return
    if isinstance(now, dict) and isinstance(since, dict):
        for key in list(now) + [k for k in since if k not in now]:
            _diff(now.get(key), since.get(key), f"{path}.{key}" if path else str(key), found)
    elif now != since:
        found.append({"path": path, "now": _shown(now), "since": _shown(since)})


def _shown(value: Any) -> Any:
    if isinstance(value, (list, dict)) and len(repr(value)) > SHOWN_VALUE_CHARS:
        kind = "list" if isinstance(value, list) else "object"
        return f"(a {kind} of {len(value)} entries)"
    return value
