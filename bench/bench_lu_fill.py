"""The calibration of policy iteration's LU memory (:func:`worker.costs.lu_entries`): the fill-in SuperLU makes.

Run from the repository root: ``python bench/bench_lu_fill.py`` (``--stationary``: the stationary report's
LU above ``worker.costs.DIRECT_SOLVE_MAX_POINTS`` states instead, :func:`stationary_main`).
Every document of ``tests/_estimate_set.py``
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


def stationary_shapes() -> dict[str, dict]:
    """Grid models of more than ``DIRECT_SOLVE_MAX_POINTS`` states with a stationary report (name → document):
    one-state savings and growth chains (grid and continuous choices, 3 to 20 shock points) and two-state
    chains whose states both move (the roastery's next_of and expression, growth with a level that moves by its
    own law, savings with a skill that grows with work, in both orders of the states)."""
    from tests._documents import TWO_CHOICES
    from tests._estimate_set import example, growth, two_state_growth_euler, two_states

    def one_state(name: str, points: int, shocks: int) -> dict:
        raw = example(name)
        next(iter(raw["model"]["states"].values()))["points"] = points
        next(iter(raw["model"]["shocks"].values()))["ar1"]["points"] = shocks
        raw["report"] = {"stationary": True}
        return raw

    def reported(raw: dict) -> dict:
        raw = copy.deepcopy(raw)
        raw["report"] = {"stationary": True}
        return raw

    shapes = {f"household_{p}x{s}": one_state("household_saving", p, s) for p, s in ((500, 5), (1000, 5), (1500, 3))}
    shapes.update({f"beekeeper_continuous_{p}x{s}": one_state("beekeeper_savings", p, s)
                   for p, s in ((500, 7), (1000, 7), (2000, 5))})
    shapes.update({f"growth_{p}x{s}": reported(growth(p, s)) for p, s in ((1000, 5), (3000, 3), (700, 20))})
    shapes.update({f"roastery_{c}x{u}": two_states(c, u) for c, u in ((40, 60), (60, 60), (80, 80))})
    shapes.update({f"two_state_growth_continuous_{p}x{a}": reported(two_state_growth_euler(p, a))
                   for p, a in ((400, 9), (1000, 5))})
    for order in (("a", "h"), ("h", "a")):
        model = {"kind": "grid", **copy.deepcopy(TWO_CHOICES)}
        model["states"]["a"]["points"], model["states"]["h"]["points"] = 300, 10
        model["states"] = {name: model["states"][name] for name in order}
        shapes[f"skill_savings_{order[0]}_first"] = {"version": 1, "discount": 0.95, "model": model,
                                                     "solver": {"method": "howard", "tolerance": 1e-6},
                                                     "report": {"stationary": True}}
    return shapes


def stationary_main() -> int:
    """``--stationary``: the LU of the stationary report above ``DIRECT_SOLVE_MAX_POINTS`` states
    (:func:`worker.costs.stationary_lu_entries`) against the one the report makes, on :func:`stationary_shapes`.
    Printed: the chain's states and entries, its envelope (the bound of an LU in the states' own order) as a
    share of ``n²``, the LU made (none: the envelope was past ``NATURAL_ENVELOPE`` times the entries, the
    iterative solves instead) as a share of ``n²``, and the estimate's entries over the measured ones.  Target,
    printed with PASS or FAIL: the estimate at least the LU made on every shape (an under-estimate lets a job
    past its cap; the estimate's memory ratio on the whole set is ``bench/bench_estimates.py``'s)."""
    import worker.report as report
    from worker import solve
    from worker.costs import every_state_moves, stationary_lu_entries
    from worker.stationary_lu import natural_lu_bound

    chains: list[tuple[int, int, int]] = []
    made: list[int] = []
    fits, factorise = report.natural_lu_fits, spla.splu

    def measured_fits(matrix: sp.csr_matrix) -> bool:
        n = matrix.shape[0]
        system = sp.csr_matrix(sp.identity(n, format="csr") - matrix)
        system.sort_indices()
        transposed = sp.csc_matrix((system.data, system.indices, system.indptr), shape=(n, n))
        chains.append((n, transposed.nnz, natural_lu_bound(transposed)))
        return fits(matrix)

    def kept_factor(matrix: sp.csc_matrix, *args: object, **kwargs: object) -> object:
        lu = factorise(matrix, *args, **kwargs)
        if matrix.shape[0] > DIRECT_SOLVE_MAX_POINTS:
            made.append(lu.nnz)
        return lu

    report.natural_lu_fits, spla.splu = measured_fits, kept_factor
    print(f"{'document':34s} {'n':>6s} {'entries':>8s} {'envelope/n²':>11s} {'LU/n²':>8s} {'estimate/n²':>11s} "
          f"{'est/LU':>7s}")
    under = []
    try:
        for name, raw in stationary_shapes().items():
            chains.clear()
            made.clear()
            solve(raw)
            if not chains:
                print(f"{name:34s} no chain above {DIRECT_SOLVE_MAX_POINTS} states")
                continue
            n, entries, envelope = chains[-1]
            doc = parse_document(raw)
            plan = grid_plan(doc.model, method="howard")
            promised = stationary_lu_entries(n, plan.n * plan.nodes * plan.shocks, all_move=every_state_moves(doc))
            lu = made[-1] if made else 0
            if promised < lu:
                under.append(name)
            ratio = f"{promised / lu:7.2f}" if lu else "   none"
            print(f"{name:34s} {n:6d} {entries:8d} {envelope / n / n:11.4f} {lu / n / n:8.4f} "
                  f"{promised / n / n:11.4f} {ratio}", flush=True)
    finally:
        report.natural_lu_fits, spla.splu = fits, factorise
    print(f"stationary LU estimated at least as made: {'PASS' if not under else 'FAIL: ' + ', '.join(under)}")
    return 0 if not under else 1


if __name__ == "__main__":
    sys.exit(stationary_main() if "--stationary" in sys.argv else main())
