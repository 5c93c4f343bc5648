"""The result document: what a solve returns, described as models with a description on every key.

:class:`ResultDocument` is the schema of ``GET /v1/jobs/{id}/result`` in the OpenAPI description and
the source of the README's reference of the result document (``python -m service.docref``).  It
documents results; nothing validates a result through it on the way out.  A reader meets, in order:

* :mod:`~worker.result_document.document`: the document and its convergence log;
* :mod:`~worker.result_document.diagnostics`: ``diagnostics``;
* :mod:`~worker.result_document.reports`: ``stationary``, ``simulation``, ``cohort`` and ``search``;
* :mod:`~worker.result_document._types`: the base class and the nested-array types.
"""

from __future__ import annotations

import functools
from typing import Any

import orjson

from worker.document._json_schema import finish_schema
from worker.result_document.document import LogEntry, ResultDocument

__all__ = ["LogEntry", "ResultDocument", "result_json_schema"]


@functools.cache
def _schema() -> bytes:
    schema = finish_schema(ResultDocument.model_json_schema())
    out = {
        "$schema": "https://json-schema.org/draft/2020-12/schema",
        "title": "fixq result document",
        **{key: value for key, value in schema.items() if key != "title"},
    }
    return orjson.dumps(out)


def result_json_schema() -> dict[str, Any]:
    """The JSON Schema (2020-12) of result documents (the models' own, descriptions unwrapped)."""
    return orjson.loads(_schema())
