"""The R and MATLAB/Octave client scripts, run as shipped against a live fixq: a real API and
worker on the private Redis, auth on, and a key made as the other tests make keys.

Each script writes its arrays in its language's own (column-major) order with their sizes and
axis names; the test reads them back with Fortran order and compares them with the JSON result
it fetches itself, so a transposed or scrambled array fails. The examples cover two axes of
different lengths (household_saving), three with a period axis (glassblower_life_cycle), one
axis of text labels (machine_replacement), and taste shocks, whose CSV table has a probability
column per alternative (courier_van_replacement). One more run goes through a pass-through that lists
a result's axes out of order and states the order in ``axis_order``, which the scripts must
follow, and that plays a short outage (a cut connection, then a 503) which they must wait
out. The Python and curl scripts (run as they are by tests/service/test_examples.py) go through
that outage too. A test skips when its language is not installed.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
import sys
import threading
from collections.abc import Iterator
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path
from typing import Any

import httpx
import numpy as np
import pytest
import redis

from service.embedded_redis import EmbeddedRedis
from service.keys import KeyStore
from service.problems import UNAVAILABLE_DETAIL
from service.settings import Settings
from tests.service._live_server import LiveServer

CLIENTS = Path(__file__).resolve().parents[2] / "service" / "examples" / "clients"
KEY_NAME = "client-scripts"
EXAMPLES = ["household_saving", "glassblower_life_cycle", "machine_replacement", "courier_van_replacement"]
RUN_TIMEOUT_S = 90


def command(language: str, outdir: Path) -> list[str]:
    if language == "R":
        return ["Rscript", str(CLIENTS / "r_httr2.R"), str(outdir)]
    return ["octave-cli", "--no-gui", "--norc", "--eval", f"addpath('{CLIENTS}'); matlab_octave('{outdir}');"]


LANGUAGES = [
    pytest.param("R", marks=pytest.mark.skipif(shutil.which("Rscript") is None, reason="Rscript is not installed")),
    pytest.param(
        "Octave",
        marks=pytest.mark.skipif(
            shutil.which("octave-cli") is None or shutil.which("curl") is None,
            reason="octave-cli (and curl, which the script calls under Octave) are needed",
        ),
    ),
]


@pytest.fixture(scope="module")
def server(redis_server: EmbeddedRedis, tmp_path_factory: pytest.TempPathFactory) -> Iterator[LiveServer]:
    # Database 5 of the private server: other tests empty database 0 between tests.
    live = LiveServer(redis_server.url.rsplit("/", 1)[0] + "/5", tmp_path_factory.mktemp("clients"), FIXQ_AUTH="on")
    try:
        live.start()
        live.start_worker()
        yield live
    finally:
        live.stop()


@pytest.fixture(scope="module")
def key(server: LiveServer) -> str:
    connection = redis.Redis.from_url(server.env["FIXQ_REDIS_URL"])
    try:
        return KeyStore(connection, Settings().redis_prefix).add(KEY_NAME)
    finally:
        connection.close()


def run(language: str, server: LiveServer, outdir: Path, **env: str) -> subprocess.CompletedProcess[str]:
    environment = {**os.environ, "FIXQ_URL": server.url, **env}
    for name in ("FIXQ_KEY", "FIXQ_EXAMPLE"):
        if name not in env:
            environment.pop(name, None)
    return subprocess.run(command(language, outdir), cwd=outdir, env=environment, capture_output=True, text=True,
                          timeout=RUN_TIMEOUT_S)  # fmt: skip


class ReorderingProxy:
    """A pass-through to the live server that lists a result's ``axes`` in reverse key order and
    states their array order in ``axis_order``: what a result looks like when the document fixed
    the axis order apart from its key order. A script that sizes its arrays by the keys of
    ``axes`` then gets them wrong.

    With ``outage=True`` it also plays a short outage on the way to each of a job's record, live
    log and result: the first request is cut without an answer (the API restarting), the second
    answers 503 as the API does while Redis is away (with ``Retry-After: 1``); ``interrupted``
    lists what was cut or refused."""

    def __init__(self, upstream: str, *, outage: bool = False) -> None:
        seen: dict[str, int] = {}
        self.interrupted: list[str] = []

        def relay(handler: BaseHTTPRequestHandler) -> None:
            size = int(handler.headers.get("Content-Length") or 0)
            body = handler.rfile.read(size) if size else None
            path = handler.path.split("?", 1)[0]
            if outage and handler.command == "GET" and re.fullmatch(r"/v1/jobs/[0-9a-f]{16}(/log|/result)?", path):
                seen[path] = seen.get(path, 0) + 1
                if seen[path] == 1:
                    self.interrupted.append(f"cut {path}")
                    handler.close_connection = True
                    return
                if seen[path] == 2:
                    self.interrupted.append(f"503 {path}")
                    problem = json.dumps({"type": "urn:fixq:problem:unavailable", "title": "service unavailable",
                                          "status": 503, "detail": UNAVAILABLE_DETAIL}).encode()
                    handler.send_response(503)
                    handler.send_header("Content-Type", "application/problem+json")
                    handler.send_header("Retry-After", "1")
                    handler.send_header("Content-Length", str(len(problem)))
                    handler.end_headers()
                    handler.wfile.write(problem)
                    return
            passed = ("authorization", "content-type", "accept", "last-event-id")
            headers = {k: v for k, v in handler.headers.items() if k.lower() in passed}
            reply = httpx.request(handler.command, upstream + handler.path, content=body, headers=headers, timeout=60)
            content = reply.content
            if re.fullmatch(r"/v1/jobs/[0-9a-f]+/result", handler.path) and reply.status_code == 200:
                result = reply.json()
                order = result.get("axis_order") or list(result["axes"])
                result["axes"] = dict(reversed(list(result["axes"].items())))
                result["axis_order"] = order
                content = json.dumps(result).encode()
            handler.send_response(reply.status_code)
            handler.send_header("Content-Type", reply.headers.get("content-type", "application/json"))
            handler.send_header("Content-Length", str(len(content)))
            handler.end_headers()
            handler.wfile.write(content)

        class Handler(BaseHTTPRequestHandler):
            do_GET = do_POST = do_DELETE = relay

            def log_message(self, *args: Any) -> None:
                pass

        self.server = ThreadingHTTPServer(("127.0.0.1", 0), Handler)
        self.url = f"http://127.0.0.1:{self.server.server_address[1]}"
        self.thread = threading.Thread(target=self.server.serve_forever, daemon=True)

    def __enter__(self) -> ReorderingProxy:
        self.thread.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self.server.shutdown()
        self.server.server_close()
        self.thread.join()


def read_native(path: Path) -> tuple[list[str], np.ndarray]:
    """An array a script wrote: its sizes, its axis names, then its cells in column-major order."""
    sizes, names, *cells = path.read_text().splitlines()
    dims = [int(size) for size in sizes.split()]
    try:
        values = np.array([float(cell) for cell in cells])
    except ValueError:
        values = np.array(cells)
    assert values.size == int(np.prod(dims)), path
    return names.split(), values.reshape(dims, order="F")


def assert_same(native: np.ndarray, expected: Any) -> None:
    if native.dtype.kind == "f":
        np.testing.assert_allclose(native, np.array(expected, dtype=float), rtol=1e-13, atol=0)
    else:
        np.testing.assert_array_equal(native, np.array(expected))


@pytest.mark.parametrize("example", EXAMPLES)
@pytest.mark.parametrize("language", LANGUAGES)
def test_the_script_reads_the_solution_into_native_arrays(
    language: str, example: str, server: LiveServer, key: str, tmp_path: Path
) -> None:
    # R in the C locale (cron, containers), where the script's label went out with "β" as "<ce><b2>".
    locale = {"LC_ALL": "C"} if language == "R" else {}
    done = run(language, server, tmp_path, FIXQ_KEY=key, FIXQ_EXAMPLE=example, **locale)
    assert done.returncode == 0, f"{language} failed:\n{done.stdout}\n{done.stderr}\n{server.logs()}"
    output = done.stdout
    job_id = (tmp_path / "job_id.txt").read_text().strip()
    assert f"submitted job {job_id}" in output
    with httpx.Client(base_url=server.url, headers={"Authorization": f"Bearer {key}"}, timeout=30) as client:
        record = client.get(f"/v1/jobs/{job_id}").json()
        assert record["owner"] == KEY_NAME  # the script sent the key
        if language == "R" and example == "household_saving":
            assert record["label"] == "household saving at a 2% interest rate, β = 0.96 (invented scenario)"
        result = client.get(f"/v1/jobs/{job_id}/result").json()

    axis_order = result.get("axis_order") or list(result["axes"])
    shape = tuple(len(result["axes"][name]) for name in axis_order)
    names, value = read_native(tmp_path / "value.txt")
    assert names == axis_order and value.shape == shape
    assert_same(value, result["value"])
    assert {path.name for path in tmp_path.glob("policy.*.txt")} == {f"policy.{c}.txt" for c in result["policy"]}
    for choice, expected in result["policy"].items():
        names, policy = read_native(tmp_path / f"policy.{choice}.txt")
        assert names == axis_order and policy.shape == shape
        assert_same(policy, expected)
    if example == "household_saving":
        # What the array means, not only how it is laid out: the poorest household at the lowest
        # income sits at the borrowing limit, and more assets today never mean fewer tomorrow.
        assert shape == (160, 5) and policy[0, 0] == -1.0 and (np.diff(policy, axis=0) >= 0).all()

    # Progress: R follows the live log, so it shows every entry of the result's log; Octave polls
    # the job record, so it shows some of them (none when the job ends before the first poll).
    shown = [int(n) for n in re.findall(r"^  iteration (\d+), error bound", output, re.MULTILINE)]
    logged = [entry["iteration"] for entry in result["log"]]
    if language == "R":
        assert shown == logged
    else:
        assert shown == sorted(set(shown)) and set(shown) <= set(logged)

    assert "CSV and JSON values agree" in output
    assert "the bad document was refused with 422" in output
    assert "  solver.tolerance: must be greater than" in output
    if "period" not in axis_order:  # a finite horizon allows any positive discount
        assert "  discount: the discount factor must lie strictly between 0 and 1" in output


@pytest.mark.parametrize("language", LANGUAGES)
def test_without_a_key_the_script_stops_with_the_reason(language: str, server: LiveServer, tmp_path: Path) -> None:
    done = run(language, server, tmp_path)
    assert done.returncode != 0
    said = done.stdout + done.stderr
    assert "401" in said and "this API needs a key" in said
    assert not (tmp_path / "value.txt").exists()


@pytest.mark.parametrize("language", LANGUAGES)
def test_the_script_follows_axis_order_and_rides_out_an_outage(
    language: str, server: LiveServer, key: str, tmp_path: Path
) -> None:
    # One run for two things (R and Octave start slowly): the axis order comes from axis_order, and
    # a wait that meets a cut connection and a 503 on the job's record, log and result goes on.
    with ReorderingProxy(server.url, outage=True) as proxy:
        done = run(language, server, tmp_path, FIXQ_URL=proxy.url, FIXQ_KEY=key, FIXQ_EXAMPLE="glassblower_life_cycle")
    assert done.returncode == 0, f"{language} failed:\n{done.stdout}\n{done.stderr}\n{server.logs()}"
    job_id = (tmp_path / "job_id.txt").read_text().strip()
    assert f"cut /v1/jobs/{job_id}/result" in proxy.interrupted
    assert f"503 /v1/jobs/{job_id}/result" in proxy.interrupted
    assert "fixq is unreachable for now" in done.stdout
    with httpx.Client(base_url=server.url, headers={"Authorization": f"Bearer {key}"}, timeout=30) as client:
        result = client.get(f"/v1/jobs/{job_id}/result").json()
    names, value = read_native(tmp_path / "value.txt")
    assert names == ["period", "savings", "orders"] and value.shape == (60, 150, 3)
    assert_same(value, result["value"])
    if language == "R":  # the live log, cut and refused once, opened again where it stopped
        assert {f"cut /v1/jobs/{job_id}/log", f"503 /v1/jobs/{job_id}/log"} <= set(proxy.interrupted)
        shown = [int(n) for n in re.findall(r"^  iteration (\d+), error bound", done.stdout, re.MULTILINE)]
        assert shown == [entry["iteration"] for entry in result["log"]]


def test_the_python_script_rides_out_an_outage(server: LiveServer, key: str, tmp_path: Path) -> None:
    # python_httpx.py (run as shipped by tests/service/test_examples.py too) through the same outage.
    with ReorderingProxy(server.url, outage=True) as proxy:
        environment = {**os.environ, "FIXQ_URL": proxy.url, "FIXQ_KEY": key}
        done = subprocess.run([sys.executable, str(CLIENTS / "python_httpx.py")], cwd=tmp_path, env=environment,
                              capture_output=True, text=True, timeout=RUN_TIMEOUT_S)  # fmt: skip
    assert done.returncode == 0, f"{done.stdout}\n{done.stderr}\n{server.logs()}"
    job_id = re.search(r"submitted job ([0-9a-f]{16})", done.stdout).group(1)
    assert {f"cut /v1/jobs/{job_id}/result", f"503 /v1/jobs/{job_id}/result"} <= set(proxy.interrupted)
    assert "fixq is unreachable for now" in done.stderr
    assert "policy array shape (160, 5) (assets x income)" in done.stdout


@pytest.mark.skipif(not (shutil.which("curl") and shutil.which("jq")), reason="curl and jq are needed for this example")
def test_the_curl_script_rides_out_an_outage(server: LiveServer, key: str, tmp_path: Path) -> None:
    # curl_lifecycle.sh (run as shipped by tests/service/test_examples.py too) through the same outage.
    with ReorderingProxy(server.url, outage=True) as proxy:
        environment = {**os.environ, "FIXQ_URL": proxy.url, "FIXQ_KEY": key}
        done = subprocess.run(["bash", str(CLIENTS / "curl_lifecycle.sh"), str(tmp_path)], cwd=tmp_path,
                              env=environment, capture_output=True, text=True, timeout=RUN_TIMEOUT_S)  # fmt: skip
    assert done.returncode == 0, f"{done.stdout}\n{done.stderr}\n{server.logs()}"
    job_id = re.search(r"job ([0-9a-f]{16}) is done", done.stdout).group(1)
    assert {f"cut /v1/jobs/{job_id}/result", f"503 /v1/jobs/{job_id}/log"} <= set(proxy.interrupted)
    assert "fixq is unreachable for now (HTTP 503)" in done.stderr
    assert "wear 8\treplace" in done.stdout
    assert json.loads((tmp_path / "result.json").read_text())["axis_order"] == ["state_label"]
    table = (tmp_path / "result.csv").read_text().splitlines()
    assert table[0] == "state_label,value,action" and len(table) == 11
