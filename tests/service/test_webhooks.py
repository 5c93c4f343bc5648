"""Webhooks: signing, who may be called, delivery with retries, and one sent by a real worker.

No test sends traffic anywhere but loopback: refused targets are refused
before any connection, and names resolve through a patched resolver where a
test needs a public-looking address.
"""

from __future__ import annotations

import hashlib
import hmac
import ipaddress
import json
import os
import socket
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path

import pytest
import redis

from service import webhooks
from service.deps import Caller
from service.embedded_redis import EmbeddedRedis, free_port
from service.notifier import Notifier
from service.settings import Settings
from service.store import JobStore
from service.submission import submit
from tests._documents import machine_shop
from tests._processes import WORKER_LAUNCH, stop_process_groups
from tests._receiver import Receiver
from worker.errors import InvalidDocument

REPO = Path(__file__).resolve().parents[2]
PUBLIC = ipaddress.ip_address("93.184.215.14")
"""A global address the patched resolver hands out; nothing ever connects to it."""
WORKER_DATABASE = 5
"""Redis database of the real-worker test, apart from the FLUSHDB of other tests."""
def independent_signature(secret: str, timestamp: str, body: bytes) -> str:
    """The documented scheme, computed here without fixq: hex HMAC-SHA256 over f"{timestamp}." + body."""
    return "sha256=" + hmac.new(secret.encode(), timestamp.encode() + b"." + body, hashlib.sha256).hexdigest()


def loopback_settings(settings: Settings, **update) -> Settings:
    return settings.model_copy(update={"notify_allow_hosts": "127.0.0.1", "notify_allow_private": True,
                                       "notify_retry_delays_s": [0.2], **update})  # fmt: skip


@pytest.fixture
def resolver(monkeypatch: pytest.MonkeyPatch) -> dict[str, list]:
    """A patched resolver: host name → addresses (IP literals resolve to themselves)."""
    table: dict[str, list] = {}

    def resolve(host: str, port: int) -> list:
        try:
            return [ipaddress.ip_address(host)]
        except ValueError:
            pass
        if host not in table:
            raise socket.gaierror(socket.EAI_NONAME, "Name or service not known")
        return [ipaddress.ip_address(a) for a in table[host]]

    monkeypatch.setattr(webhooks, "resolve_host", resolve)
    return table


def test_the_signature_is_hmac_sha256_over_timestamp_dot_body() -> None:
    body = b'{"event":"job.finished","job":{"id":"0123456789abcdef"},"timestamp":1700000000}'
    signature = webhooks.sign("lab secret", 1700000000, body)
    assert signature == independent_signature("lab secret", "1700000000", body)
    assert webhooks.verify("lab secret", "1700000000", signature, body, now=1700000010)
    assert not webhooks.verify("lab secret", "1700000000", signature, body + b" ", now=1700000010)
    assert not webhooks.verify("other secret", "1700000000", signature, body, now=1700000010)
    assert not webhooks.verify("lab secret", "1700000001", signature, body, now=1700000010)
    assert not webhooks.verify("lab secret", "1700000000", signature, body, now=1700000000 + 301)
    assert not webhooks.verify("lab secret", "soon", signature, body)


def test_webhooks_are_refused_while_the_allowlist_is_empty(settings: Settings) -> None:
    with pytest.raises(InvalidDocument) as caught:
        webhooks.check_target("https://hooks.lab.example/fixq", settings)
    assert caught.value.errors[0]["path"] == "notify.url"
    assert "not enabled" in caught.value.errors[0]["message"]
    assert "notify_allow_hosts is empty" in caught.value.errors[0]["message"]


def test_unlisted_hosts_are_refused_without_a_lookup(settings: Settings, monkeypatch: pytest.MonkeyPatch) -> None:
    def no_lookup(host: str, port: int) -> list:
        raise AssertionError(f"looked up {host}")

    monkeypatch.setattr(webhooks, "resolve_host", no_lookup)
    listed = settings.model_copy(update={"notify_allow_hosts": "hooks.lab.example"})
    with pytest.raises(InvalidDocument, match="not on this server's allowlist"):
        webhooks.check_target("https://intranet.example/admin", listed)


def test_names_suffixes_and_networks_on_the_allowlist(settings: Settings, resolver: dict) -> None:
    listed = settings.model_copy(update={"notify_allow_hosts": "hooks.lab.example, .ci.example, *.farm.example"})
    for host in ("hooks.lab.example", "a.ci.example", "deep.b.ci.example", "x.farm.example"):
        resolver[host] = [str(PUBLIC)]
        target = webhooks.check_target(f"https://{host}:8443/fixq", listed)
        assert (target.host, target.port, target.addresses) == (host, 8443, (PUBLIC,))
    for host in ("ci.example", "evil-ci.example", "hooks.lab.example.evil.test", "lab.example"):
        resolver[host] = [str(PUBLIC)]
        with pytest.raises(InvalidDocument, match="not on this server's allowlist"):
            webhooks.check_target(f"https://{host}/fixq", listed)
    by_network = settings.model_copy(update={"notify_allow_hosts": "93.184.215.0/24"})
    resolver["edge.example"] = [str(PUBLIC)]
    assert webhooks.check_target("http://edge.example/", by_network).addresses == (PUBLIC,)
    resolver["split.example"] = [str(PUBLIC), "2606:4700::1"]
    with pytest.raises(InvalidDocument, match="allowlist"):
        webhooks.check_target("http://split.example/", by_network)


@pytest.mark.parametrize(
    ("address", "reason"),
    [
        ("127.0.0.1", "loopback"),
        ("127.8.9.10", "loopback"),
        ("::1", "loopback"),
        ("10.1.2.3", "private"),
        ("172.16.0.9", "private"),
        ("192.168.1.20", "private"),
        ("fd12:3456::1", "private"),
        ("100.64.1.1", "not globally routable"),
        ("169.254.169.254", "metadata"),
        ("169.254.10.10", "link-local"),
        ("fe80::1", "link-local"),
        ("fd00:ec2::254", "metadata"),
        ("100.100.100.200", "metadata"),
        ("0.0.0.0", "unspecified"),
        ("0.1.2.3", "this network"),
        ("224.0.0.251", "multicast"),
        ("ff02::1", "multicast"),
        ("240.0.0.1", "reserved"),
        ("255.255.255.255", "reserved"),
        ("::ffff:127.0.0.1", "loopback"),
        ("::ffff:169.254.169.254", "metadata"),
        ("2002:a00:1::1", "private"),
    ],
)
def test_internal_addresses_are_refused(settings: Settings, address: str, reason: str) -> None:
    everything = settings.model_copy(update={"notify_allow_hosts": "0.0.0.0/0, ::/0"})
    host = f"[{address}]" if ":" in address else address
    with pytest.raises(InvalidDocument) as caught:
        webhooks.check_target(f"http://{host}:8080/hook", everything)
    assert reason in caught.value.errors[0]["message"]
    assert caught.value.errors[0]["path"] == "notify.url"


def test_allowing_private_targets_still_refuses_metadata_multicast_and_link_local(settings: Settings) -> None:
    relaxed = settings.model_copy(update={"notify_allow_hosts": "0.0.0.0/0, ::/0", "notify_allow_private": True})
    for address in ("127.0.0.1", "[::1]", "10.1.2.3", "100.64.1.1"):
        assert webhooks.check_target(f"http://{address}/hook", relaxed).addresses
    for address in ("169.254.169.254", "[fe80::1]", "224.0.0.251", "0.0.0.0", "100.100.100.200", "240.0.0.1"):
        with pytest.raises(InvalidDocument):
            webhooks.check_target(f"http://{address}/hook", relaxed)


def test_host_names_that_resolve_inside_are_refused(settings: Settings, resolver: dict) -> None:
    listed = settings.model_copy(update={"notify_allow_hosts": "localhost, .lab.example, metadata.google.internal"})
    resolver.update({
        "localhost": ["127.0.0.1", "::1"],
        "hooks.lab.example": ["10.20.30.40"],
        "mixed.lab.example": [str(PUBLIC), "192.168.0.7"],
        "metadata.google.internal": ["169.254.169.254"],
    })  # fmt: skip
    for host, shown in (("localhost", "127.0.0.1"), ("hooks.lab.example", "10.20.30.40"),
                        ("mixed.lab.example", "192.168.0.7"),
                        ("metadata.google.internal", "169.254.169.254")):  # fmt: skip
        with pytest.raises(InvalidDocument) as caught:
            webhooks.check_target(f"https://{host}/hook", listed)
        assert f"resolves to {shown}" in caught.value.errors[0]["message"]
    with pytest.raises(InvalidDocument, match="does not resolve"):
        webhooks.check_target("https://gone.lab.example/hook", listed)


def test_the_system_resolver_maps_localhost_to_loopback(settings: Settings) -> None:
    listed = settings.model_copy(update={"notify_allow_hosts": "localhost"})
    with pytest.raises(InvalidDocument, match="loopback"):
        webhooks.check_target("http://localhost:9/hook", listed)


@pytest.mark.parametrize(
    ("url", "words"),
    [
        ("ftp://hooks.lab.example/x", "http:// or https://"),
        ("http:///nohost", "http:// or https://"),
        ("http://user:pw@hooks.lab.example/x", "user name or password"),
        ("http://hooks.lab.example:99999/x", "port"),
    ],
)
def test_malformed_targets_are_refused(settings: Settings, url: str, words: str) -> None:
    listed = settings.model_copy(update={"notify_allow_hosts": "hooks.lab.example"})
    with pytest.raises(InvalidDocument, match=words):
        webhooks.check_target(url, listed)


def test_a_job_submission_is_refused_at_notify_url(store: JobStore, settings: Settings) -> None:
    document = machine_shop(notify={"url": "http://10.0.0.8/hook", "secret": "s"})
    listed = settings.model_copy(update={"notify_allow_hosts": "10.0.0.0/8"})
    with pytest.raises(InvalidDocument) as caught:
        submit(document, Caller("anonymous", admin=True), store, listed)
    assert caught.value.errors == [{"path": "notify.url", "message": caught.value.errors[0]["message"]}]
    assert "private" in caught.value.errors[0]["message"]
    assert store.counts_by_state()["queued"] == 0


def finished_job(store: JobStore, url: str, secret: str | None = "s3cret") -> str:
    """A job record that reached ``done`` without a worker, with a webhook asked for."""
    notify = {"url": url} if secret is None else {"url": url, "secret": secret}
    record = submit(machine_shop(notify=notify), Caller("anonymous", admin=True), store, store.settings)
    assert store.claim(record["id"], "token", worker="test:1") == "ok"
    assert store.finish(record["id"], "token", "failed", error={"title": "t", "detail": "d", "errors": []})
    return record["id"]


def test_one_delivery_signs_the_record_and_is_scheduled_once(redis_client: redis.Redis, settings: Settings) -> None:
    store = JobStore(redis_client, loopback_settings(settings))
    with Receiver([204]) as receiver:
        job_id = finished_job(store, receiver.url)
        assert webhooks.schedule(store, job_id) and not webhooks.schedule(store, job_id)
        assert webhooks.delivery_status(store, job_id)["state"] == "pending"
        assert webhooks.deliver_due(store) == 1 and webhooks.deliver_due(store) == 0
        (request,) = receiver.wait_for(1, 5)
    headers, body = request["headers"], request["body"]
    assert request["path"] == "/hook?lab=1"
    assert headers["Content-Type"] == "application/json" and headers["Fixq-Event"] == "job.finished"
    assert headers["Fixq-Delivery"] == job_id and headers["Fixq-Attempt"] == "1"
    assert headers["Fixq-Signature"] == independent_signature("s3cret", headers["Fixq-Timestamp"], body)
    payload = json.loads(body)
    assert payload["event"] == "job.finished" and payload["timestamp"] == int(headers["Fixq-Timestamp"])
    assert payload["job"] == store.get_job(job_id)
    status = webhooks.delivery_status(store, job_id)
    assert status["state"] == "delivered" and status["attempts"] == 1 and status["last_status"] == 204


def test_a_job_without_notify_schedules_nothing(redis_client: redis.Redis, settings: Settings) -> None:
    store = JobStore(redis_client, settings)
    record = store.create_job(machine_shop(), owner="anonymous", estimate={}, document_hash="h", enqueue=False)
    assert not webhooks.schedule(store, record["id"])
    assert webhooks.delivery_status(store, record["id"]) is None


def test_failed_attempts_back_off_then_give_up(redis_client: redis.Redis, settings: Settings) -> None:
    store = JobStore(redis_client, loopback_settings(settings, notify_retry_delays_s=[1, 5, 30],
                                                     notify_max_attempts=4))  # fmt: skip
    with Receiver([500]) as receiver:
        job_id = finished_job(store, receiver.url, secret=None)
        webhooks.schedule(store, job_id)
        due_key = store.key("notify", "due")
        clock = int(time.time())
        for delay in (1, 5, 30):
            assert webhooks.deliver(store, job_id, now=lambda: clock) == "retry"
            assert store.redis.zscore(due_key, job_id) == (clock + delay) * 1000
        assert webhooks.deliver_due(store) == 0  # the next attempt is not due yet
        assert webhooks.deliver(store, job_id) == "failed"
        assert len(receiver.wait_for(4, 5)) == 4
    assert "Fixq-Signature" not in receiver.requests[0]["headers"]
    assert [r["headers"]["Fixq-Attempt"] for r in receiver.requests] == ["1", "2", "3", "4"]
    status = webhooks.delivery_status(store, job_id)
    assert status["state"] == "failed" and status["attempts"] == 4 and status["last_status"] == 500
    assert store.redis.zscore(due_key, job_id) is None


def test_redirects_are_not_followed(redis_client: redis.Redis, settings: Settings) -> None:
    store = JobStore(redis_client, loopback_settings(settings))
    with Receiver([302]) as receiver:
        job_id = finished_job(store, receiver.url)
        webhooks.schedule(store, job_id)
        assert webhooks.deliver(store, job_id) == "retry"
        time.sleep(0.2)
        assert [r["path"] for r in receiver.requests] == ["/hook?lab=1"]
    assert webhooks.delivery_status(store, job_id)["last_status"] == 302


def test_a_slow_receiver_times_out(redis_client: redis.Redis, settings: Settings) -> None:
    store = JobStore(redis_client, loopback_settings(settings, notify_timeout_s=0.2))
    with Receiver([204], delay_s=1.0) as receiver:
        job_id = finished_job(store, receiver.url)
        webhooks.schedule(store, job_id)
        started = time.monotonic()
        assert webhooks.deliver(store, job_id) == "retry"
        assert time.monotonic() - started < 0.9
    assert "Timeout" in webhooks.delivery_status(store, job_id)["last_error"]


def test_a_name_rebound_to_loopback_after_submission_is_refused_at_delivery(
    redis_client: redis.Redis, settings: Settings, resolver: dict
) -> None:
    store = JobStore(redis_client, settings.model_copy(update={"notify_allow_hosts": "hooks.lab.example"}))
    with Receiver([204]) as receiver:
        resolver["hooks.lab.example"] = [str(PUBLIC)]
        job_id = finished_job(store, f"http://hooks.lab.example:{receiver.port}/hook")
        webhooks.schedule(store, job_id)
        resolver["hooks.lab.example"] = ["127.0.0.1"]
        assert webhooks.deliver(store, job_id) == "refused"
        time.sleep(0.1)
        assert receiver.requests == []
    status = webhooks.delivery_status(store, job_id)
    assert status["state"] == "refused" and "resolves to 127.0.0.1" in status["last_error"]
    assert store.redis.zscore(store.key("notify", "due"), job_id) is None


@pytest.fixture
def worker_store(redis_server: EmbeddedRedis, settings: Settings) -> Iterator[JobStore]:
    url = f"{redis_server.url.rsplit('/', 1)[0]}/{WORKER_DATABASE}"
    client = redis.Redis.from_url(url)
    client.flushdb()
    store = JobStore(client, loopback_settings(settings, redis_url=url))
    yield store
    client.flushdb()
    client.close()


def start_worker(store: JobStore, log: Path) -> subprocess.Popen:
    env = {**os.environ, "FIXQ_REDIS_URL": store.settings.redis_url, "FIXQ_NOTIFY_ALLOW_HOSTS": "127.0.0.1",
           "FIXQ_NOTIFY_ALLOW_PRIVATE": "true", "FIXQ_NOTIFY_RETRY_DELAYS_S": "[0.3]", "FIXQ_NOTIFY_POLL_S": "0.05",
           "PYTHONPATH": str(REPO)}  # fmt: skip
    with open(log, "wb") as out:
        return subprocess.Popen([sys.executable, "-c", WORKER_LAUNCH], cwd=REPO, env=env, stdout=out,
                                stderr=subprocess.STDOUT, start_new_session=True)  # fmt: skip


def stop_worker(process: subprocess.Popen) -> None:
    stop_process_groups([process])


def test_a_real_worker_notifies_a_loopback_receiver_and_retries_after_a_500(
    worker_store: JobStore, tmp_path: Path
) -> None:
    store = worker_store
    with Receiver([500, 204]) as receiver:
        record = submit(machine_shop(notify={"url": receiver.url, "secret": "lab secret"}),
                        Caller("anonymous", admin=True), store, store.settings)  # fmt: skip
        worker = start_worker(store, tmp_path / "worker.log")
        try:
            requests = receiver.wait_for(2, 60)
        finally:
            stop_worker(worker)
    assert len(requests) == 2, (tmp_path / "worker.log").read_text()[-3000:]
    first, second = requests
    assert second["at"] - first["at"] >= 0.25  # the retry waited notify_retry_delays_s
    for attempt, request in enumerate(requests, start=1):
        headers, body = request["headers"], request["body"]
        assert headers["Fixq-Signature"] == independent_signature("lab secret", headers["Fixq-Timestamp"], body)
        assert headers["Fixq-Delivery"] == record["id"] and headers["Fixq-Attempt"] == str(attempt)
        payload = json.loads(body)
        assert payload["event"] == "job.finished" and payload["timestamp"] == int(headers["Fixq-Timestamp"])
        assert payload["job"]["id"] == record["id"] and payload["job"]["state"] == "done"
        assert payload["job"]["status"] == "converged" and payload["job"]["iterations"] > 0
    status = webhooks.delivery_status(store, record["id"])
    assert status["state"] == "delivered" and status["attempts"] == 2 and status["last_status"] == 204


def teredo(server: str, client: str) -> str:
    """The Teredo address (2001::/32) of ``server`` and ``client``: server in bits 32-63, client inverted last."""
    inverted = int(ipaddress.IPv4Address(client)) ^ 0xFFFFFFFF
    return str(ipaddress.IPv6Address((0x20010000 << 96) | (int(ipaddress.IPv4Address(server)) << 64) | inverted))


@pytest.mark.parametrize(
    ("address", "reason"),
    [
        (teredo("127.0.0.1", "93.184.215.14"), "loopback"),
        (teredo("93.184.215.14", "10.0.0.1"), "private"),
        (teredo("93.184.215.14", "169.254.169.254"), "metadata"),
        (teredo("169.254.10.10", "93.184.215.14"), "link-local"),
    ],
)
def test_teredo_addresses_are_judged_by_their_embedded_ipv4(settings: Settings, address: str, reason: str) -> None:
    everything = settings.model_copy(update={"notify_allow_hosts": "0.0.0.0/0, ::/0"})
    with pytest.raises(InvalidDocument) as caught:
        webhooks.check_target(f"http://[{address}]:8080/hook", everything)
    assert reason in caught.value.errors[0]["message"] and "Teredo" in caught.value.errors[0]["message"]
    relaxed = everything.model_copy(update={"notify_allow_private": True})
    if reason in ("metadata", "link-local"):
        with pytest.raises(InvalidDocument, match=reason):
            webhooks.check_target(f"http://[{address}]:8080/hook", relaxed)


def test_a_slow_receiver_does_not_delay_another_targets_delivery(redis_client: redis.Redis, settings: Settings) -> None:
    store = JobStore(redis_client, loopback_settings(settings, notify_timeout_s=10.0, notify_per_target=2))
    notifier = Notifier(store, poll_s=0.05)
    with Receiver([204], delay_s=3.0) as slow, Receiver([204]) as fast:
        for _ in range(3):
            webhooks.schedule(store, finished_job(store, slow.url))
        time.sleep(0.01)
        webhooks.schedule(store, finished_job(store, fast.url))
        started = time.monotonic()
        notifier.start()
        try:
            (request,) = fast.wait_for(1, 10)
            assert request["at"] - started < 1.5
            assert len(slow.requests) == 0  # the slow receiver is still sleeping on its first two
            assert len(slow.wait_for(3, 15)) == 3
        finally:
            notifier.stop()
            assert notifier.pool.wait_idle(15)


def test_the_notifier_logs_one_line_per_pass_while_redis_is_away(
    tmp_path: Path, settings: Settings, caplog: pytest.LogCaptureFixture
) -> None:
    """Before, every pass (notify_poll_s, 0.5 s) logged a traceback of about 30 lines: 120 lines a second in a
    worker's log during an outage (measured: 971 lines in 8 s)."""
    server = EmbeddedRedis(tmp_path / "redis", port=free_port()).start()
    client = redis.Redis.from_url(server.url)
    try:
        notifier = Notifier(JobStore(client, settings.model_copy(update={"redis_url": server.url})))
        server.kill()
        with caplog.at_level("WARNING", logger="fixq.webhooks"):
            assert notifier.run_once() is False
            assert notifier.run_once() is False
        assert [r.getMessage().startswith("notifier: Redis unavailable") for r in caplog.records] == [True, True]
        assert all(r.exc_info is None for r in caplog.records)
    finally:
        client.close()
        server.stop()
