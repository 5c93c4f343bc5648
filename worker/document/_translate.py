"""Pydantic's validation errors turned into faults with document paths and plain messages.

Pydantic locates an error by a ``loc`` that includes union tags and ``[key]``
markers; :func:`split_loc` walks the model types along it to drop those, so a
fault names the path as the document writes it (``model.states.capital.min``).
"""

from __future__ import annotations

import difflib
import types
from typing import Annotated, Any, Union, get_args, get_origin

from pydantic import AliasChoices, BaseModel, Tag

from worker.document._faults import FAULTS_ERROR, Fault, concat, describe, fault
from worker.errors import join_path


def _unwrap(tp: Any) -> tuple[Any, list[Any]]:
    metadata: list[Any] = []
    while get_origin(tp) is Annotated:
        tp, *extra = get_args(tp)
        metadata.extend(extra)
    return tp, metadata


def _is_union(tp: Any) -> bool:
    return get_origin(tp) in (Union, types.UnionType)


def _is_model(tp: Any) -> bool:
    return isinstance(tp, type) and issubclass(tp, BaseModel)


def _tagged_member(union: Any, item: Any) -> Any:
    """The member of ``union`` selected by discriminator tag ``item``, else None."""
    for member in get_args(union):
        inner, metadata = _unwrap(member)
        if any(isinstance(m, Tag) and m.tag == item for m in metadata):
            return inner
        if (
            _is_model(inner)
            and "kind" in inner.model_fields
            and get_args(inner.model_fields["kind"].annotation) == (item,)
        ):
            return inner
    return None


def _resolve(tp: Any) -> Any:
    tp, _ = _unwrap(tp)
    if _is_union(tp):
        rest = [m for m in get_args(tp) if m is not type(None)]
        if len(rest) == 1:
            return _resolve(rest[0])
    return tp


def _child(tp: Any, item: Any) -> Any:
    tp = _resolve(tp)
    if _is_model(tp):
        field = _field(tp, item) if isinstance(item, str) else None
        return field.annotation if field else None
    if get_origin(tp) is dict:
        return get_args(tp)[1]
    if get_origin(tp) is list:
        return get_args(tp)[0]
    return None


def _field(model: type[BaseModel], key: str) -> Any:
    """The field of ``model`` read from JSON key ``key``: its name, or one of its alias choices."""
    if key in model.model_fields:
        return model.model_fields[key]
    for field in model.model_fields.values():
        alias = field.validation_alias
        if isinstance(alias, AliasChoices) and key in alias.choices:
            return field
    return None


def split_loc(loc: tuple[Any, ...], root: type[BaseModel]) -> tuple[list[str | int], Any]:
    """Drop union tags and ``[key]`` from a pydantic ``loc``.

    Returns the path parts and the type found at the end of ``loc`` (None
    when the walk left the models, for example inside a validated array).
    """
    parts: list[str | int] = []
    tp: Any = root
    for item in loc:
        if item == "[key]":
            continue
        bare = _resolve(tp) if tp is not None else None
        if bare is not None and _is_union(bare):
            member = _tagged_member(bare, item)
            if member is not None:
                tp = member
                continue
        if tp is None and isinstance(item, str) and item.startswith("<") and item.endswith(">"):
            continue
        parts.append(item)
        tp = _child(tp, item) if tp is not None else None
    return parts, tp


_EXPECTED = {
    "float_type": "a number",
    "float_parsing": "a number",
    "int_type": "a whole number",
    "int_parsing": "a whole number",
    "int_from_float": "a whole number",
    "string_type": "a string",
    "bool_type": "true or false",
    "bool_parsing": "true or false",
    "list_type": "a list",
    "dict_type": "an object",
    "model_type": "an object",
    "model_attributes_type": "an object",
}

_COMPARISONS = {
    "greater_than": ("gt", "greater than"),
    "greater_than_equal": ("ge", "at least"),
    "less_than": ("lt", "less than"),
    "less_than_equal": ("le", "at most"),
}


def translate(errors: list[Any], root: type[BaseModel]) -> list[Fault]:
    """Turn pydantic's error list into faults with document paths and plain messages."""
    faults: list[Fault] = []
    empty_at: set[str] = set()
    for error in errors:
        kind, ctx, given = error["type"], error.get("ctx") or {}, error.get("input")
        parts, _ = split_loc(tuple(error["loc"]), root)
        path = join_path(*parts)
        if isinstance(given, list) and not given and kind in _EMPTY_ARRAY_KINDS:
            if path not in empty_at:  # a union's members each refuse it: one fault is enough
                empty_at.add(path)
                faults.append(fault(path, empty_array_message(kind, ctx, tuple(error["loc"]), root)))
        elif kind == FAULTS_ERROR:
            faults.extend({**f, "path": concat(path, f["path"])} for f in ctx["faults"])
        elif kind == "extra_forbidden":
            faults.append(fault(path, _unknown_key_message(tuple(error["loc"]), root)))
        elif kind in ("union_tag_invalid", "union_tag_not_found"):
            key = str(ctx.get("discriminator", "kind")).strip("'")
            expected = " or ".join(f'"{tag}"' for tag in _union_tags(tuple(error["loc"]), root))
            if kind == "union_tag_invalid":
                message = f"must be {expected}, got {describe(ctx.get('tag'))}"
            else:
                message = f"missing required key `{key}` ({expected})"
            faults.append(fault(join_path(*parts, key), message))
        else:
            faults.append(fault(path, _message(kind, ctx, given, parts, error.get("msg", ""))))
    return faults


_EMPTY_ARRAY_KINDS = {*(kind for kind in _EXPECTED if kind != "list_type"), "fixq_initial", "literal_error"}
"""Error kinds that, for an empty JSON array, mean a value other than a list was expected."""

def empty_array_message(kind: str, ctx: dict[str, Any], loc: tuple[Any, ...], root: type[BaseModel]) -> str:
    """The message for ``[]`` where a non-list was expected: what was, and how to send nothing instead.

    MATLAB/Octave's ``jsonencode`` writes ``[]`` for an empty or missing value (and ``jsondecode`` reads
    ``null`` back as ``[]``), so a round trip through them puts ``[]`` where an object, a number or null was.
    """
    if kind == "fixq_initial":
        expected = '"zeros", an object {"values": ARRAY} or an object {"job": JOB_ID}'
    elif kind == "literal_error":
        expected = str(ctx.get("expected", "one of the listed words")).replace(chr(39), chr(34))
    else:
        expected = _EXPECTED.get(kind, "a value")
    optional, nullable = _slot(loc, root)
    note = "MATLAB/Octave encode a missing value as []"
    if optional and nullable:
        return f"expected {expected} (or null); got an empty array — {note}; send null or leave the key out"
    if optional:
        return f"expected {expected}; got an empty array — {note}; leave the key out for the default"
    return f"expected {expected}; got an empty array — {note}, but this value is required"


def _slot(loc: tuple[Any, ...], root: type[BaseModel]) -> tuple[bool, bool]:
    """Whether the value at pydantic's ``loc`` may be left out, and whether it may be null (False, False when
    unknown)."""
    if not loc:
        return False, False
    _, holder = split_loc(loc[:-1], root)
    holder = _resolve(holder) if holder is not None else None
    if not _is_model(holder) or not isinstance(loc[-1], str):
        value = _child(holder, loc[-1]) if holder is not None else None
        return False, _accepts_none(value)
    field = _field(holder, loc[-1])
    if field is None:
        return False, False
    return not field.is_required(), _accepts_none(field.annotation)


def _accepts_none(tp: Any) -> bool:
    tp, _ = _unwrap(tp)
    return tp is type(None) or (_is_union(tp) and any(_unwrap(m)[0] is type(None) for m in get_args(tp)))


def _union_tags(loc: tuple[Any, ...], root: type[BaseModel]) -> list[str]:
    _, tp = split_loc(loc, root)
    union = _unwrap(tp)[0] if tp is not None else None
    if union is None or not _is_union(union):
        return []
    members = [_unwrap(m)[0] for m in get_args(union)]
    return [
        get_args(m.model_fields["kind"].annotation)[0] for m in members if _is_model(m) and "kind" in m.model_fields
    ]


def _message(kind: str, ctx: dict[str, Any], given: Any, parts: list[str | int], fallback: str) -> str:
    if kind == "missing":
        return f"missing required key `{parts[-1]}`" if parts else "missing"
    if kind in _EXPECTED:
        if not parts and kind.startswith("model"):
            return f"expected a JSON object (the problem document), got {describe(given)}"
        if kind == "float_type" and isinstance(given, int) and not isinstance(given, bool):
            return "this number is too large to be held as a float64"
        return f"expected {_EXPECTED[kind]}, got {describe(given)}"
    if kind == "finite_number":
        return f"must be a finite number, got {describe(given)}: NaN and infinity are not allowed"
    if kind == "literal_error":
        return f"must be {str(ctx.get('expected', '')).replace(chr(39), chr(34))}, got {describe(given)}"
    if kind in _COMPARISONS:
        key, words = _COMPARISONS[kind]
        return f"must be {words} {ctx.get(key)}, got {describe(given)}"
    if kind == "string_too_short":
        return (
            "must not be empty"
            if ctx.get("min_length") == 1
            else f"must be at least {ctx.get('min_length')} characters long"
        )
    if kind == "string_too_long":
        return (
            f"must be at most {ctx.get('max_length')} characters long, got "
            f"{len(given) if isinstance(given, str) else 'more'}"
        )
    if kind in ("too_short", "too_long"):
        limit = ctx.get("min_length" if kind == "too_short" else "max_length")
        noun = ("entry", "entries") if ctx.get("field_type") == "Dictionary" else ("item", "items")
        words = f"{limit} {noun[0] if limit == 1 else noun[1]}"
        if kind == "too_short":
            return f"must have at least {words}"
        return f"must have at most {words}" + (f", got {len(given)}" if isinstance(given, (list, dict)) else "")
    if kind == "value_error":
        return fallback.removeprefix("Value error, ")
    return fallback


def _unknown_key_message(loc: tuple[Any, ...], root: type[BaseModel]) -> str:
    key = str(loc[-1]) if loc else ""
    _, holder = split_loc(loc[:-1], root)
    holder = _resolve(holder) if holder is not None else None
    message = f"unknown key `{key}`"
    if _is_model(holder):
        allowed = list(holder.model_fields)
        close = difflib.get_close_matches(key, allowed, n=1)
        if close:
            message += f" (did you mean `{close[0]}`?)"
        message += "; allowed here: " + ", ".join(allowed)
    return message
