"""The calibration of policy iteration's LU memory (:func:`worker.costs.lu_entries`): the fill-in SuperLU makes.

Run from the repository root: ``python bench/bench_lu_fill.py``.  Every document of ``tests/_estimate_set.py``
(and its method variants) that policy iteration solves by a sparse LU — at most
``worker.costs.DIRECT_SOLVE_MAX_POINTS`` points, no horizon — is solved by policy iteration in this process,
and each system handed to ``scipy.sparse.linalg.spsolve`` is kept (the last policy's, and the largest factor).
Printed per document:

* the system's points ``n`` and stored entries, and the estimate's entries (``n · nodes · shocks`` for a grid
  model, a policy's share of the stored transitions for a tabular one);
* ``fill``: the entries of SuperLU's factor of that system (``splu`` with spsolve's default COLAMD ordering,
  L and U), and the estimate's :func:`~worker.costs.lu_entries`, and their ratio (estimate / measured);
* grid models: ``fill / (entries + n)``, the figure :data:`~worker.costs.GRID_LU_FILL` stands for; tabular
  models: the bandwidth read from the document and ``fill / n²``;
* ``rss+``: the growth of a fresh process's peak resident memory over one ``spsolve`` of the system (the peak
  reset through ``/proc/self/clear_refs`` first; Linux), against ``fill × LU_ENTRY_BYTES``: whether 12 bytes an
  entry is SuperLU's real memory.  A factor of a few hundred KiB comes from memory the allocator already holds,
  so its ``rss+`` is low; it is for information.

Target, printed with PASS or FAIL: the estimate's LU entries within a factor of ``FACTOR`` of the measured fill
(the memory test, ``tests/worker/test_estimates_accuracy.py``, holds the whole solve's memory within two).
"""

from __future__ import annotations

import copy
import math
import os
import subprocess
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
os.environ.setdefault("FIXQ_COLD_BRIDGE", "off")

import numpy as np  # noqa: E402
import scipy.sparse as sp  # noqa: E402
import scipy.sparse.linalg as spla  # noqa: E402

from tests._estimate_set import documents, method_variants  # noqa: E402
from worker.costs import DIRECT_SOLVE_MAX_POINTS, GRID_LU_FILL, LU_ENTRY_BYTES, lu_entries  # noqa: E402
from worker.document import parse_document  # noqa: E402
from worker.errors import InvalidDocument  # noqa: E402
from worker.estimate import grid_plan, transition_bandwidth  # noqa: E402

FACTOR = 3.2
"""Largest ratio of the estimate's LU entries to the measured fill, and its inverse the smallest
(dimensionless): the fill of a grid model's policy is not known before solving, and ``GRID_LU_FILL`` is one
figure for 1.0 to 6.6 measured."""

_MIB = 2**20


RSS_CHILD = r"""
import sys
import numpy as np, scipy.sparse as sp, scipy.sparse.linalg as spla
saved = np.load(sys.argv[1])
system = sp.csc_matrix((saved["data"], saved["indices"], saved["indptr"]), shape=tuple(saved["shape"]))
b = np.ones(system.shape[0])
spla.spsolve(sp.identity(2, format="csc"), np.ones(2))  # SuperLU's module and buffers loaded


def status(field):
    with open("/proc/self/status", encoding="ascii") as lines:
        return next(int(line.split()[1]) * 1024 for line in lines if line.startswith(field + ":"))


with open("/proc/self/clear_refs", "w", encoding="ascii") as refs:
    refs.write("5")
before = status("VmRSS")
spla.spsolve(system, b)
print(status("VmHWM") - before)
"""


def rss_growth(system: sp.csc_matrix) -> float | None:
    """Peak resident growth of one ``spsolve`` of ``system`` in a fresh process (bytes; None where the peak
    cannot be reset, off Linux)."""
    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / "system.npz"
        np.savez(path, data=system.data, indices=system.indices, indptr=system.indptr, shape=system.shape)
        done = subprocess.run([sys.executable, "-c", RSS_CHILD, str(path)], capture_output=True, text=True,
                              timeout=300, check=False)
    return float(done.stdout.split()[-1]) if done.returncode == 0 and done.stdout.split() else None


def policy_documents() -> dict[str, dict]:
    """Every document of the estimate set by policy iteration whose exact evaluation is a direct sparse solve."""
    cases = {}
    for name, raw in {**documents(), **method_variants()}.items():
        raw = copy.deepcopy(raw)
        solver = raw.setdefault("solver", {})
        if solver.get("method") == "value_iteration" or name.endswith("_pi"):
            continue  # the variants repeat their base document by policy iteration
        solver["method"] = "policy_iteration"
        solver.pop("evaluation_steps", None)
        cases[name] = raw
    return cases


def main() -> int:
    from worker import solve

    systems: list[sp.csc_matrix] = []
    sparse_solve = spla.spsolve

    def kept(A, b, *args, **kwargs):  # noqa: ANN001, ANN002, ANN003, ANN202
        systems.append(sp.csc_matrix(A, copy=True))
        return sparse_solve(A, b, *args, **kwargs)

    print(f"{'document':32s} {'n':>5s} {'entries':>8s} {'est ent':>8s} {'fill':>8s} {'est fill':>8s} "
          f"{'ratio':>6s}   {'structure':24s} {'rss+ MiB':>8s} {'12 B MiB':>8s}")
    ratios, grid_fills = [], []
    for name, raw in policy_documents().items():
        try:
            doc = parse_document(raw)
        except Exception as error:  # noqa: BLE001  a method the document's interpolation does not allow
            print(f"{name:32s} skipped: {str(error).splitlines()[0][:80]}")
            continue
        model = doc.model
        if model.kind == "grid":
            if model.horizon is not None:
                continue
            plan = grid_plan(model, method="policy_iteration")
            n, entries, bandwidth = plan.n, plan.n * plan.nodes * plan.shocks, None
        else:
            if model.horizon is not None:
                continue
            n = int(model.n_states)
            transition = model.transition
            dense = len(getattr(transition, "shape", ())) == 3
            stored = int(np.count_nonzero(np.asarray(transition))) if dense else int(transition.entries.shape[0])
            entries = stored if model.taste_shocks is not None else math.ceil(stored / int(model.n_actions))
            bandwidth = transition_bandwidth(transition, dense)
        if n > DIRECT_SOLVE_MAX_POINTS:
            continue
        systems.clear()
        spla.spsolve = kept
        try:
            solve(raw)
        except InvalidDocument as error:  # a method the document's interpolation does not allow
            print(f"{name:32s} skipped: {str(error).splitlines()[0][:80]}")
            continue
        finally:
            spla.spsolve = sparse_solve
        if not systems:
            print(f"{name:32s} {n:5d}  no sparse solve (the reduced system of draws after the choice, dense)")
            continue
        fills = [spla.splu(system).nnz for system in systems]
        largest = int(np.argmax(fills))
        system, fill = systems[largest], fills[largest]
        promised = lu_entries(n, entries, bandwidth)
        ratio = promised / fill
        ratios.append(ratio)
        if bandwidth is None:
            structure = f"fill/(entries+n) {fill / (entries + n):5.2f}"
            grid_fills.append(fill / (entries + n))
        else:
            structure = f"band {bandwidth:4d} fill/n² {fill / n / n:4.2f}"
        grown = rss_growth(system)
        print(f"{name:32s} {n:5d} {system.nnz - n:8d} {entries:8d} {fill:8d} {promised:8d} {ratio:6.2f}   "
              f"{structure:24s} {(grown or 0) / _MIB:8.2f} {fill * LU_ENTRY_BYTES / _MIB:8.2f}", flush=True)
    if grid_fills:
        middle = math.exp(sum(math.log(f) for f in grid_fills) / len(grid_fills))
        print(f"grid fill/(entries+n) {min(grid_fills):.2f} to {max(grid_fills):.2f}, geometric mean {middle:.2f} "
              f"(GRID_LU_FILL {GRID_LU_FILL:g})")
    ok = all(1 / FACTOR <= ratio <= FACTOR for ratio in ratios)
    print(f"LU entries estimated / measured {min(ratios):.2f} to {max(ratios):.2f}: {'PASS' if ok else 'FAIL'} "
          f"(within {FACTOR:g}x)")
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
