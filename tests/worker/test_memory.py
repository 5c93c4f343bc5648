"""The per-job memory limit: a job that outgrows its promise fails cleanly and the process lives on."""

from __future__ import annotations

import json
import pathlib
import resource
import subprocess
import sys

import pytest

from worker.memory import MARGIN_BYTES, SAFETY_FACTOR, data_bytes, memory_limit

REPO = pathlib.Path(__file__).resolve().parents[2]
linux_only = pytest.mark.skipif(not sys.platform.startswith("linux"), reason="RLIMIT_DATA is enforced on Linux")

OUTGROWN_JOB = r"""
import importlib, json, resource, threading, time
resource.setrlimit(resource.RLIMIT_AS, (6 << 30, 6 << 30))  # never let a broken limit take the machine down

estimate_module = importlib.import_module("worker.estimate")  # the package exports a function of that name
import worker.gridmodel  # numba and the kernels' modules loaded before the job, as in a warm worker
import worker.memory as memory
from tests._documents import GROWTH, grid_document, machine_shop
from worker import solve
from worker.errors import TooLarge

memory.MARGIN_BYTES = 48 << 20
sized = estimate_module.estimate


def understated(doc, **kwargs):
    # An estimate that is not an upper bound: the promise the limit must enforce is 1 MiB.
    return {**sized(doc, **kwargs), "bytes": 1 << 20}


estimate_module.estimate = understated
beats = []
stop = threading.Event()


def heartbeat():
    while not stop.is_set():
        beats.append(str(time.monotonic()) * 4)
        del beats[:-10]
        time.sleep(0.01)


thread = threading.Thread(target=heartbeat)
thread.start()
before = resource.getrlimit(resource.RLIMIT_DATA)
model = {**GROWTH, "states": {"k": {"min": 2.7, "max": 8.2, "points": 2000}}}
out = {}
try:
    solve(grid_document(model), limits={"enforce_memory": True})
    out["first"] = "solved"
except TooLarge as exc:
    out["first"] = "too_large"
    out["message"] = exc.errors[0]["message"]
    out["path"] = exc.errors[0]["path"]
    out["context"] = {key: exc.context[key] for key in ("estimate_bytes", "limit_bytes", "peak_rss_bytes")}
    out["estimate_in_context"] = exc.context["estimate"]["pairs"]
out["restored"] = resource.getrlimit(resource.RLIMIT_DATA) == before
beats_then = len(beats), beats[-1]
time.sleep(0.1)
out["heartbeat_alive"] = thread.is_alive() and beats[-1] != beats_then[1]
out["second"] = solve(machine_shop(), limits={"enforce_memory": True})["status"]
stop.set()
thread.join()
print(json.dumps(out))
"""


@linux_only
def test_a_job_that_outgrows_its_promise_fails_cleanly_and_the_next_job_runs() -> None:
    done = subprocess.run(
        [sys.executable, "-c", OUTGROWN_JOB],
        capture_output=True,
        text=True,
        timeout=300,
        cwd=REPO,
        env={"PATH": "/usr/bin:/bin", "FIXQ_COLD_BRIDGE": "off", "PYTHONPATH": str(REPO)},
    )
    assert done.returncode == 0, done.stderr[-3000:]
    out = json.loads(done.stdout.strip().splitlines()[-1])
    assert out["first"] == "too_large", out
    assert out["path"] == "model"
    message = out["message"]
    assert "ran out of memory" in message and "size estimate was 1 MiB" in message
    assert "peak resident memory reached" in message
    assert out["context"]["estimate_bytes"] == 1 << 20
    assert out["context"]["limit_bytes"] > 0 and out["context"]["peak_rss_bytes"] > 0
    assert out["estimate_in_context"] == 2000 * 3 * 2000
    assert out["restored"] and out["heartbeat_alive"]
    assert out["second"] == "converged"


@linux_only
def test_the_limit_is_the_current_size_plus_the_promise_and_is_restored() -> None:
    before = resource.getrlimit(resource.RLIMIT_DATA)
    current = data_bytes()
    assert current is not None
    with memory_limit(100 << 20) as cap:
        assert cap.limit is not None
        soft, _ = resource.getrlimit(resource.RLIMIT_DATA)
        assert soft == cap.limit
        expected = current + SAFETY_FACTOR * (100 << 20) + MARGIN_BYTES
        assert abs(cap.limit - expected) < 64 << 20
        with memory_limit(1 << 40) as looser:
            assert looser.limit is None  # the tighter outer limit stays
            assert resource.getrlimit(resource.RLIMIT_DATA)[0] == soft
        assert resource.getrlimit(resource.RLIMIT_DATA)[0] == soft
    assert resource.getrlimit(resource.RLIMIT_DATA) == before


def test_other_errors_pass_through_and_the_limit_is_restored() -> None:
    before = resource.getrlimit(resource.RLIMIT_DATA)
    with pytest.raises(ValueError, match="not memory"):
        with memory_limit(100 << 20):
            raise ValueError("not memory")
    assert resource.getrlimit(resource.RLIMIT_DATA) == before
