"""The job page's view of a search, in a real browser (headless Chromium over the DevTools protocol).

A live API and worker (subprocesses on the private Redis, database 5) serve the page; the page is opened
while the job waits in the queue, follows it while the worker runs it, and ends with a row per trial and a
point per trial on the residual plot, as many as the job's log holds.  Skipped only when no Chromium is
installed (``apt-get install -y chromium``).  The economy is invented (households saving in `a` with a
continuous choice; a Cobb–Douglas firm's wage and capital demand as params given as expressions of r).
"""

from __future__ import annotations

from collections.abc import Iterator
from typing import Any

import httpx
import pytest

from service.embedded_redis import EmbeddedRedis
from tests._documents import savings_market
from tests.service._browser import CHROMIUM, Browser, Tab
from tests.service._live_server import LiveServer, wait_until_finished

pytestmark = pytest.mark.skipif(CHROMIUM is None, reason="Chromium is not installed (apt-get install -y chromium)")

MARKET = {"unknowns": {"r": {"min": 0.0, "max": 0.05}}, "conditions": ["mean(a) - capital_demand"],
          "tolerance": 1e-6}
ROWS = "document.querySelectorAll('#search-trials tbody tr').length"
DOTS = "document.querySelectorAll('#search-chart circle').length"


def _document(search: dict[str, Any] | None) -> dict[str, Any]:
    document: dict[str, Any] = {
        "version": 1, "label": "households and a firm (invented)", "discount": 0.95,
        "solver": {"method": "howard", "tolerance": 1e-10},
        "model": savings_market(),
    }
    if search is not None:
        document["search"] = search
    return document


@pytest.fixture(scope="module")
def browser() -> Iterator[Browser]:
    assert CHROMIUM is not None
    instance = Browser(CHROMIUM)
    try:
        yield instance
    finally:
        instance.close()


@pytest.fixture
def tab(browser: Browser) -> Iterator[Tab]:
    opened = Tab(browser)
    opened.front()
    yield opened
    opened.close()


@pytest.fixture(scope="module")
def server(redis_server: EmbeddedRedis, tmp_path_factory: pytest.TempPathFactory) -> Iterator[LiveServer]:
    live = LiveServer(redis_server.url.rsplit("/", 1)[0] + "/5", tmp_path_factory.mktemp("search"), FIXQ_AUTH="off")
    try:
        live.start()
        yield live
    finally:
        live.stop()


@pytest.fixture(scope="module")
def api(server: LiveServer) -> Iterator[httpx.Client]:
    with httpx.Client(base_url=server.url, timeout=30.0) as client:
        yield client


def _submit(api: httpx.Client, document: dict[str, Any]) -> str:
    response = api.post("/v1/jobs", json=document, params={"fresh": "true"})
    assert response.status_code == 202, response.text
    return response.json()["id"]


def test_a_search_shows_its_trials_from_the_queue_to_the_answer(
    server: LiveServer, api: httpx.Client, tab: Tab
) -> None:
    job_id = _submit(api, _document(MARKET))
    tab.goto(f"{server.url}/jobs/{job_id}")
    tab.wait_for("document.querySelector('#job-state .state')?.textContent === 'queued'")
    # Nothing in the log yet: the page cannot tell a search yet and shows no card.
    assert tab.evaluate("document.getElementById('search-card').classList.contains('hidden')")

    server.ensure_worker()
    record = wait_until_finished(api, job_id)
    assert record["state"] == "done" and record["search"]["status"] == "converged"
    trials = record["search"]["trials"]
    tab.wait_for(f"{ROWS} === {trials} && {DOTS} === {trials} && "
                 "document.getElementById('search-summary').textContent.startsWith('Found')")
    entries = api.get(f"/v1/jobs/{job_id}/log", params={"limit": 500}).json()["data"]
    rows = tab.evaluate("[...document.querySelectorAll('#search-trials tbody tr')].map(tr => "
                        "[...tr.children].map(td => td.textContent))")
    for row, entry in zip(rows, entries):
        trial = entry["search_trial"]
        assert int(row[0]) == entry["iteration"]
        assert float(row[1]) == pytest.approx(trial["unknowns"]["r"], rel=1e-9)
        assert row[4] == trial["inner_status"] and int(row[5].replace(",", "")) == trial["iterations"]
    headers = tab.evaluate("[...document.querySelectorAll('#search-trials thead th')].map(th => th.textContent)")
    assert headers[:3] == ["trial", "r", "residual"] and "error bound" in headers and "inner tolerance" in headers
    summary = tab.evaluate("document.getElementById('search-summary').textContent")
    assert f"r = {record['search']['unknowns']['r']:.10g}"[:12] in summary and f"{trials} trials" in summary
    tab.screenshot("job-search")
    assert tab.problems() == []


def test_a_search_without_a_root_shows_its_trials(server: LiveServer, api: httpx.Client, tab: Tab) -> None:
    server.ensure_worker()
    job_id = _submit(api, _document({**MARKET, "unknowns": {"r": {"min": 0.0, "max": 0.02}}}))
    record = wait_until_finished(api, job_id)
    assert record["state"] == "failed" and record["search"]["status"] == "no_root"
    trials = record["search"]["trials"]  # from the document's r towards the root, then the bracket's ends
    assert trials >= 2
    tab.goto(f"{server.url}/jobs/{job_id}")
    tab.wait_for(f"{ROWS} === {trials} && "
                 "document.getElementById('search-summary').textContent.startsWith('No sign change')")
    assert "no root in the bracket" in tab.evaluate("document.getElementById('failure-list').textContent")
    # The summary names the trial nearest zero (the log's rows), not a root that is not there.
    rows = [entry["search_trial"] for entry in api.get(f"/v1/jobs/{job_id}/log", params={"limit": 500}).json()["data"]]
    nearest = min(rows, key=lambda row: abs(row["residuals"][0]))
    summary = tab.evaluate("document.getElementById('search-summary').textContent")
    assert f"nearest zero: r = {nearest['unknowns']['r']:.10g}"[:24] in summary, summary
    assert "No root" not in summary
    assert tab.problems() == []


def test_a_job_without_a_search_shows_no_search_card(server: LiveServer, api: httpx.Client, tab: Tab) -> None:
    server.ensure_worker()
    job_id = _submit(api, _document(None))
    assert wait_until_finished(api, job_id)["state"] == "done"
    tab.goto(f"{server.url}/jobs/{job_id}")
    tab.wait_for("document.querySelector('#job-state .state')?.textContent === 'done' && "
                 "!document.getElementById('outcome').classList.contains('hidden')")
    assert tab.evaluate("document.getElementById('search-card').classList.contains('hidden')")
    # One log entry was enough to tell: the page read no more of the log than that.
    reads = [url for url, _ in tab.requested() if "/log?cursor=" in url]
    assert reads and all("limit=1" in url for url in reads), reads
    assert tab.problems() == []
