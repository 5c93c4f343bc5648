"""Parameter sweeps: one base document × values of some of its fields → many jobs, one table.

The request (``POST /v1/sweeps``)
---------------------------------
::

    {"base": DOCUMENT,
     "vary": {"discount": [0.94, 0.95, 0.96], "model.params.gamma": [1.5, 2, 3]},
     "mode": "product" | "zip",          default product
     "chain": false | true,              default false
     "label": TEXT, "tags": [TAG, ...], "priority": "high" | "normal" | "low"}

*Paths* are dotted keys with list indices in brackets, as in error paths:
``discount``, ``model.params.gamma``, ``model.states.k.points``,
``model.feasible[0]``, ``solver.tolerance``.  A missing key is created (with
the objects on its way); a list index must exist in the base.  Keys that
contain ``.``, ``[`` or ``]`` cannot be named.  ``label``, ``tags``,
``priority`` and ``notify`` belong to the whole sweep and cannot vary; with
``chain``, neither can ``solver.initial``.  No path may lie inside another.
A value may be any JSON value (a number, a string, a whole object).

*Combinations*: ``product`` takes every combination of the lists, numbered in
C order of the ``vary`` keys (the last key varies fastest); ``zip`` takes the
i-th value of every list, which must all have the same length.  At most
``sweep_max_combinations`` combinations, and combinations × the base's JSON
size at most ``sweep_max_documents_mb`` (else 413, naming the setting).

*Admission*: every combination's document passes the same door as a single
job (``service.submission.admit_submission``) before any job is created; if
any is refused, none is, and the 422 lists each fault once, at
``vary.<path>[i]`` when the fault lies at or under a varied path (its message
starting with the inner path), else at ``base.<inner path>``, with the
combinations it hit.  A ``base.notify.url`` is checked once.

Each job is the base with the combination's values, ``priority`` the sweep's
(else the base's), ``tags`` the base's plus the sweep's plus
``sweep:{sweep id}`` (so ``GET /v1/jobs?tag=sweep:{id}`` lists them), and a
label naming the combination.

Chains
------
With ``chain: true`` each combination except the first warm-starts from a
neighbour one step back along one axis: its predecessor is the combination
with its *last non-zero* axis index decreased by one (``zip``: the previous
combination).  For the vary above, (0.95, 3) starts from (0.95, 2), (0.95,
1.5) from (0.94, 1.5), and (0.94, 1.5) from its base's ``solver.initial``:
a tree rooted at combination 0 whose branches run in parallel.

A job that must wait for its predecessor is not created until the
predecessor has finished: rows then show ``state: "waiting"`` and no job.
When a sweep job finishes, the worker (``service.lifecycle``) creates the
combinations that start from it, with ``solver.initial: {"job": ID}`` when it
is ``done`` and its result still stored, else with the base's
``solver.initial`` (a failed or canceled predecessor does not fail the rest
of the chain).  Creation is claimed per
row (``SET NX PX``) and reading a sweep repeats it for any row whose
predecessor has finished without a successor, so a worker dying between the
two does not stall the chain.  fixq's own reaper re-enqueues any ``queued``
job that sits in no RQ queue, which rules out RQ's ``depends_on`` (deferred
jobs sit in no queue).

Keys (prefix ``fixq``)
----------------------
================================  ======  ===========================================
``fixq:sweep:{id}``               hash    ``record`` (JSON), ``owner``, ``stationary``
                                          ("1" when some combination reports it),
                                          ``canceled_at``
``fixq:sweep:{id}:base``          string  the base document, zlib-compressed JSON
``fixq:sweep:{id}:jobs``          hash    combination index → job id
``fixq:sweep:{id}:means``         hash    combination index → stationary means (JSON)
``fixq:sweep:{id}:errors``        hash    combination index → why its job was not created
``fixq:sweep:{id}:claim:{i}``     string  a short-lived claim on creating row ``i``'s job
``fixq:sweep:{id}:door``          string  present while ``POST`` is still creating the first jobs
``fixq:sweepjob:{job id}``        string  ``{sweep id}:{index}`` of a sweep's job
``fixq:sweeps``                   zset    sweep ids by creation time (ms)
``fixq:sweeps:owner:{owner}``     zset    the same per owner
``fixq:sweepidem:{owner}:{h}``    string  sweep id of an Idempotency-Key
================================  ======  ===========================================
"""

from __future__ import annotations

import base64
import functools
import hashlib
import itertools
import math
import re
import secrets
import time
import zlib
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from datetime import datetime, timezone
from typing import Any

import orjson
import redis

from service import webhooks
from service.limits import ActiveJobs, Quota, Reservation, check_problem_size
from worker.document.schema import MAX_LABEL_CHARS, MAX_TAGS, SUBMISSION_KEYS
from service.settings import Settings
from service.store import TERMINAL_STATES, JobStore, is_job_id
from service.submission import Submitter, admit_submission, admitted_summary, create_submitted_job
from worker.errors import FixqError, InvalidDocument, TooLarge, join_path

__all__ = [
    "CLAIM_MS",
    "MODES",
    "ROW_STATES",
    "Sweep",
    "SweepRequest",
    "cancel_sweep",
    "create_sweep",
    "job_finished",
    "list_sweeps",
    "load_sweep",
    "parse_path",
    "parse_request",
    "sweep_tag",
    "sweep_view",
]

MODES = ("product", "zip")
ROW_STATES = ("waiting", "queued", "running", "done", "failed", "canceled")
"""States of a row: a job's state, or ``waiting`` while its chain predecessor runs."""
CLAIM_MS = 60_000
"""Milliseconds a claim on creating one row's job lasts; a creator that died loses it then."""
DOOR_RENEW_EVERY = 200
"""Jobs the door creates between two renewals of its marker ``fixq:sweep:{id}:door`` (count), which
lasts ``CLAIM_MS``: while it lives, reading the sweep leaves the first jobs to the door."""
MAX_REPORTED = 100
"""Most distinct faults listed when combinations are refused (count)."""
VALUE_IN_LABEL_CHARS = 40
"""Longest rendering of one value in a job's label (characters)."""

_REQUEST_KEYS = ("base", "vary", "mode", "chain", "label", "tags", "priority")
_PRIORITIES = ("high", "normal", "low")
_TAG = re.compile(r"[A-Za-z0-9_.:-]{1,64}")
_SEGMENT = re.compile(r"([^.\[\]]+)|\[(\d+)\]")

Segments = tuple[str | int, ...]


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


@dataclass(frozen=True)
class SweepRequest:
    """A checked sweep request: the base, the varied paths and values, and how they combine."""

    base: dict[str, Any]
    paths: tuple[str, ...]
    segments: tuple[Segments, ...]
    values: tuple[list[Any], ...]
    mode: str = "product"
    chain: bool = False
    label: str | None = None
    tags: tuple[str, ...] = ()
    priority: str | None = None
    shape: tuple[int, ...] = field(init=False)
    count: int = field(init=False)

    def __post_init__(self) -> None:
        shape = tuple(len(v) for v in self.values)
        object.__setattr__(self, "shape", shape)
        object.__setattr__(self, "count", math.prod(shape) if self.mode == "product" else (shape[0] if shape else 0))

    def value_indices(self, index: int) -> tuple[int, ...]:
        """Index into each path's list of combination ``index``."""
        if self.mode == "zip":
            return (index,) * len(self.paths)
        out = []
        for size in reversed(self.shape):
            index, position = divmod(index, size)
            out.append(position)
        return tuple(reversed(out))

    def values_of(self, index: int) -> dict[str, Any]:
        """``{path: value}`` of combination ``index``."""
        return {p: v[i] for p, v, i in zip(self.paths, self.values, self.value_indices(index))}

    def predecessor(self, index: int) -> int | None:
        """The combination ``index`` warm-starts from when chained (None for the first)."""
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
            "priority": self.priority or _text(self.base.get("priority")) or "normal",
            "mode": self.mode,
            "chain": self.chain,
            "vary": dict(zip(self.paths, self.values)),
            "combinations": self.count,
        }

    @classmethod
    def from_record(cls, record: dict[str, Any], base: dict[str, Any]) -> SweepRequest:
        """Rebuild the request of a stored sweep."""
        paths = tuple(record["vary"])
        return cls(
            base=base,
            paths=paths,
            segments=tuple(parse_path(p) for p in paths),
            values=tuple(record["vary"][p] for p in paths),
            mode=record["mode"],
            chain=record["chain"],
            label=record.get("sweep_label"),
            tags=tuple(record.get("tags") or ()),
            priority=record.get("sweep_priority"),
        )


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


def sweep_tag(sweep_id: str) -> str:
    """The tag every job of a sweep carries."""
    return f"sweep:{sweep_id}"


def parse_request(body: dict[str, Any], settings: Settings) -> SweepRequest:
    """Check a sweep request's own fields (not the combined documents).

    Raises ``InvalidDocument`` listing every fault, or ``TooLarge`` when it
    expands past ``sweep_max_combinations`` or ``sweep_max_documents_mb``.
    """
    faults: list[dict[str, str]] = []

    def fault(path: str, message: str) -> None:
        faults.append({"path": path, "message": message})

    for key in body:
        if key not in _REQUEST_KEYS:
            fault(key, f"unknown key; a sweep has {', '.join(_REQUEST_KEYS)}")
    base = body.get("base")
    if not isinstance(base, dict):
        fault("base", "required: the problem document that every combination starts from (a JSON object)")
    mode = body.get("mode", "product")
    if mode not in MODES:
        fault("mode", f'must be "product" (every combination, the default) or "zip" (the i-th of each), got {mode!r}')
    chain = body.get("chain", False)
    if not isinstance(chain, bool):
        fault("chain", f"must be true or false, got {chain!r}")
    label = body.get("label")
    if label is not None and not (isinstance(label, str) and len(label) <= MAX_LABEL_CHARS):
        fault("label", f"must be a text of at most {MAX_LABEL_CHARS} characters")
    tags = body.get("tags", [])
    if not isinstance(tags, list) or len(tags) > MAX_TAGS:
        fault("tags", f"must be a list of at most {MAX_TAGS} tags")
        tags = []
    for i, tag in enumerate(tags):
        if not (isinstance(tag, str) and _TAG.fullmatch(tag)):
            fault(f"tags[{i}]", f"a tag must be 1 to 64 characters of letters, digits and _ . : -, got {tag!r}")
    priority = body.get("priority")
    if priority is not None and priority not in _PRIORITIES:
        fault("priority", f'must be "high", "normal" or "low", got {priority!r}')
    paths, segments, values = _check_vary(body.get("vary"), base, chain is True, fault)
    base_tags = base.get("tags", []) if isinstance(base, dict) else None
    texts = isinstance(base_tags, list) and all(isinstance(t, str) for t in [*base_tags, *tags])
    if texts:
        total = len(dict.fromkeys([*base_tags, *tags])) + 1
        if total > MAX_TAGS:
            fault("tags", f"the jobs would carry {total} tags (the base's, the sweep's, sweep:ID); at most {MAX_TAGS}")
    if mode == "zip" and len({len(v) for v in values}) > 1:
        lengths = ", ".join(f"{p}: {len(v)}" for p, v in zip(paths, values))
        fault("vary", f'with mode "zip" every list needs the same length; got {lengths}')
    if faults:
        raise InvalidDocument(faults)
    request = SweepRequest(base, paths, segments, values, mode, chain, label, tuple(tags), priority)
    _check_size(request, settings)
    return request


def _check_vary(
    vary: Any, base: Any, chain: bool, fault: Callable[[str, str], None]
) -> tuple[tuple[str, ...], tuple[Segments, ...], tuple[list[Any], ...]]:
    if not isinstance(vary, dict) or not vary:
        fault("vary", 'required: an object of path → list of values, e.g. {"discount": [0.94, 0.95]}')
        return (), (), ()
    paths: list[str] = []
    parsed: list[Segments] = []
    lists: list[list[Any]] = []
    for text, values in vary.items():
        where = f"vary.{text}"
        try:
            segments = parse_path(text)
        except ValueError as exc:
            fault(where, str(exc))
            continue
        path = join_path(*segments)
        if segments[0] in SUBMISSION_KEYS:
            fault(where, f"{segments[0]} is set for the whole sweep and cannot vary")
        elif chain and segments[:2] in (("solver",), ("solver", "initial")):
            fault(where, "with chain, solver.initial is set by the chain and cannot vary")
        elif isinstance(base, dict) and (problem := _structure_fault(base, segments)) is not None:
            fault(where, problem)
        for other in parsed:
            shorter = min(len(other), len(segments))
            if other[:shorter] == segments[:shorter]:
                fault(where, f"overlaps the varied path {join_path(*other)}; one path may not lie inside another")
        if not isinstance(values, list) or not values:
            fault(where, "must be a non-empty list of values")
            values = [None]
        paths.append(path)
        parsed.append(segments)
        lists.append(values)
    return tuple(paths), tuple(parsed), tuple(lists)


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


@dataclass
class _Faults:
    """Faults of refused combinations, each kept once with the combinations it hit."""

    request: SweepRequest
    seen: dict[tuple[str, str, str], list[int]] = field(default_factory=dict)
    too_large_only: bool = True

    def add(self, index: int, exc: FixqError) -> None:
        self.too_large_only &= isinstance(exc, TooLarge)
        picks = self.request.value_indices(index)
        for error in exc.errors:
            inner = error["path"]
            outer = next(
                (f"vary.{p}[{i}]" for p, i in zip(self.request.paths, picks)
                 if inner == p or inner.startswith((p + ".", p + "["))),
                join_path("base", inner),
            )  # fmt: skip
            self.seen.setdefault((outer, inner, error["message"]), []).append(index)

    def add_base(self, exc: FixqError) -> None:
        self.too_large_only = False
        for error in exc.errors:
            self.seen.setdefault((join_path("base", error["path"]), "", error["message"]), []).append(-1)

    def raise_if_any(self) -> None:
        if not self.seen:
            return
        faults = []
        for (outer, inner, message), hits in itertools.islice(self.seen.items(), MAX_REPORTED):
            text = f"{inner}: {message}" if inner and outer.startswith("vary.") else message
            if hits != [-1]:
                first = self.request.values_of(hits[0])
                shown = ", ".join(f"{p}={orjson.dumps(v).decode()[:VALUE_IN_LABEL_CHARS]}" for p, v in first.items())
                text += f" (in {len(hits)} of {self.request.count} combinations; first #{hits[0]}: {shown})"
            faults.append({"path": outer, "message": text})
        if len(self.seen) > MAX_REPORTED:
            faults.append({"path": "", "message": f"and {len(self.seen) - MAX_REPORTED} more faults"})
        raise (TooLarge if self.too_large_only else InvalidDocument)(faults)


class _Keys:
    def __init__(self, store: JobStore, sweep_id: str) -> None:
        self.sweep = store.key("sweep", sweep_id)
        self.base = f"{self.sweep}:base"
        self.jobs = f"{self.sweep}:jobs"
        self.means = f"{self.sweep}:means"
        self.errors = f"{self.sweep}:errors"
        self.door = f"{self.sweep}:door"
        self._store = store

    def claim(self, index: int) -> str:
        return f"{self.sweep}:claim:{index}"

    def job_link(self, job_id: str) -> str:
        return self._store.key("sweepjob", job_id)


def _index_key(store: JobStore, owner: str | None) -> str:
    return store.key("sweeps", "owner", owner) if owner is not None else store.key("sweeps")


@dataclass
class Sweep:
    """A stored sweep: its public record and what bookkeeping needs."""

    store: JobStore
    record: dict[str, Any]
    stationary: bool
    canceled_at: str | None
    _request: SweepRequest | None = None

    @property
    def id(self) -> str:
        return self.record["id"]

    @property
    def owner(self) -> str:
        return self.record["owner"]

    @property
    def keys(self) -> _Keys:
        return _Keys(self.store, self.id)

    @functools.cached_property
    def plan(self) -> SweepRequest:
        """The request without its base document: values, combinations and chains."""
        return self._request or SweepRequest.from_record(self.record, {})

    def request(self) -> SweepRequest:
        """The whole request, the base document read from Redis on first use."""
        if self._request is None:
            blob = self.store.redis.get(self.keys.base)
            if blob is None:
                raise InvalidDocument.at("base", f"the base document of sweep {self.id} is missing from Redis")
            self._request = SweepRequest.from_record(self.record, orjson.loads(zlib.decompress(blob)))
        return self._request

    def may_see(self, record: dict[str, Any]) -> bool:
        """True for the records of this sweep's owner (the warm starts its chains may use)."""
        return record.get("owner") == self.owner

    def public(self) -> dict[str, Any]:
        """The record as the API shows it (without rows)."""
        out = {k: v for k, v in self.record.items() if not k.startswith("sweep_")}
        out["canceled_at"] = self.canceled_at
        return out


def load_sweep(store: JobStore, sweep_id: str) -> Sweep | None:
    """The stored sweep ``sweep_id``, or None (also for a malformed id, without touching Redis)."""
    if not is_job_id(sweep_id):
        return None
    raw = store.redis.hmget(store.key("sweep", sweep_id), "record", "stationary", "canceled_at")
    if raw[0] is None:
        return None
    return Sweep(store, orjson.loads(raw[0]), raw[1] == b"1", raw[2].decode() if raw[2] else None)


def create_sweep(
    body: dict[str, Any],
    caller: Submitter,
    store: JobStore,
    settings: Settings,
    *,
    idempotency_key: str | None = None,
    quota: Quota | None = None,
) -> Sweep:
    """Check and admit every combination, store the sweep, and create its first jobs.

    With a ``quota`` (the caller's per-key caps), every combination must fit
    the key's memory cap (413) and the jobs created now take slots of its
    active-job caps (429), exactly as single submissions do.  Jobs a chain
    creates later, when their predecessor finishes, are not counted.

    Raises ``InvalidDocument`` or ``TooLarge`` (nothing stored) when any part is refused.
    With an ``idempotency_key`` the same owner already used within
    ``idempotency_ttl_s``, that earlier sweep is returned and nothing is created.
    """
    idem = None
    if idempotency_key is not None:
        idem = store.key("sweepidem", caller.owner, hashlib.sha256(idempotency_key.encode()).hexdigest())
        earlier = load_sweep(store, (store.redis.get(idem) or b"").decode())
        if earlier is not None:
            return earlier
    request = parse_request(body, settings)
    sweep_id = secrets.token_hex(8)
    faults = _Faults(request)
    notify = request.base.get("notify")
    if isinstance(notify, dict) and isinstance(notify.get("url"), str):
        try:
            webhooks.check_target(notify["url"], settings, path="notify.url")
        except InvalidDocument as exc:
            faults.add_base(exc)
    prepared: dict[int, dict[str, Any]] = {}
    stationary = False
    high = False
    first_jobs = range(request.count) if not request.chain else [0]
    for index in range(request.count):
        raw = request.document(index, sweep_id=sweep_id)
        try:
            admitted = admit_submission(raw, settings, store, may_see=caller.may_see, check_notify=False)
        except FixqError as exc:
            faults.add(index, exc)
            continue
        stationary = stationary or admitted.document.report.stationary
        high = high or admitted.document.priority == "high"
        if quota is not None:
            check_problem_size(quota, admitted.estimate)
        if not faults.seen and (not request.chain or index == 0):
            prepared[index] = admitted_summary(admitted)
    faults.raise_if_any()
    active = ActiveJobs(store.redis, settings.redis_prefix)
    reservation = active.reserve(quota, high=high, count=len(first_jobs)) if quota is not None else None
    if idem is not None:
        if not store.redis.set(idem, sweep_id, nx=True, ex=settings.idempotency_ttl_s):
            earlier = load_sweep(store, (store.redis.get(idem) or b"").decode())
            if earlier is not None:
                if reservation is not None:
                    active.release(reservation)
                return earlier
    sweep = _store_sweep(store, sweep_id, caller.owner, request, stationary)
    created: list[str] = []
    try:
        for index in first_jobs:
            if index % DOOR_RENEW_EVERY == 0:
                store.redis.set(sweep.keys.door, "1", px=CLAIM_MS)
            job_id = _ensure_job(sweep, index, prepared=prepared.get(index))
            if job_id is not None:
                created.append(job_id)
        store.redis.delete(sweep.keys.door)
        if reservation is not None:
            active.bind(reservation, created)
    except redis.RedisError:
        # Nothing half-done: what was created is canceled, then the 503 is answered.
        try:
            cancel_sweep(sweep)
        except redis.RedisError:
            pass
        raise
    return sweep


def _store_sweep(store: JobStore, sweep_id: str, owner: str, request: SweepRequest, stationary: bool) -> Sweep:
    now_ms = int(time.time() * 1000)
    record = {
        "id": sweep_id,
        "owner": owner,
        **request.record_fields(),
        "tag": sweep_tag(sweep_id),
        "created_at": _iso(now_ms / 1000),
        "links": {
            "self": f"/v1/sweeps/{sweep_id}",
            "csv": f"/v1/sweeps/{sweep_id}?format=csv",
            "jobs": f"/v1/jobs?tag=sweep:{sweep_id}",
        },
        "sweep_label": request.label,
        "sweep_priority": request.priority,
    }
    keys = _Keys(store, sweep_id)
    with store.redis.pipeline(transaction=True) as pipe:
        pipe.set(keys.base, zlib.compress(orjson.dumps(request.base), 1))
        pipe.hset(keys.sweep, mapping={"record": orjson.dumps(record), "owner": owner, "stationary": int(stationary)})
        pipe.zadd(_index_key(store, None), {sweep_id: now_ms})
        pipe.zadd(_index_key(store, owner), {sweep_id: now_ms})
        pipe.execute()
    return Sweep(store, record, stationary, None, request)


def _ensure_job(sweep: Sweep, index: int, *, prepared: dict[str, Any] | None = None) -> str | None:
    """Create the job of row ``index`` unless it exists or another creator holds the claim.

    Returns the new job id, or None when nothing was created.
    """
    store, keys = sweep.store, sweep.keys
    if store.redis.hexists(keys.jobs, index):
        return None
    if not store.redis.set(keys.claim(index), secrets.token_hex(4), nx=True, px=CLAIM_MS):
        return None
    try:
        if store.redis.hexists(keys.jobs, index):
            return None
        request = sweep.request()
        initial = _warm_start_from(sweep, index)
        raw = request.document(index, sweep_id=sweep.id, initial=initial)
        if prepared is None or initial is not None:
            try:
                prepared = _readmit(sweep, raw)
            except FixqError:
                if initial is None:
                    raise
                # The predecessor's result is gone: start as the base says instead.
                raw = request.document(index, sweep_id=sweep.id)
                prepared = _readmit(sweep, raw)
        record = create_submitted_job(raw, store, owner=sweep.owner, **prepared)
        # Counted among the owner's active jobs, so later submissions see it under their caps
        # (a chain's successor is made when its predecessor ends, past the door's reservation).
        active = ActiveJobs(store.redis, store.settings.redis_prefix)
        active.bind(Reservation(sweep.owner, raw.get("priority") == "high", member=""), [record["id"]])
    except FixqError as exc:
        error = {"title": exc.title, "detail": exc.detail, "errors": exc.errors}
        store.redis.hset(keys.errors, index, orjson.dumps(error))
        return None
    finally:
        store.redis.delete(keys.claim(index))
    job_id = record["id"]
    with store.redis.pipeline(transaction=True) as pipe:
        pipe.hset(keys.jobs, index, job_id)
        pipe.set(keys.job_link(job_id), f"{sweep.id}:{index}")
        pipe.hget(keys.sweep, "canceled_at")
        canceled = pipe.execute()[-1]
    if canceled is not None:
        # The sweep was canceled while this job was being created.
        _cancel_job(store, job_id)
    return job_id


def _readmit(sweep: Sweep, raw: dict[str, Any]) -> dict[str, Any]:
    settings = sweep.store.settings
    admitted = admit_submission(raw, settings, sweep.store, may_see=sweep.may_see, check_notify=False)
    return admitted_summary(admitted)


def _warm_start_from(sweep: Sweep, index: int) -> dict[str, str] | None:
    if not sweep.plan.chain:
        return None
    before = sweep.plan.predecessor(index)
    if before is None:
        return None
    store = sweep.store
    job_id = store.redis.hget(sweep.keys.jobs, before)
    if job_id is None:
        return None
    state = store.redis.hget(store.keys.job(job_id.decode()), "state")
    return {"job": job_id.decode()} if state == b"done" else None


def _cancel_job(store: JobStore, job_id: str) -> str | None:
    outcome = store.request_cancel(job_id)
    if outcome is None:
        return None
    if outcome["outcome"] == "canceled":
        # Canceled in its queue, so no worker will see it finish: notify here.
        webhooks.schedule(store, job_id)
    return outcome["outcome"]


def job_finished(store: JobStore, job_id: str) -> None:
    """Bookkeeping once a sweep's job reached a terminal state: keep its means, start its chain successors."""
    link = store.redis.get(store.key("sweepjob", job_id))
    if link is None:
        return
    sweep_id, _, index_text = link.decode().partition(":")
    sweep = load_sweep(store, sweep_id)
    if sweep is None:
        return
    index = int(index_text)
    state = store.redis.hget(store.keys.job(job_id), "state")
    if state == b"done" and sweep.stationary:
        _means(sweep, {index: job_id}, {index: "done"})
    if sweep.plan.chain and sweep.canceled_at is None:
        for successor in sweep.plan.successors(index):
            _ensure_job(sweep, successor)


def _means(sweep: Sweep, jobs: dict[int, str], states: dict[int, str]) -> dict[int, Any]:
    """Stationary means of the ``done`` rows among ``jobs``, cached in ``fixq:sweep:{id}:means``."""
    store, key = sweep.store, sweep.keys.means
    indices = list(jobs)
    cached = dict(zip(indices, store.redis.hmget(key, indices))) if indices else {}
    out: dict[int, Any] = {}
    for index, blob in cached.items():
        if blob is not None:
            out[index] = orjson.loads(blob)
        elif sweep.stationary and states.get(index) == "done":
            result = store.get_result(jobs[index])
            if result is None:
                continue
            stationary = result.get("stationary")
            means = stationary.get("means") if isinstance(stationary, dict) else None
            store.redis.hset(key, index, orjson.dumps(means))
            out[index] = means
    return out


def _row_states(sweep: Sweep) -> tuple[dict[int, str], dict[int, str]]:
    """(index → job id, index → state) of the rows that have a job."""
    store = sweep.store
    jobs = {int(k): v.decode() for k, v in store.redis.hgetall(sweep.keys.jobs).items()}
    order = list(jobs)
    with store.redis.pipeline(transaction=False) as pipe:
        for index in order:
            pipe.hget(store.keys.job(jobs[index]), "state")
        states = pipe.execute()
    return jobs, {index: (s.decode() if s else "failed") for index, s in zip(order, states)}


def _reconcile(sweep: Sweep, jobs: dict[int, str], states: dict[int, str]) -> bool:
    """Create the jobs of rows whose predecessor finished without starting them; True if any was."""
    plan = sweep.plan
    if sweep.canceled_at is not None or len(jobs) >= plan.count or sweep.store.redis.exists(sweep.keys.door):
        return False
    errors = {int(k) for k in sweep.store.redis.hkeys(sweep.keys.errors)}
    created = False
    for index in range(plan.count):
        if index in jobs or index in errors:
            continue
        before = plan.predecessor(index) if plan.chain else None
        if before is None or states.get(before) in TERMINAL_STATES:
            created |= _ensure_job(sweep, index) is not None
    return created


def sweep_view(sweep: Sweep, *, cursor: int = 0, limit: int | None = 100) -> dict[str, Any]:
    """The sweep record with ``state``, ``counts`` and a page of ``rows`` (``limit=None``: all rows).

    ``state`` is ``canceled`` once the sweep was canceled, ``finished`` when
    every row is done, failed or canceled, else ``active``.  ``rows`` is
    ``{"data": [...], "next": index of the next page or null}``; a row is
    ``{"index", "values", "job", "state", "status", "iterations",
    "error_bound", "means", "error", "after"}``.
    """
    jobs, states = _row_states(sweep)
    if _reconcile(sweep, jobs, states):
        jobs, states = _row_states(sweep)
    total = sweep.record["combinations"]
    errors = {int(k): orjson.loads(v) for k, v in sweep.store.redis.hgetall(sweep.keys.errors).items()}

    def row_state(index: int) -> str:
        if index in states:
            return states[index]
        if index in errors:
            return "failed"
        return "canceled" if sweep.canceled_at is not None else "waiting"

    counts = dict.fromkeys(ROW_STATES, 0)
    for index in range(total):
        counts[row_state(index)] += 1
    if sweep.canceled_at is not None:
        state = "canceled"
    else:
        state = "finished" if counts["waiting"] + counts["queued"] + counts["running"] == 0 else "active"
    end = total if limit is None else min(total, cursor + limit)
    page = range(min(cursor, total), end)
    rows = _rows(sweep, page, jobs, states, errors, row_state)
    next_row = end if end < total else None
    return {**sweep.public(), "state": state, "counts": counts, "rows": {"data": rows, "next": next_row}}


def _rows(
    sweep: Sweep,
    page: range,
    jobs: dict[int, str],
    states: dict[int, str],
    errors: dict[int, Any],
    row_state: Callable[[int], str],
) -> list[dict[str, Any]]:
    store, plan = sweep.store, sweep.plan
    on_page = [i for i in page if i in jobs]
    with store.redis.pipeline(transaction=False) as pipe:
        for index in on_page:
            pipe.hmget(store.keys.job(jobs[index]), "status", "iterations", "error_bound", "error")
        fields = dict(zip(on_page, pipe.execute()))
    means = _means(sweep, {i: jobs[i] for i in on_page}, states)
    rows = []
    for index in page:
        status, iterations, error_bound, error = fields.get(index, (None, None, None, None))
        rows.append({
            "index": index,
            "values": plan.values_of(index),
            "job": jobs.get(index),
            "state": row_state(index),
            "status": status.decode() if status else None,
            "iterations": orjson.loads(iterations) if iterations else None,
            "error_bound": orjson.loads(error_bound) if error_bound else None,
            "means": means.get(index),
            "error": orjson.loads(error) if error else errors.get(index),
            "after": plan.predecessor(index) if plan.chain else None,
        })  # fmt: skip
    return rows


def cancel_sweep(sweep: Sweep) -> dict[str, int]:
    """Cancel every unfinished job of the sweep and create no more; counts of what happened.

    Returns ``{"canceled": n, "cancel_requested": n}``: jobs canceled in their
    queue, and running jobs asked to stop at their next sweep.
    """
    store = sweep.store
    now = _iso(time.time())
    store.redis.hsetnx(sweep.keys.sweep, "canceled_at", now)
    sweep.canceled_at = (store.redis.hget(sweep.keys.sweep, "canceled_at") or now.encode()).decode()
    jobs, states = _row_states(sweep)
    outcomes = {"canceled": 0, "cancel_requested": 0}
    for index, job_id in jobs.items():
        if states[index] in TERMINAL_STATES:
            continue
        outcome = _cancel_job(store, job_id)
        if outcome in outcomes:
            outcomes[outcome] += 1
    return outcomes


def list_sweeps(
    store: JobStore, *, owner: str | None = None, cursor: str | None = None, limit: int = 50
) -> tuple[list[dict[str, Any]], str | None]:
    """A page of sweep records (without rows), newest first, and the cursor of the next page.

    ``owner=None`` lists every owner's sweeps.  ``ValueError`` for a malformed cursor.
    """
    index = _index_key(store, owner)
    max_score: float | str = "+inf"
    skip: bytes | None = None
    if cursor:
        max_score, skip = _decode_cursor(cursor)
    page: list[tuple[bytes, float]] = []
    offset = 0
    while len(page) <= limit:
        batch = store.redis.zrevrangebyscore(index, max_score, "-inf", start=offset, num=limit + 1, withscores=True)
        if not batch:
            break
        offset += len(batch)
        for member, score in batch:
            # Ties come in reverse member order; skip those the last page already gave.
            if skip is not None and score == max_score and member >= skip:
                continue
            page.append((member, score))
    more = len(page) > limit
    page = page[:limit]
    records = []
    for member, _ in page:
        sweep = load_sweep(store, member.decode())
        if sweep is not None:
            records.append(sweep.public())
    return records, _encode_cursor(*page[-1]) if more and page else None


def _encode_cursor(member: bytes, score: float) -> str:
    return base64.urlsafe_b64encode(b"%d:%s" % (int(score), member)).decode().rstrip("=")


def _decode_cursor(cursor: str) -> tuple[float, bytes]:
    try:
        raw = base64.urlsafe_b64decode(cursor + "=" * (-len(cursor) % 4))
        score, member = raw.split(b":", 1)
        if not is_job_id(member.decode()):
            raise ValueError
        return float(int(score)), member
    except (ValueError, UnicodeDecodeError):
        raise ValueError(f"malformed cursor {cursor!r}") from None


def _iso(seconds: float) -> str:
    return datetime.fromtimestamp(seconds, timezone.utc).isoformat(timespec="milliseconds").replace("+00:00", "Z")

