"""The building blocks of the result document's models: the base class and the nested-array types.

The models describe what :func:`worker.solve.solve` returns; they are documentation, never a step of
a solve or of ``GET /v1/jobs/{id}/result`` (a result of hundreds of MB is sent as stored).  Every
model refuses keys it does not list, so that a test validating real results against them fails on
an undocumented key; their JSON Schema leaves ``additionalProperties`` open, because a client should
ignore keys it does not know (a later version may add some).
"""

from __future__ import annotations

from typing import Annotated, Any, Union

from pydantic import BaseModel, ConfigDict, Field
from typing_extensions import TypeAliasType

__all__ = [
    "NestedIntegers",
    "NestedLabels",
    "NestedNumbers",
    "NestedOptionalNumbers",
    "NumberOrLabel",
    "Reported",
    "absent_unless",
]


def _finish(schema: dict[str, Any], cls: type) -> None:
    """Drop ``additionalProperties: false`` from a model's JSON Schema (see the module docstring), and the
    defaults of keys left out when they do not apply (:func:`absent_unless`: never null, never defaulted)."""
    if schema.get("additionalProperties") is False:
        del schema["additionalProperties"]
    for prop in schema.get("properties", {}).values():
        prop.pop("default", None)


def absent_unless(description: str) -> Any:
    """A key that a result leaves out when it does not apply: optional, and never null when present (the
    attribute reads None on a model validated without it)."""
    return Field(default=None, description=description)


class Reported(BaseModel):
    """Base of every object of the result document: keys not listed are refused when validating."""

    model_config = ConfigDict(
        extra="forbid",
        strict=True,
        allow_inf_nan=False,
        protected_namespaces=(),
        json_schema_extra=_finish,
    )


NumberOrLabel = Union[float, str]
"""A value on an axis or of a choice: a number, or a tabular state's or action's label (the document's strings,
or indices from 0 when it gave a count)."""

NestedNumbers = TypeAliasType(
    "NestedNumbers",
    Annotated[
        list[Union[float, "NestedNumbers"]],
        Field(description="Numbers in nested lists, one level per axis (C order: the last axis varies fastest)."),
    ],
)
NestedIntegers = TypeAliasType(
    "NestedIntegers",
    Annotated[
        list[Union[int, "NestedIntegers"]],
        Field(description="Whole numbers (grid indices, from 0) in nested lists, one level per axis."),
    ],
)
NestedLabels = TypeAliasType(
    "NestedLabels",
    Annotated[
        list[Union[str, int, "NestedLabels"]],
        Field(description="Labels (strings, or indices from 0) in nested lists, one level per axis."),
    ],
)
NestedOptionalNumbers = TypeAliasType(
    "NestedOptionalNumbers",
    Annotated[
        list[Union[float, None, "NestedOptionalNumbers"]],
        Field(description="Numbers, or null where nothing was measured, in nested lists."),
    ],
)
