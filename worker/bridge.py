"""The first solve of a new model structure, while its kernels compile in the background.

Grid models run generated numba kernels, compiled once per model *structure*
and machine and then loaded from the on-disk cache (:mod:`worker._codegen`).
Compiling them takes several seconds (measured 4–9 s on a shared 2-core
machine for the hinted growth model), far longer than solving a small model.
A practitioner trying out model variants would wait on the compiler every
time, so when a structure's kernels are not yet known to be in the cache and
the problem is small, the solve does not wait:

* it tabulates every (state, choice) pair with numpy (the ``precomputed``
  regime's own tables) and runs every Bellman step as an exact scan of the
  table in numpy (:class:`TableProblem`) — no hints, no block search, nothing
  to compile;
* it starts a background process (``python -m worker.bridge``, niced) that
  compiles the kernels the regular path would use (by a solve of three
  iterations), so the next solve of the structure, in any process on the
  machine, loads them.

The table scan is exact, so the answer is certified exactly as on the
regular path; it can differ from the regular path's in the last bits, as
the two regimes already may (numpy's vectorised ``log``/``exp``/``**`` are
not the C library's).  It applies only when the tables fit within the
precompute budget and :data:`BRIDGE_MAX_BYTES`, and have at most
:data:`BRIDGE_MAX_PAIRS` pairs, and never when a caller forces a regime.
``FIXQ_COLD_BRIDGE=off`` turns it off (the test suite does, except where it
tests this module).

Readiness is a marker file beside the kernels (``<module>.<tag>.ready``),
written after a successful warm-up in any process; ``tag`` covers
``NUMBA_CACHE_DIR``, Python and numba versions, since the compiled code lives
where those say.  Lock files (``.compiling``) keep two background compiles of one
structure from running at once, and more than :data:`MAX_BACKGROUND` of any
structures; a lock older than :data:`STALE_LOCK_S` is ignored (its process
died).
"""

from __future__ import annotations

import hashlib
import json
import os
import subprocess
import sys
import time
from pathlib import Path
from types import SimpleNamespace
from typing import Any

import numpy as np

from worker import _codegen
from worker.environment import COLD_BRIDGE, cold_bridge_enabled
from worker.gridmodel import GridProblem

__all__ = ["BRIDGE_MAX_BYTES", "BRIDGE_MAX_PAIRS", "ENV", "TableProblem", "compile_later", "enabled", "is_warm", "mark_warm", "wait_idle"]

BRIDGE_MAX_PAIRS = 12_000_000
"""Largest number of (state, choice) pairs solved by numpy table scans while kernels compile (count).
A scan costs about 5 ns a pair here, so some 30 improvements of the largest take about as long as
compiling the kernels would."""
BRIDGE_MAX_BYTES = 256 << 20
"""Most memory the bridge's tables and scans may take (bytes, the precompute estimate): a first solve
admitted on the smaller on-the-fly estimate stays within a few hundred MiB more than it."""
"""Environment variable; ``off`` (or ``0``, ``false``, ``no``) disables the bridge."""
MAX_BACKGROUND = 1
"""Background compiles that may run at once per kernel folder (count): a queue fed many new
structures at once (a hostile or a careless user) starts no more than this, and the rest of those
first solves take the bridge again until their turn comes."""
STALE_LOCK_S = 900.0
"""Age after which a background compile's lock file is ignored (seconds)."""
CHUNK_PAIRS = 2_000_000
"""Pairs per chunk of a numpy table scan (bounds its temporaries to some 50 MB)."""

_BACKGROUND: list[subprocess.Popen] = []


def enabled() -> bool:
    return cold_bridge_enabled()


def _tag() -> str:
    import numba

    text = "|".join([os.environ.get("NUMBA_CACHE_DIR", ""), sys.version, numba.__version__])
    return hashlib.sha256(text.encode()).hexdigest()[:10]


def _path(module_name: str, suffix: str) -> Path:
    return _codegen.kernel_cache_dir() / f"{module_name}.{_tag()}.{suffix}"


def is_warm(module_name: str) -> bool:
    """Whether some process finished warming up this module's kernels (with this numba cache)."""
    return _path(module_name, "ready").exists()


def mark_warm(module_name: str) -> None:
    try:
        _path(module_name, "ready").touch()
    except OSError:
        pass  # a read-only cache only means the next process takes the bridge again


def _locked(module_name: str) -> bool:
    lock = _path(module_name, "compiling")
    try:
        return time.time() - lock.stat().st_mtime < STALE_LOCK_S
    except FileNotFoundError:
        return False


def compile_later(
    document: dict[str, Any], module_name: str, *, regime: str, limits: dict[str, Any] | None = None
) -> bool:
    """Start the background compile of a document's kernels; False when one already runs (or cannot start)."""
    for process in list(_BACKGROUND):
        if process.poll() is not None:
            _BACKGROUND.remove(process)
    if _locked(module_name) or len(_active_locks()) >= MAX_BACKGROUND:
        return False
    lock = _path(module_name, "compiling")
    try:
        lock.unlink(missing_ok=True)  # stale
        descriptor = os.open(lock, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
    except OSError:
        return False
    os.close(descriptor)
    payload = json.dumps(
        {"document": document, "module": module_name, "regime": regime, "limits": limits, "lock": str(lock)}
    )
    env = {**os.environ, COLD_BRIDGE: "off"}
    root = str(Path(__file__).resolve().parents[1])
    env["PYTHONPATH"] = root + (os.pathsep + env["PYTHONPATH"] if env.get("PYTHONPATH") else "")
    try:
        process = subprocess.Popen(
            [sys.executable, "-m", "worker.bridge"], stdin=subprocess.PIPE, stdout=subprocess.DEVNULL,
            stderr=subprocess.DEVNULL, start_new_session=True, env=env, cwd=root,
        )
        process.stdin.write(payload.encode())
        process.stdin.close()
    except OSError:
        lock.unlink(missing_ok=True)
        return False
    _BACKGROUND.append(process)
    return True


def _active_locks() -> list[Path]:
    found = []
    for lock in _codegen.kernel_cache_dir().glob(f"*.{_tag()}.compiling"):
        try:
            if time.time() - lock.stat().st_mtime < STALE_LOCK_S:
                found.append(lock)
        except FileNotFoundError:
            continue
    return found


def wait_idle(timeout: float = 120.0) -> bool:
    """Wait until no background compile holds a lock (benchmarks and tests); True when idle."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if not _active_locks():
            return True
        time.sleep(0.05)
    return False


def _corner(w: np.ndarray, corner: int, m: int) -> tuple[list[int], np.ndarray]:
    """The bits of interpolation corner ``corner`` and its weights ``Π_k (w_k or 1 − w_k)``, left to right
    as the kernels multiply them (``w``: upper weights, last axis of length ``m``)."""
    bits = [(corner >> k) & 1 for k in range(m)]
    weight = w[..., 0] if bits[0] else (1.0 - w[..., 0])
    for k in range(1, m):
        weight = weight * (w[..., k] if bits[k] else (1.0 - w[..., k]))
    return bits, weight


class TableProblem(GridProblem):
    """A grid problem solved by exact numpy scans of its ``precomputed`` tables; nothing is compiled.

    Same protocol as :class:`~worker.gridmodel.GridProblem` and the same
    tables, so ``bellman_step`` gives the same bits as the ``table``
    backend's ``bellman_full`` (the same operations in the same order, the
    first of equal values winning).  Evaluation sweeps use the sparse
    ``P_σ`` (``policy_sweeps`` is None).
    """

    policy_sweeps = None  # type: ignore[assignment]

    def __init__(self, *args: Any, **kwargs: Any) -> None:
        super().__init__(*args, **kwargs)
        self.hints = SimpleNamespace(monotone=False, concave=False)
        self._monotone = self._concave = False
        self.hints_active = False
        R, next_base, lower, weight, _ = self._ctx
        self._tables = (R, next_base, lower, weight)

    def _warm_up(self) -> None:
        """Nothing to compile."""

    def _interpolated_expected(self, EVt: np.ndarray, start: int, stop: int) -> np.ndarray:
        """``Σ_k w_k EVt[z, node_k]`` for states ``[start, stop)`` × every choice, corners in the kernels' order."""
        _, next_base, lower, weight = self._tables
        interp = self._layout.interpolated
        z = np.arange(start, stop) % EVt.shape[0]
        lo, w = lower[start:stop], weight[start:stop]
        expected = np.zeros(lo.shape[:2])
        for corner in range(2 ** len(interp)):
            bits, wk = _corner(w, corner, len(interp))
            index = next_base[None, :].astype(np.int64)
            for k, t in enumerate(interp):
                index = index + self._strides[t] * (lo[..., k].astype(np.int64) + bits[k])
            # Zero weights add nothing (the kernels skip them; ``e + 0.0`` is ``e`` for e ≥ +0.0 sums).
            term = wk * EVt[z[:, None], np.minimum(index, EVt.shape[1] - 1)]
            expected += np.where(wk != 0.0, term, 0.0)
        return expected

    def bellman_step(
        self,
        v: np.ndarray,
        *,
        restricted: bool = False,
        policy_guess: np.ndarray | None = None,
        exhaustive: bool = False,
    ) -> tuple[np.ndarray, np.ndarray]:
        """An exact step: every allowed choice of every state, scanned in chunks of rows."""
        R, next_base = self._tables[:2]
        EVt = self._continuation(v)
        out_v = np.empty(self.n)
        out_policy = np.empty(self.n, dtype=np.int64)
        rows_per_chunk = max(1, CHUNK_PAIRS // max(R.shape[1], 1))
        if not self._layout.interpolated:
            # Every pair lands on a grid point: per shock, one row of EV values serves all its states.
            n_shocks = EVt.shape[0]
            per_shock = self.n // n_shocks
            step = max(1, min(per_shock, rows_per_chunk))
            buffer = np.empty((step, R.shape[1]))
            for z in range(n_shocks):
                expected = self.discount * EVt[z, next_base]
                for start in range(0, per_shock, step):
                    stop = min(per_shock, start + step)
                    # States x·n_shocks + z for x in [start, stop): a strided view, no gather.
                    view = R[start * n_shocks + z : stop * n_shocks : n_shocks]
                    values = np.add(view, expected, out=buffer[: stop - start])
                    best = np.argmax(values, axis=1)
                    out_policy[start * n_shocks + z : stop * n_shocks : n_shocks] = best
                    out_v[start * n_shocks + z : stop * n_shocks : n_shocks] = values[np.arange(stop - start), best]
            return out_v, out_policy
        for start in range(0, self.n, rows_per_chunk):
            stop = min(self.n, start + rows_per_chunk)
            reward = R[start:stop]
            values = reward + self.discount * self._interpolated_expected(EVt, start, stop)
            values[reward == -np.inf] = -np.inf
            best = np.argmax(values, axis=1)
            out_policy[start:stop] = best
            out_v[start:stop] = values[np.arange(stop - start), best]
        return out_v, out_policy

    def _nodes(self, policy: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """The table's reward and nodes at a policy (recomputed whenever the policy changes)."""
        policy, hit = self._cached_nodes(policy)
        if hit is not None:
            return hit
        R, next_base, lower, weight = self._tables
        rows = np.arange(self.n)
        reward = R[rows, policy]
        if not np.all(reward != -np.inf):
            raise self._not_allowed(policy, int(np.flatnonzero(reward == -np.inf)[0]))
        interp = self._layout.interpolated
        nodes = self._layout.nodes
        index = np.empty((self.n, nodes), dtype=np.int64)
        node_weight = np.empty((self.n, nodes))
        base = next_base[policy]
        if not interp:
            index[:, 0] = base
            node_weight[:, 0] = 1.0
        else:
            lo = lower[rows, policy].astype(np.int64)
            w = weight[rows, policy]
            strides = [self._strides[t] for t in interp]
            for corner in range(nodes):
                bits, wk = _corner(w, corner, len(interp))
                node_weight[:, corner] = wk
                index[:, corner] = base + sum(stride * (lo[:, k] + bits[k]) for k, stride in enumerate(strides))
        clamped = np.zeros(self.n, dtype=np.bool_)
        self._policy_cache = (policy.copy(), reward, index, node_weight, clamped)
        return reward, index, node_weight, clamped


def main() -> int:
    """``python -m worker.bridge``: compile a document's kernels (JSON on stdin), then drop the lock.

    Runs a solve of at most three iterations from zeros, with no reports and
    the caller's limits (they decide the regime, hence the kernels), so that
    every kernel a real solve calls is compiled, diagnostics included
    (compiling alone would leave those to the first real solve).  Should that
    solve have compiled another module than the one the caller named, that
    one is compiled too, in the regime the caller chose.
    """
    payload = json.loads(sys.stdin.read())
    lock = Path(payload["lock"])
    try:
        os.nice(10)  # behind the solves of the machine it shares
    except (AttributeError, OSError):
        pass
    try:
        from worker.solve import solve

        document = dict(payload["document"])
        document.pop("report", None)
        document["solver"] = {**document.get("solver", {}), "initial": "zeros", "max_iterations": 3}
        document["solver"].pop("time_limit_s", None)
        solve(document, limits=payload.get("limits"))
        if not is_warm(payload["module"]):
            from worker.document.schema import parse_document
            from worker.gridmodel import compile_grid

            compile_grid(parse_document(document), limits=payload.get("limits"), regime=payload["regime"])
    finally:
        lock.unlink(missing_ok=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
