"""The JSON Schema (2020-12) of problem documents, as served at ``/v1/schema``.

Pydantic writes most of it from the models; here the array markers of
:func:`worker.document._fields.array_field` become references to two shared
definitions (packed arrays and nested numbers), and keywords pydantic leaves
untranslated are fixed.  Its descriptions are user-facing text.
"""

from __future__ import annotations

import functools
from typing import Any

import orjson

from worker.arrays import DTYPES
from worker.document.document import ProblemDocument

_KEYWORDS = {"ge": "minimum", "le": "maximum", "gt": "exclusiveMinimum", "lt": "exclusiveMaximum"}
"""Constraint names pydantic leaves untranslated on validated-then-constrained ints."""


def finish_schema(node: Any) -> Any:
    """Swap array markers for ``$ref``s, fix key-pattern and constraint keywords,
    and unwrap docstring line breaks inside paragraphs of descriptions."""
    if isinstance(node, dict):
        if node.get("x-packed-array"):
            return {"$ref": "#/$defs/PackedArray"}
        if node.get("x-nested-numbers"):
            return {"$ref": "#/$defs/NestedNumbers"}
        out = {_KEYWORDS.get(key, key) if "type" in node else key: finish_schema(value) for key, value in node.items()}
        patterns = out.pop("patternProperties", None)
        if patterns:
            # dict[Name, X]: the key pattern belongs in propertyNames, or other keys would pass unchecked.
            ((pattern, values),) = patterns.items()
            out["propertyNames"] = {**out.get("propertyNames", {}), "pattern": pattern}
            out["additionalProperties"] = values
        if isinstance(out.get("description"), str):
            out["description"] = "\n\n".join(" ".join(part.split()) for part in out["description"].split("\n\n"))
        return out
    if isinstance(node, list):
        return [finish_schema(item) for item in node]
    return node


@functools.cache
def _schema() -> bytes:
    schema = ProblemDocument.model_json_schema()
    defs = schema.setdefault("$defs", {})
    defs["PackedArray"] = {
        "type": "object",
        "description": (
            "A numeric array sent compactly: the elements in row-major order (last index fastest; the default) or, "
            'with "order": "column_major", in column-major order (first index fastest: the memory layout of R, '
            "Julia, MATLAB and Fortran arrays), each little-endian, base64-encoded (standard alphabet, padded)."
        ),
        "properties": {
            "dtype": {"enum": list(DTYPES), "description": "Element type of the encoded bytes."},
            "shape": {
                "type": "array",
                "items": {"type": "integer", "minimum": 0},
                "maxItems": 32,
                "description": "Length of each dimension.",
            },
            "base64": {"type": "string", "contentEncoding": "base64", "description": "The encoded bytes."},
            "order": {
                "enum": ["row_major", "column_major"],
                "default": "row_major",
                "description": (
                    'The order of the elements: "row_major" (C order, last index fastest) or "column_major" '
                    "(Fortran order, first index fastest)."
                ),
            },
        },
        "required": ["dtype", "shape", "base64"],
        "additionalProperties": False,
    }
    defs["NestedNumbers"] = {
        "type": "array",
        "description": "Numbers in nested lists, one level per dimension.",
        "items": {"anyOf": [{"type": "number"}, {"$ref": "#/$defs/NestedNumbers"}]},
    }
    schema = finish_schema(schema)
    # The discount lies below 1 unless the model has a finite horizon (the one rule spanning two keys).
    schema["if"] = {"properties": {"model": {"required": ["horizon"]}}}
    schema["else"] = {"properties": {"discount": {"exclusiveMaximum": 1}}}
    out = {
        "$schema": "https://json-schema.org/draft/2020-12/schema",
        "title": "fixq problem document, version 1",
        **{key: value for key, value in schema.items() if key != "title"},
    }
    return orjson.dumps(out)


def json_schema() -> dict[str, Any]:
    """The JSON Schema (2020-12) of problem documents, as served at ``/v1/schema``."""
    return orjson.loads(_schema())
