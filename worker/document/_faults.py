"""Faults: how every check of the document reports what is wrong.

A *fault* is a ``{"path", "message"}`` dict as in :mod:`worker.errors`, plus
an optional ``"kind"`` (``"infeasible"`` or ``"too_large"``) that picks the
exception class and is dropped before raising.  Validators inside the models
raise :func:`faults_error`, a pydantic error whose context carries faults with
paths *relative* to the model that raised it; :func:`worker.document._translate.translate`
joins them to the model's own location, so every check can name its exact
path without knowing where its model sits in the document.

Also here: the guard against hostile nesting that runs before pydantic sees a
document, and the vectorised checks shared by several models (strictly
increasing values, probability rows, mutually exclusive forms).
"""

from __future__ import annotations

from collections.abc import Iterable
from itertools import chain, compress
from typing import Any

import numpy as np
from pydantic_core import PydanticCustomError

from worker.document.limits import MAX_LISTED, ROW_SUM_TOLERANCE
from worker.errors import InfeasibleModel, InvalidDocument, TooLarge, join_path

Fault = dict[str, Any]

FAULTS_ERROR = "fixq_faults"
"""Type of the pydantic error that carries a list of relative faults."""


def fault(path: str | int, message: str, kind: str | None = None) -> Fault:
    """One fault; ``path`` is relative to the model that reports it."""
    out: Fault = {"path": path if isinstance(path, str) else join_path(path), "message": message}
    if kind:
        out["kind"] = kind
    return out


def faults_error(faults: list[Fault]) -> PydanticCustomError:
    """A pydantic error carrying ``faults``; :func:`translate` unpacks it."""
    summary = "; ".join(f"{f['path'] or '(here)'}: {f['message']}" for f in faults[:3])
    return PydanticCustomError(FAULTS_ERROR, "{summary}", {"summary": summary, "faults": faults})


def raise_faults(faults: list[Fault]) -> None:
    """Raise :func:`faults_error` when there are any faults."""
    if faults:
        raise faults_error(faults)


def capped(faults: Iterable[Fault], total: int, path: str, what: str) -> list[Fault]:
    """The first :data:`MAX_LISTED` of ``total`` faults, plus one that counts the rest."""
    listed = []
    for item in faults:
        if len(listed) == MAX_LISTED:
            break
        listed.append(item)
    if total > len(listed):
        kind = listed[0].get("kind") if listed else None
        listed.append(fault(path, f"and {total - len(listed):,} more {what}", kind))
    return listed


def concat(prefix: str, relative: str) -> str:
    """Join a document path and a path relative to it (``"[2]"`` or ``"min"``)."""
    if not relative:
        return prefix
    if not prefix or relative.startswith("["):
        return prefix + relative
    return f"{prefix}.{relative}"


def number(value: float) -> str:
    """A float for messages: up to 12 significant digits."""
    return f"{float(value):.12g}"


def describe(value: Any) -> str:
    """What a JSON value is, for "expected X, got Y" messages."""
    if value is None:
        return "null"
    if isinstance(value, (bool, np.bool_)):
        return "true" if value else "false"
    if isinstance(value, str):
        shown = value if len(value) <= 40 else value[:37] + "..."
        return f'the string "{shown}"'
    if isinstance(value, dict):
        return "an object"
    if isinstance(value, (list, tuple)):
        return "a list"
    if isinstance(value, (int, np.integer)):
        return f"the number {int(value)}" if abs(int(value)) < 10**20 else "a very large whole number"
    if isinstance(value, (float, np.floating)):
        return f"the number {number(value)}"
    return f"a {type(value).__name__}"


def shown(value: Any) -> str:
    """A JSON value as written in a document, shortened: ``2``, ``"abc"``, ``true``, ``an object``."""
    if isinstance(value, str):
        return f'"{value if len(value) <= 40 else value[:37] + "..."}"'
    if isinstance(value, (bool, np.bool_)) or value is None:
        return describe(value)
    if isinstance(value, (int, np.integer)) and abs(int(value)) < 10**20:
        return str(int(value))
    if isinstance(value, (float, np.floating)):
        return number(value)
    return describe(value)


_CONTAINERS = frozenset({list, tuple, dict})
_MAPPINGS = frozenset({dict})
_SEQUENCES = frozenset({list, tuple})


def structure_fault(raw: Any, *, max_depth: int, max_keys: int) -> Fault | None:
    """A fault at the first list or object nested deeper than ``max_depth``
    levels, or the first object with more than ``max_keys`` keys; else None.

    Breadth first over whole levels with C-level iterators only (``chain``,
    ``compress``, ``map``), so the cost is a few passes over the document's
    nodes and there is no recursion at any depth.  Only exact JSON types count
    as containers (what a JSON parser produces).
    """
    level: list[Any] = [raw] if type(raw) in _CONTAINERS else []
    for depth in range(1, max_depth + 2):
        if not level:
            return None
        if depth > max_depth:
            return fault(
                _path_to_depth(raw, depth),
                f"nested more than {max_depth} levels deep; no part of a problem document needs that",
            )
        dicts = list(compress(level, map(_MAPPINGS.__contains__, map(type, level))))
        if dicts and max(map(len, dicts)) > max_keys:
            big = next(d for d in dicts if len(d) > max_keys)
            return fault(
                _path_to(raw, big),
                f"has {len(big):,} keys; no object in a problem document needs more than {max_keys:,}",
            )
        lists = compress(level, map(_SEQUENCES.__contains__, map(type, level)))
        children = list(chain(chain.from_iterable(lists), chain.from_iterable(map(dict.values, dicts))))
        level = list(compress(children, map(_CONTAINERS.__contains__, map(type, children))))
    return None


def _path_to(raw: Any, target: Any) -> str:
    stack: list[tuple[Any, tuple[str | int, ...]]] = [(raw, ())]
    while stack:
        node, parts = stack.pop()
        if node is target:
            return join_path(*parts)
        if type(node) is dict:
            stack.extend((child, (*parts, str(key))) for key, child in node.items() if type(child) in _CONTAINERS)
        elif type(node) in _SEQUENCES:
            stack.extend((child, (*parts, i)) for i, child in enumerate(node) if type(child) in _CONTAINERS)
    return ""


def _path_to_depth(raw: Any, depth: int) -> str:
    stack: list[tuple[Any, tuple[str | int, ...]]] = [(raw, ())]
    while stack:
        node, parts = stack.pop()
        if len(parts) + 1 == depth:
            if isinstance(node, (list, tuple, dict)):
                return join_path(*parts)
            continue
        if isinstance(node, dict):
            stack.extend((child, (*parts, str(key))) for key, child in node.items())
        elif isinstance(node, (list, tuple)):
            stack.extend((child, (*parts, i)) for i, child in enumerate(node))
    return ""


def increasing_faults(values: np.ndarray, where: str) -> list[Fault]:
    """A fault at the first entry of ``values`` (1-d) that does not exceed its predecessor."""
    bad = np.flatnonzero(np.diff(values) <= 0)
    if not bad.size:
        return []
    i = int(bad[0]) + 1
    return [
        fault(
            join_path(where, i),
            f"values must be strictly increasing, but {number(values[i])} follows {number(values[i - 1])}",
        )
    ]


def stochastic_faults(matrix: np.ndarray, where: str, *, single_row: bool = False) -> list[Fault]:
    """Faults for negative entries and row sums away from 1 in an (n, m) matrix."""

    def at(i: int, *rest: int) -> str:
        return join_path(where, *(rest if single_row else (i, *rest)))

    negative = np.argwhere(matrix < 0)
    faults = capped(
        (
            fault(at(int(i), int(j)), f"probabilities must be non-negative, got {number(matrix[i, j])}")
            for i, j in negative
        ),
        len(negative),
        where,
        "negative probabilities",
    )
    sums = matrix.sum(axis=1)
    off = np.flatnonzero((np.abs(sums - 1.0) > ROW_SUM_TOLERANCE) & ~(matrix < 0).any(axis=1))
    what = "the probabilities sum" if single_row else "this row sums"
    faults += capped(
        (
            fault(
                at(int(i)), f"{what} to {number(sums[i])}; probabilities must sum to 1 (within {ROW_SUM_TOLERANCE:g})"
            )
            for i in off
        ),
        off.size,
        where,
        "rows that do not sum to 1",
    )
    return faults


def form_faults(part: Any, forms: dict[str, tuple[str, ...]], described: str) -> tuple[str | None, list[Fault]]:
    """Which of the mutually exclusive ``forms`` (name → keys) ``part`` uses, and faults if not exactly one."""
    present = {name: [key for key in keys if getattr(part, key) is not None] for name, keys in forms.items()}
    used = [name for name, keys in present.items() if keys]
    if not used:
        return None, [fault("", f"give {described}")]
    if len(used) > 1:
        first = ", ".join(f"`{k}`" for k in present[used[0]])
        return None, [
            fault(key, f"`{key}` cannot be combined with {first}: give {described}")
            for name in used[1:]
            for key in present[name]
        ]
    return used[0], []


def exception_for(faults: list[Fault], max_reported: int, unlisted: int = 0) -> InvalidDocument | TooLarge:
    """The exception for ``faults``: duplicates dropped, at most ``max_reported`` listed,
    the rest (plus ``unlisted`` faults never translated) counted in a last fault.

    ``TooLarge`` when an array is over its cap (the client must shrink the
    document whatever else is wrong), ``InfeasibleModel`` when the only faults
    are states with no allowed action, else ``InvalidDocument``.
    """
    unique: dict[tuple[str, str], Fault] = {}
    for item in faults:
        unique.setdefault((item["path"], item["message"]), {"path": item["path"], "message": item["message"]})
    listed = list(unique.values())
    more = max(len(listed) - max_reported, 0) + unlisted
    if more:
        listed = listed[:max_reported] + [fault("", f"and {more:,} more faults")]
    kinds = {item.get("kind") for item in faults}
    if "too_large" in kinds:
        return TooLarge(listed)
    if kinds == {"infeasible"}:
        return InfeasibleModel(listed)
    return InvalidDocument(listed)
