"""Warm-start benchmark: a nightly re-solve with every parameter moved by 1 %, warm against cold.

    python bench/bench_warm_start.py [--shift 0.01] [--examples plant_capacity household_saving]

For each bundled grid example (invented scenarios), with the solver method
its document names:

1. solve the document as shipped (yesterday's job);
2. move every ``model.params`` value by ``--shift`` (1 %: x → 1.01·x);
3. solve the moved document cold (``initial: "zeros"``) and warm
   (``initial: {"job": ...}``, the first result handed to ``worker.solve`` as
   ``warm_start``, exactly what the worker does for a job that names an
   earlier one).

It prints iterations (the result's ``iterations``) warm and
cold, their ratio, evaluation steps and seconds, and PASS/FAIL for the
target "at least 50 % fewer iterations warm" (ratio ≤ 0.50).  Both
solves must converge and agree within the sum of their certified error
bounds, or the line says FAIL regardless of the ratio.  All numbers are of
this one run.
"""

from __future__ import annotations

import argparse
import copy
import json
import sys
import time
from pathlib import Path
from typing import Any

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from worker import solve  # noqa: E402

EXAMPLES = ROOT / "service" / "examples"
TARGET_RATIO = 0.50
"""Warm iterations over cold ones must be at most this (≥ 50 % fewer)."""
DEFAULT_EXAMPLES = ("plant_capacity", "household_saving")


def load(name: str) -> dict[str, Any]:
    document = json.loads((EXAMPLES / f"{name}.json").read_text(encoding="utf-8"))
    document.pop("report", None)  # reports cost the same warm or cold; the bench times the solve
    return document


def moved(document: dict[str, Any], shift: float) -> dict[str, Any]:
    """The document with every parameter multiplied by ``1 + shift``."""
    out = copy.deepcopy(document)
    out["model"]["params"] = {name: value * (1 + shift) for name, value in out["model"]["params"].items()}
    return out


def timed_solve(document: dict[str, Any], warm_start: dict[str, Any] | None = None) -> tuple[dict[str, Any], float]:
    started = time.perf_counter()
    result = solve(document, warm_start=warm_start)
    return result, time.perf_counter() - started


def compare(name: str, shift: float) -> bool:
    """Print one example's line; True when it passes."""
    yesterday = load(name)
    solve(yesterday)  # compiles the model's kernels, so neither timed solve pays for it
    earlier, _ = timed_solve(yesterday)
    tonight = moved(yesterday, shift)
    cold, cold_s = timed_solve(tonight)
    warm_document = copy.deepcopy(tonight)
    warm_document["solver"]["initial"] = {"job": "0000000000000000"}
    warm, warm_s = timed_solve(warm_document, {"axes": earlier["axes"], "value": earlier["value"]})
    gap = float(np.max(np.abs(np.asarray(warm["value"]) - np.asarray(cold["value"]))))
    agree = gap <= warm["error_bound"] + cold["error_bound"]
    converged = cold["status"] == warm["status"] == "converged"
    ratio = warm["iterations"] / cold["iterations"]
    ok = converged and agree and ratio <= TARGET_RATIO
    method = tonight["solver"].get("method", "howard")
    print(f"{name} ({method}, parameters x{1 + shift:g}):")
    print(
        f"  iterations warm {warm['iterations']}, cold {cold['iterations']}, ratio {ratio:.2f} "
        f"({1 - ratio:.0%} fewer; target >= {1 - TARGET_RATIO:.0%} fewer) {'PASS' if ok else 'FAIL'}"
    )
    print(
        f"  evaluation steps warm {warm['evaluation_steps']}, cold {cold['evaluation_steps']}; "
        f"seconds warm {warm_s:.3f}, cold {cold_s:.3f}"
    )
    if not converged:
        print(f"  status warm {warm['status']}, cold {cold['status']}: both must converge")
    print(f"  warm and cold values differ by {gap:.2e} (allowed: the sum of their bounds, "
          f"{warm['error_bound'] + cold['error_bound']:.2e}){'' if agree else ' -- DISAGREE'}")  # fmt: skip
    return ok


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--shift", type=float, default=0.01, help="relative move of every parameter (0.01 = 1 %%)")
    parser.add_argument("--examples", nargs="+", default=list(DEFAULT_EXAMPLES), help="bundled grid examples")
    args = parser.parse_args(argv)
    results = [compare(name, args.shift) for name in args.examples]
    print(f"overall: {sum(results)} of {len(results)} PASS")
    return 0


if __name__ == "__main__":
    sys.exit(main())
