"""The kernel cache: numbers in formulas share modules, the folder is private and bounded, a process is recycled."""

from __future__ import annotations

import fcntl
import os
import pathlib
import stat
import subprocess
import sys
import tempfile
import threading
import time

import numpy as np
import pytest

from tests._documents import grid_document
from worker import _codegen
from worker._codegen import cache
from worker._codegen.literals import lift_literals
from worker._codegen.source import _GENERATORS, _WORKER
from worker.document import parse_document
from worker.feasibility import model_data
from worker.gridmodel import compile_grid

REPO = pathlib.Path(__file__).resolve().parents[2]

NUDGED: dict = {
    "params": {"a": 0.5},
    "states": {"k": {"min": 1.0, "max": 2.0, "points": 9}},
    "choices": {"k2": {"next_of": "k"}},
    "reward": "a * k - (k2 - k)**2 + 1e-9",
    "feasible": ["k2 > 0.3 * k"],
}
"""An invented model whose reward ends in a small number that the tests change."""


def nudged(reward: str) -> dict:
    return {**NUDGED, "reward": reward}


def kernel_name(model: dict) -> str:
    """The module name of a model's on-the-fly kernels, without compiling them."""
    data = model_data(parse_document(grid_document(model)))
    layout = _codegen.layout_for(data.setter, len(data.shocks), len(data.choices), "expr", False)
    return _codegen.module_name(_codegen.module_source(layout, lift_literals(data.source)[0]))


def table_source(tag: str) -> str:
    """A real generated module's source (table backend: importing it compiles nothing), made unique by ``tag``."""
    layout = _codegen.layout_for((0,), 1, 1, "table", False)
    return _codegen.module_source(layout, None) + f"\n# {tag}\n"


@pytest.fixture
def kernels(tmp_path, monkeypatch) -> pathlib.Path:
    folder_path = tmp_path / "kernels"
    monkeypatch.setenv("FIXQ_KERNEL_CACHE", str(folder_path))
    return folder_path


def test_documents_differing_only_in_a_number_share_one_module(kernels) -> None:
    first = compile_grid(parse_document(grid_document(NUDGED)), reward_storage="on_the_fly")
    second = compile_grid(
        parse_document(grid_document(nudged("a * k - (k2 - k)**2 + 2e-9"))), reward_storage="on_the_fly"
    )
    assert second._kernels is first._kernels
    assert len(list(kernels.glob("fixq_kernels_*.py"))) == 1
    values = np.linspace(-1.0, 1.0, first.n)
    for model, problem in ((NUDGED, first), (nudged("a * k - (k2 - k)**2 + 2e-9"), second)):
        # No transcendental functions: the reward tables (numpy) give the same bits as the kernels.
        reference = compile_grid(parse_document(grid_document(model)), reward_storage="tables")
        got, want = problem.bellman_step(values), reference.bellman_step(values)
        assert np.array_equal(got[0], want[0]) and np.array_equal(got[1], want[1])
    assert not np.array_equal(first.bellman_step(values)[0], second.bellman_step(values)[0])


def test_the_folder_is_trimmed_after_a_first_load_only(kernels, monkeypatch) -> None:
    # Scanning the folder costs more than a small solve: a structure this process holds skips it.
    trims: list[int] = []
    monkeypatch.setattr(_codegen, "trim", lambda *args: trims.append(1) or 0)
    document = parse_document(grid_document(nudged("a * k - abs(k2 - k)**3 + sqrt(k) * 5e-9")))
    compile_grid(document, reward_storage="on_the_fly")
    compile_grid(document, reward_storage="on_the_fly")
    assert len(trims) == 1


MIXED: dict = {
    "params": {"a": 0.5, "t": 2.0},
    "states": {"k": {"min": 0.5, "max": 3.0, "points": 30}},
    "choices": {"k2": {"next_of": "k"}},
    "define": {"c": "1.3 * k**0.37 + 0.9 * k - k2 / 3.0", "u": "c**0.71 / 0.71 - 0.04 * abs(k2 - 1.1)**2.3"},
    "reward": "log(c) * 0.2 + u + 1.7**(k - k2) - exp(-0.7 * k2) + where(k2 > 1.2, 0.4, -0.1) + min(c, 2.5)"
    " + sqrt(k2) * 1e-9 + clip(k, 0.9, 2.2) + k**2 - 2**k2 + k2**-1 + k**0.5 + a * 0.96**t + k**t",
    "feasible": ["c > 0.05", "k2 >= 0.6 or k < 1"],
}
"""An invented model with numbers in every role: lifted ones, and structural exponents and bases."""


def test_numbers_as_params_give_the_same_bits_as_numbers_in_the_source() -> None:
    data = model_data(parse_document(grid_document(MIXED)))
    layout = _codegen.layout_for(data.setter, len(data.shocks), len(data.choices), "expr", False)
    lifted, numbers = lift_literals(data.source)
    assert len(numbers) > 15
    outputs = []
    for model, params in (
        (data.source, data.param_values),
        (lifted, _codegen.kernel_params(data.param_values, numbers)),
    ):
        module = _codegen.load(_codegen.module_source(layout, model))
        ctx = _codegen.context(params, data.state_grids, data.shock_table, data.choice_grids)
        n = data.state_grids[0].size
        out = (np.empty(n), np.empty(n, dtype=np.int64), np.empty(n, dtype=np.int64), np.empty(n, dtype=np.int64))
        module.bellman_full(np.random.default_rng(0).normal(size=(1, n)), 0.95, ctx, *out)
        outputs.append(out)
    for before, after in zip(*outputs):
        assert np.array_equal(before.view(np.int64), after.view(np.int64))


def test_module_names_follow_the_structure_not_the_numbers() -> None:
    base = kernel_name(NUDGED)
    assert kernel_name(nudged("a * k - (k2 - k)**2 + 3.25e-7")) == base
    assert kernel_name({**NUDGED, "feasible": ["k2 > 0.25 * k"]}) == base
    assert kernel_name(nudged("a * k - abs(k2 - k)**2.7 + 1e-9")) == kernel_name(
        nudged("a * k - abs(k2 - k)**1.3 + 5.0")
    )
    assert kernel_name(nudged("a * k - 3.0**(k2 - k) + 1e-9")) == kernel_name(nudged("a * k - 1.7**(k2 - k) + 1"))
    # Structural numbers, which LLVM folds into other functions: see worker/_codegen/literals.py.
    assert kernel_name(nudged("a * k - (k2 - k)**3 + 1e-9")) != base
    assert kernel_name(nudged("a * k - 2.0**(k2 - k) + 1e-9")) != kernel_name(nudged("a * k - 3.0**(k2 - k) + 1e-9"))
    assert kernel_name(nudged("a * k - (k2 - k) + 1e-9")) != base


def test_generator_hash_covers_every_generator_file() -> None:
    hashed = {path for pattern in _GENERATORS for path in _WORKER.glob(pattern)}
    assert set((_WORKER / "_codegen").glob("*.py")) <= hashed
    assert set((_WORKER / "expressions").glob("*.py")) <= hashed
    for line in table_source("imports").splitlines():
        if line.startswith("from worker."):
            module = line.split()[1]
            assert REPO / (module.replace(".", "/") + ".py") in hashed, module


def test_a_world_writable_folder_is_refused_and_its_planted_module_never_runs(tmp_path, monkeypatch) -> None:
    shared = tmp_path / "shared"
    shared.mkdir()
    shared.chmod(0o777)
    source = table_source("planted")
    marker = tmp_path / "ran"
    (shared / f"{_codegen.module_name(source)}.py").write_text(f"open({str(marker)!r}, 'w').close()\n")
    monkeypatch.setenv("FIXQ_KERNEL_CACHE", str(shared))
    with pytest.raises(_codegen.UnsafeFolder, match="FIXQ_KERNEL_CACHE") as refused:
        _codegen.load(source)
    assert str(shared) in str(refused.value)
    assert not marker.exists()


@pytest.mark.skipif(os.getuid() != 0, reason="handing a folder to another uid needs root")
def test_a_folder_of_another_user_is_refused(tmp_path, monkeypatch) -> None:
    theirs = tmp_path / "theirs"
    theirs.mkdir(mode=0o700)
    os.chown(theirs, 65534, 65534)
    monkeypatch.setenv("FIXQ_KERNEL_CACHE", str(theirs))
    with pytest.raises(_codegen.UnsafeFolder, match="belongs to uid 65534"):
        _codegen.kernel_cache_dir()


def test_a_symbolic_link_is_refused(tmp_path, monkeypatch) -> None:
    target = tmp_path / "target"
    target.mkdir(mode=0o700)
    (tmp_path / "link").symlink_to(target)
    monkeypatch.setenv("FIXQ_KERNEL_CACHE", str(tmp_path / "link"))
    with pytest.raises(_codegen.UnsafeFolder, match="symbolic link"):
        _codegen.kernel_cache_dir()


def test_without_a_home_the_temp_fallback_is_private(tmp_path, monkeypatch) -> None:
    blocker = tmp_path / "not-a-folder"
    blocker.write_text("")
    monkeypatch.delenv("FIXQ_KERNEL_CACHE", raising=False)
    monkeypatch.setenv("HOME", str(blocker / "home"))
    monkeypatch.setattr(tempfile, "tempdir", str(tmp_path))
    fallback = tmp_path / f"fixq-kernels-{os.getuid()}"
    # Pre-created by someone else, writable by all: refused, not used and not passed over.
    fallback.mkdir()
    fallback.chmod(0o777)
    with pytest.raises(_codegen.UnsafeFolder, match=str(fallback)):
        _codegen.kernel_cache_dir()
    fallback.rmdir()
    old = os.umask(0o277)  # even one that takes the owner's write bit: the mode must not depend on it
    try:
        assert _codegen.kernel_cache_dir() == fallback
    finally:
        os.umask(old)
    assert stat.S_IMODE(fallback.stat().st_mode) == 0o700


def test_an_own_folder_readable_by_others_is_made_private(tmp_path, monkeypatch) -> None:
    readable = tmp_path / "readable"
    readable.mkdir()
    readable.chmod(0o755)
    monkeypatch.setenv("FIXQ_KERNEL_CACHE", str(readable))
    assert _codegen.kernel_cache_dir() == readable
    assert stat.S_IMODE(readable.stat().st_mode) == 0o700


def fake_module(directory: pathlib.Path, index: int, size: int, used: float) -> str:
    """A module's files (source, bytecode cache, last-use stamp) of ``size`` bytes in all, last used at ``used``."""
    name = f"fixq_kernels_{index:024x}"
    (directory / "__pycache__").mkdir(mode=0o700, exist_ok=True)
    (directory / f"{name}.py").write_bytes(b"#" * (size // 2))
    (directory / "__pycache__" / f"{name}.run-3.py311.nbc").write_bytes(b"0" * (size - size // 2))
    (directory / f"{name}.used").touch()
    os.utime(directory / f"{name}.used", (used, used))
    return name


def survivors(directory: pathlib.Path) -> set[str]:
    return {path.stem for path in directory.glob("fixq_kernels_*.py")}


def test_trim_deletes_the_least_recently_used_modules_down_to_the_limit(kernels) -> None:
    _codegen.kernel_cache_dir()
    names = [fake_module(kernels, k, 1000, used=1_000_000.0 + k) for k in range(5)]
    os.utime(kernels / f"{names[0]}.used")  # the oldest is used again now
    assert _codegen.trim(limit=10_000) == 0
    assert _codegen.trim(limit=2_500) == 3000
    assert survivors(kernels) == {names[0], names[4]}
    assert not list((kernels / "__pycache__").glob(f"{names[1]}.*"))
    assert not (kernels / f"{names[1]}.lock").exists()


def test_the_cache_limit_setting_bounds_the_folder(kernels, monkeypatch) -> None:
    _codegen.kernel_cache_dir()
    for k in range(4):
        fake_module(kernels, k, 400_000, used=1_000_000.0 + k)
    monkeypatch.setenv("FIXQ_KERNEL_CACHE_MB", "1")
    _codegen.trim()
    assert len(survivors(kernels)) == 2


@pytest.fixture
def holder(kernels):
    """A second process that loads a module and keeps it until told to exit."""
    source = table_source("held elsewhere")
    script = (
        "import sys\n"
        "from worker import _codegen\n"
        "source = sys.stdin.read(int(sys.stdin.readline()))\n"
        "_codegen.load(source)\n"
        "print('loaded', flush=True)\n"
        "sys.stdin.readline()\n"
    )
    process = subprocess.Popen(
        [sys.executable, "-c", script],
        stdin=subprocess.PIPE,
        stdout=subprocess.PIPE,
        text=True,
        cwd=REPO,
        env={**os.environ, "PYTHONPATH": str(REPO)},
    )
    process.stdin.write(f"{len(source)}\n{source}")
    process.stdin.flush()
    assert process.stdout.readline().strip() == "loaded"
    try:
        yield process, _codegen.module_name(source)
    finally:
        if process.poll() is None:
            process.stdin.write("\n")
            process.stdin.flush()
        process.wait(timeout=60)
        process.stdin.close()
        process.stdout.close()


def test_a_module_held_by_another_process_survives_trim_and_goes_once_released(kernels, holder) -> None:
    process, name = holder
    for k in range(3):
        fake_module(kernels, k, 1000, used=1_000_000.0 + k)
    _codegen.trim(limit=0)
    assert survivors(kernels) == {name}
    process.stdin.write("\n")
    process.stdin.flush()
    process.wait(timeout=60)
    _codegen.trim(limit=0)
    assert survivors(kernels) == set()


def test_a_loader_that_waited_for_a_deleting_trim_starts_over(kernels) -> None:
    source = table_source("loaded while deleted")
    name = _codegen.module_name(source)
    _codegen.kernel_cache_dir()
    lock = kernels / f"{name}.lock"
    descriptor = os.open(lock, os.O_RDWR | os.O_CREAT, 0o600)
    fcntl.flock(descriptor, fcntl.LOCK_EX)  # as trim holds it while it deletes the module's files
    loaded: list = []
    loader = threading.Thread(target=lambda: loaded.append(_codegen.load(source)))
    loader.start()
    time.sleep(0.2)
    assert not loaded  # waiting for the lock
    lock.unlink()
    os.close(descriptor)
    loader.join(timeout=60)
    assert loaded and (kernels / f"{name}.py").read_text() == source
    # It holds the lock file in place now, not the deleted one, so another process's trim cannot take the module.
    assert os.fstat(cache._HELD[name].lock).st_ino == os.stat(lock).st_ino


def test_a_deleted_module_is_written_again_when_needed(kernels) -> None:
    source = table_source("deleted and needed again")
    name = _codegen.module_name(source)
    module = _codegen.load(source)
    assert _codegen.trim(limit=0) == 0  # held by this process
    for k in range(cache.LOADED_KEPT):
        _codegen.load(table_source(f"pushing out {k}"))
    assert name not in sys.modules
    _codegen.trim(limit=0)
    assert not (kernels / f"{name}.py").exists()
    again = _codegen.load(source)
    assert again is not module and (kernels / f"{name}.py").read_text() == source


def test_an_altered_module_file_is_refused(kernels) -> None:
    source = table_source("altered")
    _codegen.kernel_cache_dir()
    (kernels / f"{_codegen.module_name(source)}.py").write_text(source + "print('not ours')\n")
    with pytest.raises(OSError, match="does not hold the module"):
        _codegen.load(source)


def test_a_process_counts_its_loads_drops_old_modules_and_asks_to_be_recycled(kernels, monkeypatch) -> None:
    start = _codegen.loaded_structures()
    monkeypatch.setenv("FIXQ_MAX_LOADED_STRUCTURES", str(start + cache.LOADED_KEPT + 1))
    sources = [table_source(f"recycled {k}") for k in range(cache.LOADED_KEPT + 1)]
    first = _codegen.module_name(sources[0])
    for source in sources:
        assert not _codegen.recycle_due()
        _codegen.load(source)
        _codegen.load(source)  # kept: not loaded again
    assert _codegen.loaded_structures() == start + cache.LOADED_KEPT + 1
    assert _codegen.recycle_due()
    # The oldest was dropped: out of sys.modules, and its lock free for trim.
    assert first not in sys.modules
    descriptor = os.open(kernels / f"{first}.lock", os.O_RDWR)
    try:
        fcntl.flock(descriptor, fcntl.LOCK_EX | fcntl.LOCK_NB)
    finally:
        os.close(descriptor)
    _codegen.load(sources[0])
    assert _codegen.loaded_structures() == start + cache.LOADED_KEPT + 2


_WARM_RACE = """
import json, os, pathlib, sys, time
from numba.core.registry import CPUDispatcher
from tests._documents import grid_document
from worker.document import parse_document
from worker.gridmodel import compile_grid
model, barrier = json.loads(sys.argv[1]), pathlib.Path(sys.argv[2])
document = parse_document(grid_document(model))
barrier.with_name(barrier.name + "." + sys.argv[3]).touch()
while len(list(barrier.parent.glob(barrier.name + ".*"))) < 2:
    time.sleep(0.005)
problem = compile_grid(document, reward_storage="on_the_fly")
kernels = [value for value in vars(problem._kernels).values() if isinstance(value, CPUDispatcher)]
print(json.dumps([sum(sum(k.stats.cache_misses.values()) for k in kernels),
                  sum(sum(k.stats.cache_hits.values()) for k in kernels)]))
"""
"""One process of the race below: waits for the other at a barrier, compiles a model, prints its kernels' numba
cache misses (compiled here) and hits (loaded from what another process compiled)."""


def test_two_processes_warming_up_one_new_structure_compile_it_once(kernels, tmp_path) -> None:
    # Two workers of a node taking a new sweep's first members at the same moment: before, both compiled the same
    # kernels side by side (each its own cache misses); under the warm-up lock (worker._codegen.cache.warming)
    # one compiles and the other, having waited, loads every kernel from the cache the first wrote.
    model = nudged("a * k - (k2 - k)**2 + 3.25e-9 * k2")  # a structure no other test compiles
    env = {**os.environ, "FIXQ_KERNEL_CACHE": str(kernels), "FIXQ_COLD_BRIDGE": "off", "PYTHONPATH": str(REPO)}
    import json

    racers = [subprocess.Popen([sys.executable, "-c", _WARM_RACE, json.dumps(model), str(tmp_path / "barrier"),
                                str(n)], cwd=REPO, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE)
              for n in range(2)]  # fmt: skip
    counts = []
    for racer in racers:
        out, err = racer.communicate(timeout=300)
        assert racer.returncode == 0, err.decode()[-2000:]
        counts.append(json.loads(out.decode().strip().splitlines()[-1]))
    misses = sorted(count[0] for count in counts)
    assert misses[0] == 0 and misses[1] > 0, counts  # one compiled; the other compiled nothing
    assert max(count[1] for count in counts) > 0, counts
