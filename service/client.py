"""A small Python client for the fixq HTTP API (the CLI is built on it).

>>> with FixqClient("http://127.0.0.1:8000") as fixq:      # doctest: +SKIP
...     job = fixq.submit(document)
...     record = fixq.wait(job["id"], on_progress=print)
...     result = fixq.result(job["id"])

Errors answered by the API raise :class:`APIError`, which carries the RFC 9457
problem body; a server that cannot be reached raises ``httpx.TransportError``.
"""

from __future__ import annotations

import json
import os
import time
from collections.abc import Callable, Iterator
from typing import Any

import httpx
import orjson

__all__ = ["DEFAULT_URL", "APIError", "FixqClient"]

DEFAULT_URL = "http://127.0.0.1:8000"
TERMINAL_STATES = frozenset({"done", "failed", "canceled"})
JSON_HEADERS = {"Content-Type": "application/json"}
RECONNECT_S = 1.0
"""Seconds to wait before re-opening a progress stream that broke."""
STREAM_SILENCE_S = 45.0
"""Seconds a live log may send nothing before it counts as broken: three of the API's keepalive intervals (15 s),
so a connection that died without closing (a dropped network, a suspended laptop) is re-opened, not waited on
for ever."""


class APIError(Exception):
    """Raised when the API answers with an error status.

    ``status`` is the HTTP status and ``problem`` the problem-details body
    (``type``, ``title``, ``detail`` and, for invalid documents, ``errors``);
    ``retry_after`` the seconds of a ``Retry-After`` header (429, 503), else None.
    """

    def __init__(self, status: int, problem: dict[str, Any], retry_after: float | None = None) -> None:
        self.status = status
        self.problem = problem
        self.retry_after = retry_after
        super().__init__(f"{status} {problem.get('title', 'error')}: {problem.get('detail', '')}".rstrip(": "))

    @property
    def errors(self) -> list[dict[str, str]]:
        """The ``{path, message}`` list of an invalid document (else empty)."""
        return list(self.problem.get("errors") or [])


class FixqClient:
    """Talks to one fixq API.

    Parameters
    ----------
    url : str, optional
        Base URL of the API; default ``FIXQ_URL`` or ``http://127.0.0.1:8000``.
    key : str, optional
        API key sent as ``Authorization: Bearer``; default ``FIXQ_KEY``.
    timeout_s : float
        Timeout of each request, in seconds.
    transport : httpx.BaseTransport, optional
        For tests (``httpx.MockTransport``, a WSGI/ASGI bridge).
    """

    def __init__(
        self,
        url: str | None = None,
        key: str | None = None,
        *,
        timeout_s: float = 30.0,
        transport: httpx.BaseTransport | None = None,
    ) -> None:
        self.url = (url or os.environ.get("FIXQ_URL") or DEFAULT_URL).rstrip("/")
        key = key if key is not None else os.environ.get("FIXQ_KEY")
        headers = {"Authorization": f"Bearer {key}"} if key else {}
        self._http = httpx.Client(base_url=self.url, headers=headers, timeout=timeout_s, transport=transport)

    def __enter__(self) -> FixqClient:
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.close()

    def close(self) -> None:
        """Close the connection pool."""
        self._http.close()

    def _request(self, method: str, path: str, **kwargs: Any) -> httpx.Response:
        response = self._http.request(method, path, **kwargs)
        if response.status_code >= 400:
            raise _api_error(response)
        return response

    def submit(
        self, document: dict[str, Any], *, idempotency_key: str | None = None, fresh: bool = False
    ) -> dict[str, Any]:
        """Queue a problem document; returns the job record (``id``, ``state``...).

        ``fresh=True`` solves again even when this key already solved the same document.
        """
        headers = {"Idempotency-Key": idempotency_key} if idempotency_key else None
        headers = {**JSON_HEADERS, **(headers or {})}
        params = {"fresh": "true"} if fresh else None
        return self._request("POST", "/v1/jobs", content=_encode(document), headers=headers, params=params).json()

    def check(self, document: dict[str, Any]) -> dict[str, Any]:
        """Validate a document and estimate its size, memory and time."""
        return self._request("POST", "/v1/check", content=_encode(document), headers=JSON_HEADERS).json()

    def status(self, job_id: str) -> dict[str, Any]:
        """The job record."""
        return self._request("GET", f"/v1/jobs/{job_id}").json()

    def result(self, job_id: str, *, format: str = "json") -> dict[str, Any] | str:
        """The result document (``format="json"``) or the long table (``"csv"``)."""
        response = self._request("GET", f"/v1/jobs/{job_id}/result", params={"format": format})
        return orjson.loads(response.content) if format == "json" else response.text

    def changes(self, job_id: str, *, since: str) -> dict[str, Any]:
        """What moved from job ``since`` (the older) to job ``job_id``: ``GET /v1/jobs/{id}/changes``."""
        return self._request("GET", f"/v1/jobs/{job_id}/changes", params={"since": since}).json()

    def log(self, job_id: str, *, cursor: int | None = None, limit: int | None = None) -> dict[str, Any]:
        """One page of the convergence log: ``{"data": [...], "next": cursor}``."""
        params = {k: v for k, v in {"cursor": cursor, "limit": limit}.items() if v is not None}
        return self._request("GET", f"/v1/jobs/{job_id}/log", params=params).json()

    def cancel(self, job_id: str) -> dict[str, Any]:
        """Ask for a queued or running job to stop; returns the job record."""
        return self._request("DELETE", f"/v1/jobs/{job_id}").json()

    def jobs(self, **filters: Any) -> dict[str, Any]:
        """One page of the job list (filters ``state``, ``tag``, ``label``, ``cursor``, ``limit``)."""
        params = {k: v for k, v in filters.items() if v is not None}
        return self._request("GET", "/v1/jobs", params=params).json()

    def health(self) -> dict[str, Any]:
        """``/healthz``: ``{"status": "ok", "redis": "ok"}`` when all is well."""
        return self._request("GET", "/healthz").json()

    def stream_log(self, job_id: str, *, after: int | None = None) -> Iterator[tuple[str, dict[str, Any]]]:
        """Follow the live log (SSE): yields ``("entry", entry)`` then ``("end", {"state": ...})``.

        Raises ``httpx.ReadTimeout`` when the stream sends nothing, not even a keepalive, for
        ``STREAM_SILENCE_S``. ``after`` is the last iteration already seen (sent as ``Last-Event-ID``).
        """
        headers = {"Accept": "text/event-stream"}
        if after is not None:
            headers["Last-Event-ID"] = str(after)
        timeout = httpx.Timeout(self._http.timeout.connect, read=STREAM_SILENCE_S)
        with self._http.stream("GET", f"/v1/jobs/{job_id}/log", headers=headers, timeout=timeout) as response:
            if response.status_code >= 400:
                response.read()
                raise _api_error(response)
            event, data = "message", []
            for line in response.iter_lines():
                if line == "":
                    if data:
                        yield event, json.loads("\n".join(data))
                    event, data = "message", []
                elif line.startswith("event:"):
                    event = line[6:].strip()
                elif line.startswith("data:"):
                    data.append(line[5:].lstrip())

    def wait(
        self,
        job_id: str,
        *,
        on_progress: Callable[[dict[str, Any]], None] | None = None,
        timeout_s: float | None = None,
        on_outage: Callable[[str], None] | None = None,
    ) -> dict[str, Any]:
        """Block until the job is done, failed or canceled; returns its final record.

        ``on_progress(entry)`` is called with each convergence-log entry
        (``iteration``, ``distance``, ``error_bound``...) as it is made.  A
        broken stream (the API restarted, Redis answered 503 for a while) is
        re-opened where it left off; ``on_outage(reason)`` is called once when
        the job record cannot be read (so a caller can say why it is waiting),
        and again only after it could be read in between.
        """
        deadline = None if timeout_s is None else time.monotonic() + timeout_s
        last_iteration: int | None = None
        in_outage = False
        while True:
            ended = False
            try:
                for event, data in self.stream_log(job_id, after=last_iteration):
                    if event == "entry":
                        last_iteration = data.get("iteration", last_iteration)
                        if on_progress is not None:
                            on_progress(data)
                    elif event == "end":
                        ended = True
                        break
                    if deadline is not None and time.monotonic() > deadline:
                        break
            except (httpx.TransportError, httpx.StreamError):
                pass
            except APIError as exc:
                if exc.status != 503:
                    raise
            outage = None
            try:
                record = self.status(job_id)
            except httpx.TransportError as exc:
                record, outage = {"state": None}, f"cannot reach the API at {self.url} ({exc or type(exc).__name__})"
            except APIError as exc:
                if exc.status != 503:
                    raise
                record, outage = {"state": None}, str(exc)
            if outage is not None and not in_outage and on_outage is not None:
                on_outage(outage)
            in_outage = outage is not None
            if record.get("state") in TERMINAL_STATES:
                if not ended and on_progress is not None:
                    # The stream broke and the job ended before it was re-opened: the log's tail is still to
                    # be passed on (a finished job's stream replays it, then ends).
                    self._drain_log(job_id, last_iteration, on_progress)
                return record
            if deadline is not None and time.monotonic() > deadline:
                raise TimeoutError(f"job {job_id} not finished after {timeout_s} s")
            if not ended:
                time.sleep(RECONNECT_S)

    def _drain_log(self, job_id: str, after: int | None, on_progress: Callable[[dict[str, Any]], None]) -> None:
        """Pass on the entries of a finished job's log after iteration ``after`` (best effort: a stream that breaks
        again is left, the record is what the caller returns)."""
        try:
            for event, data in self.stream_log(job_id, after=after):
                if event == "entry":
                    on_progress(data)
                elif event == "end":
                    return
        except (httpx.TransportError, httpx.StreamError, APIError):
            return


def _encode(document: dict[str, Any]) -> bytes:
    """Strict JSON: NaN and infinity refused here rather than silently sent as null."""
    try:
        return json.dumps(document, allow_nan=False, separators=(",", ":"), default=_array_to_list).encode()
    except ValueError as exc:
        raise ValueError(
            f"a problem document is strict JSON ({exc}); write null where a choice is not allowed"
        ) from None


def _array_to_list(value: Any) -> Any:
    if hasattr(value, "tolist"):
        return value.tolist()
    raise TypeError(f"{type(value).__name__} is not JSON")


def _api_error(response: httpx.Response) -> APIError:
    try:
        problem = response.json()
    except ValueError:
        problem = {"title": response.reason_phrase, "detail": response.text[:200]}
    if not isinstance(problem, dict):
        problem = {"title": response.reason_phrase, "detail": str(problem)[:200]}
    try:
        retry_after = float(response.headers["Retry-After"])
    except (KeyError, ValueError):
        retry_after = None
    return APIError(response.status_code, problem, retry_after)
