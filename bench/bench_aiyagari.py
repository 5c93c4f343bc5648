"""Benchmark: the σ = 0.2 panel of Aiyagari (1994) Table II, one fixq search job per cell, over HTTP.

    python bench/bench_aiyagari.py [--mu 3] [--rho 0 0.3 0.6 0.9] [--points 200] [--method howard]
                                   [--interpolation monotone_cubic] [--quick]

The economy is :mod:`bench.baseline_aiyagari`'s (β = 0.96, α = 0.36, δ = 0.08, zero borrowing limit, log
endowment an AR(1) with unconditional standard deviation σ = 0.2 on a 7-state Tauchen chain of width 3, CRRA
utility of risk aversion ``mu``).  For every ρ of the panel (one cell: the equilibrium interest rate, and the
saving rate δα/(r + δ) it implies) the bench starts a private Redis, ``fixq api`` and one ``fixq worker``
(like ``bench/bench_service.py``) and measures, in one run:

1. **fixq**: one job whose document carries a ``search`` for ``r`` (condition: mean assets = capital demand),
   submitted over HTTP, waited for, and its answer read from the job record (no arrays downloaded);
2. **client loop**: what a user did before searches existed: scipy's ``brentq`` over ``r`` on the client,
   each evaluation a single job of the same model at that ``r`` (``report.stationary`` on), submitted, waited
   for, its result downloaded, and mean assets and mean endowment computed from the stationary distribution;
   measured twice: every job from a cold start, and every job after the first started from the one before
   (``solver.initial: {"job": ID}``, as the README offers for re-solves with moved params: the warm client loop);
3. **independent**: :mod:`baseline_aiyagari` (endogenous grid method at 4,000 asset points, Young
   lotteries, brentq), in this process.

Targets: every cell within 0.01 percentage points of the independent solver; fixq at least 10× faster than
the (cold) client loop per cell, the ratio to the warm client loop printed beside, at the same accuracy (all
loops stop within about 1e-8 of the same ``r``: the search's tolerance on the condition, 1e-6, is about 1e-8
in ``r``; the client's brentq ``xtol`` is 1e-8).
The client loop's jobs run with ``fresh`` so the service's reuse of an identical solved document cannot
flatter either side.  Aiyagari's printed figures, where shown, are *as published, from memory*; nothing is
compared with them.
"""

from __future__ import annotations

import argparse
import os
import signal
import statistics
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import redis
from scipy.optimize import brentq

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "bench"))

from baseline_aiyagari import ALPHA, BETA, DELTA, STATES, WIDTH, Economy  # noqa: E402
from bench_service import Processes, wait_until  # noqa: E402

from service.client import FixqClient  # noqa: E402
from service.embedded_redis import EmbeddedRedis, free_port  # noqa: E402

SD = 0.2
"""Aiyagari's σ: the unconditional standard deviation of log endowment (the panel benchmarked)."""
ACCURACY_TARGET_PP = 0.01
"""Every cell within this many percentage points of the independent solver."""
SPEED_TARGET = 10.0
"""fixq at least this many times faster than the client loop, per cell."""
R_BRACKET = (0.0, 0.0416)
"""The interest rate lies below 1/β - 1 = 0.041667 in any such economy (Aiyagari 1994)."""
SEARCH_TOLERANCE = 1e-6
"""The search's tolerance on mean assets minus capital demand (about 1e-8 in r, as dK/dr is about -100)."""
CLIENT_XTOL = 1e-8
"""The client loop's brentq tolerance on r (the same accuracy as the search's)."""
SOLVER_TOLERANCE = 1e-8
"""solver.tolerance of every document (value function, sup norm)."""
ASSET_MAX = 60.0
"""Top of fixq's asset grid (the same as the independent solver's)."""
PUBLISHED = {  # Aiyagari (1994) Table II, σ = 0.2, net return to capital in %: as published, from memory.
    1: {0.0: 4.1666, 0.3: 4.1456, 0.6: 4.0858, 0.9: 3.9305},
    3: {0.0: 4.1365, 0.3: 4.0432, 0.6: 3.9054, 0.9: 3.5107},
    5: {0.0: 4.0912, 0.3: 3.9305, 0.6: 3.7567, 0.9: 3.2792},
}


def document(rho: float, mu: float, points: int, method: str, interpolation: str = "monotone_cubic") -> dict:
    """The household of the economy as a fixq document, with the search for ``r``.

    ``w`` and the capital demand per unit of labour are params given as expressions of ``r``; the mean
    endowment L is ``mean(l)`` in the condition, so the document needs no number computed outside it.
    """
    reward = "log(c)" if mu == 1 else "c ** (1 - mu) / (1 - mu)"
    model = {
        "kind": "grid",
        "params": {"r": 0.03, "alpha": ALPHA, "delta": DELTA, "mu": mu,
                   "w": "(1 - alpha) * (alpha / (r + delta)) ** (alpha / (1 - alpha))",
                   "k_per_l": "(alpha / (r + delta)) ** (1 / (1 - alpha))"},
        "states": {"a": {"min": 0.0, "max": ASSET_MAX, "points": points, "spacing": "power", "exponent": 2.0,
                         "real_ends": ["min"]}},
        "shocks": {"l": {"ar1": {"rho": rho, "sd": SD, "points": STATES, "method": "tauchen", "width": WIDTH},
                         "transform": "exp"}},
        "choices": {"save": {"next_of": "a", "continuous": True}},
        "define": {"c": "(1 + r) * a + w * l - save"},
        "reward": reward,
        "feasible": ["c > 0"],
        "hints": {"monotone": True, "concave": True},
        "interpolation": interpolation,
    }
    return {"version": 1, "label": f"Aiyagari (1994) Table II, sigma 0.2, rho {rho}, mu {mu} (bench)",
            "discount": BETA, "model": model, "solver": {"method": method, "tolerance": SOLVER_TOLERANCE},
            "search": {"unknowns": {"r": {"min": R_BRACKET[0], "max": R_BRACKET[1]}},
                       "conditions": ["mean(a) - mean(l) * k_per_l"], "tolerance": SEARCH_TOLERANCE}}


def single_job(search_document: dict, r: float) -> dict:
    """The same model at a given ``r``, without a search, with the stationary report (the client loop's job)."""
    out = {key: value for key, value in search_document.items() if key != "search"}
    out["model"] = {**search_document["model"], "params": {**search_document["model"]["params"], "r": r}}
    out["report"] = {"stationary": True}
    return out


def fixq_cell(client: FixqClient, doc: dict) -> tuple[float, float, dict]:
    """One search job: (r, seconds from submit to the answer read from the job record, the record's summary)."""
    started = time.perf_counter()
    job = client.submit(doc, fresh=True)
    record = client.wait(job["id"])
    elapsed = time.perf_counter() - started
    if record["state"] != "done" or record["search"]["status"] != "converged":
        raise RuntimeError(f"the search job ended {record['state']}: {record.get('error') or record.get('search')}")
    return float(record["search"]["unknowns"]["r"]), elapsed, record["search"]


def client_loop_cell(client: FixqClient, doc: dict, warm: bool = False) -> tuple[float, float, int]:
    """brentq on the client over single jobs: (r, seconds, jobs).  With ``warm`` every job after the first
    starts from the one before (``solver.initial: {"job": ID}``, as the README offers for re-solves with
    moved params)."""
    jobs = 0
    previous: str | None = None

    def excess(r: float) -> float:
        nonlocal jobs, previous
        jobs += 1
        single = single_job(doc, r)
        if warm and previous is not None:
            single["solver"] = {**single["solver"], "initial": {"job": previous}}
        job = client.submit(single, fresh=True)
        previous = job["id"]
        record = client.wait(job["id"])
        if record["state"] != "done":
            raise RuntimeError(f"a single job ended {record['state']}: {record.get('error')}")
        result = client.result(job["id"])
        pi = np.asarray(result["stationary"]["distribution"])  # (assets, endowment)
        a, e = np.asarray(result["axes"]["a"]), np.asarray(result["axes"]["l"])
        mean_a, mean_l = float((pi * a[:, None]).sum()), float((pi * e[None, :]).sum())
        return mean_a - mean_l * (ALPHA / (r + DELTA)) ** (1 / (1 - ALPHA))

    started = time.perf_counter()
    r = brentq(excess, *R_BRACKET, xtol=CLIENT_XTOL)
    return float(r), time.perf_counter() - started, jobs


def _stop_on_sigterm(signum: int, frame: object) -> None:
    raise SystemExit(143)


def main() -> int:
    signal.signal(signal.SIGTERM, _stop_on_sigterm)
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--mu", type=float, default=3.0, help="relative risk aversion (Aiyagari's columns: 1, 3, 5)")
    parser.add_argument("--rho", type=float, nargs="+", default=[0.0, 0.3, 0.6, 0.9])
    parser.add_argument("--points", type=int, default=200, help="fixq's asset points")
    parser.add_argument("--method", default="howard", help="fixq's solver.method")
    parser.add_argument("--interpolation", default="monotone_cubic",
                        help="fixq's model.interpolation (linear at 200 points was 0.012-0.014 pp off at low rho)")
    parser.add_argument("--repeats", type=int, default=3, help="fixq search jobs per cell (the median is used)")
    parser.add_argument("--quick", action="store_true", help="ρ = 0.9 only, one repeat (a smoke run)")
    args = parser.parse_args()
    rhos = [0.9] if args.quick else args.rho
    repeats = 1 if args.quick else args.repeats
    mu = int(args.mu) if float(args.mu).is_integer() else args.mu

    print(f"independent solver (endogenous grid, {Economy(0.0, SD, args.mu).points} points, Young lotteries):",
          flush=True)
    independent = {}
    for rho in rhos:
        economy = Economy(rho, SD, args.mu)
        started = time.perf_counter()
        r, saving = economy.equilibrium()
        independent[rho] = (r, saving)
        print(f"  rho {rho}: r {100 * r:.4f} %, saving rate {100 * saving:.2f} %, mass in the top tenth of the "
              f"grid {economy.top_mass:.1e}, {time.perf_counter() - started:.1f} s", flush=True)

    rows = []
    with tempfile.TemporaryDirectory() as tmp, EmbeddedRedis(Path(tmp) / "redis") as server:
        connection = redis.Redis.from_url(server.url)
        port = free_port()
        env = {**os.environ, "FIXQ_REDIS_URL": server.url, "FIXQ_AUTH": "off", "FIXQ_WORKER_LOG_LEVEL": "WARNING"}
        processes = Processes(env, Path(tmp))
        fixq = [sys.executable, "-m", "service.cli"]
        try:
            api = processes.spawn("api", [*fixq, "api", "--port", str(port)])
            client = FixqClient(f"http://127.0.0.1:{port}", timeout_s=600)
            wait_until(lambda: api.poll() is None and client.health()["status"] == "ok", 60, "the API")
            processes.spawn("worker-0", [*fixq, "worker"])
            wait_until(lambda: client.health()["workers"] == 1, 60, "the worker")
            for rho in rhos:
                doc = document(rho, mu, args.points, args.method, args.interpolation)
                # Warm up: the worker compiles (or loads) the model's kernels once; neither side pays it below.
                client.wait(client.submit(single_job(doc, 0.03), fresh=True)["id"])
                runs = [fixq_cell(client, doc) for _ in range(repeats)]
                fixq_s = statistics.median(run[1] for run in runs)
                r_fixq, _, summary = runs[0]
                r_loop, loop_s, jobs = client_loop_cell(client, doc)
                r_warm, warm_s, warm_jobs = client_loop_cell(client, doc, warm=True)
                rows.append((rho, r_fixq, fixq_s, summary["trials"], r_loop, loop_s, jobs, r_warm, warm_s))
                print(f"  rho {rho}: fixq r {100 * r_fixq:.5f} % in {fixq_s:.3f} s ({summary['trials']} trials, "
                      f"runs {', '.join(f'{run[1]:.3f}' for run in runs)}); client loop r {100 * r_loop:.5f} % in "
                      f"{loop_s:.2f} s ({jobs} jobs); warm-started client loop r {100 * r_warm:.5f} % in "
                      f"{warm_s:.2f} s ({warm_jobs} jobs)", flush=True)
        finally:
            processes.stop_all()
            connection.close()

    print(f"\nAiyagari (1994) Table II, sigma = {SD}, mu = {mu}; fixq: {args.points} asset points, "
          f"{args.method}, {args.interpolation} continuous choice; r and saving rate in %")
    print(f"{'rho':>4} {'independent':>18} {'fixq':>18} {'|diff| pp':>9} {'client loop':>11} {'fixq s':>7} "
          f"{'loop s':>7} {'ratio':>6} {'warm s':>7} {'ratio':>6} {'published*':>10}")
    accurate = fast = True
    ratios, warm_ratios = [], []
    for rho, r_fixq, fixq_s, trials, r_loop, loop_s, jobs, r_warm, warm_s in rows:
        r_ind, s_ind = independent[rho]
        diff_pp = 100 * abs(r_fixq - r_ind)
        ratio = loop_s / fixq_s
        ratios.append(ratio)
        warm_ratios.append(warm_s / fixq_s)
        accurate &= all(100 * abs(r - r_ind) <= ACCURACY_TARGET_PP for r in (r_fixq, r_loop, r_warm))
        fast &= ratio >= SPEED_TARGET
        published = PUBLISHED.get(mu, {}).get(rho)
        print(f"{rho:>4} {100 * r_ind:>9.4f} / {100 * s_ind:>5.2f} {100 * r_fixq:>9.4f} / "
              f"{100 * DELTA * ALPHA / (r_fixq + DELTA):>5.2f} {diff_pp:>9.5f} {100 * r_loop:>11.4f} {fixq_s:>7.3f} "
              f"{loop_s:>7.2f} {ratio:>5.1f}x {warm_s:>7.2f} {warm_s / fixq_s:>5.1f}x "
              f"{'' if published is None else f'{published:.4f}':>10}")
    print("* as published (Aiyagari 1994, Table II), from memory; not compared")
    print(f"accuracy: every cell within {ACCURACY_TARGET_PP} pp of the independent solver: "
          f"{'PASS' if accurate else 'FAIL'}")
    print(f"speed: fixq / client loop per cell {min(ratios):.1f}x - {max(ratios):.1f}x "
          f"(target >= {SPEED_TARGET:.0f}x): {'PASS' if fast else 'FAIL'}; against the warm-started client loop "
          f"{min(warm_ratios):.1f}x - {max(warm_ratios):.1f}x")
    return 0


if __name__ == "__main__":
    sys.exit(main())
