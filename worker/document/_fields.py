"""The building blocks of the document's models: the base class and annotated field types.

Each annotated type carries its own check and the JSON Schema keywords that
state it, so a field declares what it accepts in one place.  Numeric arrays
(:func:`array_field`) accept nested lists, packed base64 objects or ndarrays
through :func:`worker.arrays.decode_array`.
"""

from __future__ import annotations

import keyword
from typing import Annotated, Any, Literal, Union

import annotated_types
import numpy as np
from pydantic import (
    AfterValidator,
    BaseModel,
    BeforeValidator,
    ConfigDict,
    Discriminator,
    FailFast,
    Field,
    GetJsonSchemaHandler,
    PlainSerializer,
    Tag,
    WithJsonSchema,
)
from pydantic_core import PydanticCustomError, core_schema

from worker import expressions
from worker.arrays import decode_array, encode_array
from worker.document._faults import faults_error, shown
from worker.document.limits import (
    CANONICAL_INLINE_ELEMENTS,
    MAX_ARRAY_ELEMENTS,
    MAX_EXPRESSION_CHARS,
    MAX_LABEL_CHARS,
    MAX_NAME_CHARS,
    MAX_POINTS,
)
from worker.errors import InvalidDocument, TooLarge

EXPRESSION_FUNCTIONS = tuple(expressions.FUNCTIONS)
"""Functions of the expression language; no variable may take their names."""


class Part(BaseModel):
    """Base of every object of the document: unknown keys, coercions, NaN and infinity are refused."""

    model_config = ConfigDict(
        extra="forbid",
        strict=True,
        allow_inf_nan=False,
        arbitrary_types_allowed=True,
        protected_namespaces=(),
    )


class SchemaExtra:
    """Annotated metadata that adds JSON Schema keywords for a check a validator makes."""

    def __init__(self, **keywords: Any) -> None:
        self.keywords = keywords

    def __get_pydantic_json_schema__(
        self, schema: core_schema.CoreSchema, handler: GetJsonSchemaHandler
    ) -> dict[str, Any]:
        out = handler(schema)
        out.update(self.keywords)
        return out


def check(predicate: Any, message: str) -> AfterValidator:
    """An after-validator raising ``message`` (``{value}`` is filled in) when ``predicate`` fails."""

    def validate(value: Any) -> Any:
        if not predicate(value):
            raise PydanticCustomError("fixq_check", message, {"value": shown(value)})
        return value

    return AfterValidator(validate)


def integral(value: Any) -> Any:
    """Before-validator of whole numbers: ``3.0`` becomes ``3``."""
    # JSON writers of R, MATLAB and Julia send 3.0 for 3; bool stays bool so strict int refuses it.
    if type(value) is float and value.is_integer() and abs(value) < 2**63:
        return int(value)
    return value


def _nested_schema(ndim: int | None, nullable: bool, row_length: int | None) -> dict[str, Any]:
    if ndim is None:
        return {"x-nested-numbers": True}
    nested: dict[str, Any] = {"type": ["number", "null"]} if nullable else {"type": "number"}
    for level in range(ndim):
        nested = {"type": "array", "items": nested}
        if level == 0 and row_length is not None:
            nested.update(minItems=row_length, maxItems=row_length)
    return nested


def array_field(
    ndim: int | None,
    *,
    max_elements: int,
    inline_elements: int,
    allow_null: bool = False,
    row_length: int | None = None,
) -> Any:
    """The annotated type of a numeric-array field.

    Nested lists, a packed array or an ndarray in (via :func:`worker.arrays.decode_array`);
    a C-contiguous float64 ndarray out.  In JSON it is written as nested lists
    up to ``inline_elements`` elements and packed beyond.
    """

    def decode(value: Any) -> np.ndarray:
        try:
            array = decode_array(value, path="", allow_null=allow_null, max_elements=max_elements, ndim=ndim)
        except TooLarge as exc:
            raise faults_error([{**e, "kind": "too_large"} for e in exc.errors]) from None
        except InvalidDocument as exc:
            raise faults_error(exc.errors) from None
        return np.ascontiguousarray(array, dtype=np.float64)

    def to_json(array: np.ndarray) -> Any:
        return array.tolist() if array.size <= inline_elements else encode_array(array)

    schema = {"anyOf": [_nested_schema(ndim, allow_null, row_length), {"x-packed-array": True}]}
    return Annotated[
        np.ndarray, BeforeValidator(decode), PlainSerializer(to_json, when_used="json"), WithJsonSchema(schema)
    ]


def check_name(name: str) -> str:
    """Validate a name of the grid model (an expression variable)."""
    if not (name.isascii() and name.isidentifier()) or len(name) > MAX_NAME_CHARS:
        raise PydanticCustomError(
            "fixq_name",
            "`{name}` is not a valid name: use ASCII letters (A-Z, a-z), digits and underscores, starting with a "
            "letter or underscore, at most {limit} characters",
            {"name": name[:80], "limit": MAX_NAME_CHARS},
        )
    if keyword.iskeyword(name) or keyword.issoftkeyword(name):
        raise PydanticCustomError(
            "fixq_name", "`{name}` is a reserved word and cannot be used as a name", {"name": name}
        )
    if name in EXPRESSION_FUNCTIONS:
        raise PydanticCustomError(
            "fixq_name",
            "`{name}` is the name of a function of the expression language and cannot be used as a name",
            {"name": name},
        )
    return name


Integer = Annotated[int, BeforeValidator(integral)]


def one_as_list(value: Any) -> Any:
    """A single string where a list of strings is expected, as that one string's list (decoders that unbox a
    one-element list into its element, such as R's jsonlite with auto_unbox, send that)."""
    return [value] if isinstance(value, str) else value
Name = Annotated[
    str,
    AfterValidator(check_name),
    SchemaExtra(pattern="^[A-Za-z_][A-Za-z0-9_]*$", maxLength=MAX_NAME_CHARS),
]
Expression = Annotated[str, Field(min_length=1, max_length=MAX_EXPRESSION_CHARS)]
Expressions = Annotated[
    list[Expression], BeforeValidator(one_as_list, json_schema_input_type=Expression | list[Expression])
]
"""A list of expressions, or one expression as a string."""
Points = Annotated[
    Integer,
    check(lambda n: n >= 2, "a grid needs at least 2 points, got {value}"),
    check(lambda n: n <= MAX_POINTS, f"at most {MAX_POINTS:,} points per axis are accepted, got {{value}}"),
    SchemaExtra(minimum=2, maximum=MAX_POINTS),
]
Positive = Annotated[float, Field(gt=0)]
Spacing = Literal["uniform", "log", "power"]
RealEnds = list[Literal["min", "max"]]
"""Ends of a grid declared real limits of the problem (``real_ends`` of a state's grid or a choice's own)."""


_SIZES = {"max_elements": MAX_ARRAY_ELEMENTS, "inline_elements": CANONICAL_INLINE_ELEMENTS}
Vector = array_field(1, **_SIZES)
Matrix = array_field(2, **_SIZES)
NullableMatrix = array_field(2, allow_null=True, **_SIZES)
Cube = array_field(3, **_SIZES)
Rows4 = array_field(2, row_length=4, **_SIZES)
AnyArray = array_field(None, **_SIZES)


def _labels_or_count(value: Any) -> str | None:
    if isinstance(value, list):
        return "<labels>"
    if isinstance(value, int) and not isinstance(value, bool) or isinstance(value, float) and value.is_integer():
        return "<count>"
    return None


class _FailFast(FailFast):
    """Stop a list at its first bad item (so a million bad labels cost one error); hashable,
    as members of a ``Union`` must be."""

    __hash__ = object.__hash__


def _number_or_text(value: Any) -> str | None:
    if isinstance(value, str):
        return "<expression>"
    if isinstance(value, (int, float)) and not isinstance(value, bool):
        return "<number>"
    return None


NumberOrExpression = Annotated[
    Union[Annotated[float, Tag("<number>")], Annotated[Expression, Tag("<expression>")]],
    Discriminator(
        _number_or_text,
        custom_error_type="fixq_bound",
        custom_error_message="expected a number or an expression (a string)",
    ),
]
"""A bound that is a number, or an expression (a continuous choice's interval)."""

Label = Annotated[str, Field(min_length=1, max_length=MAX_LABEL_CHARS)]
LabelsOrCount = Annotated[
    Union[
        Annotated[list[Label], annotated_types.Len(1, MAX_POINTS), _FailFast(), Tag("<labels>")],
        Annotated[Integer, annotated_types.Interval(ge=1, le=MAX_POINTS), Tag("<count>")],
    ],
    Discriminator(
        _labels_or_count,
        custom_error_type="fixq_labels",
        custom_error_message="expected a list of labels (strings) or a count (a whole number)",
    ),
]
