"""The ``fixq`` command: client commands against the in-process app, and ``fixq run`` for real."""

from __future__ import annotations

import io
import json
import os
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import httpx
import pytest
from fastapi import FastAPI

from service import cli, progress
from service.client import FixqClient
from service.embedded_redis import free_port
from tests._documents import machine_shop
from tests.service._http import ASGIBridge, run_inline


@pytest.fixture
def fixq(app: FastAPI, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]):
    """Run ``fixq ARGS`` in process against the app; returns (exit code, stdout, stderr)."""
    monkeypatch.setattr(cli, "FixqClient", lambda: FixqClient(transport=ASGIBridge(app)))

    def run(*args: str) -> tuple[int, str, str]:
        try:
            code = cli.main(list(args))
        except SystemExit as exc:
            code = int(exc.code or 0)
        out, err = capsys.readouterr()
        return code, out, err

    return run


@pytest.fixture
def document_file(tmp_path: Path) -> Path:
    path = tmp_path / "shop.json"
    path.write_text(json.dumps(machine_shop()))
    return path


def test_every_command_parses() -> None:
    parser = cli._parser()
    for argv in (["run", "--host", "0.0.0.0", "--port", "9000"], ["api", "--port", "1"], ["worker", "--burst"],
                 ["submit", "f.json", "--wait"], ["status", "abc"], ["result", "abc", "-o", "x", "--format", "csv"],
                 ["check", "f.json"], ["cancel", "abc"]):  # fmt: skip
        assert parser.parse_args(argv).command == argv[0]
    with pytest.raises(SystemExit) as exc:
        parser.parse_args(["result", "abc", "--format", "xml"])
    assert exc.value.code == 2


def test_check_prints_the_estimate(fixq, document_file: Path) -> None:
    code, out, _ = fixq("check", str(document_file))
    assert code == 0
    assert json.loads(out)["estimate"]["points"] == 3


def test_invalid_documents_exit_2_naming_the_paths(fixq, tmp_path: Path) -> None:
    bad = tmp_path / "bad.json"
    bad.write_text(json.dumps(machine_shop(discount=1.5)))
    code, out, err = fixq("submit", str(bad))
    assert code == 2 and out == ""
    assert "discount:" in err
    broken = tmp_path / "broken.json"
    broken.write_text('{"version": 1,')
    code, _, err = fixq("check", str(broken))
    assert code == 2 and "not valid JSON" in err and "line 1" in err
    code, _, err = fixq("submit", str(tmp_path / "missing.json"))
    assert code == 2 and "cannot read" in err
    not_a_number = tmp_path / "nan.json"
    not_a_number.write_text('{"version": 1, "discount": NaN}')
    code, _, err = fixq("submit", str(not_a_number))
    assert code == 2 and "NaN is not JSON" in err


def test_submit_status_result_and_cancel(fixq, document_file: Path, tmp_path: Path) -> None:
    code, out, _ = fixq("submit", str(document_file))
    job_id = out.strip()
    assert code == 0 and len(job_id) == 16
    code, out, _ = fixq("status", job_id)
    assert code == 0 and "queued" in out and "machine shop" in out
    code, _, err = fixq("result", job_id)
    assert code == 1 and "409" in err and "queued" in err
    run_inline(job_id)
    code, out, _ = fixq("status", job_id, "--json")
    record = json.loads(out)
    assert code == 0 and record["state"] == "done"
    code, out, _ = fixq("result", job_id)
    assert code == 0 and json.loads(out)["iterations"] == record["iterations"]
    table = tmp_path / "table.csv"
    code, out, _ = fixq("result", job_id, "--format", "csv", "-o", str(table))
    assert code == 0 and out == ""
    assert table.read_text().splitlines()[0] == "state_label,value,action"
    other = tmp_path / "other.json"
    other.write_text(json.dumps(machine_shop(discount=0.8)))
    code, out, _ = fixq("submit", str(other))
    code, out, _ = fixq("cancel", out.strip())
    assert code == 0 and "canceled" in out


def test_unknown_job_exits_1(fixq) -> None:
    code, _, err = fixq("status", "0123456789abcdef")
    assert code == 1 and "404" in err


def test_submit_wait_shows_progress_and_exits_by_the_outcome(fixq, document_file: Path, monkeypatch) -> None:
    monkeypatch.setattr(progress, "PROGRESS_EVERY_S", 0.0)
    submitted: list[str] = []
    original = FixqClient.submit

    def submit_then_solve(self: FixqClient, document: dict, **kwargs: object) -> dict:
        record = original(self, document, **kwargs)
        submitted.append(record["id"])
        threading.Timer(0.2, run_inline, [record["id"]]).start()
        return record

    monkeypatch.setattr(FixqClient, "submit", submit_then_solve)
    code, out, err = fixq("submit", str(document_file), "--wait")
    assert code == 0 and out.strip() == submitted[0]
    lines = [line for line in err.splitlines() if line.startswith("iteration")]
    assert len(lines) > 10
    assert "distance" in lines[0] and "error bound" in lines[0]
    assert f"job {submitted[0]} done: converged" in err

    canceled: list[str] = []

    def submit_then_cancel(self: FixqClient, document: dict, **kwargs: object) -> dict:
        record = original(self, document, **kwargs)
        canceled.append(record["id"])
        self.cancel(record["id"])
        return record

    monkeypatch.setattr(FixqClient, "submit", submit_then_cancel)
    # Another discount: the same document again would reuse the done job's result.
    other = document_file.with_name("other.json")
    other.write_text(json.dumps(machine_shop(discount=0.8)))
    code, _, err = fixq("submit", str(other), "--wait")
    assert code == 1 and f"job {canceled[0]} canceled" in err


def test_unreachable_api_exits_3(monkeypatch, document_file: Path, capsys) -> None:
    monkeypatch.setenv("FIXQ_URL", f"http://127.0.0.1:{free_port()}")
    assert cli.main(["submit", str(document_file)]) == 3
    assert "cannot reach" in capsys.readouterr().err


def test_progress_bar_fills_on_a_log_scale() -> None:
    bar = progress.ProgressBar(io.StringIO(), tolerance=1e-6)
    bar.update({"iteration": 1, "distance": 1.0, "error_bound": 1.0})
    assert bar.fraction(1.0) == 0.0
    assert bar.fraction(1e-3) == pytest.approx(0.5)
    assert bar.fraction(1e-7) == 1.0


def test_progress_bar_of_a_finite_horizon_counts_periods() -> None:
    stream = io.StringIO()
    bar = progress.ProgressBar(stream, tolerance=1e-6)
    bar.update({"iteration": 15, "period": 45, "periods": 60, "distance": 1.0, "error_bound": 1e-12})
    bar.close()
    line = stream.getvalue()
    assert "period     45  (15 of 60 done)" in line and "[######..................]" in line


def wait_healthy(url: str, process: subprocess.Popen, timeout_s: float = 60.0) -> None:
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        assert process.poll() is None, "the process exited early"
        try:
            if httpx.get(f"{url}/healthz", timeout=1.0).status_code == 200:
                return
        except httpx.TransportError:
            pass
        time.sleep(0.2)
    raise AssertionError(f"{url} never became healthy")


def children_of(pid: int) -> list[int]:
    path = Path(f"/proc/{pid}/task/{pid}/children")
    return [int(p) for p in path.read_text().split()] if path.exists() else []


def alive(pid: int) -> bool:
    try:
        return Path(f"/proc/{pid}/stat").read_text().split()[2] != "Z"
    except FileNotFoundError:
        return False


def test_run_starts_redis_api_and_worker_and_stops_them_all(tmp_path: Path, document_file: Path) -> None:
    port = free_port()
    env = {k: v for k, v in os.environ.items() if k not in ("FIXQ_REDIS_URL", "FIXQ_AUTH")}
    env["FIXQ_EMBEDDED_REDIS_DIR"] = str(tmp_path / "redis")
    env["FIXQ_URL"] = f"http://127.0.0.1:{port}"
    run = subprocess.Popen(
        [sys.executable, "-m", "service.cli", "run", "--port", str(port)],
        env=env, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True,
    )  # fmt: skip
    try:
        wait_healthy(env["FIXQ_URL"], run)
        children = children_of(run.pid)
        assert len(children) == 3  # redis-server, the API, the worker
        submitted = subprocess.run(
            [sys.executable, "-m", "service.cli", "submit", str(document_file), "--wait"],
            env=env, capture_output=True, text=True, timeout=120,
        )  # fmt: skip
        assert submitted.returncode == 0, submitted.stderr
        assert "done: converged" in submitted.stderr
    finally:
        run.send_signal(signal.SIGTERM)
        output, _ = run.communicate(timeout=60)
    assert run.returncode == 0, output
    assert "auth is OFF" in output and "loopback" in output
    assert not [pid for pid in children if alive(pid)]
    assert (tmp_path / "redis" / "appendonlydir").exists() or any((tmp_path / "redis").glob("appendonly*"))


def test_examples_lists_the_bundled_problems_and_writes_one_out(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    from service.cli import main
    from service.examples import example_names, load_example
    from worker.document import parse_document

    assert main(["examples"]) == 0
    listing = capsys.readouterr().out.splitlines()
    assert [line.split()[0] for line in listing] == example_names()
    assert "10 points" in next(line for line in listing if line.startswith("machine_replacement"))
    target = tmp_path / "shop.json"
    assert main(["examples", "machine_replacement", "-o", str(target)]) == 0
    written = json.loads(target.read_text())
    assert written == load_example("machine_replacement")
    parse_document(written)
    assert main(["examples", "no_such_example"]) == 2
