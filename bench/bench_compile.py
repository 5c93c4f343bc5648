"""The calibration of :mod:`worker.compile_seconds`: what a cold first solve compiles, kernel by kernel.

Run from the repository root: ``python bench/bench_compile.py [name ...]``.  For each grid document of
``tests/_estimate_set.py`` (and ``POINTWISE``), a fresh process with an empty kernel folder
(``FIXQ_KERNEL_CACHE`` set to a temporary folder, the cold bridge off) imports fixq, records numba's compile
events (``numba:compile``, outermost ones only, so a kernel's callees count with it), solves the document and
solves it again.  Printed: the first solve's extra time over the second (``cold+``), the estimate's
``compile_seconds`` and their ratio, then each compiled kernel's seconds by module and name.  The kinds and
costs of :data:`worker.compile_seconds.KERNEL_COSTS` come from these lines.  A kernel of an installed module
(``worker.kernels``, ``worker.drawsteps``, ...) appears only on the first run after installing or editing it:
it is compiled once per installation, not per structure, and is left out of the estimate.

Target, printed with PASS or FAIL: ``compile_seconds`` within a factor of two of ``cold+``.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
os.environ["FIXQ_COLD_BRIDGE"] = "off"

from tests._estimate_set import POINTWISE, documents  # noqa: E402
from worker.document import parse_document  # noqa: E402
from worker.estimate import estimate  # noqa: E402

FACTOR = 2.0
"""Largest ratio compile_seconds / cold extra, and its inverse the smallest (dimensionless)."""

CHILD = r"""
import json, sys, time
sys.path.insert(0, {root!r})
given = json.loads(sys.stdin.read())
raw, limits = given["document"], given["limits"]
from numba.core import event

compiles, starts = [], []


class Outermost(event.Listener):
    def on_start(self, ev):
        starts.append(time.perf_counter())

    def on_end(self, ev):
        began = starts.pop()
        if not starts:
            function = ev.data["dispatcher"].py_func
            compiles.append((function.__module__, function.__qualname__, time.perf_counter() - began))


event.register("numba:compile", Outermost())
from worker import solve
start = time.perf_counter()
solve(raw, limits=limits)
first = time.perf_counter() - start
start = time.perf_counter()
solve(raw, limits=limits)
print(json.dumps({{"extra": first - (time.perf_counter() - start), "compiles": compiles}}))
"""


def cold_run(raw: dict, limits: dict | None) -> dict:
    with tempfile.TemporaryDirectory() as folder:
        done = subprocess.run(
            [sys.executable, "-c", CHILD.format(root=str(ROOT))], input=json.dumps({"document": raw, "limits": limits}),
            capture_output=True, text=True, env={**os.environ, "FIXQ_KERNEL_CACHE": folder}, timeout=900, check=True,
        )
    return json.loads(done.stdout.strip().splitlines()[-1])


def main(argv: list[str]) -> int:
    cases = {name: (raw, None) for name, raw in documents().items() if raw["model"]["kind"] == "grid"}
    cases.update(POINTWISE)
    ratios = []
    for name in argv or list(cases):
        raw, limits = cases[name]
        promised = estimate(parse_document(raw), limits=limits)["compile_seconds"]
        run = cold_run(raw, limits)
        ratio = promised / run["extra"]
        ratios.append(ratio)
        print(f"{name:30s} cold+ {run['extra']:6.2f} s  compile_seconds {promised:6.2f} s  ratio {ratio:5.2f}",
              flush=True)
        for module, kernel, seconds in sorted(run["compiles"], key=lambda c: -c[2]):
            generated = module.startswith("fixq_kernels_")
            print(f"    {seconds:6.2f} s  {'(generated)' if generated else module}:{kernel}")
    ok = all(1 / FACTOR <= ratio <= FACTOR for ratio in ratios)
    print(f"compile_seconds / cold extra {min(ratios):.2f} to {max(ratios):.2f}: {'PASS' if ok else 'FAIL'} "
          f"(within {FACTOR:g}x, this run)")
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
