"""``fixq changes`` and the dashboard's changes view against a live fixq: ``fixq api`` and ``fixq worker`` as
subprocesses on the private Redis, the CLI run as its own process, the view in headless Chromium.

The two solves differ by a constant added to every reward, so the value moves by exactly its present value
(0.25 / (1 - 0.95) = 5, up to the two error bounds) and the policy not at all.
"""

from __future__ import annotations

import copy
import json
import os
import subprocess
import sys
from collections.abc import Callable, Iterator
from typing import Any

import httpx
import pytest

from service.embedded_redis import EmbeddedRedis, free_port
from tests._documents import log_growth
from tests.service._browser import CHROMIUM, Browser, Tab
from tests.service._live_server import REPO, LiveServer, wait_until_finished

BONUS = 0.25
DISCOUNT = 0.95
SHIFT = BONUS / (1 - DISCOUNT)
"""The exact change of the value: T(V + c) = TV + beta c (Stokey and Lucas 1989, Theorem 3.3), so adding b to
every reward adds b / (1 - beta) to the fixed point and keeps the policy."""


def orchard(bonus: float) -> dict[str, Any]:
    model = log_growth(points=24)
    model["params"]["bonus"] = bonus
    model["reward"] = "log(c) + bonus"
    return {"version": 1, "label": "orchard replanting (invented)", "discount": DISCOUNT, "model": model,
            "solver": {"tolerance": 1e-9}, "report": {"stationary": True}}  # fmt: skip


@pytest.fixture(scope="module")
def server(redis_server: EmbeddedRedis, tmp_path_factory: pytest.TempPathFactory) -> Iterator[LiveServer]:
    # Database 9 of the private server: other tests empty database 0 between tests.
    live = LiveServer(redis_server.url.rsplit("/", 1)[0] + "/9", tmp_path_factory.mktemp("changes"), FIXQ_AUTH="off")
    try:
        live.start()
        live.start_worker()
        yield live
    finally:
        live.stop()


@pytest.fixture(scope="module")
def jobs(server: LiveServer) -> dict[str, str]:
    """Finished jobs: the orchard before and after its bonus, and one on another state variable."""
    renamed = orchard(0.0)
    model = renamed["model"]
    model["states"] = {"trees": model["states"].pop("k")}
    model["choices"] = {"k_next": {"next_of": "trees"}}
    model["define"] = {"c": "z * trees**alpha - k_next"}
    documents = {"before": orchard(0.0), "after": orchard(BONUS), "renamed": renamed}
    ids = {}
    with httpx.Client(base_url=server.url, timeout=30.0) as api:
        for name, document in documents.items():
            response = api.post("/v1/jobs", json=copy.deepcopy(document), params={"fresh": "true"})
            assert response.status_code == 202, response.text
            ids[name] = response.json()["id"]
        for job_id in ids.values():
            assert wait_until_finished(api, job_id)["state"] == "done", server.logs()
    return ids


def fixq(server_url: str, *args: str) -> subprocess.CompletedProcess[str]:
    python_path = os.pathsep.join(filter(None, [str(REPO), os.environ.get("PYTHONPATH")]))
    env = {**os.environ, "FIXQ_URL": server_url, "PYTHONPATH": python_path}
    env.pop("FIXQ_KEY", None)
    command = [sys.executable, "-m", "service.cli", "changes", *args]
    return subprocess.run(command, cwd=REPO, env=env, capture_output=True, text=True, timeout=60)


def test_fixq_changes_exits_1_only_above_the_threshold(server: LiveServer, jobs: dict[str, str]) -> None:
    after, before = jobs["after"], jobs["before"]
    quiet = fixq(server.url, after, "--since", before)
    assert quiet.returncode == 0, quiet.stderr
    lines = dict(line.split(None, 1) for line in quiet.stdout.splitlines() if not line.startswith("note:"))
    assert lines["value"].startswith("largest change 5") and lines["structure"].startswith("the same")
    assert "model.params.bonus 0.0 -> 0.25" in lines["structure"]
    assert "0.0% of points changed" in quiet.stdout and "the change is larger: real" in quiet.stdout

    above = fixq(server.url, after, "--since", before, "--fail-above", str(SHIFT - 0.01))
    assert above.returncode == 1 and "above --fail-above" in above.stderr
    below = fixq(server.url, after, "--since", before, "--fail-above", str(SHIFT + 0.01))
    assert below.returncode == 0 and below.stderr == ""
    same = fixq(server.url, before, "--since", before, "--fail-above", "0")
    assert same.returncode == 0 and "within them: noise" in same.stdout

    raw = fixq(server.url, after, "--since", before, "--json")
    answer = json.loads(raw.stdout)
    assert raw.returncode == 0 and abs(answer["value"]["sup_norm"] - SHIFT) <= answer["error_bounds"]["sum"]


def test_fixq_changes_exits_2_when_the_comparison_is_refused_and_3_when_unreachable(
    server: LiveServer, jobs: dict[str, str]
) -> None:
    refused = fixq(server.url, jobs["renamed"], "--since", jobs["before"], "--fail-above", "1")
    assert refused.returncode == 2 and "422" in refused.stderr
    assert "model.states.trees:" in refused.stderr and "model.states.k:" in refused.stderr
    unknown = fixq(server.url, jobs["after"], "--since", "0123456789abcdef")
    assert unknown.returncode == 2 and "404" in unknown.stderr
    negative = fixq(server.url, jobs["after"], "--since", jobs["before"], "--fail-above", "-1")
    assert negative.returncode == 2 and "--fail-above" in negative.stderr
    missing = fixq(server.url, jobs["after"])
    assert missing.returncode == 2 and "--since" in missing.stderr
    unreachable = fixq(f"http://127.0.0.1:{free_port()}", jobs["after"], "--since", jobs["before"])
    assert unreachable.returncode == 3 and "cannot reach" in unreachable.stderr


@pytest.fixture
def tab() -> Iterator[Callable[[], Tab]]:
    if CHROMIUM is None:
        pytest.skip("Chromium is not installed (apt-get install -y chromium)")
    browser = Browser(CHROMIUM)
    opened: list[Tab] = []

    def open_tab() -> Tab:
        page = Tab(browser)
        page.front()
        opened.append(page)
        return page

    try:
        yield open_tab
    finally:
        for page in opened:
            page.close()
        browser.close()


def test_the_job_page_compares_with_an_earlier_job(
    server: LiveServer, jobs: dict[str, str], tab: Callable[[], Tab]
) -> None:
    after, before = jobs["after"], jobs["before"]
    page = tab()
    page.goto(f"{server.url}/jobs/{after}")
    page.wait_for("!document.getElementById('compare-card').classList.contains('hidden')")
    page.evaluate(
        f"document.querySelector('#compare input[name=since]').value = '{before}';"
        " document.getElementById('compare').requestSubmit(); true"
    )
    page.wait_for("document.body.dataset.changes === 'shown'")
    assert page.evaluate("window.location.pathname + window.location.search") == f"/jobs/{after}/changes?since={before}"
    page.wait_for("(() => { const img = document.getElementById('change-plot'); "
                  "return img.complete && img.naturalWidth > 0; })()")  # fmt: skip
    summary = page.evaluate(
        "Object.fromEntries([...document.querySelectorAll('#change-summary dt')]"
        ".map(dt => [dt.textContent, dt.nextElementSibling.textContent]))"
    )
    assert summary["largest value change"].startswith("+5.00 at k = ")
    assert summary["verdict"].startswith("larger than both") and summary["structure"].startswith("the same")
    assert "0.0%" in page.evaluate("document.querySelector('#policy-rows tr[data-choice=k_next]').textContent")
    assert "model.params.bonus" in page.evaluate("document.getElementById('differences').textContent")
    assert page.evaluate("document.getElementById('since').value") == before
    page.screenshot("job-changes")
    assert page.problems() == []

    refused = tab()
    refused.goto(f"{server.url}/jobs/{jobs['renamed']}/changes?since={before}")
    refused.wait_for("document.body.dataset.changes === 'refused'")
    banner = refused.evaluate("document.getElementById('problem').textContent")
    assert "cannot be compared" in banner and "trees" in banner
    assert refused.evaluate("document.getElementById('change-plot').classList.contains('hidden')")
