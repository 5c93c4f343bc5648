"""A resumed solve with a coarse start decodes its Redis checkpoint once.

``worker.coarse_solve`` decides whether a solve starts coarse by asking the checkpoint whether it holds a state;
the service's :class:`service.checkpoints.RedisCheckpoint` answers that from Redis without decoding the state
(``has_state``), so the solve's own ``load`` is the only decode (and the only rewrite of the job's log).  The
model is the invented growth economy of ``tests/worker/test_coarse_start.py`` on a grid just large enough for
a coarse start; the checkpoint is a real one, saved by a solve that was stopped mid-way, stored in the private
Redis of the fixtures in the service's own format.
"""

from __future__ import annotations

from types import SimpleNamespace
from typing import Any

import numpy as np
import pytest

from service import checkpoints
from service.checkpoints import RedisCheckpoint, encode_checkpoint
from service.store import JobStore
from tests._documents import log_growth
from tests._memory_checkpoint import Crash, MemoryCheckpoint
from worker.coarse_start import COARSE_MIN_POINTS
from worker.solve import solve

JOB = "00c0ffee00c0ffee"


def _growth() -> dict[str, Any]:
    """Invented growth on ``k ∈ [0.05, 0.4]`` with a continuous choice, a checkpoint at every iteration."""
    model = log_growth(alpha=0.3, k_min=0.05, k_max=0.4, points=COARSE_MIN_POINTS, interpolation="linear")
    model["choices"] = {"k_next": {"next_of": "k", "continuous": True}}
    model["hints"] = {"concave": True, "monotone": True}
    return {"version": 1, "discount": 0.95, "model": model,
            "solver": {"method": "howard", "tolerance": 1e-10, "checkpoint_s": 1e-6}}


def test_a_resumed_coarse_start_solve_decodes_its_checkpoint_once(store: JobStore,
                                                                  monkeypatch: pytest.MonkeyPatch) -> None:
    document = _growth()
    memory = MemoryCheckpoint(crash_after=2)
    with pytest.raises(Crash):
        solve(document, checkpoint=memory)
    state = memory.state
    assert state is not None
    store.redis.set(store.keys.checkpoint(JOB), b"fixq-ckpt:%d\n" % state["iteration"] + encode_checkpoint(state))
    logs: list[list[dict]] = []
    execution = SimpleNamespace(store=store, job_id=JOB, token="t", replace_log=logs.append, still_ours=lambda: True)
    decodes: list[int] = []
    original = checkpoints.decode_checkpoint

    def counted(payload: bytes) -> dict[str, Any]:
        decodes.append(len(payload))
        return original(payload)

    monkeypatch.setattr(checkpoints, "decode_checkpoint", counted)
    saved = RedisCheckpoint(execution)
    saved.save = lambda state: None  # type: ignore[method-assign]  # no lease here: the resume only reads
    assert saved.has_state()
    resumed = solve(document, checkpoint=saved)
    assert len(decodes) == 1 and len(logs) == 1
    assert resumed["diagnostics"]["resumed_from_iteration"] == state["iteration"]
    assert "coarse_start" not in resumed["diagnostics"]
    # The same fixed point as a solve that was never stopped (within both error bounds).
    whole = solve(document)
    gap = np.abs(np.array(resumed["value"]) - np.array(whole["value"])).max()
    assert gap <= resumed["error_bound"] + whole["error_bound"]
    store.redis.delete(store.keys.checkpoint(JOB))
    assert not saved.has_state()
