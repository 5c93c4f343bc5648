"""The sweep request (``POST /v1/sweeps``): its pydantic model, the checks of its paths, and its combinations.

:class:`SweepRequest` validates the request's own fields (their types and
ranges, and the paths of ``vary`` against the base); :func:`parse_request`
answers every fault as ``InvalidDocument`` with the field paths of the
request (``mode``, ``tags[0]``, ``vary.model.reward[7][0]``).  A checked
request knows its combinations: their values, their documents, and along a
chain each one's predecessor and successors.  The documents themselves are
admitted elsewhere (``service.sweeps.creation``).
"""

from __future__ import annotations

import functools
import math
import re
from collections.abc import Callable, Sequence
from typing import Annotated, Any, Literal

import orjson
from pydantic import AfterValidator, BaseModel, ConfigDict, Field, StrictBool, StrictStr, ValidationError

from service.settings import Settings
from worker.document import DEFAULT_PRIORITY, MAX_LABEL_CHARS, MAX_TAGS, PRIORITIES, SUBMISSION_KEYS
from worker.document.tags import tag_problem
from worker.errors import InvalidDocument, TooLarge, join_path

__all__ = [
    "MODES",
    "VALUE_IN_LABEL_CHARS",
    "Segments",
    "SweepRequest",
    "parse_path",
    "parse_request",
    "sweep_tag",
]

MODES = ("product", "zip")
"""How the varied lists combine: every combination, or the i-th value of each."""
VALUE_IN_LABEL_CHARS = 40
"""Longest rendering of one value in a job's label (characters)."""

_SEGMENT = re.compile(r"([^.\[\]]+)|\[(\d+)\]")

Segments = tuple[str | int, ...]


def _tag(value: str) -> str:
    """A sweep's tag, checked by the documents' one rule (worker/document/tags.py)."""
    problem = tag_problem(value)
    if problem is not None:
        raise ValueError(problem)
    return value


Tag = Annotated[StrictStr, AfterValidator(_tag)]
ValueList = Annotated[list[Any], Field(min_length=1)]


def parse_path(text: str) -> Segments:
    """``"model.feasible[0]"`` → ``("model", "feasible", 0)``; ``ValueError`` for a malformed path."""
    if not isinstance(text, str) or not text:
        raise ValueError("a path is a non-empty string such as model.params.gamma")
    segments: list[str | int] = []
    position = 0
    while position < len(text):
        if segments and text[position] == ".":
            position += 1
            if position == len(text) or text[position] == "[":
                raise ValueError(f"{text!r} has an empty key")
        match = _SEGMENT.match(text, position)
        if match is None or (match.group(1) is not None and segments and text[position - 1] != "."):
            raise ValueError(f"{text!r} is not a path of keys and [index] parts, such as model.feasible[0]")
        key, index = match.groups()
        segments.append(key if key is not None else int(index))
        position = match.end()
    if not isinstance(segments[0], str):
        raise ValueError(f"{text!r} must start with a key of the document")
    return tuple(segments)


def sweep_tag(sweep_id: str) -> str:
    """The tag every job of a sweep carries."""
    return f"sweep:{sweep_id}"


class SweepRequest(BaseModel):
    """A sweep request: the base document, the values of some of its fields, and how they combine.

    ``vary`` maps a path (dotted keys, ``[i]`` list indices) to the values it
    takes.  ``product`` takes every combination, numbered in C order of the
    ``vary`` keys (the last varies fastest); ``zip`` the i-th value of every
    list.  ``label``, ``tags`` and ``priority`` belong to the whole sweep.
    """

    model_config = ConfigDict(extra="forbid", frozen=True)

    base: dict[str, Any] = Field(
        description="The problem document every combination starts from (its JSON Schema: GET /v1/schema)."
    )
    vary: dict[str, ValueList] = Field(
        min_length=1,
        description="Path into the document (dotted keys, [i] list indices) → the values it takes.",
    )
    mode: Literal[MODES] = Field(default="product", description="product: every combination; zip: the i-th of each.")
    chain: StrictBool = Field(
        default=False,
        description="Warm-start each job from its neighbour (refused with model.horizon, where solver.initial "
        "replaces the terminal value).",
    )
    label: StrictStr | None = Field(default=None, max_length=MAX_LABEL_CHARS)
    tags: list[Tag] = Field(default_factory=list, max_length=MAX_TAGS)
    priority: Literal[PRIORITIES] | None = None

    @property
    def paths(self) -> tuple[str, ...]:
        """The varied paths, in the order of ``vary``."""
        return tuple(self.vary)

    @functools.cached_property
    def segments(self) -> tuple[Segments, ...]:
        """Each varied path split into keys and indices."""
        return tuple(parse_path(path) for path in self.vary)

    @property
    def shape(self) -> tuple[int, ...]:
        """Number of values of each varied path."""
        return tuple(len(values) for values in self.vary.values())

    @property
    def count(self) -> int:
        """Number of combinations."""
        shape = self.shape
        return math.prod(shape) if self.mode == "product" else (shape[0] if shape else 0)

    def value_indices(self, index: int) -> tuple[int, ...]:
        """Index into each path's list of combination ``index``."""
        if self.mode == "zip":
            return (index,) * len(self.vary)
        out = []
        for size in reversed(self.shape):
            index, position = divmod(index, size)
            out.append(position)
        return tuple(reversed(out))

    def values_of(self, index: int) -> dict[str, Any]:
        """``{path: value}`` of combination ``index``."""
        return {p: v[i] for (p, v), i in zip(self.vary.items(), self.value_indices(index))}

    def predecessor(self, index: int) -> int | None:
        """The combination ``index`` warm-starts from when chained (None for the first).

        Its *last non-zero* axis index steps back by one (``zip``: the previous combination).
        """
        if index == 0:
            return None
        if self.mode == "zip":
            return index - 1
        position = list(self.value_indices(index))
        axis = max(a for a, i in enumerate(position) if i > 0)
        position[axis] -= 1
        return self._ravel(position)

    def successors(self, index: int) -> list[int]:
        """The combinations that warm-start from ``index`` when chained."""
        if self.mode == "zip":
            return [index + 1] if index + 1 < self.count else []
        position = self.value_indices(index)
        last = max((a for a, i in enumerate(position) if i > 0), default=0)
        out = []
        for axis in range(last, len(position)):
            if position[axis] + 1 < self.shape[axis]:
                out.append(self._ravel([*position[:axis], position[axis] + 1, *position[axis + 1 :]]))
        return out

    def _ravel(self, position: Sequence[int]) -> int:
        index = 0
        for size, i in zip(self.shape, position):
            index = index * size + i
        return index

    def document(self, index: int, *, sweep_id: str, initial: Any = None) -> dict[str, Any]:
        """The document of combination ``index``: the base with its values and the sweep's options.

        ``initial`` replaces ``solver.initial`` (a chain's ``{"job": ID}``).
        """
        values = self.values_of(index)
        document: dict[str, Any] = self.base
        for segments, value in zip(self.segments, values.values()):
            document = _with_value(document, segments, value)
        document = dict(document)
        document["label"] = _job_label(self.label or _text(self.base.get("label")) or f"sweep {sweep_id}", values)
        document["tags"] = _job_tags(self.base.get("tags"), self.tags, sweep_id)
        if self.priority is not None:
            document["priority"] = self.priority
        if initial is not None:
            document = _with_value(document, ("solver", "initial"), initial)
        return document

    def record_fields(self) -> dict[str, Any]:
        """The request's part of the public sweep record."""
        return {
            "label": self.label if self.label is not None else _text(self.base.get("label")),
            "tags": list(self.tags),
            "priority": self.priority or _text(self.base.get("priority")) or DEFAULT_PRIORITY,
            "mode": self.mode,
            "chain": self.chain,
            "vary": dict(self.vary),
            "combinations": self.count,
        }

    @classmethod
    def from_record(cls, record: dict[str, Any], base: dict[str, Any]) -> SweepRequest:
        """Rebuild the request of a stored sweep (checked when it was stored, so not again)."""
        return cls.model_construct(
            base=base,
            vary=record["vary"],
            mode=record["mode"],
            chain=record["chain"],
            label=record.get("sweep_label"),
            tags=list(record.get("tags") or ()),
            priority=record.get("sweep_priority"),
        )

    def faults(self) -> list[dict[str, str]]:
        """What is wrong beyond the fields' types: the varied paths, the zip lengths and the jobs' tag count."""
        out: list[dict[str, str]] = []
        parsed: list[Segments] = []
        for text in self.vary:
            where = f"vary.{text}"
            try:
                segments = parse_path(text)
            except ValueError as exc:
                out.append({"path": where, "message": str(exc)})
                continue
            problem = None
            if segments[0] in SUBMISSION_KEYS:
                problem = f"{segments[0]} is set for the whole sweep and cannot vary"
            elif self.chain and segments[:2] in (("solver",), ("solver", "initial")):
                problem = "with chain, solver.initial is set by the chain and cannot vary"
            else:
                problem = _structure_fault(self.base, segments)
            if problem is not None:
                out.append({"path": where, "message": problem})
            for other in parsed:
                shorter = min(len(other), len(segments))
                if other[:shorter] == segments[:shorter]:
                    out.append({"path": where, "message": f"overlaps the varied path {join_path(*other)}; "
                                "one path may not lie inside another"})  # fmt: skip
            parsed.append(segments)
        base_tags = self.base.get("tags", [])
        if isinstance(base_tags, list) and all(isinstance(t, str) for t in base_tags):
            total = len(dict.fromkeys([*base_tags, *self.tags])) + 1
            if total > MAX_TAGS:
                out.append({"path": "tags", "message": f"the jobs would carry {total} tags (the base's, the "
                            f"sweep's, sweep:ID); at most {MAX_TAGS}"})  # fmt: skip
        if self.chain and self._has_horizon():
            out.append({"path": "chain", "message": "a model with a horizon (model.horizon) is solved by backward "
                        "induction, which starts from no guess: there, solver.initial is the value after the last "
                        "period, and a neighbour's value would replace the terminal value; leave chain out"})
        if self.mode == "zip" and len(set(self.shape)) > 1:
            lengths = ", ".join(f"{p}: {len(v)}" for p, v in self.vary.items())
            out.append({"path": "vary", "message": f'with mode "zip" every list needs the same length; got {lengths}'})
        return out

    def _has_horizon(self) -> bool:
        """Whether some combination has a finite horizon (the base's model.horizon, or a varied one)."""
        model = self.base.get("model")
        if isinstance(model, dict) and model.get("horizon") is not None:
            return True
        for segments, values in zip(self._segments_or_none(), self.vary.values()):
            if segments is not None and segments[:2] == ("model", "horizon") and any(v is not None for v in values):
                return True
        return False

    def _segments_or_none(self) -> list[Segments | None]:
        """Each varied path split into keys and indices, None for a path that does not parse."""
        out: list[Segments | None] = []
        for text in self.vary:
            try:
                out.append(parse_path(text))
            except ValueError:
                out.append(None)
        return out

    def canonical(self) -> SweepRequest:
        """The same request with each varied path written one way (``a.b[0]``), as it is stored."""
        vary = {join_path(*segments): values for segments, values in zip(self.segments, self.vary.values())}
        return self.model_copy(update={"vary": vary})


_PRIORITY_WORDS = ", ".join(f'"{p}"' for p in PRIORITIES[:-1]) + f' or "{PRIORITIES[-1]}"'

_FIELD_MESSAGES: dict[str, Callable[[Any], str]] = {
    "base": lambda value: "required: the problem document that every combination starts from (a JSON object)",
    "vary": lambda value: 'required: an object of path → list of values, e.g. {"discount": [0.94, 0.95]}',
    "mode": lambda value: f'must be "product" (every combination, the default) or "zip" (the i-th of each), '
    f"got {value!r}",
    "chain": lambda value: f"must be true or false, got {value!r}",
    "label": lambda value: f"must be a text of at most {MAX_LABEL_CHARS} characters",
    "tags": lambda value: f"must be a list of at most {MAX_TAGS} tags",
    "priority": lambda value: f"must be {_PRIORITY_WORDS}, got {value!r}",
}
"""The message of a fault at each top-level field, given the value that was sent."""


def _field_fault(error: Any) -> dict[str, str]:
    """A pydantic error as a fault at the request's own path, worded for a person."""
    loc, value = error["loc"], error.get("input")
    field = str(loc[0]) if loc else ""
    if error["type"] == "extra_forbidden":
        return {"path": field, "message": f"unknown key; a sweep has {', '.join(SweepRequest.model_fields)}"}
    if field == "vary" and len(loc) > 1:
        return {"path": f"vary.{loc[1]}", "message": "must be a non-empty list of values"}
    if field == "tags" and len(loc) > 1:
        return {"path": f"tags[{loc[1]}]", "message": f"{tag_problem(value) or error['msg']}, got {value!r}"}
    message = _FIELD_MESSAGES.get(field)
    return {"path": field, "message": message(value) if message else error["msg"]}


def parse_request(body: dict[str, Any], settings: Settings) -> SweepRequest:
    """Check a sweep request's own fields (not the combined documents).

    Raises ``InvalidDocument`` listing every fault, or ``TooLarge`` when it
    expands past ``sweep_max_combinations`` or ``sweep_max_documents_mb``.
    """
    try:
        request = SweepRequest.model_validate(body)
    except ValidationError as exc:
        faults = {(f["path"], f["message"]): f for f in map(_field_fault, exc.errors())}
        raise InvalidDocument(list(faults.values())) from None
    faults = request.faults()
    if faults:
        raise InvalidDocument(faults)
    request = request.canonical()
    _check_size(request, settings)
    return request


def _check_size(request: SweepRequest, settings: Settings) -> None:
    if request.count > settings.sweep_max_combinations:
        raise TooLarge.at(
            "vary",
            f"this sweep has {request.count:,} combinations, over the cap sweep_max_combinations = "
            f"{settings.sweep_max_combinations:,}; vary fewer values, or split it into several sweeps",
        )
    total_mb = request.count * len(orjson.dumps(request.base)) / 2**20
    if total_mb > settings.sweep_max_documents_mb:
        raise TooLarge.at(
            "base",
            f"{request.count:,} copies of this base document take about {total_mb:,.0f} MiB, over the cap "
            f"sweep_max_documents_mb = {settings.sweep_max_documents_mb:g} MiB; vary fewer values or pack the arrays",
        )


def _structure_fault(base: Any, segments: Segments) -> str | None:
    """Why ``segments`` cannot be set in ``base`` (None: it can)."""
    node = base
    for depth, segment in enumerate(segments):
        where = join_path(*segments[:depth]) or "the document"
        if isinstance(segment, int):
            if not isinstance(node, list):
                return f"{where} is not a list in the base, so it has no [{segment}]"
            if segment >= len(node):
                return f"{where} has {len(node)} items in the base, so it has no [{segment}]"
            node = node[segment]
            continue
        if node is None:
            return None if all(isinstance(s, str) for s in segments[depth:]) else (
                f"{join_path(*segments[: depth + 1])} is not in the base, so it has no list to index"
            )
        if not isinstance(node, dict):
            return f"{where} is not an object in the base, so it has no key {segment!r}"
        node = node.get(segment)
    return None


def _with_value(node: Any, segments: Segments, value: Any) -> Any:
    """A copy of ``node`` with ``value`` at ``segments``; only the containers on the path are copied."""
    head, rest = segments[0], segments[1:]
    copy: Any = list(node) if isinstance(head, int) else dict(node or {})
    if not rest:
        copy[head] = value
    else:
        child = copy[head] if isinstance(head, int) else copy.get(head)
        copy[head] = _with_value(child, rest, value)
    return copy


def _text(value: Any) -> str | None:
    return value if isinstance(value, str) else None


def _job_label(prefix: str, values: dict[str, Any]) -> str:
    def shown(value: Any) -> str:
        text = orjson.dumps(value).decode()
        return text if len(text) <= VALUE_IN_LABEL_CHARS else text[: VALUE_IN_LABEL_CHARS - 1] + "…"

    label = f"{prefix} · " + ", ".join(f"{path}={shown(value)}" for path, value in values.items())
    return label if len(label) <= MAX_LABEL_CHARS else label[: MAX_LABEL_CHARS - 1] + "…"


def _job_tags(base_tags: Any, sweep_tags: Sequence[str], sweep_id: str) -> Any:
    if base_tags is not None and not (isinstance(base_tags, list) and all(isinstance(t, str) for t in base_tags)):
        return base_tags  # admission names the fault at `tags`
    return list(dict.fromkeys([*(base_tags or []), *sweep_tags, sweep_tag(sweep_id)]))
