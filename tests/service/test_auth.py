"""API keys and ownership: the key store, the ``fixq keys`` commands, and who sees which job.

The HTTP tests run the app in process with auth on, on the private Redis
server, with two ordinary keys (alice, bob) and an admin key.  The isolation
test walks ``app.routes``, so a new ``/v1`` route that takes an id fails it
until it is covered here.
"""

from __future__ import annotations

import re
import secrets
from typing import Any

import httpx
import pytest
import redis
from fastapi import FastAPI

from service import cli
from service.keys import KEY_PREFIX, KeyNameError, KeyStore, key_digest, looks_like_key
from service.settings import get_settings
from tests._documents import print_shop
from tests.service._http import assert_problem, make_client, run_inline, submit


def api_routes(app: FastAPI) -> list[tuple[str, set[str]]]:
    """(path template, methods) of every route of ``app``, routers included (FastAPI >= 0.165 nests them)."""
    try:
        from fastapi.routing import iter_route_contexts
    except ImportError:
        contexts: Any = app.routes
    else:
        contexts = iter_route_contexts(app.routes)
    return [(c.path, set(c.methods) - {"HEAD"}) for c in contexts if c.path and c.methods]


def every_stored_byte(client: redis.Redis) -> bytes:
    """Every key name and value in the database, concatenated (strings and hashes: all the key store writes)."""
    chunks = []
    for name in client.scan_iter(count=1000):
        chunks.append(name)
        kind = client.type(name)
        if kind == b"string":
            chunks.append(client.get(name) or b"")
        elif kind == b"hash":
            for field, value in client.hgetall(name).items():
                chunks += [field, value]
    return b"\n".join(chunks)


def test_a_new_key_is_random_and_only_its_sha256_is_stored(keys: KeyStore, redis_client: redis.Redis) -> None:
    key = keys.add("alice")
    other = keys.add("bob")
    assert key != other and looks_like_key(key) and key.startswith(KEY_PREFIX)
    # 32 random bytes in URL-safe base64 (RFC 4648 section 5): 43 characters, no padding.
    assert re.fullmatch(r"fxq_[A-Za-z0-9_-]{43}", key)
    stored = every_stored_byte(redis_client)
    assert key.encode() not in stored and key[len(KEY_PREFIX) :].encode() not in stored
    assert key_digest(key).encode() in stored
    assert keys.authenticate(key).name == "alice"  # type: ignore[union-attr]


def test_authenticate_refuses_unknown_malformed_and_revoked_keys(keys: KeyStore) -> None:
    key = keys.add("alice", admin=True)
    record = keys.authenticate(key)
    assert record is not None and record.name == "alice" and record.admin and record.created_at
    assert keys.authenticate(KEY_PREFIX + secrets.token_urlsafe(32)) is None
    for malformed in ("", "alice", key[:-10], key + "\n", key.upper().replace("FXQ_", "fxq_") + "!", "x" * 10_000):
        assert keys.authenticate(malformed) is None
    assert keys.revoke("alice") and not keys.revoke("alice")
    assert keys.authenticate(key) is None


def test_key_names_are_checked_and_unique(keys: KeyStore) -> None:
    keys.add("alice")
    with pytest.raises(KeyNameError, match="already"):
        keys.add("alice")
    for bad in ("", "has space", "a:b", "-lead", "x" * 65, "anonymous"):
        with pytest.raises(KeyNameError):
            keys.add(bad)
    # A name in a language other than English is refused, and the message says why (it used to say "letters").
    with pytest.raises(KeyNameError, match="ASCII letters"):
        keys.add("Müller")
    assert [k.name for k in keys.list_keys()] == ["alice"]


def test_a_key_may_carry_its_own_limits(keys: KeyStore) -> None:
    key = keys.add("student", limits={"max_active_jobs": 3, "max_problem_mb": 64})
    assert keys.authenticate(key).limits == {"max_active_jobs": 3, "max_problem_mb": 64.0}  # type: ignore[union-attr]
    with pytest.raises(ValueError, match="unknown key limit"):
        keys.add("other", limits={"max_cpus": 2})


def run_cli(capsys: pytest.CaptureFixture[str], *argv: str) -> tuple[int, str, str]:
    try:
        code = cli.main(list(argv))
    except SystemExit as exit_:
        code = int(exit_.code or 0)
    out, err = capsys.readouterr()
    return code, out, err


def test_keys_add_prints_the_key_alone_on_the_last_line(
    redis_url: str, redis_client: redis.Redis, keys: KeyStore, capsys: pytest.CaptureFixture[str]
) -> None:
    code, out, err = run_cli(capsys, "keys", "add", "alice", "--admin")
    assert code == 0
    key = out.splitlines()[-1]
    assert looks_like_key(key) and out.endswith(key + "\n")
    record = keys.authenticate(key)
    assert record is not None and record.name == "alice" and record.admin
    assert "only once" in err


def test_keys_list_shows_names_flags_and_times_never_keys(
    redis_url: str, redis_client: redis.Redis, capsys: pytest.CaptureFixture[str]
) -> None:
    run_cli(capsys, "keys", "add", "alice", "--admin")
    code, out, _ = run_cli(capsys, "keys", "add", "bob", "--max-active-jobs", "5")
    bob_key = out.splitlines()[-1]
    code, out, _ = run_cli(capsys, "keys", "list")
    assert code == 0
    lines = out.splitlines()
    assert lines[0].split()[:3] == ["name", "admin", "created"]
    rows = {line.split()[0]: line for line in lines[1:]}
    assert set(rows) == {"alice", "bob"}
    assert "yes" in rows["alice"] and "no" in rows["bob"] and "max_active_jobs=5" in rows["bob"]
    assert re.search(r"\d{4}-\d\d-\d\dT", rows["alice"])
    assert bob_key not in out and key_digest(bob_key) not in out and "fxq_" not in out
    code, out, _ = run_cli(capsys, "keys", "list", "--json")
    assert {entry["name"] for entry in __import__("json").loads(out)} == {"alice", "bob"}


def test_keys_revoke_and_the_errors_of_keys_commands(
    redis_url: str, redis_client: redis.Redis, keys: KeyStore, capsys: pytest.CaptureFixture[str]
) -> None:
    _, out, _ = run_cli(capsys, "keys", "add", "alice")
    key = out.splitlines()[-1]
    code, _, err = run_cli(capsys, "keys", "add", "alice")
    assert code == 2 and "already" in err
    code, _, err = run_cli(capsys, "keys", "add", "anonymous")
    assert code == 2 and "reserved" in err
    assert run_cli(capsys, "keys", "revoke", "alice")[0] == 0
    assert keys.authenticate(key) is None
    code, _, err = run_cli(capsys, "keys", "revoke", "alice")
    assert code == 1 and "no key named" in err


def test_keys_commands_need_redis(monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]) -> None:
    monkeypatch.delenv("FIXQ_REDIS_URL", raising=False)
    get_settings.cache_clear()
    try:
        code, _, err = run_cli(capsys, "keys", "list")
    finally:
        get_settings.cache_clear()
    assert code == 2 and "FIXQ_REDIS_URL" in err


@pytest.fixture
def served(monkeypatch: pytest.MonkeyPatch, redis_url: str) -> list[dict[str, Any]]:
    """Calls of ``uvicorn.run`` (replaced: nothing is served)."""
    import uvicorn

    calls: list[dict[str, Any]] = []
    monkeypatch.setattr(uvicorn, "run", lambda *args, **kwargs: calls.append(kwargs))
    return calls


def with_env(monkeypatch: pytest.MonkeyPatch, **env: str) -> None:
    for name, value in env.items():
        monkeypatch.setenv(name, value)
    get_settings.cache_clear()


def test_api_refuses_auth_off_on_an_open_address_unless_told_twice(
    served: list[dict[str, Any]], monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    with_env(monkeypatch, FIXQ_AUTH="off")
    code, _, err = run_cli(capsys, "api", "--host", "0.0.0.0")
    assert code == 2 and not served
    assert "FIXQ_AUTH=off" in err and "--allow-open-network" in err and "FIXQ_ALLOW_OPEN_NETWORK" in err
    assert run_cli(capsys, "api", "--host", "0.0.0.0", "--allow-open-network")[0] == 0
    assert served[-1]["host"] == "0.0.0.0"
    with_env(monkeypatch, FIXQ_ALLOW_OPEN_NETWORK="yes")
    assert run_cli(capsys, "api", "--host", "192.0.2.10")[0] == 0
    assert len(served) == 2


def test_api_serves_loopback_with_auth_off_and_anything_with_auth_on(
    served: list[dict[str, Any]], monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    with_env(monkeypatch, FIXQ_AUTH="off")
    assert run_cli(capsys, "api", "--host", "127.0.0.1")[0] == 0
    assert run_cli(capsys, "api", "--host", "::1")[0] == 0
    with_env(monkeypatch, FIXQ_AUTH="on")
    assert run_cli(capsys, "api", "--host", "0.0.0.0")[0] == 0
    assert len(served) == 3


def test_run_refuses_auth_off_on_an_open_address_before_starting_anything(
    served: list[dict[str, Any]], monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    spawned: list[Any] = []
    monkeypatch.setattr(cli, "spawn", lambda *args: spawned.append(args))
    with_env(monkeypatch, FIXQ_AUTH="off")
    code, _, err = run_cli(capsys, "run", "--host", "0.0.0.0")
    assert code == 2 and not spawned and "--allow-open-network" in err


def test_requests_without_a_valid_key_are_401(
    auth_app: FastAPI, keys: KeyStore, alice: httpx.Client
) -> None:
    job = submit(alice)
    revoked_key = keys.add("carol")
    keys.revoke("carol")
    attempts = {
        "no key": {},
        "empty bearer": {"Authorization": "Bearer "},
        "unknown key": {"Authorization": f"Bearer {KEY_PREFIX}{secrets.token_urlsafe(32)}"},
        "revoked key": {"Authorization": f"Bearer {revoked_key}"},
        "basic scheme": {"Authorization": "Basic YWxpY2U6c2VjcmV0"},
        "key in a query": {},
    }
    with make_client(auth_app) as anonymous:
        for name, headers in attempts.items():
            params = {"key": revoked_key} if name == "key in a query" else None
            for method, path in (("GET", "/v1/jobs"), ("GET", f"/v1/jobs/{job['id']}"), ("POST", "/v1/jobs")):
                response = anonymous.request(method, path, headers=headers, params=params, json=print_shop())
                body = assert_problem(response, 401)
                assert response.headers["www-authenticate"].startswith("Bearer"), name
                assert "key" in body["detail"]


def test_every_v1_route_needs_a_key_and_healthz_and_metrics_do_not(auth_app: FastAPI) -> None:
    # Static public documents: the bundled invented examples and the JSON
    # Schema of problem documents carry no job data (see the report).
    public = {"/v1/schema", "/v1/examples", "/v1/examples/{name}"}
    checked = 0
    with make_client(auth_app) as anonymous:
        for template, methods in api_routes(auth_app):
            if not template.startswith("/v1") or template in public:
                continue
            path = re.sub(r"\{[^}]+\}", "0123456789abcdef", template)
            for method in methods:
                assert_problem(anonymous.request(method, path, json={}), 401)
                checked += 1
        assert checked >= 8
        assert anonymous.get("/healthz").status_code == 200
        assert anonymous.get("/metrics").status_code == 200


def test_the_dashboard_cookie_signs_in_with_a_key(auth_app: FastAPI, keys: KeyStore, alice: httpx.Client) -> None:
    job = submit(alice)
    key = keys.add("alice-laptop")
    with make_client(auth_app) as browser:
        assert browser.get("/ui/session").json() == {"auth": True, "signed_in": False, "owner": None}
        refused = browser.post("/ui/session", data={"key": "fxq_wrong", "next": "/"}, follow_redirects=False)
        assert refused.status_code == 303 and "signin=failed" in refused.headers["location"]
        signed_in = browser.post("/ui/session", data={"key": key, "next": "/"}, follow_redirects=False)
        assert signed_in.status_code == 303
        cookie = signed_in.cookies.get("fixq_session")
        assert cookie == key and "httponly" in signed_in.headers["set-cookie"].lower()
        browser.cookies.set("fixq_session", cookie)
        assert browser.get("/ui/session").json()["owner"] == "alice-laptop"
        assert browser.get("/v1/jobs").json()["data"] == []
        assert_problem(browser.get(f"/v1/jobs/{job['id']}"), 404)
        keys.revoke("alice-laptop")
        assert_problem(browser.get("/v1/jobs"), 401)
        assert browser.get("/ui/session").json()["signed_in"] is False


def test_jobs_record_their_owner_and_lists_hold_only_the_callers(
    alice: httpx.Client, bob: httpx.Client, admin: httpx.Client
) -> None:
    alices = {submit(alice, print_shop(discount=0.8 + i / 100))["id"] for i in range(3)}
    bobs = {submit(bob)["id"]}
    assert {job["owner"] for job in alice.get("/v1/jobs").json()["data"]} == {"alice"}
    assert {job["id"] for job in alice.get("/v1/jobs").json()["data"]} == alices
    assert {job["id"] for job in bob.get("/v1/jobs").json()["data"]} == bobs
    assert {job["id"] for job in admin.get("/v1/jobs").json()["data"]} == alices | bobs
    filtered = bob.get("/v1/jobs", params={"tag": "shop", "label": "print shop (invented)", "state": "queued"})
    assert {job["id"] for job in filtered.json()["data"]} == bobs


ID_PARAMETERS = {"job_id", "sweep_id"}
"""Path parameters that name a resource owned by a key; each route with one is checked for isolation."""
OTHER_PARAMETERS = {"picture": "convergence", "fmt": "svg"}
"""Values for the other path parameters of id routes."""
PUBLIC_ROUTES = {"/v1/examples/{name}"}
"""Routes with path parameters that name no owned resource."""
EXTRA_QUERIES: dict[str, list[dict[str, Any]]] = {
    "/v1/jobs/{job_id}/result": [{"params": {"format": "csv"}}],
    "/v1/jobs/{job_id}/log": [{"headers": {"accept": "text/event-stream"}}],
    "/v1/jobs/{job_id}/plots/{picture}.{fmt}": [{"path": {"picture": "value", "fmt": "png"}},
                                                {"path": {"picture": "policy", "fmt": "svg"}}],
    "/v1/sweeps/{sweep_id}": [{"params": {"format": "csv"}}],
}
"""More ways to call a route (CSV, SSE, other pictures), each checked as well."""
REQUIRED_QUERIES: dict[str, dict[str, Any]] = {
    "/v1/jobs/{job_id}/changes": {"params": {"since": "{job_id}"}},
    "/v1/jobs/{job_id}/plots/changes.{fmt}": {"params": {"since": "{job_id}"}},
}
"""Query parameters a route cannot be called without; an id in braces is filled as the path's ids are."""


@pytest.fixture
def owned(alice: httpx.Client) -> dict[str, str]:
    """A finished job of alice's, and a sweep of hers when the app has sweeps."""
    job = submit(alice)
    assert run_inline(job["id"])["outcome"] == "done"
    ids = {"job_id": job["id"]}
    sweep = alice.post("/v1/sweeps", json={"base": print_shop(), "vary": {"discount": [0.7, 0.75]}})
    if sweep.status_code != 404:
        assert sweep.status_code == 202, sweep.text
        ids["sweep_id"] = sweep.json()["id"]
    return ids


def id_route_calls(app: FastAPI) -> list[tuple[str, str, dict[str, Any]]]:
    """(method, path template, call options) of every /v1 route that takes an id; fails on a route it cannot fill."""
    calls = []
    for template, methods in api_routes(app):
        if not template.startswith("/v1") or "{" not in template or template in PUBLIC_ROUTES:
            continue
        names = set(re.findall(r"\{([^}:]+)", template))
        unknown = names - ID_PARAMETERS - set(OTHER_PARAMETERS)
        assert not unknown, f"{template} has path parameters {unknown} this test does not know: cover it"
        assert names & ID_PARAMETERS, f"{template} takes no known id: add it to ID_PARAMETERS or PUBLIC_ROUTES"
        required = REQUIRED_QUERIES.get(template, {})
        for method in sorted(methods):
            calls.append((method, template, required))
            extras = EXTRA_QUERIES.get(template, []) if method == "GET" else []
            calls += [(method, template, {**required, **extra}) for extra in extras]
    return calls


def fill(template: str, ids: dict[str, str], extra: dict[str, Any]) -> str:
    values = {**OTHER_PARAMETERS, **ids, **extra.get("path", {})}
    return re.sub(r"\{([^}:]+)\}", lambda match: values[match.group(1)], template)


def filled_params(extra: dict[str, Any], ids: dict[str, str]) -> dict[str, str]:
    return {name: fill(str(value), ids, {}) for name, value in extra.get("params", {}).items()}


def normalised(response: httpx.Response, ids: list[str]) -> tuple[int, str, str]:
    text = response.text
    for value in ids:
        text = text.replace(value, "ID")
    return response.status_code, response.headers.get("content-type", ""), text


def test_another_keys_ids_answer_exactly_as_unknown_ids_on_every_route(
    auth_app: FastAPI, alice: httpx.Client, bob: httpx.Client, admin: httpx.Client, owned: dict[str, str]
) -> None:
    calls = id_route_calls(auth_app)
    covered = {path for _, path, _ in calls}
    assert {"/v1/jobs/{job_id}", "/v1/jobs/{job_id}/result", "/v1/jobs/{job_id}/log"} <= covered
    unknown = {name: secrets.token_hex(8) for name in owned}
    for method, template, extra in calls:
        missing = set(re.findall(r"\{([^}:]+)", template)) & ID_PARAMETERS - set(owned)
        if missing:
            pytest.fail(f"{template}: no owned {missing} to try; extend the `owned` fixture")
        options = {key: value for key, value in extra.items() if key not in ("path", "params")}
        theirs = bob.request(method, fill(template, owned, extra), params=filled_params(extra, owned), **options)
        nobody = bob.request(method, fill(template, unknown, extra), params=filled_params(extra, unknown), **options)
        assert theirs.status_code == 404, (method, template, theirs.text)
        same_as_unknown = normalised(theirs, list(owned.values())) == normalised(nobody, list(unknown.values()))
        assert same_as_unknown, (method, template, theirs.text, nobody.text)
        for who in (admin, alice):
            response = who.request(method, fill(template, owned, extra), params=filled_params(extra, owned), **options)
            assert response.status_code < 400, (method, template, response.text)


PUBLIC_LISTS = {"/v1/examples"}
"""List routes of public documents (the bundled invented examples), not of anything a key owns."""


def test_every_list_route_shows_a_key_only_its_own(
    auth_app: FastAPI, alice: httpx.Client, bob: httpx.Client, admin: httpx.Client, owned: dict[str, str]
) -> None:
    lists = [template for template, methods in api_routes(auth_app)
             if template.startswith("/v1") and "{" not in template and "GET" in methods]  # fmt: skip
    lists = [template for template in lists if template not in PUBLIC_LISTS and template != "/v1/schema"]
    assert "/v1/jobs" in lists
    for template in lists:
        theirs = bob.get(template)
        assert theirs.status_code == 200 and theirs.json()["data"] == [], (template, theirs.text)
        listed_to_admin = {entry["id"] for entry in admin.get(template).json()["data"]}
        listed_to_alice = {entry["id"] for entry in alice.get(template).json()["data"]}
        assert listed_to_admin == listed_to_alice and listed_to_alice & set(owned.values()), template


def test_another_key_can_neither_cancel_nor_list_nor_warm_start_from_a_job(
    alice: httpx.Client, bob: httpx.Client, admin: httpx.Client
) -> None:
    queued = submit(alice)
    assert_problem(bob.delete(f"/v1/jobs/{queued['id']}"), 404)
    assert alice.get(f"/v1/jobs/{queued['id']}").json()["state"] == "queued"
    assert bob.get("/v1/jobs").json()["data"] == []
    assert admin.delete(f"/v1/jobs/{queued['id']}").json()["state"] == "canceled"
    solved = submit(alice, print_shop(discount=0.85))
    assert run_inline(solved["id"])["outcome"] == "done"
    warm = print_shop(discount=0.86, solver={"method": "value_iteration", "initial": {"job": solved["id"]}})
    refused = assert_problem(bob.post("/v1/jobs", json=warm), 422)
    nobodys = {**warm, "solver": {"initial": {"job": secrets.token_hex(8)}}}
    unknown = assert_problem(bob.post("/v1/jobs", json=nobodys), 422)
    assert refused["errors"][0]["path"] == unknown["errors"][0]["path"] == "solver.initial.job"
    assert refused["errors"][0]["message"].replace(solved["id"], "ID") == re.sub(
        r"[0-9a-f]{16}", "ID", unknown["errors"][0]["message"]
    )
    assert_problem(bob.post("/v1/check", json=warm), 422)
    assert submit(alice, warm)["state"] == "queued"
    assert submit(admin, warm)["state"] == "queued"


def test_metrics_carry_no_owners_labels_or_ids(
    auth_app: FastAPI, alice: httpx.Client, bob: httpx.Client
) -> None:
    done = submit(alice, print_shop(label="secret-label-alpha", tags=["secret-tag-beta"]))
    run_inline(done["id"])
    submit(bob, print_shop(label="secret-label-gamma"))
    with make_client(auth_app) as anonymous:
        text = anonymous.get("/metrics").text
    for secret in ("alice", "bob", "secret-label-alpha", "secret-tag-beta", "secret-label-gamma", done["id"]):
        assert secret not in text
    label_sets = re.findall(r"^fixq_[a-z_]+\{([^}]*)\}", text, flags=re.MULTILINE)
    labels = {pair.split("=")[0] for labels in label_sets for pair in labels.split(",") if pair}
    assert labels <= {"state", "queue", "le"}, labels
