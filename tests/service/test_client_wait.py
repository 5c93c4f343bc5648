"""The Python client's ``wait``: a log broken by an API restart is passed on whole, even when the job ends
before the stream is re-opened (the race an API restart test met once under load)."""

from __future__ import annotations

from collections.abc import Iterator
from typing import Any

import httpx

from service.client import FixqClient


class _Replaying(FixqClient):
    """A client whose first stream breaks after two entries; by the time it asks again the job is done."""

    def __init__(self) -> None:
        super().__init__("http://127.0.0.1:9")  # never contacted: every request is answered here
        self.streams = 0

    def stream_log(self, job_id: str, *, after: int | None = None) -> Iterator[tuple[str, dict[str, Any]]]:
        self.streams += 1
        if self.streams == 1:
            yield "entry", {"iteration": 1}
            yield "entry", {"iteration": 2}
            raise httpx.RemoteProtocolError("the API went away")
        if self.streams == 2:
            raise httpx.ConnectError("the API is not back yet")
        for k in range((after or 0) + 1, 6):  # a finished job's stream replays the tail, then ends
            yield "entry", {"iteration": k}
        yield "end", {"state": "done"}

    def status(self, job_id: str) -> dict[str, Any]:
        return {"id": job_id, "state": "done", "iterations": 5} if self.streams >= 2 else {"state": "running"}


def test_the_log_tail_is_passed_on_when_the_job_ended_while_the_stream_was_broken(monkeypatch) -> None:
    monkeypatch.setattr("service.client.RECONNECT_S", 0.0)
    client = _Replaying()
    seen: list[int] = []
    record = client.wait("job", on_progress=lambda entry: seen.append(entry["iteration"]))
    assert record["state"] == "done"
    assert seen == [1, 2, 3, 4, 5]
