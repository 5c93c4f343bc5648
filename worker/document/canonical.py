"""The canonical form of a problem document and its hash.

Two documents that pose the same problem have the same canonical form, and
so the same :func:`document_hash`, however their keys were ordered, their
arrays written (nested lists or packed) or their defaults spelled out.
"""

from __future__ import annotations

import hashlib
from typing import Any

import orjson

from worker.document.document import SUBMISSION_KEYS, ProblemDocument, parse_document

_ORDERED = {("model", "states"), ("model", "shocks"), ("model", "choices"), ("model", "define")}
"""Objects whose key order means something (array axes; define order)."""


def sorted_keys(node: Any, ordered: set[tuple[str, ...]], where: tuple[str, ...] = ()) -> Any:
    """``node`` with object keys sorted, except in the objects at the paths in ``ordered``."""
    if isinstance(node, dict):
        keys = node if where in ordered else sorted(node)
        return {key: sorted_keys(node[key], ordered, (*where, key)) for key in keys}
    if isinstance(node, list) and node and isinstance(node[0], (dict, list)):
        return [sorted_keys(item, ordered, where) for item in node]
    return node


def _canonical(document: ProblemDocument, include_submission: bool) -> Any:
    data = document.model_dump(
        mode="json", exclude_none=True, exclude=None if include_submission else set(SUBMISSION_KEYS)
    )
    return sorted_keys(data, _ORDERED)


def canonical_json(raw_document: dict[str, Any] | ProblemDocument, *, include_submission: bool = False) -> bytes:
    """The canonical form of a document: compact JSON of the validated document.

    Defaults are filled in, keys sorted (except inside ``model.states``,
    ``shocks``, ``choices`` and ``define``, whose order is part of the
    problem), arrays written as nested lists up to
    :data:`~worker.document.limits.CANONICAL_INLINE_ELEMENTS` elements and packed beyond.  The result
    is itself a valid document.  ``label``, ``tags``, ``priority`` and
    ``notify`` are left out unless ``include_submission``.
    """
    document = raw_document if isinstance(raw_document, ProblemDocument) else parse_document(raw_document)
    return orjson.dumps(_canonical(document, include_submission))


def document_hash(raw: dict[str, Any] | ProblemDocument) -> str:
    """SHA-256 (hex) of :func:`canonical_json`: equal for documents that pose the same problem."""
    return hashlib.sha256(canonical_json(raw)).hexdigest()
