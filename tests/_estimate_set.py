"""The documents the size estimates are measured on, and the measurement (shared by a test and a bench).

Every bundled example (``service/examples/*.json``) plus the shapes the estimates must also hold for,
each an invented scenario: several iid and Markov shocks, taste shocks on a tabular model, draws after
the choice (alone and with taste shocks), a finite horizon, a continuous choice, tabular dense and sparse
transitions, and grid models of tens and hundreds of thousands of points where per-point costs dominate
fixed ones.

:func:`measure_memory` is the figure the estimate's ``bytes`` targets: the peak of the memory traced by
:mod:`tracemalloc` (Python objects and numpy's arrays) during a solve in a process that has already
solved the document once (kernels compiled or loaded, libraries imported), measured from the traced
memory just before the solve.  :func:`measure_seconds` is the wall time of such a warm solve.
"""

from __future__ import annotations

import contextlib
import copy
import gc
import json
import time
import tracemalloc
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np

from tests._documents import GROWTH, array_tabular, grid_document, log_growth, random_replacement, with_period_slot
from tests._draw_models import fishery, van
from worker.arrays import encode_array

EXAMPLES = Path(__file__).resolve().parents[1] / "service" / "examples"


def example(name: str) -> dict[str, Any]:
    return json.loads((EXAMPLES / f"{name}.json").read_text(encoding="utf-8"))


def several_shocks(points: int = 60) -> dict[str, Any]:
    """Invented farm savings: two iid shocks (rain, prices) and a Markov health chain, 60 × 5 × 4 × 3 points."""
    return {
        "version": 1, "label": "farm savings with rain, price and health shocks (invented)", "discount": 0.95,
        "model": {
            "kind": "grid",
            "params": {"gamma": 2.0, "r": 0.03},
            "states": {"a": {"min": 0.0, "max": 12.0, "points": points, "spacing": "power"}},
            "shocks": {
                "rain": {"iid": {"values": [0.6, 0.8, 1.0, 1.1, 1.2], "probs": [0.1, 0.2, 0.4, 0.2, 0.1]}},
                "price": {"iid": {"values": [0.8, 0.95, 1.05, 1.2], "probs": [0.2, 0.3, 0.3, 0.2]}},
                "health": {"markov": {"values": [0.5, 0.9, 1.0],
                                      "matrix": [[0.5, 0.3, 0.2], [0.1, 0.7, 0.2], [0.02, 0.08, 0.9]]}},
            },
            "choices": {"a_next": {"next_of": "a"}},
            "define": {"c": "(1 + r) * a + rain * price * health - a_next"},
            "reward": "c**(1 - gamma) / (1 - gamma)",
            "feasible": ["c > 0"],
        },
        "solver": {"method": "howard", "tolerance": 1e-6},
    }


def lifted_shock(points: int = 40, shock_points: int = 25) -> dict[str, Any]:
    """Invented shop: a discretised iid cost shock of many points, two choices (the issue's refused shape)."""
    values = np.linspace(-2.0, 2.0, shock_points)
    probs = np.exp(-values**2 / 2)
    probs /= probs.sum()
    return {
        "version": 1, "label": "repair shop with a many-point cost shock (invented)", "discount": 0.95,
        "model": {
            "kind": "grid",
            "states": {"wear": {"min": 0.0, "max": float(points - 1), "points": points}},
            "shocks": {"cost": {"iid": {"values": values.tolist(), "probs": probs.tolist()}}},
            "choices": {"repair": {"values": [0, 1]}},
            "next": {"wear": "(1 - repair) * min(wear + 1, " + str(points - 1) + ")"},
            "reward": "-(0.1 * wear) * (1 - repair) - (3 + 0.5 * cost) * repair",
        },
        "solver": {"method": "howard", "tolerance": 1e-8},
    }


def separation(offers: int = 40) -> dict[str, Any]:
    """Invented job search: the separation is drawn after the choice with a probability that falls with effort."""
    return {
        "version": 1, "label": "job search with separations after the choice (invented)", "discount": 0.95,
        "model": {
            "kind": "grid",
            "params": {"benefit": 0.6, "cost": 0.3},
            "states": {"employed": {"values": [0, 1]},
                       "wage": {"min": 0.5, "max": 2.0, "points": offers}},
            "shocks": {
                "offer": {"iid": {"values": np.linspace(0.5, 2.0, offers).tolist(),
                                  "probs": (np.ones(offers) / offers).tolist()}},
                "lost": {"timing": "after_choice",
                         "iid": {"values": [0, 1], "probs": ["1 - 0.1 * (1 - 0.5 * effort)",
                                                             "0.1 * (1 - 0.5 * effort)"]}},
            },
            "choices": {"accept": {"values": [0, 1]}, "effort": {"values": [0.0, 0.5, 1.0]}},
            "next": {
                "employed": "max(employed, accept) * (1 - lost)",
                "wage": "employed * wage + (1 - employed) * (accept * offer + (1 - accept) * wage)",
            },
            "reward": "employed * wage + (1 - employed) * benefit - cost * effort**2",
        },
        "solver": {"method": "howard", "tolerance": 1e-8},
    }


def growth(points: int, shocks: int, hints: dict | None = None) -> dict[str, Any]:
    model = {"kind": "grid", **copy.deepcopy(GROWTH)}
    model["states"]["k"] = {"min": 2.7, "max": 8.2, "points": points}
    model["shocks"]["z"]["ar1"]["points"] = shocks
    if hints is not None:
        model["hints"] = hints
    return {"version": 1, "label": f"growth {points} × {shocks} (invented)", "discount": 0.95, "model": model,
            "solver": {"method": "howard", "tolerance": 1e-6}}


def two_states(capacity: int, customers: int) -> dict[str, Any]:
    """The roastery example on a finer grid: two states moved by a next_of and an expression."""
    document = example("roastery_growth")
    document["model"]["states"]["capacity"]["points"] = capacity
    document["model"]["states"]["customers"]["points"] = customers
    return document


def dense_tabular(states: int = 150, actions: int = 4, seed: int = 1) -> dict[str, Any]:
    """Invented dense fleet problem: every state reachable from every (state, action)."""
    rng = np.random.default_rng(seed)
    transition = rng.dirichlet(np.ones(states), (states, actions))
    raw = array_tabular(rng.uniform(0.0, 1.0, (states, actions)), encode_array(transition))
    raw["solver"] = {"method": "howard", "tolerance": 1e-8}
    return raw


def taste_tabular(states: int = 400) -> dict[str, Any]:
    raw = random_replacement(200, seed=3, label="fleet upkeep with taste shocks (invented)", method="howard")
    raw["solver"]["tolerance"] = 1e-8
    raw["discount"] = 0.95
    raw["model"]["taste_shocks"] = {"scale": 0.5}
    return raw


def sparse_tabular() -> dict[str, Any]:
    raw = random_replacement(200, seed=2, method="howard")
    raw["solver"]["tolerance"] = 1e-8
    raw["discount"] = 0.95
    return raw


def continuous_with_draws(points: int = 400) -> dict[str, Any]:
    """The invented fishery of ``tests._draw_models`` (a continuous harvest, the season drawn after it) on
    ``points`` stock points, without reports."""
    return fishery(points, tolerance=1e-8, reports=False)


def two_state_growth_euler(k_points: int = 200, a_points: int = 7) -> dict[str, Any]:
    """Invented growth with a productivity level ``a`` that moves by its own law, capital chosen continuously
    (``monotone_cubic``), with Euler errors at every grid point of ``a`` (``worker.euler_states``)."""
    model = log_growth(
        k_min=0.05, k_max=0.45, points=k_points, params={"alpha": 0.3, "rho": 0.6},
        shocks={"e": {"markov": {"values": [0.9, 1.1], "matrix": [[0.8, 0.2], [0.3, 0.7]]}, "transform": "none"}},
        define={"c": "e * a * k**alpha - k_next"}, next={"a": "a**rho"},
        interpolation="monotone_cubic", hints={"concave": True})
    model["states"] = {"a": {"min": 0.8, "max": 1.25, "points": a_points}, **model["states"]}
    model["choices"]["k_next"]["continuous"] = True
    # With the period slot, as tests/worker/test_euler_states.py writes this model: one set of kernels for both.
    return with_period_slot({"version": 1, "discount": 0.95, "model": model,
                             "solver": {"method": "howard", "tolerance": 1e-8}, "report": {"euler_errors": True}})


def saver(points: int, interpolation: str = "monotone_cubic", hinted: bool = True) -> dict[str, Any]:
    """The beekeeper example (a continuous saving choice, 7 harvest points) on ``points`` savings points, with
    ``interpolation``, with or without its hints, without reports (the solve's own time)."""
    document = example("beekeeper_savings")
    model = document["model"]
    model["states"]["savings"]["points"] = points
    model["interpolation"] = interpolation
    if not hinted:
        model.pop("hints")
    document.pop("report")
    return document


def continuous_shapes() -> dict[str, dict[str, Any]]:
    """Name → document: models with a continuous choice whose time ``bench/bench_estimates.py --continuous``
    compares with the estimate's (linear and monotone cubic, hinted and not, 200 to 5,000 points of the state the
    choice sets; two states; draws after the choice), without reports."""
    shapes = {}
    for points in (200, 1000, 5000):
        for interpolation, short in (("monotone_cubic", "cubic"), ("linear", "linear")):
            shapes[f"saver_{short}_hinted_{points}"] = saver(points, interpolation)
    for points in (200, 1000, 3000):
        for interpolation, short in (("monotone_cubic", "cubic"), ("linear", "linear")):
            shapes[f"saver_{short}_unhinted_{points}"] = saver(points, interpolation, hinted=False)
    for (k_points, a_points), interpolation in (((200, 7), "monotone_cubic"), ((1000, 5), "linear")):
        document = two_state_growth_euler(k_points, a_points)
        document.pop("report")
        document["model"]["interpolation"] = interpolation
        shapes[f"two_state_growth_{interpolation.split('_')[-1]}_{k_points}x{a_points}"] = document
    for points in (400, 2000):
        shapes[f"fishery_draws_{points}"] = continuous_with_draws(points)
    return shapes


def documents(large: bool = False) -> dict[str, dict[str, Any]]:
    """Name → document: the bundled examples and the extra shapes; ``large`` adds the slow, large ones."""
    docs = {path.stem: example(path.stem) for path in sorted(EXAMPLES.glob("*.json"))}
    docs.update({
        "several_iid_and_markov": several_shocks(),
        "many_point_iid": lifted_shock(),
        "separation_after_choice": separation(),
        "dense_tabular": dense_tabular(),
        "sparse_tabular": sparse_tabular(),
        "taste_tabular": taste_tabular(),
        "taste_with_draws_after_choice": grid_document(van(top=400), discount=0.95, tolerance=1e-6),
        "continuous_with_draws_after_choice": continuous_with_draws(),
        "two_states_continuous_euler": two_state_growth_euler(),
        "growth_tables_20k": growth(1000, 20),
        "growth_hinted_60k": growth(2000, 30, {"monotone": True, "concave": True}),
    })
    if large:
        docs.update({
            "growth_hinted_300k": growth(6000, 50, {"monotone": True, "concave": True}),
            "roastery_29k": two_states(120, 120),
            "several_iid_and_markov_60k": several_shocks(1000),
        })
    return docs


def method_variants() -> dict[str, dict[str, Any]]:
    """The taste-shock and draw documents solved by policy iteration and by value iteration (name → document):
    their exact evaluations and their iteration counts are modelled apart from Howard's."""
    base = {name: raw for name, raw in documents().items() if name in (
        "taste_tabular", "taste_with_draws_after_choice", "separation_after_choice", "bike_shop_inventory",
        "courier_van_replacement")}
    variants = {}
    for name, raw in base.items():
        for method, short in (("policy_iteration", "pi"), ("value_iteration", "vi")):
            document = copy.deepcopy(raw)
            document["solver"]["method"] = method
            document["solver"].pop("evaluation_steps", None)
            variants[f"{name}_{short}"] = document
    return variants


POINTWISE: dict[str, tuple[dict[str, Any], dict[str, int]]] = {
    "fishery_pointwise": (example("fishery_harvest"), {"max_bytes": 2**20}),
    "roastery_60_pointwise": (two_states(60, 60), {"max_bytes": 200 * 2**20}),
}
"""Documents solved under a memory cap whose precompute budget leaves their tables out: exact pointwise steps
through an interpolated state (name → (document, ``limits``))."""


LU_ENTRY_BYTES = 12
"""SuperLU's storage per entry of an LU factor, a value and a row index (bytes; its own figure, not the
estimate's: ``bench/bench_lu_fill.py`` compares it with the resident memory a solve adds)."""


@contextlib.contextmanager
def untraced_solves(held: list[int]) -> Iterator[None]:
    """Count what direct solves hold outside :mod:`tracemalloc`'s view, while they run.

    SuperLU (``scipy.sparse.linalg.spsolve``, ``splu``) and LAPACK (``numpy.linalg.solve``) allocate their
    factors with C's ``malloc``, which tracing does not see.  For each call, ``held`` gets the traced memory at
    the call plus that factor: the entries of SuperLU's factor of the same matrix (``splu`` with spsolve's
    default COLAMD ordering, its ``nnz`` read, nothing converted) at ``LU_ENTRY_BYTES`` each; for ``splu`` itself
    (a stationary distribution's LU), the entries of the factor it made; LAPACK's copy of the matrix and the
    right-hand side, and its pivots.
    """
    import numpy.linalg as npla
    import scipy.sparse as sp
    import scipy.sparse.linalg as spla

    sparse_solve, dense_solve, factorise = spla.spsolve, npla.solve, spla.splu

    def counted_sparse(A: Any, b: Any, *args: Any, **kwargs: Any) -> Any:
        factor = factorise(sp.csc_matrix(A))
        held.append(tracemalloc.get_traced_memory()[0] + factor.nnz * LU_ENTRY_BYTES)
        del factor
        return sparse_solve(A, b, *args, **kwargs)

    def counted_factor(A: Any, *args: Any, **kwargs: Any) -> Any:
        factor = factorise(A, *args, **kwargs)
        held.append(tracemalloc.get_traced_memory()[0] + factor.nnz * LU_ENTRY_BYTES)
        return factor

    def counted_dense(a: Any, b: Any) -> Any:
        a, b = np.asarray(a), np.asarray(b)
        held.append(tracemalloc.get_traced_memory()[0] + a.nbytes + b.nbytes + 4 * a.shape[-1])
        return dense_solve(a, b)

    spla.spsolve, npla.solve, spla.splu = counted_sparse, counted_dense, counted_factor
    try:
        yield
    finally:
        spla.spsolve, npla.solve, spla.splu = sparse_solve, dense_solve, factorise


def measure_memory(raw: dict[str, Any], limits: dict[str, Any] | None = None) -> int:
    """Peak bytes a warm solve of ``raw`` adds (the document solved once before, outside the trace): the traced
    peak, or the traced memory at a direct solve plus the factor it holds outside the trace
    (:func:`untraced_solves`), whichever is larger."""
    from worker import solve

    solve(raw, limits=limits)
    gc.collect()
    held: list[int] = []
    tracemalloc.start()
    try:
        base, _ = tracemalloc.get_traced_memory()
        with untraced_solves(held):
            solve(raw, limits=limits)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    return max([peak, *held]) - base


def measure_seconds(raw: dict[str, Any], repeats: int = 3, limits: dict[str, Any] | None = None) -> float:
    """Median wall time of ``repeats`` warm solves (after one untimed solve) in seconds: on a shared machine the
    least is as much luck as the largest (the same solve took 1 to 5 times as long from one run to the next)."""
    import statistics

    from worker import solve

    solve(raw, limits=limits)
    seconds = []
    for _ in range(repeats):
        start = time.perf_counter()
        solve(raw, limits=limits)
        seconds.append(time.perf_counter() - start)
    return statistics.median(seconds)
