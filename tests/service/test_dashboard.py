"""The dashboard in a real browser: headless Chromium driven over the DevTools protocol.

A live API and worker (subprocesses on the private Redis) serve the pages; the
browser loads them, and every test asserts that no request failed and nothing
was logged as an error.  Screenshots go to ``tests/screenshots/`` (git-ignored).
The tests are skipped only when no Chromium is installed
(``apt-get install -y chromium``).
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from typing import Any

import httpx
import pytest

from service.embedded_redis import EmbeddedRedis
from service.examples import load_example
from service.routers.dashboard import SESSION_COOKIE
from tests._documents import log_growth
from tests.service._browser import CHROMIUM, Browser, Tab
from tests.service._live_server import LiveServer, wait_until_finished

pytestmark = pytest.mark.skipif(CHROMIUM is None, reason="Chromium is not installed (apt-get install -y chromium)")


@pytest.fixture(scope="module")
def browser() -> Iterator[Browser]:
    assert CHROMIUM is not None
    instance = Browser(CHROMIUM)
    try:
        yield instance
    finally:
        instance.close()


@pytest.fixture
def new_tab(browser: Browser) -> Iterator[Callable[[], Tab]]:
    """Open tabs (each brought to the front when opened); closed after the test."""
    opened: list[Tab] = []

    def open_tab() -> Tab:
        tab = Tab(browser)
        tab.front()
        opened.append(tab)
        return tab

    yield open_tab
    for tab in opened:
        tab.close()


@pytest.fixture(scope="module")
def server(redis_server: EmbeddedRedis, tmp_path_factory: pytest.TempPathFactory) -> Iterator[LiveServer]:
    # Database 3 of the private server: other tests empty database 0 between tests.
    live = LiveServer(redis_server.url.rsplit("/", 1)[0] + "/3", tmp_path_factory.mktemp("dashboard"), FIXQ_AUTH="off")
    try:
        live.start()
        yield live
    finally:
        live.stop()


@pytest.fixture(scope="module")
def api(server: LiveServer) -> Iterator[httpx.Client]:
    with httpx.Client(base_url=server.url, timeout=30.0) as client:
        page = client.get("/")
        assert page.status_code == 200 and "text/html" in page.headers["content-type"], (
            "GET / is not the dashboard: service.app.create_app must include service.routers.dashboard.router"
        )
        assert client.get("/v1/jobs/0123456789abcdef/plots").status_code == 404
        yield client


def submit(api: httpx.Client, document: dict[str, Any]) -> str:
    response = api.post("/v1/jobs", json=document)
    assert response.status_code == 202, response.text
    return response.json()["id"]


PLOTS_SHOWN = (
    "!document.getElementById('pictures').classList.contains('hidden')"
    " && ['value-plot', 'policy-plot'].every(id => { const img = document.getElementById(id);"
    " return img.complete && img.naturalWidth > 0; })"
)


def chart_points(tab: Tab, series: str) -> int:
    return tab.evaluate(
        f"(document.querySelector('#convergence path[data-series={series}]')?.getAttribute('d') || '')"
        ".split(/[ML]/).filter(s => s.trim()).length"
    )


def test_a_job_is_followed_live_from_queued_to_solved(
    server: LiveServer, api: httpx.Client, new_tab: Callable[[], Tab]
) -> None:
    # No worker yet: the job waits in the queue while both pages are open.
    document = load_example("household_saving")
    # Without its declared borrowing limit, so that the result warns and the page must show the warning.
    del document["model"]["states"]["assets"]["real_ends"]
    job_id = submit(api, document)

    listing = new_tab()
    listing.goto(f"{server.url}/")
    listing.wait_for(f"document.querySelector('tr[data-job=\"{job_id}\"]')?.dataset.state === 'queued'")
    assert "refreshing" in listing.evaluate("document.getElementById('live').textContent")

    page = new_tab()
    page.goto(f"{server.url}/jobs/{job_id}")
    page.wait_for("document.querySelector('#job-state .state')?.textContent === 'queued'")
    assert "waiting for the first iteration" in page.evaluate("document.getElementById('convergence').textContent")

    server.start_worker()
    page.wait_for(PLOTS_SHOWN)
    record = wait_until_finished(api, job_id)
    assert record["state"] == "done"
    result = api.get(f"/v1/jobs/{job_id}/result").json()

    # The chart was fed by the event stream (the page never reloaded) and holds the whole log.
    assert any(url.endswith(f"/v1/jobs/{job_id}/log") and kind == "EventSource" for url, kind in page.requested())
    assert len(page.mine("Page.frameNavigated")) == 1
    assert chart_points(page, "distance") == len(result["log"]) == result["iterations"]
    assert chart_points(page, "error_bound") == len(result["log"])
    assert page.evaluate("document.querySelector('#job-state .state').textContent") == "done"
    notes = page.evaluate("document.getElementById('notes').textContent")
    assert "Converged" in notes and "howard" in notes and "simulated paths" in notes
    assert f"{result['iterations']} iterations" in notes and "evaluation steps" in notes
    facts = page.evaluate(
        "Object.fromEntries([...document.querySelectorAll('#facts dt')]"
        ".map(dt => [dt.textContent, dt.nextElementSibling.textContent]))"
    )
    assert facts["points"] == "800" and "choice points" in facts and "states" not in facts
    assert "borrowing limit" in page.evaluate("document.getElementById('warning-list').textContent")
    links = page.evaluate("[...document.querySelectorAll('#downloads a')].map(a => a.getAttribute('href'))")
    assert f"/v1/jobs/{job_id}/result" in links and f"/v1/jobs/{job_id}/result?format=csv" in links
    for link in links:
        assert api.get(link).status_code == 200, link
    # No Euler-equation errors were asked for: no such picture, and none asked of the server.
    assert page.evaluate("document.getElementById('euler-figure').classList.contains('hidden')")
    assert not any("euler_errors" in url for url, _ in page.requested())
    assert api.get(f"/v1/jobs/{job_id}/plots/euler_errors.svg").status_code == 404
    page.screenshot("job-household-saving")
    assert page.problems() == []

    # The list refreshed itself while the job was active, and stopped once nothing was.
    listing.front()
    listing.wait_for(f"document.querySelector('tr[data-job=\"{job_id}\"]')?.dataset.state === 'done'")
    listing.wait_for("document.getElementById('live').textContent.startsWith('no active jobs')")
    row = listing.evaluate(f"document.querySelector('tr[data-job=\"{job_id}\"]').innerText")
    assert document["label"] in row and "consumption-saving" in row and "anonymous" in row
    assert str(result["iterations"]) in row
    listing.screenshot("job-list")
    assert listing.problems() == []


def test_an_example_started_from_the_list_shows_its_bars(
    server: LiveServer, api: httpx.Client, new_tab: Callable[[], Tab]
) -> None:
    server.ensure_worker()
    tab = new_tab()
    tab.goto(f"{server.url}/")
    tab.wait_for("document.querySelector('[data-example=\"machine_replacement\"] button') !== null")
    meta = tab.evaluate("document.querySelector('[data-example=\"machine_replacement\"] .meta').textContent")
    assert "10 points" in meta
    tab.evaluate("document.querySelector('[data-example=\"machine_replacement\"] button').click()")
    job_id = tab.wait_for("location.pathname.startsWith('/jobs/') && location.pathname.split('/')[2]")
    tab.wait_for(PLOTS_SHOWN)
    assert api.get(f"/v1/jobs/{job_id}").json()["label"] == load_example("machine_replacement")["label"]
    # A tabular model: bars per state, no shock or choice pickers.
    assert tab.evaluate("document.getElementById('choice-box').classList.contains('hidden')")
    assert tab.evaluate("document.getElementById('value-shock-box').classList.contains('hidden')")
    assert "/plots/policy.svg?choice=action" in tab.evaluate("document.getElementById('policy-plot').src")
    tab.screenshot("job-machine-shop")
    assert tab.problems() == []


def test_two_state_models_offer_shock_and_choice_pickers(
    server: LiveServer, api: httpx.Client, new_tab: Callable[[], Tab]
) -> None:
    server.ensure_worker()
    job_id = submit(api, load_example("roastery_growth"))
    assert wait_until_finished(api, job_id)["state"] == "done"
    tab = new_tab()
    tab.goto(f"{server.url}/jobs/{job_id}")
    tab.wait_for(PLOTS_SHOWN)
    assert tab.evaluate("[...document.querySelectorAll('#choice option')].map(o => o.value)") == [
        "capacity_next",
        "marketing",
    ]
    assert tab.evaluate("[...document.querySelectorAll('#policy-shock option')].map(o => o.textContent)") == [
        "taste=0.8",
        "taste=1.2",
    ]
    first = tab.evaluate("document.getElementById('policy-plot').src")
    tab.evaluate(
        "(() => { const pick = (id, v) => { const s = document.getElementById(id); s.value = v;"
        " s.dispatchEvent(new Event('change')); }; pick('choice', 'marketing'); pick('policy-shock', '1'); })()"
    )
    tab.wait_for(PLOTS_SHOWN + " && document.getElementById('policy-plot').src.includes('choice=marketing')")
    assert tab.evaluate("document.getElementById('policy-plot').src") != first
    assert "shock_index=1" in tab.evaluate("document.getElementById('policy-plot').src")
    tab.screenshot("job-roastery-heatmaps")
    assert tab.problems() == []


LIFE_CYCLE_SHOWN = (
    PLOTS_SHOWN + " && !document.getElementById('life-cycle-figure').classList.contains('hidden')"
    " && (img => img.complete && img.naturalWidth > 0)(document.getElementById('life-cycle-plot'))"
)


def test_a_finite_horizon_shows_value_policy_and_means_by_period(
    server: LiveServer, api: httpx.Client, new_tab: Callable[[], Tab]
) -> None:
    server.ensure_worker()
    job_id = submit(api, load_example("glassblower_life_cycle"))
    assert wait_until_finished(api, job_id)["state"] == "done"
    tab = new_tab()
    tab.goto(f"{server.url}/jobs/{job_id}")
    tab.wait_for(LIFE_CYCLE_SHOWN)
    notes = tab.evaluate("document.getElementById('notes').textContent")
    assert "backward induction" in notes and "60 periods" in notes and "fixed point" not in notes
    assert "In every period the hinted search was checked" in notes and "hints held" in notes
    assert "shock_index=0" in tab.evaluate("document.getElementById('value-plot').src")
    links = tab.evaluate("[...document.querySelectorAll('#downloads a')].map(a => a.getAttribute('href'))")
    assert f"/v1/jobs/{job_id}/plots/life_cycle.png" in links
    tab.screenshot("job-glassblower-life-cycle")
    assert tab.problems() == []


EULER_SHOWN = (
    PLOTS_SHOWN + " && !document.getElementById('euler-figure').classList.contains('hidden')"
    " && (img => img.complete && img.naturalWidth > 0)(document.getElementById('euler-plot'))"
)


def test_euler_equation_errors_are_plotted_across_the_state(
    server: LiveServer, api: httpx.Client, new_tab: Callable[[], Tab]
) -> None:
    server.ensure_worker()
    # Growth with log utility and full depreciation (the Brock & Mirman 1972 form); every number is invented.
    model = log_growth(alpha=0.33, k_min=0.04, k_max=0.45, points=150, hints={"monotone": True, "concave": True})
    document = {
        "version": 1,
        "label": "orchard growth, log utility (invented)",
        "discount": 0.94,
        "model": model,
        "solver": {"method": "howard", "tolerance": 1e-9},
        "report": {"euler_errors": True, "stationary": True},
    }
    job_id = submit(api, document)
    assert wait_until_finished(api, job_id)["state"] == "done"
    errors = api.get(f"/v1/jobs/{job_id}/result").json()["diagnostics"]["euler_errors"]
    profile = errors["profile"]
    summary = api.get(f"/v1/jobs/{job_id}/plots").json()
    assert summary["euler_profile"] is True and "profile" not in summary["diagnostics"]["euler_errors"]
    assert summary["diagnostics"]["euler_errors"]["max_log10"] == errors["max_log10"]

    tab = new_tab()
    tab.goto(f"{server.url}/jobs/{job_id}")
    tab.wait_for(EULER_SHOWN)
    shown = tab.evaluate("document.getElementById('euler-plot').src")
    assert shown.endswith(f"/v1/jobs/{job_id}/plots/euler_errors.svg")
    words = tab.evaluate("document.getElementById('euler-summary').textContent")
    assert f"worst 10{errors['max_log10']:.2f}".replace("-", "−") in words
    assert f"mean 10{errors['mean_log10']:.2f}".replace("-", "−") in words
    assert f"{errors['points']:,} test points" in words and "weighted by the stationary distribution" in words

    # The picture the page shows: a line per shock point (two here) and the mean, drawn from the profile.
    picture = api.get(f"/v1/jobs/{job_id}/plots/euler_errors.svg")
    assert picture.status_code == 200 and picture.headers["content-type"].startswith("image/svg+xml")
    for gid in ("series-0", "series-1", "mean"):
        assert f'id="{gid}"' in picture.text, gid
    assert 'id="series-2"' not in picture.text
    assert len(profile["at"]) == len(profile["log10_error"]) and len(profile["log10_error"][0]) == 2
    links = tab.evaluate("[...document.querySelectorAll('#downloads a')].map(a => a.getAttribute('href'))")
    assert f"/v1/jobs/{job_id}/plots/euler_errors.png" in links
    assert api.get(f"/v1/jobs/{job_id}/plots/euler_errors.png").content[:8] == b"\x89PNG\r\n\x1a\n"
    tab.screenshot("job-euler-errors")
    assert tab.problems() == []


PROBABILITIES_SHOWN = (
    PLOTS_SHOWN + " && !document.getElementById('probability-figure').classList.contains('hidden')"
    " && (img => img.complete && img.naturalWidth > 0)(document.getElementById('probability-plot'))"
)


def test_choice_probabilities_of_taste_shocks_are_plotted(
    server: LiveServer, api: httpx.Client, new_tab: Callable[[], Tab]
) -> None:
    server.ensure_worker()
    document = {
        "version": 1,
        "label": "lathe replacement with taste shocks (invented)",
        "discount": 0.95,
        "model": {
            "kind": "grid",
            "states": {"mileage": {"min": 0, "max": 19, "points": 20}},
            "shocks": {"wear": {"iid": {"values": [0, 1, 2], "probs": [0.35, 0.5, 0.15]}}},
            "choices": {"replace": {"values": [0, 1]}},
            "next": {"mileage": "(1 - replace) * min(mileage + wear, 19)"},
            "reward": "-(1 - replace) * 0.3 * mileage - replace * 4",
            "taste_shocks": {"scale": 0.7},
        },
    }
    job_id = submit(api, document)
    assert wait_until_finished(api, job_id)["state"] == "done"
    assert api.get(f"/v1/jobs/{job_id}/plots").json()["choice_probabilities"] is True
    tab = new_tab()
    tab.goto(f"{server.url}/jobs/{job_id}")
    tab.wait_for(PROBABILITIES_SHOWN)
    shown = tab.evaluate("document.getElementById('probability-plot').src")
    assert "/plots/choice_probabilities.svg?" in shown and "choice=replace" in shown and "shock_index=0" in shown
    notes = tab.evaluate("document.getElementById('notes').textContent")
    assert "Taste shocks of scale 0.7" in notes and "Euler's constant is not in the value" in notes
    # Three wear values: the shock point can be picked, and the picture follows it.
    tab.evaluate("(s => { s.value = '2'; s.dispatchEvent(new Event('change')); })"
                 "(document.getElementById('probability-shock'))")
    tab.wait_for(PROBABILITIES_SHOWN + " && document.getElementById('probability-plot').src.includes('shock_index=2')")
    links = tab.evaluate("[...document.querySelectorAll('#downloads a')].map(a => a.getAttribute('href'))")
    assert f"/v1/jobs/{job_id}/plots/choice_probabilities.png" in links
    tab.screenshot("job-choice-probabilities")
    assert tab.problems() == []


def test_a_failed_job_says_why(server: LiveServer, api: httpx.Client, new_tab: Callable[[], Tab]) -> None:
    server.ensure_worker()
    # Valid at the door (every number is finite), but the values overflow to inf while solving.
    document = {
        "version": 1,
        "label": "overflowing rewards (invented)",
        "discount": 0.99,
        "model": {"kind": "tabular", "states": 2, "actions": 1, "reward": [[1e308], [1e308]],
                  "transition": [[[0.5, 0.5]], [[0.5, 0.5]]]},
    }  # fmt: skip
    job_id = submit(api, document)
    assert wait_until_finished(api, job_id)["state"] == "failed"
    tab = new_tab()
    tab.goto(f"{server.url}/jobs/{job_id}")
    tab.wait_for("!document.getElementById('failure').classList.contains('hidden')")
    assert tab.evaluate("document.getElementById('failure-list').textContent").strip()
    assert tab.evaluate("document.getElementById('pictures').classList.contains('hidden')")
    tab.screenshot("job-failed")
    assert tab.problems() == []


def test_the_pages_load_nothing_from_outside(server: LiveServer, new_tab: Callable[[], Tab]) -> None:
    tab = new_tab()
    tab.goto(f"{server.url}/")
    tab.wait_for("document.querySelectorAll('#examples .example').length > 0")
    urls = [url for url, _ in tab.requested()]
    assert urls and all(url.startswith(server.url) or url.startswith("data:") for url in urls), urls
    assert tab.problems() == []


@pytest.fixture(scope="module")
def guarded_server(redis_server: EmbeddedRedis, tmp_path_factory: pytest.TempPathFactory) -> Iterator[LiveServer]:
    live = LiveServer(redis_server.url.rsplit("/", 1)[0] + "/4", tmp_path_factory.mktemp("guarded"), FIXQ_AUTH="on")
    try:
        live.start()
        yield live
    finally:
        live.stop()


def test_with_auth_on_the_dashboard_asks_for_a_key_and_refuses_a_wrong_one(
    guarded_server: LiveServer, new_tab: Callable[[], Tab]
) -> None:
    tab = new_tab()
    tab.goto(f"{guarded_server.url}/jobs/0123456789abcdef")
    tab.wait_for("!document.getElementById('signin').classList.contains('hidden')")
    assert tab.evaluate("document.getElementById('content').classList.contains('hidden')")
    # Nothing but the page itself and the session check was asked for: no 401s in the console.
    assert tab.problems() == []
    tab.evaluate(
        "document.querySelector('#signin input[name=key]').value = 'not-a-real-key';"
        " document.querySelector('#signin form').submit()"
    )
    tab.wait_for("location.search.includes('signin=failed')")
    tab.wait_for("!document.querySelector('#signin .problem').classList.contains('hidden')")
    assert tab.evaluate("location.pathname") == "/jobs/0123456789abcdef"
    assert "not-a-real-key" not in tab.evaluate("location.href")
    assert not [
        c
        for c in tab.send("Network.getCookies", {"urls": [guarded_server.url]})["cookies"]
        if c["name"] == SESSION_COOKIE
    ]
    tab.screenshot("signin-refused")


def test_with_auth_on_a_right_key_signs_in_once_and_shows_only_its_jobs(
    guarded_server: LiveServer, new_tab: Callable[[], Tab]
) -> None:
    import redis as redis_client

    from service.keys import KeyStore

    connection = redis_client.Redis.from_url(guarded_server.env["FIXQ_REDIS_URL"])
    keys = KeyStore(connection, "fixq")
    mine, theirs = keys.add("dash-owner"), keys.add("dash-other")
    labels = {}
    for key, who in ((mine, "mine"), (theirs, "theirs")):
        document = load_example("machine_replacement")
        document["label"] = f"{who} (invented)"
        reply = httpx.post(f"{guarded_server.url}/v1/jobs", json=document, headers={"Authorization": f"Bearer {key}"})
        assert reply.status_code in (201, 202), reply.text
        labels[who] = reply.json()["id"]
    tab = new_tab()
    tab.goto(f"{guarded_server.url}/")
    tab.wait_for("!document.getElementById('signin').classList.contains('hidden')")
    tab.evaluate(
        f"document.querySelector('#signin input[name=key]').value = {mine!r};"
        " document.querySelector('#signin form').submit()"
    )
    tab.wait_for(f"document.body.textContent.includes({labels['mine']!r})")
    assert labels["theirs"] not in tab.evaluate("document.body.textContent")
    assert mine not in tab.evaluate("location.href")
    cookies = [c for c in tab.send("Network.getCookies", {"urls": [guarded_server.url]})["cookies"]
               if c["name"] == SESSION_COOKIE]  # fmt: skip
    assert cookies and cookies[0]["httpOnly"] and cookies[0]["sameSite"] == "Strict"
    assert tab.problems() == []
    tab.screenshot("signed-in-job-list")


def test_the_session_endpoints_keep_the_key_out_of_urls(guarded_server: LiveServer) -> None:
    with httpx.Client(base_url=guarded_server.url, follow_redirects=False) as client:
        assert client.get("/ui/session").json() == {"auth": True, "signed_in": False, "owner": None}
        refused = client.post("/ui/session", data={"key": "wrong", "next": "/jobs/0123456789abcdef"})
        assert refused.status_code == 303
        assert refused.headers["location"] == "/jobs/0123456789abcdef?signin=failed"
        assert SESSION_COOKIE not in refused.cookies
        # Only local paths are followed after signing in (no open redirect).
        assert (
            client.post("/ui/session", data={"key": "x", "next": "https://elsewhere.test/"}).headers["location"]
            == "/?signin=failed"
        )
        # A browser's cross-site post is refused outright.
        cross = client.post("/ui/session", data={"key": "x"}, headers={"Sec-Fetch-Site": "cross-site"})
        assert cross.status_code == 403
        out = client.post("/ui/logout")
        assert out.status_code == 303
        assert f"{SESSION_COOKIE}=" in out.headers["set-cookie"] and "Max-Age=0" in out.headers["set-cookie"]


def test_a_running_job_can_be_canceled_from_its_page(
    server: LiveServer, api: httpx.Client, new_tab: Callable[[], Tab]
) -> None:
    server.ensure_worker()
    # A tolerance no float64 arithmetic reaches: the solve runs until it is stopped.
    document = load_example("machine_replacement")
    document["solver"] = {"method": "value_iteration", "tolerance": 1e-300, "max_iterations": 10_000_000}
    job_id = submit(api, document)
    tab = new_tab()
    tab.goto(f"{server.url}/jobs/{job_id}")
    tab.wait_for("document.querySelector('#job-state .state')?.textContent === 'running'")
    tab.wait_for("document.querySelector('#convergence path[data-series=distance]') !== null")
    tab.evaluate("document.getElementById('cancel').click()")
    tab.wait_for("document.querySelector('#job-state .state')?.textContent === 'canceled'")
    assert api.get(f"/v1/jobs/{job_id}").json()["state"] == "canceled"
    assert tab.evaluate("document.getElementById('cancel').classList.contains('hidden')")
    assert "canceled after" in tab.evaluate("document.getElementById('notes').textContent")
    tab.screenshot("job-canceled")
    assert tab.problems() == []
