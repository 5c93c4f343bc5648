"""Problem documents that several test modules share, all invented scenarios.

Tabular:

* :func:`machine_shop` — a three-state machine (new, worn, broken): run it, or
  repair it at a cost; the default document of the in-process HTTP tests.
* :func:`print_shop` — a two-state print shop: print, or service the press; the
  default document of the auth, limits and reuse tests.
* :func:`tiny_tabular` — two states, two actions, numbers passed in by the test
  that depends on them (store, load, hostile tests).
* :func:`array_tabular` — a document around a reward array and a transition a
  test generated (sizes counted from the reward array).
* :func:`idle_busy_worn` — a three-state machine that is idle, busy or worn, run
  or serviced; tests whose expected values depend on its numbers pass them.
* :func:`random_replacement` — a random sparse problem (500 states, 3 actions, 8
  successors each) whose solve length a test chooses: the tolerance is below what
  float64 reaches, so it always runs to ``max_iterations`` (about 70 µs per
  value-iteration step on the test machine).

:func:`plant_capacity` reads the bundled plant example (an invented scenario),
optionally on a coarser capacity grid.

Grid models (the ``model`` part only; :func:`grid_document` wraps one):

* :data:`GROWTH` — stochastic growth with CRRA utility, the workhorse model;
* :data:`LQ` — a linear–quadratic problem on a narrow grid;
* :data:`TWO_CHOICES` — a household with two states, two choices and a shock.

:func:`log_growth` is a whole grid ``model`` (``kind`` included): growth with
log utility and full depreciation, whose exact policy is ``k' = αβ z k^α``.

:func:`drifting` is a whole grid document whose size (state variables, points)
a test chooses, for the kernel-size limits.

:func:`aging_saver` is a whole grid document: a household over eight ages saving continuously, by the
endogenous grid method or the search.

:func:`with_period_slot` and :func:`with_horizon` let an infinite-horizon model and its finite-horizon twin
share their kernels.

:func:`random_values` gives the value function the kernel tests probe a compiled
problem with.  Each builder returns a fresh dict, so a test may edit its copy.
"""

from __future__ import annotations

import copy
import json
from pathlib import Path
from typing import Any

import numpy as np

from worker.arrays import encode_array


def machine_shop(**overrides: Any) -> dict[str, Any]:
    """An invented three-state machine: run it, or repair it at a cost; top-level keys overridden."""
    document: dict[str, Any] = {
        "version": 1,
        "label": "machine shop (invented)",
        "tags": ["shop"],
        "discount": 0.9,
        "model": {
            "kind": "tabular",
            "states": ["new", "worn", "broken"],
            "actions": ["run", "repair"],
            "reward": [[3.0, -1.0], [2.0, -1.0], [None, -4.0]],
            "transition": [
                [[0.8, 0.2, 0.0], [1.0, 0.0, 0.0]],
                [[0.0, 0.7, 0.3], [1.0, 0.0, 0.0]],
                [[0.0, 0.0, 1.0], [1.0, 0.0, 0.0]],
            ],
        },
        "solver": {"method": "value_iteration", "tolerance": 1e-8},
    }
    document.update(overrides)
    return document


def print_shop(**overrides: Any) -> dict[str, Any]:
    """An invented two-state print shop: print, or service the press at a cost; top-level keys overridden."""
    document: dict[str, Any] = {
        "version": 1,
        "label": "print shop (invented)",
        "tags": ["shop"],
        "discount": 0.9,
        "model": {
            "kind": "tabular",
            "states": ["sharp", "smudging"],
            "actions": ["print", "service"],
            "reward": [[4.0, -1.0], [1.5, -1.0]],
            "transition": [[[0.85, 0.15], [1.0, 0.0]], [[0.0, 1.0], [1.0, 0.0]]],
        },
        "solver": {"method": "value_iteration", "tolerance": 1e-8},
    }
    document.update(overrides)
    return document


def tiny_tabular(
    *,
    states: int | list[str] = 2,
    actions: int | list[str] = 2,
    reward: list | None = None,
    transition: list | None = None,
    **top_level: Any,
) -> dict[str, Any]:
    """An invented two-state, two-action document at discount 0.9; top-level keys overridden."""
    document: dict[str, Any] = {
        "version": 1,
        "discount": 0.9,
        "model": {
            "kind": "tabular",
            "states": states,
            "actions": actions,
            "reward": [[1.0, 0.0], [0.0, 2.0]] if reward is None else reward,
            "transition": [[[0.5, 0.5], [1.0, 0.0]], [[0.0, 1.0], [0.3, 0.7]]] if transition is None else transition,
        },
    }
    document.update(top_level)
    return document


def array_tabular(reward: np.ndarray, transition: Any, *, pack: bool = False, **top_level: Any) -> dict[str, Any]:
    """A tabular document at discount 0.9 whose sizes are those of ``reward``; top-level keys overridden.

    ``reward`` is written as nested lists (None where it is NaN: a forbidden
    action), or as a packed array when ``pack``; ``transition`` is written as given.
    """
    document: dict[str, Any] = {
        "version": 1,
        "discount": 0.9,
        "model": {
            "kind": "tabular",
            "states": reward.shape[0],
            "actions": reward.shape[1],
            "reward": encode_array(reward)
            if pack
            else [[None if np.isnan(x) else float(x) for x in row] for row in reward],
            "transition": transition,
        },
    }
    document.update(top_level)
    return document


def idle_busy_worn(*, reward: list | None = None, transition: list | None = None, **top_level: Any) -> dict[str, Any]:
    """An invented machine that is idle, busy or worn: run it, or service it; top-level keys overridden.

    Running a busy machine is the only choice there (its service reward is None).
    """
    document: dict[str, Any] = {
        "version": 1,
        "label": "machine shop (invented)",
        "discount": 0.95,
        "model": {
            "kind": "tabular",
            "states": ["idle", "busy", "worn"],
            "actions": ["run", "service"],
            "reward": [[1.0, -0.5], [2.0, None], [0.3, -1.5]] if reward is None else reward,
            "transition": [
                [[0.2, 0.7, 0.1], [0.9, 0.1, 0.0]],
                [[0.1, 0.6, 0.3], [0.0, 1.0, 0.0]],
                [[0.0, 0.1, 0.9], [0.8, 0.2, 0.0]],
            ]
            if transition is None
            else transition,
        },
        "solver": {"tolerance": 1e-9},
    }
    document.update(top_level)
    return document


def random_replacement(
    iterations: int,
    *,
    seed: int = 0,
    label: str = "fleet upkeep (invented)",
    checkpoint_s: float | None = None,
    discount: float = 0.999,
    **solver: Any,
) -> dict[str, Any]:
    """An invented random sparse problem solved for exactly ``iterations`` improvement steps.

    ``solver`` options (value iteration unless ``method`` says otherwise) are added
    to the tolerance and ``max_iterations`` that fix the length of the solve.
    """
    states, actions, successors = 500, 3, 8
    rng = np.random.default_rng(seed)
    s = np.repeat(np.arange(states), actions * successors)
    a = np.tile(np.repeat(np.arange(actions), successors), states)
    s_next = rng.integers(0, states, states * actions * successors)
    p = rng.dirichlet(np.ones(successors), (states, actions)).ravel()
    options: dict[str, Any] = {"method": "value_iteration", **solver, "tolerance": 1e-30, "max_iterations": iterations}
    if checkpoint_s is not None:
        options["checkpoint_s"] = checkpoint_s
    return {
        "version": 1,
        "label": label,
        "discount": discount,
        "model": {
            "kind": "tabular",
            "states": states,
            "actions": actions,
            "reward": encode_array(rng.uniform(0.0, 1.0, (states, actions))),
            "transition": {"entries": encode_array(np.column_stack([s, a, s_next, p]))},
        },
        "solver": options,
    }


GROWTH: dict[str, Any] = {
    "params": {"alpha": 0.36, "delta": 0.08, "gamma": 2.0},
    "states": {"k": {"min": 2.7, "max": 8.2, "points": 120}},
    "shocks": {"z": {"ar1": {"rho": 0.9, "sigma": 0.02, "points": 3}, "transform": "exp"}},
    "choices": {"k_next": {"next_of": "k"}},
    "define": {"c": "z * k**alpha + (1 - delta) * k - k_next"},
    "reward": "c**(1 - gamma) / (1 - gamma)",
    "feasible": ["c > 0"],
}
"""Stochastic growth with CRRA utility (invented calibration): the workhorse model of the kernel tests."""

LQ: dict[str, Any] = {
    "params": {"a": 0.95, "b": 0.5, "q": 1.0, "r": 0.5},
    "states": {"x": {"min": -1.0, "max": 1.0, "points": 41}},
    "choices": {"u": {"min": -3.0, "max": 3.0, "points": 61}},
    "next": {"x": "a * x + b * u"},
    "reward": "-(q * x**2 + r * u**2)",
}
"""A linear–quadratic problem on a narrow grid: many choices send x' outside it (clamped)."""

TWO_CHOICES: dict[str, Any] = {
    "params": {"alpha": 0.3, "wage": 1.0},
    "states": {"a": {"min": 0.0, "max": 4.0, "points": 25}, "h": {"min": 0.5, "max": 2.0, "points": 4}},
    "shocks": {"e": {"markov": {"values": [0.8, 1.2], "matrix": [[0.9, 0.1], [0.2, 0.8]]}}},
    "choices": {"a_next": {"next_of": "a"}, "work": {"values": [0.0, 0.5, 1.0]}},
    "next": {"h": "0.9 * h + 0.3 * work"},
    "define": {"income": "wage * e * h * work + 1.02 * a", "c": "income + 0.2 - a_next"},
    "reward": "log(c) - 0.5 * work**2",
    "feasible": ["c > 0"],
}
"""A household (invented): savings by next_of, a work menu, and human capital h that moves by
interpolation — several states, several choices, shocks and interpolation at once."""


def log_growth(
    *,
    alpha: float = 0.3,
    k_min: float = 0.1,
    k_max: float = 2.0,
    points: int = 20,
    shocks: dict | None = None,
    **model: Any,
) -> dict[str, Any]:
    """Invented growth with log utility and full depreciation: a grid ``model``, its keys overridden.

    The capital grid is ``[k_min, k_max]`` with ``points`` points; the default
    shock is a two-state Markov chain used untransformed.
    """
    if shocks is None:
        shocks = {"z": {"markov": {"values": [0.9, 1.1], "matrix": [[0.8, 0.2], [0.3, 0.7]]}, "transform": "none"}}
    return {
        "kind": "grid",
        "params": {"alpha": alpha},
        "states": {"k": {"min": k_min, "max": k_max, "points": points}},
        "shocks": shocks,
        "choices": {"k_next": {"next_of": "k"}},
        "define": {"c": "z * k**alpha - k_next"},
        "reward": "log(c)",
        "feasible": ["c > 0"],
        **model,
    }


def grid_document(model: dict, *, discount: float = 0.95, hints: dict | None = None, **solver: object) -> dict:
    """A version-1 document around the grid ``model`` (a copy), with ``solver`` options and tolerance 1e-8."""
    model = {"kind": "grid", **copy.deepcopy(model)}
    if hints is not None:
        model["hints"] = hints
    return {"version": 1, "discount": discount, "model": model, "solver": {"tolerance": 1e-8, **solver}}


def plant_capacity(points: int | None = None, **top_level: Any) -> dict[str, Any]:
    """The bundled plant example, a fresh copy; ``points`` capacity points if given, top-level keys overridden."""
    path = Path(__file__).resolve().parents[1] / "service" / "examples" / "plant_capacity.json"
    document: dict[str, Any] = json.loads(path.read_text(encoding="utf-8"))
    if points is not None:
        document["model"]["states"]["capacity"]["points"] = points
    document.update(top_level)
    return document


def drifting(state_variables: int, points: int) -> dict[str, Any]:
    """An invented grid document: every state variable drifts toward the chosen effort by a next expression."""
    model = {
        "kind": "grid",
        "states": {f"x{i}": {"min": 0.0, "max": 1.0, "points": points} for i in range(state_variables)},
        "choices": {"effort": {"values": [0.0, 1.0]}},
        "next": {f"x{i}": f"0.6 * x{i} + 0.3 * effort + 0.05" for i in range(state_variables)},
        "reward": " + ".join(f"x{i}" for i in range(state_variables)) + " - 0.5 * effort",
    }
    return {"version": 1, "discount": 0.9, "model": model}


def random_values(problem: Any, seed: int = 0) -> np.ndarray:
    """A value function that is neither concave nor monotone: the searches must not rely on shape."""
    return np.random.default_rng(seed).normal(scale=3.0, size=problem.n)


def two_peaks(bonus: float, hints: dict | None) -> dict[str, Any]:
    """Invented (tests/worker/test_local_phase.py): a broad peak of the reward at 0.25 + 0.05·k + z and a
    narrow one of height ``bonus`` at 0.725, between the grid points 0.70 and 0.75 of ``k`` on [0, 1] (21
    points); tomorrow's value read linearly."""
    model: dict[str, Any] = {
        "kind": "grid",
        "params": {"bonus": bonus, "peak": 0.725, "spread": 0.02},
        "states": {"k": {"min": 0.0, "max": 1.0, "points": 21}},
        "shocks": {"z": {"markov": {"values": [0.0, 0.03], "matrix": [[0.9, 0.1], [0.1, 0.9]]},
                         "transform": "none"}},
        "choices": {"k_next": {"next_of": "k", "continuous": True}},
        "reward": "-(k_next - 0.25 - 0.05 * k - z)**2 + bonus * exp(-((k_next - peak) / spread)**2)",
        "interpolation": "linear",
    }
    if hints is not None:
        model["hints"] = hints
    return {"version": 1, "discount": 0.5, "model": model, "solver": {"method": "howard", "tolerance": 1e-9}}


def aging_saver(method: str | None) -> dict[str, Any]:
    """An invented household over eight ages: CRRA utility, income by age times an AR(1) shock, a pension
    from age 5, a bequest value; savings chosen continuously (tests/worker/test_horizon_egm.py; its kernels are
    those of tests/integration/test_horizon_resume.py's working life too)."""
    document: dict[str, Any] = {
        "version": 1,
        "discount": 0.96,
        "model": {
            "kind": "grid",
            "params": {"r": 0.03, "gamma": 2.0, "income": [1.0, 1.2, 1.4, 1.5, 1.5, 0.6, 0.6, 0.6]},
            "states": {"a": {"min": 0, "max": 15, "points": 120, "spacing": "power", "exponent": 2.0}},
            "shocks": {"y": {"ar1": {"rho": 0.9, "sigma": 0.1, "points": 5}}},
            "choices": {"an": {"next_of": "a", "continuous": True}},
            "define": {"c": "(1 + r) * a + income * exp(y) - an"},
            "feasible": ["c > 0"],
            "reward": "c**(1 - gamma) / (1 - gamma)",
            "hints": {"concave": True},
            "horizon": {"periods": 8, "terminal_value": "2 * (1 + a)**(1 - gamma) / (1 - gamma)"},
        },
        "report": {"euler_errors": True, "cohort": {"start": {"a": 0, "y": 0}}},
    }
    if method is not None:
        document["solver"] = {"method": method}
    return document


def savings_market(points: int = 40, **model: Any) -> dict[str, Any]:
    """Invented: households saving in an asset out of a two-state wage, their wage ``w`` and the firms'
    ``capital_demand`` params given as expressions of the interest rate ``r`` (the economy of the search tests;
    one text, so that the tests share its compiled kernels); a grid ``model`` with ``model``'s keys overridden.
    The borrowing limit, the grid's min, is a real end (no warning that the choice reaches it)."""
    return {
        "kind": "grid",
        "params": {"r": 0.02, "alpha": 0.36, "delta": 0.08,
                   "capital_demand": "(alpha / (r + delta)) ** (1 / (1 - alpha))",
                   "w": "(1 - alpha) * capital_demand ** alpha"},
        "states": {"a": {"min": 0.0, "max": 30.0, "points": points, "spacing": "power", "exponent": 2.0,
                         "real_ends": ["min"]}},
        "shocks": {"y": {"markov": {"values": [0.4, 1.6], "matrix": [[0.8, 0.2], [0.2, 0.8]]}, "transform": "none"}},
        "choices": {"save": {"next_of": "a", "continuous": True}},
        "define": {"c": "(1 + r) * a + w * y - save"},
        "reward": "log(c)",
        "feasible": ["c > 0"],
        **model,
    }


PERIOD_SLOT = "period_slot"
"""The name of the last param :func:`with_period_slot` adds (no expression reads it)."""


def with_period_slot(document: dict[str, Any]) -> dict[str, Any]:
    """An infinite-horizon grid ``document`` with a last param no expression reads (``PERIOD_SLOT``, 0), where a
    horizon puts ``period``: worker.feasibility.model_data appends ``period`` to a horizon model's params, so the
    model and its finite-horizon twin (:func:`with_horizon`) list as many params and, since a param's name is not
    part of the structure (DEVELOPERS.md), compile one set of kernels.  The solve is unchanged.  In place; returned."""
    model = document["model"]
    assert "horizon" not in model and PERIOD_SLOT not in model.get("params", {})
    model["params"] = {**model.get("params", {}), PERIOD_SLOT: 0.0}
    return document


def with_horizon(document: dict[str, Any], horizon: dict[str, Any]) -> dict[str, Any]:
    """``document`` given ``horizon``, without the param :func:`with_period_slot` added (its place is
    ``period``'s) and without ``report.stationary`` (refused with a horizon, which has no stationary
    distribution).  In place; returned."""
    document.get("report", {}).pop("stationary", None)
    model = document["model"]
    params = {name: value for name, value in model.get("params", {}).items() if name != PERIOD_SLOT}
    if params:
        model["params"] = params
    else:
        model.pop("params", None)
    model["horizon"] = horizon
    return document
