"""The faults an unknown key hid: the document checked again as if the key were not there.

Pydantic stops at an object with an unknown key before its own checks run (a grid model's expressions and
names, the document's cross-checks), so a typo such as ``model.statez`` hid an unknown name in
``model.reward`` until the next round trip.  :func:`hidden_faults` validates a corrected copy once more: each
unknown key is dropped, or, when it is a close match of a key missing beside it (``statez`` for ``states``),
read as that key, whose faults are then named at the key as written (``model.statez.capital.points``).  The
copy shares everything but the objects along the paths it changes; the raw document is never touched.  A
fault that makes the later checks meaningless (a required key missing, with no typo to read for it) still
stops them, as it does without an unknown key; a bad value inside the grid model hides no names in the copy
either (:mod:`worker.document.value_faults`).
"""

from __future__ import annotations

import difflib
from collections.abc import Callable
from typing import Any

from pydantic import BaseModel, ValidationError

from worker.document._faults import Fault
from worker.document._translate import _is_model, _resolve, split_loc, translate
from worker.document.value_faults import value_hidden_faults
from worker.errors import join_path

__all__ = ["hidden_faults"]


def hidden_faults(
    raw: Any, errors: list[Any], root: type[BaseModel], validate: Callable[[Any], Any], max_reported: int
) -> list[Fault]:
    """Faults of ``raw`` that its unknown keys kept from being checked, from validating a corrected copy.

    ``errors`` are pydantic's errors of ``raw``; ``validate`` validates a document of ``root``.  Empty when
    ``raw`` has no unknown key, or the corrected copy cannot be built (a part of it is not a JSON object).
    """
    unknown = [tuple(error["loc"]) for error in errors if error["type"] == "extra_forbidden" and error["loc"]]
    if not unknown or not isinstance(raw, dict):
        return []
    corrected: Any = raw
    renamed: dict[str, str] = {}  # the path read for a misspelt key -> its path as written
    for loc in unknown:
        parts, holder = split_loc(loc[:-1], root)
        key = str(loc[-1])
        place = _find(corrected, parts)
        if not isinstance(place, dict) or key not in place:
            return []
        target = _missing_match(key, place, holder)
        if target is not None:
            renamed[join_path(*parts, target)] = join_path(*parts, key)
        corrected = _replaced(corrected, parts, key, target)
    try:
        validate(corrected)
    except ValidationError as exc:
        again = exc.errors(include_url=False)
    else:
        return []
    found = translate(again[:max_reported], root) + value_hidden_faults(corrected, again)
    return [_as_written(item, renamed) for item in found]


def _missing_match(key: str, place: dict, holder: Any) -> str | None:
    """The key of ``holder`` that ``key`` misspells and that ``place`` lacks, else None."""
    holder = _resolve(holder) if holder is not None else None
    if not _is_model(holder):
        return None
    missing = [name for name in holder.model_fields if name not in place]
    close = difflib.get_close_matches(key, missing, n=1)
    return close[0] if close else None


def _find(node: Any, parts: list[str | int]) -> Any:
    for part in parts:
        if isinstance(node, dict) and part in node:
            node = node[part]
        elif isinstance(node, list) and isinstance(part, int) and 0 <= part < len(node):
            node = node[part]
        else:
            return None
    return node


def _replaced(node: Any, parts: list[str | int], key: str, target: str | None) -> Any:
    """A copy of ``node`` with the object at ``parts`` lacking ``key`` (its value moved to ``target``)."""
    if not parts:
        out = {name: value for name, value in node.items() if name != key}
        if target is not None:
            out[target] = node[key]
        return out
    head, rest = parts[0], parts[1:]
    copy = dict(node) if isinstance(node, dict) else list(node)
    copy[head] = _replaced(node[head], rest, key, target)
    return copy


def _as_written(item: Fault, renamed: dict[str, str]) -> Fault:
    path = item["path"]
    for read, written in renamed.items():
        if path == read or path.startswith((read + ".", read + "[")):
            return {**item, "path": written + path[len(read):]}
    return item
