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

__all__ = ["Label", "NestedIntegers", "NestedLabels", "NestedNumbers", "NestedOptionalNumbers", "Reported"]


def _open_to_additions(schema: dict[str, Any], cls: type) -> None:
    """Drop ``additionalProperties: false`` from a model's JSON Schema (see the module docstring)."""
    if schema.get("additionalProperties") is False:
        del schema["additionalProperties"]


class Reported(BaseModel):
    """Base of every object of the result document: keys not listed are refused when validating."""

    model_config = ConfigDict(
        extra="forbid",
        allow_inf_nan=False,
        protected_namespaces=(),
        json_schema_extra=_open_to_additions,
    )


Label = Union[str, int]
"""A tabular state's or action's label: the document's strings, or indices from 0 when it gave a count."""

NestedNumbers = TypeAliasType("NestedNumbers", Annotated[
    list[Union[float, "NestedNumbers"]],
    Field(description="Numbers in nested lists, one level per axis (C order: the last axis varies fastest)."),
])
NestedIntegers = TypeAliasType("NestedIntegers", Annotated[
    list[Union[int, "NestedIntegers"]],
    Field(description="Whole numbers (grid indices, from 0) in nested lists, one level per axis."),
])
NestedLabels = TypeAliasType("NestedLabels", Annotated[
    list[Union[str, int, "NestedLabels"]],
    Field(description="Labels (strings, or indices from 0) in nested lists, one level per axis."),
])
NestedOptionalNumbers = TypeAliasType("NestedOptionalNumbers", Annotated[
    list[Union[float, None, "NestedOptionalNumbers"]],
    Field(description="Numbers, or null where nothing was measured, in nested lists."),
])
