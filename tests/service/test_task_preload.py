"""A worker process imports what jobs import lazily (``service.task.preload``) before it takes a job."""

from __future__ import annotations

import json
import subprocess
import sys
from typing import Any

import pytest
from rq import Queue


def test_a_fresh_process_has_the_grid_models_and_the_searches_loaded_after_preload() -> None:
    # A fresh interpreter: in this one a test may have imported them already.
    source = (
        "import json, sys\n"
        "import service.task\n"
        "lazy = ('worker.gridmodel', 'worker.search', 'scipy.optimize', 'numba')\n"
        "before = [name for name in lazy if name in sys.modules]\n"
        "service.task.preload()\n"
        "print(json.dumps([before, [name for name in lazy if name not in sys.modules]]))\n"
    )
    out = subprocess.run([sys.executable, "-c", source], capture_output=True, text=True, timeout=120, check=True)
    before, missing = json.loads(out.stdout)
    assert "worker.search" not in before and "scipy.optimize" not in before  # lazily imported until then
    assert missing == [], out.stdout


def test_run_worker_preloads_before_its_worker_takes_a_job(monkeypatch: pytest.MonkeyPatch, redis_url: str) -> None:
    import service.task as task

    order: list[str] = []

    class RecordingWorker:
        def __init__(self, queues: list[Queue], **kwargs: Any) -> None:
            order.append("worker")

        def work(self, **kwargs: Any) -> bool:
            order.append("work")
            return False

    monkeypatch.setattr(task, "preload", lambda: order.append("preload"))
    monkeypatch.setattr(task, "Worker", RecordingWorker)
    monkeypatch.setattr(task, "SimpleWorker", RecordingWorker)
    task.run_worker(burst=True)
    assert order == ["preload", "worker", "work"]
