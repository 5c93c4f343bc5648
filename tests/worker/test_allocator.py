"""worker.allocator: glibc's malloc thresholds set once per process, off by FIXQ_MALLOC_TUNING, and
repeated small solves page-faulting far less with them (minor faults counted by getrusage)."""

from __future__ import annotations

import json
import os
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest

from worker import allocator

ROOT = Path(__file__).resolve().parents[2]


class Recorder:
    """Stands in for glibc's mallopt: records its calls, answers success."""

    def __init__(self) -> None:
        self.calls: list[tuple[int, int]] = []

    def __call__(self, parameter: int, value: int) -> int:
        self.calls.append((parameter, value))
        return 1


@pytest.fixture
def fresh(monkeypatch: pytest.MonkeyPatch) -> Recorder:
    """A process where the thresholds were never tried, with a recording mallopt."""
    recorder = Recorder()
    monkeypatch.setattr(allocator, "_applied", [])
    monkeypatch.setattr(allocator, "_glibc_mallopt", lambda: recorder)
    monkeypatch.delenv("FIXQ_MALLOC_TUNING", raising=False)
    return recorder


def test_thresholds_are_set_once(fresh: Recorder) -> None:
    assert allocator.keep_freed_memory() is True
    assert allocator.keep_freed_memory() is True
    # glibc's <malloc.h>: M_MMAP_THRESHOLD is -3, M_TRIM_THRESHOLD is -1.
    assert fresh.calls == [(-3, allocator.MMAP_THRESHOLD_BYTES), (-1, allocator.TRIM_THRESHOLD_BYTES)]
    assert allocator.MMAP_THRESHOLD_BYTES == 4 * 2**20 and allocator.TRIM_THRESHOLD_BYTES == 64 * 2**20


@pytest.mark.parametrize("word", ["off", "0", "false", "no", " OFF "])
def test_switched_off_is_a_no_op(fresh: Recorder, monkeypatch: pytest.MonkeyPatch, word: str) -> None:
    monkeypatch.setenv("FIXQ_MALLOC_TUNING", word)
    assert allocator.keep_freed_memory() is False
    assert allocator.keep_freed_memory() is False
    assert fresh.calls == []
    monkeypatch.setenv("FIXQ_MALLOC_TUNING", "on")  # switched on later in the process: applied then, once
    assert allocator.keep_freed_memory() is True
    assert len(fresh.calls) == 2


def test_without_glibc_nothing_is_called(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(allocator, "_applied", [])
    monkeypatch.setattr(allocator, "_glibc_mallopt", lambda: None)
    monkeypatch.delenv("FIXQ_MALLOC_TUNING", raising=False)
    assert allocator.keep_freed_memory() is False
    assert allocator._applied == [False]  # tried once; not looked up again


def test_a_refused_setting_is_reported(fresh: Recorder, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(allocator, "_glibc_mallopt", lambda: (lambda parameter, value: 0))
    assert allocator.keep_freed_memory() is False


def test_solve_applies_it(fresh: Recorder) -> None:
    from tests._documents import machine_shop
    from worker import solve

    solve(machine_shop())
    assert [parameter for parameter, _ in fresh.calls] == [-3, -1]


_FAULTS = textwrap.dedent(
    """
    import json, resource, sys
    import numpy as np
    from tests._documents import array_tabular
    from worker import solve
    from worker.arrays import encode_array
    rng = np.random.default_rng(3)
    states, actions = 100, 3
    document = array_tabular(rng.uniform(0.0, 1.0, (states, actions)),
                             encode_array(rng.dirichlet(np.ones(states), (states, actions))), pack=True,
                             solver={"method": "policy_iteration"})
    for _ in range(3):
        solve(document)
    before = resource.getrusage(resource.RUSAGE_SELF).ru_minflt
    for _ in range(20):
        solve(document)
    print(json.dumps((resource.getrusage(resource.RUSAGE_SELF).ru_minflt - before) / 20))
    """
)


def _faults_per_solve(tuning: str) -> float:
    env = {**os.environ, "FIXQ_MALLOC_TUNING": tuning, "PYTHONPATH": str(ROOT)}
    env.pop("GLIBC_TUNABLES", None)
    done = subprocess.run([sys.executable, "-c", _FAULTS], cwd=ROOT, env=env, capture_output=True, text=True,
                          timeout=120, check=True)
    return float(json.loads(done.stdout.strip().splitlines()[-1]))


@pytest.mark.skipif(allocator._glibc_mallopt() is None, reason="the thresholds exist only in glibc")
def test_repeated_small_solves_fault_far_less() -> None:
    # A 100-state dense tabular model (transitions 240 kB): with glibc's defaults each solve touches
    # fresh pages (about 40-60 minor faults a solve on the test machine); with the thresholds, about none.
    default = _faults_per_solve("off")
    if default < 10:  # another glibc whose defaults keep this solve's memory: nothing to compare
        pytest.skip(f"glibc's defaults fault only {default} times a solve here")
    tuned = _faults_per_solve("on")
    assert tuned <= default / 4, f"{tuned} faults a solve with the thresholds, {default} without"
