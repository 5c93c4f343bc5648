"""What ``fixq status`` and ``fixq submit`` say about a search's answer, a failed job's reason, and a
refusal with Retry-After, against canned API answers (httpx.MockTransport: the words, not the service);
and a refusal that no wait can cure carries no Retry-After."""

from __future__ import annotations

import json
from collections.abc import Callable
from pathlib import Path

import httpx
import pytest

from service import cli
from service.client import FixqClient
from service.limits import Quota, _too_many
from tests._documents import machine_shop

JOB = "87a9107cd0b1548f"
FAULT = "no root in the bracket: mean(a) - capital_demand is -8.29 at r = 0 and -7.16 at r = 0.005"
RECORDS = {
    "search_done": {
        "id": JOB, "state": "done", "label": "invented market", "status": "converged", "iterations": 2,
        "error_bound": 2.06e-09, "progress": {"iteration": 7},
        "search": {"status": "converged", "unknowns": {"r": 0.03293677769544847}, "residuals": [1.0154e-07],
                   "trials": 7},
    },
    "search_not_met": {
        "id": JOB, "state": "done", "label": "invented market", "status": "converged", "iterations": 1,
        "error_bound": 4.44e-08, "progress": {"iteration": 19},
        "search": {"status": "not_met", "unknowns": {"r": 0.04, "discount": 0.958866}, "residuals": [1.44, -0.0483],
                   "trials": 19},
    },
    "search_failed": {
        "id": JOB, "state": "failed", "label": "invented market", "progress": {"iteration": 12},
        "search": {"status": "no_root", "unknowns": {"r": 0.005}, "residuals": [-7.158], "trials": 12},
        "error": {"title": "invalid problem document", "detail": f"search.unknowns.r: {FAULT}",
                  "errors": [{"path": "search.unknowns.r", "message": FAULT}]},
    },
}  # fmt: skip


@pytest.fixture
def fixq(monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]):
    """``fixq ARGS`` against ``handler`` (a MockTransport handler); returns (exit code, stdout, stderr)."""

    def run(handler: Callable[[httpx.Request], httpx.Response], *args: str) -> tuple[int, str, str]:
        transport = httpx.MockTransport(handler)
        monkeypatch.setattr(cli, "FixqClient", lambda: FixqClient("http://fixq.test", transport=transport))
        code = cli.main(list(args))
        out, err = capsys.readouterr()
        return code, out, err

    return run


def answering(record: dict) -> Callable[[httpx.Request], httpx.Response]:
    def handler(request: httpx.Request) -> httpx.Response:
        if request.method == "POST":
            return httpx.Response(202, json={**record, "state": "queued"})
        if request.url.path.endswith("/log"):
            return httpx.Response(200, text='event: end\ndata: {"state": "x"}\n\n',
                                  headers={"Content-Type": "text/event-stream"})
        return httpx.Response(200, json=record)

    return handler


def test_status_shows_a_search_answer_from_the_job_record(fixq) -> None:
    code, out, _ = fixq(answering(RECORDS["search_done"]), "status", JOB)
    assert code == 0
    assert "search       converged: r = 0.0329368 (residuals 1.02e-07) after 7 trials" in out.splitlines()


def test_a_search_that_missed_its_tolerance_is_not_told_as_converged(fixq, tmp_path: Path) -> None:
    # Before: "fixq: job ... done: converged after 1 iterations" (the last solve's status) above
    # "fixq: search not_met: ...", two answers that contradict each other on the first line a script reads.
    document = tmp_path / "market.json"
    document.write_text(json.dumps(machine_shop()))
    _, _, err = fixq(answering(RECORDS["search_not_met"]), "submit", str(document), "--wait")
    assert (f"fixq: job {JOB} done: search not_met; its solution at the point returned converged after 1 "
            "iterations, error bound 4.44e-08") in err.splitlines()
    _, out, _ = fixq(answering(RECORDS["search_not_met"]), "status", JOB)
    assert any(line.startswith("state        done: search not_met;") for line in out.splitlines())


def test_a_failed_job_is_told_in_sentences_with_the_fault_paths(fixq, tmp_path: Path) -> None:
    # Before: "failed: {'title': 'invalid problem document', 'detail': ...}", a Python dict's repr.
    code, out, _ = fixq(answering(RECORDS["search_failed"]), "status", JOB)
    assert code == 0 and "{'" not in out
    assert f"state        failed: search.unknowns.r: {FAULT}" in out.splitlines()
    assert "search       no_root: r = 0.005 (residuals -7.16) after 12 trials" in out.splitlines()
    assert f"  search.unknowns.r: {FAULT}" in out.splitlines()

    document = tmp_path / "market.json"
    document.write_text(json.dumps(machine_shop()))
    code, out, err = fixq(answering(RECORDS["search_failed"]), "submit", str(document), "--wait")
    assert code == 1 and out.strip() == JOB and "{'" not in err
    assert f"fixq: job {JOB} failed: search.unknowns.r: {FAULT}" in err.splitlines()
    assert "fixq: search no_root: r = 0.005 (residuals -7.16) after 12 trials" in err.splitlines()


def test_a_refusal_says_when_to_try_again(fixq, tmp_path: Path) -> None:
    problem = {"type": "urn:fixq:problem:too-many-jobs", "title": "too many active jobs", "status": 429,
               "detail": "key 'lab' has 3 jobs queued or running, and the per-key cap max_active_jobs is 3"}

    def refuse(request: httpx.Request) -> httpx.Response:
        return httpx.Response(429, json=problem, headers={"Retry-After": "30"})

    document = tmp_path / "shop.json"
    document.write_text(json.dumps(machine_shop()))
    code, _, err = fixq(refuse, "submit", str(document))
    assert code == 1
    assert "fixq: 429 too many active jobs: key 'lab' has 3 jobs" in err
    assert "fixq: the API asks to try again in 30 s (Retry-After)" in err.splitlines()


def test_a_sweep_larger_than_the_cap_is_not_told_to_wait() -> None:
    # Before: "wait for some to finish ..." and Retry-After: 30 for 4 jobs at once under a cap of 3, with
    # nothing running: a client honouring Retry-After asked again for ever.
    quota = Quota(owner="lab", max_active_jobs=3, max_active_high_jobs=0, key_max_problem_mb=0.0)
    never = _too_many(quota, "max_active_jobs", 0, 4)
    assert never.status_code == 429 and not (never.headers or {}).get("Retry-After")
    assert "split the sweep, or chain it" in never.detail and "wait for some" not in never.detail
    later = _too_many(quota, "max_active_jobs", 2, 2)
    assert later.headers["Retry-After"] and "wait for some to finish" in later.detail


def test_submit_wait_says_once_why_it_waits_through_an_outage(fixq, tmp_path: Path, monkeypatch) -> None:
    # Before: the progress line froze without a word while Redis was away (503 on the log and the record).
    monkeypatch.setattr("service.client.RECONNECT_S", 0.0)
    unavailable = {"type": "urn:fixq:problem:unavailable", "title": "service unavailable", "status": 503,
                   "detail": "the job store (Redis) is unavailable; try again shortly"}
    reads: list[str] = []

    def redis_away_twice(request: httpx.Request) -> httpx.Response:
        if request.method == "POST":
            return httpx.Response(202, json={"id": JOB, "state": "queued"})
        reads.append(request.url.path)
        if len(reads) <= 4:  # log, record, log, record: all 503
            return httpx.Response(503, json=unavailable, headers={"Retry-After": "5"})
        return answering({"id": JOB, "state": "done", "status": "converged", "iterations": 3})(request)

    document = tmp_path / "shop.json"
    document.write_text(json.dumps(machine_shop()))
    code, out, err = fixq(redis_away_twice, "submit", str(document), "--wait")
    assert code == 0 and out.strip() == JOB
    said = [line for line in err.splitlines() if "waiting for it" in line]
    assert said == ["fixq: 503 service unavailable: the job store (Redis) is unavailable; try again shortly; "
                    "waiting for it (Ctrl-C stops waiting, not the job)"]  # fmt: skip
    assert f"fixq: job {JOB} done: converged after 3 iterations" in err
