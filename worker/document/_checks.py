"""Helpers of :mod:`worker.document.schema`: annotated field types, faults, the nesting
guard, the translation of pydantic errors, the vectorised checks of numeric
arrays, and the finishing of the JSON Schema and the canonical form.

A *fault* is a ``{"path", "message"}`` dict as in :mod:`worker.errors`, plus
an optional ``"kind"`` (``"infeasible"`` or ``"too_large"``) that picks the
exception class and is dropped before raising.  Validators inside the models
raise :func:`faults_error`, a pydantic error whose context carries faults with
paths *relative* to the model that raised it; :func:`translate` joins them to
the model's own location, so every check can name its exact path without
knowing where its model sits in the document.
"""

from __future__ import annotations

import difflib
import keyword
import math
import types
from itertools import chain, compress
from typing import Annotated, Any, Iterable, Union, get_args, get_origin

import numpy as np
from pydantic import AfterValidator, BaseModel, BeforeValidator, GetJsonSchemaHandler, PlainSerializer, Tag, WithJsonSchema
from pydantic_core import PydanticCustomError, core_schema

from worker.arrays import decode_array, encode_array
from worker import expressions
from worker.errors import InfeasibleModel, InvalidDocument, TooLarge, join_path

Fault = dict[str, Any]

FAULTS_ERROR = "fixq_faults"
"""Type of the pydantic error that carries a list of relative faults."""

MAX_LISTED = 10
"""Faults listed per vectorised check (count); the rest are summed up in one more fault."""

ROW_SUM_TOLERANCE = 1e-9
"""How far a probability row's sum may be from 1 (absolute, dimensionless)."""

EXPRESSION_FUNCTIONS = tuple(expressions.FUNCTIONS)
"""Functions of the expression language; no variable may take their names."""

MAX_NAME_CHARS = 64
"""Longest name of a parameter, state, shock, choice or define (characters)."""


class SchemaExtra:
    """Annotated metadata that adds JSON Schema keywords for a check a validator makes."""

    def __init__(self, **keywords: Any) -> None:
        self.keywords = keywords

    def __get_pydantic_json_schema__(self, schema: core_schema.CoreSchema, handler: GetJsonSchemaHandler) -> dict[str, Any]:
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
    ndim: int | None, *, max_elements: int, inline_elements: int, allow_null: bool = False, row_length: int | None = None
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
    return Annotated[np.ndarray, BeforeValidator(decode), PlainSerializer(to_json, when_used="json"), WithJsonSchema(schema)]


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


def check_name(name: str) -> str:
    """Validate a name of the grid model (an expression variable)."""
    if not (name.isascii() and name.isidentifier()) or len(name) > MAX_NAME_CHARS:
        raise PydanticCustomError(
            "fixq_name",
            "`{name}` is not a valid name: use letters, digits and underscores, starting with a letter "
            "or underscore, at most {limit} characters",
            {"name": name[:80], "limit": MAX_NAME_CHARS},
        )
    if keyword.iskeyword(name) or keyword.issoftkeyword(name):
        raise PydanticCustomError("fixq_name", "`{name}` is a reserved word and cannot be used as a name", {"name": name})
    if name in EXPRESSION_FUNCTIONS:
        raise PydanticCustomError(
            "fixq_name", "`{name}` is the name of a function of the expression language and cannot be used as a name", {"name": name}
        )
    return name


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
            return fault(_path_to_depth(raw, depth), f"nested more than {max_depth} levels deep; no part of a problem document needs that")
        dicts = list(compress(level, map(_MAPPINGS.__contains__, map(type, level))))
        if dicts and max(map(len, dicts)) > max_keys:
            big = next(d for d in dicts if len(d) > max_keys)
            return fault(_path_to(raw, big), f"has {len(big):,} keys; no object in a problem document needs more than {max_keys:,}")
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
        if _is_model(inner) and "kind" in inner.model_fields and get_args(inner.model_fields["kind"].annotation) == (item,):
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
        field = tp.model_fields.get(item) if isinstance(item, str) else None
        return field.annotation if field else None
    if get_origin(tp) is dict:
        return get_args(tp)[1]
    if get_origin(tp) is list:
        return get_args(tp)[0]
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
    for error in errors:
        kind, ctx, given = error["type"], error.get("ctx") or {}, error.get("input")
        parts, _ = split_loc(tuple(error["loc"]), root)
        path = join_path(*parts)
        if kind == FAULTS_ERROR:
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


def _union_tags(loc: tuple[Any, ...], root: type[BaseModel]) -> list[str]:
    _, tp = split_loc(loc, root)
    union = _unwrap(tp)[0] if tp is not None else None
    if union is None or not _is_union(union):
        return []
    members = [_unwrap(m)[0] for m in get_args(union)]
    return [get_args(m.model_fields["kind"].annotation)[0] for m in members if _is_model(m) and "kind" in m.model_fields]


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
        return "must not be empty" if ctx.get("min_length") == 1 else f"must be at least {ctx.get('min_length')} characters long"
    if kind == "string_too_long":
        return f"must be at most {ctx.get('max_length')} characters long, got {len(given) if isinstance(given, str) else 'more'}"
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
        (fault(at(int(i), int(j)), f"probabilities must be non-negative, got {number(matrix[i, j])}") for i, j in negative),
        len(negative),
        where,
        "negative probabilities",
    )
    sums = matrix.sum(axis=1)
    off = np.flatnonzero((np.abs(sums - 1.0) > ROW_SUM_TOLERANCE) & ~(matrix < 0).any(axis=1))
    what = "the probabilities sum" if single_row else "this row sums"
    faults += capped(
        (fault(at(int(i)), f"{what} to {number(sums[i])}; probabilities must sum to 1 (within {ROW_SUM_TOLERANCE:g})") for i in off),
        off.size,
        where,
        "rows that do not sum to 1",
    )
    return faults


def grid_gap_fault(spacing: str, lo: float, hi: float, points: int, exponent: float) -> Fault | None:
    """A fault when the grid's closest neighbours would be indistinguishable in float64.

    Computed from the closed-form smallest gap, so no grid is built.
    """
    step = 1.0 / (points - 1)
    if spacing == "log":
        gap = lo * math.expm1(math.log(hi / lo) * step)
    elif spacing == "power" and exponent >= 1:
        gap = (hi - lo) * step**exponent
    elif spacing == "power":
        gap = (hi - lo) * -math.expm1(exponent * math.log1p(-step)) if points > 2 else hi - lo
    else:
        gap = (hi - lo) * step
    # Four ulps of the largest magnitude on the grid: below that, rounding can
    # merge or reorder neighbouring points.
    if not gap > 4 * math.ulp(max(abs(lo), abs(hi))):
        return fault(
            "points",
            f"{points:,} points between {number(lo)} and {number(hi)} would lie too close together to tell apart in float64",
        )
    return None


def tabular_faults(model: Any) -> list[Fault]:
    """Every fault of a tabular model's labels, shapes and probabilities (paths relative to it)."""
    faults = _label_faults(model.states, "states", "state") + _label_faults(model.actions, "actions", "action")
    n_states, n_actions = model.n_states, model.n_actions
    reward = model.reward
    if reward.shape != (n_states, n_actions):
        faults.append(
            fault(
                "reward",
                f"reward has shape {list(reward.shape)}, but with {n_states} states and {n_actions} actions "
                f"reward[s][a] must have shape [{n_states}, {n_actions}]",
            )
        )
        return faults
    allowed = ~np.isnan(reward)
    stuck = np.flatnonzero(~allowed.any(axis=1))
    faults += capped(
        (fault(join_path("reward", int(s)), f"{_state(model, s)} has no allowed action: every reward in its row is null", "infeasible") for s in stuck),
        stuck.size,
        "reward",
        "states with no allowed action",
    )
    if isinstance(model.transition, np.ndarray):
        return faults + _dense_faults(model, model.transition, allowed)
    return faults + _sparse_faults(model, model.transition.entries, allowed)


def _label_faults(labels: list[str] | int, where: str, noun: str) -> list[Fault]:
    if isinstance(labels, int):
        return []
    repeats = len(labels) - len(set(labels))
    if not repeats:
        return []

    def duplicates() -> Iterable[Fault]:
        first: dict[str, int] = {}
        for i, label in enumerate(labels):
            if label in first:
                yield fault(join_path(where, i), f'duplicate {noun} label "{label}" (first used at index {first[label]})')
            else:
                first[label] = i

    return capped(duplicates(), repeats, where, "duplicate labels")


def _state(model: Any, s: int) -> str:
    return f'state "{model.states[s]}" (index {s})' if isinstance(model.states, list) else f"state {s}"


def _action(model: Any, a: int) -> str:
    return f'action "{model.actions[a]}" (index {a})' if isinstance(model.actions, list) else f"action {a}"


def _dense_faults(model: Any, transition: np.ndarray, allowed: np.ndarray) -> list[Fault]:
    n_states, n_actions = allowed.shape
    if transition.shape != (n_states, n_actions, n_states):
        return [
            fault(
                "transition",
                f"transition has shape {list(transition.shape)}, but transition[s][a][s'] must have shape "
                f"[{n_states}, {n_actions}, {n_states}] (states, actions, next states)",
            )
        ]
    negative = (transition < 0) & allowed[:, :, None] if transition.size and transition.min() < 0 else None
    faults: list[Fault] = []
    if negative is not None:
        where = np.argwhere(negative)
        faults = capped(
            (fault(join_path("transition", *map(int, ix)), f"probability {number(transition[tuple(ix)])} is negative") for ix in where),
            len(where),
            "transition",
            "negative probabilities",
        )
    sums = transition.sum(axis=2)
    off = allowed & (np.abs(sums - 1.0) > ROW_SUM_TOLERANCE)
    if negative is not None:
        off &= ~negative.any(axis=2)
    rows = np.argwhere(off)
    faults += capped(
        (fault(join_path("transition", int(s), int(a)), _row_message(model, s, a, sums[s, a])) for s, a in rows),
        len(rows),
        "transition",
        "rows that do not sum to 1",
    )
    return faults


def _row_message(model: Any, s: int, a: int, total: float) -> str:
    return (
        f"the probabilities of tomorrow's state from {_state(model, s)} under {_action(model, a)} sum to "
        f"{number(total)}; they must sum to 1 (within {ROW_SUM_TOLERANCE:g})"
    )


_ENTRY_COLUMNS = ("state index", "action index", "next-state index")


def _sparse_faults(model: Any, entries: np.ndarray, allowed: np.ndarray) -> list[Fault]:
    n_states, n_actions = allowed.shape
    where = "transition.entries"
    if entries.ndim != 2 or entries.shape[1] != 4:
        return [fault(where, f"expected rows of 4 numbers [s, a, s_next, p], got shape {list(entries.shape)}")]
    columns = np.ascontiguousarray(entries.T)
    sizes = (n_states, n_actions, n_states)
    # Whole-column reductions first: a valid document never pays for the
    # element-wise searches below, which run only to name the faulty entries.
    in_range = bool(columns.size == 0 or all(columns[c].min() >= 0 and columns[c].max() < sizes[c] for c in range(3)))
    index = columns[:3].astype(np.int64) if in_range else None
    if index is None or np.any(index != columns[:3]):
        return _entry_faults(columns, sizes, where)
    p = columns[3]
    if p.size and (p.min() < 0 or p.max() > 1):
        return _entry_faults(columns, sizes, where)
    pair = index[0] * n_actions + index[1]
    sums = np.bincount(pair, weights=p, minlength=n_states * n_actions)
    off = np.flatnonzero(allowed.ravel() & (np.abs(sums - 1.0) > ROW_SUM_TOLERANCE))
    return capped(
        (fault(where, _row_message(model, *divmod(int(k), n_actions), sums[k])) for k in off),
        off.size,
        where,
        "(state, action) pairs whose probabilities do not sum to 1",
    )


def _entry_faults(columns: np.ndarray, sizes: tuple[int, int, int], where: str) -> list[Fault]:
    """Faults naming each entry with a bad index or probability; columns is (4, N)."""
    faults: list[Fault] = []
    for col in range(3):
        values = columns[col]
        outside = (values < 0) | (values >= sizes[col])
        fractional = ~outside & (values != np.floor(values))
        noun = "actions" if col == 1 else "states"
        rows = np.flatnonzero(outside | fractional)
        faults += capped(
            (
                fault(
                    join_path(where, int(r), col),
                    f"{_ENTRY_COLUMNS[col]} {number(values[r])} is not a whole number"
                    if fractional[r]
                    else f"{_ENTRY_COLUMNS[col]} {number(values[r])} is out of range: with {sizes[col]} {noun} it must be 0 to {sizes[col] - 1}",
                )
                for r in rows
            ),
            rows.size,
            where,
            f"bad {_ENTRY_COLUMNS[col].replace('index', 'indices')}",
        )
    p = columns[3]
    rows = np.flatnonzero((p < 0) | (p > 1))
    faults += capped(
        (fault(join_path(where, int(r), 3), f"probability {number(p[r])} is outside [0, 1]") for r in rows),
        rows.size,
        where,
        "probabilities outside [0, 1]",
    )
    return faults


RANGE_KEYS = ("min", "max", "points", "spacing", "exponent")
"""Keys of a grid given by its range."""


def form_faults(part: Any, forms: dict[str, tuple[str, ...]], described: str) -> tuple[str | None, list[Fault]]:
    """Which of the mutually exclusive ``forms`` (name → keys) ``part`` uses, and faults if not exactly one."""
    present = {name: [key for key in keys if getattr(part, key) is not None] for name, keys in forms.items()}
    used = [name for name, keys in present.items() if keys]
    if not used:
        return None, [fault("", f"give {described}")]
    if len(used) > 1:
        first = ", ".join(f"`{k}`" for k in present[used[0]])
        return None, [
            fault(key, f"`{key}` cannot be combined with {first}: give {described}") for name in used[1:] for key in present[name]
        ]
    return used[0], []


def range_faults(part: Any, *, other: str, default_exponent: float) -> list[Fault]:
    """Faults of a grid given by ``min``, ``max``, ``points``, ``spacing``, ``exponent``.

    Fills in the defaults (``spacing`` uniform; ``exponent`` for power) on ``part``.
    """
    faults = [fault(key, f"missing `{key}`: a grid needs min, max and points ({other})") for key in ("min", "max", "points") if getattr(part, key) is None]
    spacing = part.spacing or "uniform"
    if part.exponent is not None and spacing != "power":
        faults.append(fault("exponent", f'exponent is used only with spacing "power", not "{spacing}"'))
    if faults:
        return faults
    if part.min >= part.max:
        faults.append(fault("max", f"max ({number(part.max)}) must be greater than min ({number(part.min)})"))
    elif spacing == "log" and part.min <= 0:
        faults.append(fault("min", f"log spacing needs min > 0 (there are no logarithms of zero or negative numbers), got {number(part.min)}"))
    else:
        exponent = part.exponent if part.exponent is not None else default_exponent
        gap = grid_gap_fault(spacing, part.min, part.max, part.points, exponent)
        faults += [gap] if gap else []
    part.spacing = spacing
    if spacing == "power" and part.exponent is None:
        part.exponent = default_exponent
    return faults


def sorted_keys(node: Any, ordered: set[tuple[str, ...]], where: tuple[str, ...] = ()) -> Any:
    """``node`` with object keys sorted, except in the objects at the paths in ``ordered``."""
    if isinstance(node, dict):
        keys = node if where in ordered else sorted(node)
        return {key: sorted_keys(node[key], ordered, (*where, key)) for key in keys}
    if isinstance(node, list) and node and isinstance(node[0], (dict, list)):
        return [sorted_keys(item, ordered, where) for item in node]
    return node


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


def grid_model_faults(model: Any) -> list[Fault]:
    """Faults of a grid model's names, laws of motion and expressions (paths relative to it)."""
    return _name_faults(model) + _motion_faults(model) + _expressions_faults(model)


def _name_faults(model: Any) -> list[Fault]:
    faults = []
    seen: dict[str, str] = {}
    for section in ("params", "states", "shocks", "choices", "define"):
        for name in getattr(model, section):
            if name in seen:
                faults.append(
                    fault(
                        join_path(section, name),
                        f"the name `{name}` is already used in {seen[name]}; names must be unique across params, states, shocks, choices and define",
                    )
                )
            else:
                seen[name] = section
    return faults


def _motion_faults(model: Any) -> list[Fault]:
    faults = []
    chooser: dict[str, str] = {}
    states = ", ".join(model.states)
    for name, choice in model.choices.items():
        target = choice.next_of
        if target is None:
            continue
        where = join_path("choices", name, "next_of")
        if target not in model.states:
            faults.append(fault(where, f"`{target}` is not a state; next_of must name one of: {states}"))
        elif target in chooser:
            faults.append(fault(where, f"state `{target}` is already chosen by choice `{chooser[target]}`; a state can be the next_of of only one choice"))
        else:
            chooser[target] = name
    for name in model.next:
        where = join_path("next", name)
        if name not in model.states:
            faults.append(fault(where, f"`{name}` is not a state; next gives tomorrow's value of a state (states: {states})"))
        elif name in chooser:
            faults.append(fault(where, f"state `{name}` is already chosen through next_of by choice `{chooser[name]}`, so it must not also have a next expression"))
    faults += [
        fault(
            join_path("next", name),
            f"state `{name}` has no law of motion: give next.{name}, an expression for its value tomorrow, or a choice with next_of \"{name}\"",
        )
        for name in model.states
        if name not in chooser and name not in model.next
    ]
    return faults


def _expressions_faults(model: Any) -> list[Fault]:
    base = [*model.params, *model.states, *model.shocks, *model.choices]
    defines = list(model.define)
    faults = []
    for i, name in enumerate(defines):
        faults += _expression_faults(model.define[name], base + defines[:i], set(defines[i:]), join_path("define", name))
    known = base + defines
    for name, text in model.next.items():
        faults += _expression_faults(text, known, set(), join_path("next", name))
    faults += _expression_faults(model.reward, known, set(), "reward")
    for i, text in enumerate(model.feasible):
        faults += _expression_faults(text, known, set(), join_path("feasible", i))
    return faults


def _expression_faults(text: str, known: list[str], later: set[str], where: str) -> list[Fault]:
    """Faults of one expression: its grammar, and names it uses that are unknown or defined later."""
    try:
        expression = expressions.parse(text, path=where)
        early = sorted(expression.names & later)
        if early:
            names = ", ".join(f"`{n}`" for n in early)
            return [fault(where, f"uses {names} before it is defined: a define may use only the defines listed before it")]
        expressions.check_names(expression, known, path=where)
    except InvalidDocument as exc:
        return exc.errors
    return []


def start_faults(model: Any, start: Any, where: str) -> list[Fault]:
    """Faults of ``report.simulate.start`` against the model (paths from the document root)."""
    if model.kind == "tabular":
        if isinstance(start, dict):
            return [fault(where, "for a tabular model, start is a state label or a state index")]
        if isinstance(start, int):
            if not 0 <= start < model.n_states:
                return [fault(where, f"state index {start} is out of range: with {model.n_states} states it must be 0 to {model.n_states - 1}")]
            return []
        if not isinstance(model.states, list) or start not in model.states:
            return [fault(where, f'"{start[:80]}" is not a state label')]
        return []
    if not isinstance(start, dict):
        return [fault(where, "for a grid model, start is an object giving a value for every state and shock")]
    axes = {**model.states, **model.shocks}
    faults = [fault(join_path(where, name), f"`{name}` is not a state or shock of the model") for name in start if name not in axes]
    faults += [fault(join_path(where, name), f"missing a starting value for `{name}`") for name in axes if name not in start]
    for name, value in start.items():
        if name in axes:
            lo, hi = axes[name].bounds
            if not lo <= value <= hi:
                faults.append(fault(join_path(where, name), f"{number(value)} lies outside the grid of `{name}`, [{number(lo)}, {number(hi)}]"))
    return faults
