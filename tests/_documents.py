"""Problem documents that several test modules share, all invented scenarios.

Tabular:

* :func:`machine_shop` — a three-state machine (new, worn, broken): run it, or
  repair it at a cost; the default document of the in-process HTTP tests.
* :func:`print_shop` — a two-state print shop: print, or service the press; the
  default document of the auth, limits and reuse tests.

Grid models (the ``model`` part only; :func:`grid_document` wraps one):

* :data:`GROWTH` — stochastic growth with CRRA utility, the workhorse model;
* :data:`LQ` — a linear–quadratic problem on a narrow grid;
* :data:`TWO_CHOICES` — a household with two states, two choices and a shock.

:func:`random_values` gives the value function the kernel tests probe a compiled
problem with.  Each builder returns a fresh dict, so a test may edit its copy.
"""

from __future__ import annotations

import copy
from typing import Any

import numpy as np


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


def grid_document(model: dict, *, discount: float = 0.95, hints: dict | None = None, **solver: object) -> dict:
    """A version-1 document around the grid ``model`` (a copy), with ``solver`` options and tolerance 1e-8."""
    model = {"kind": "grid", **copy.deepcopy(model)}
    if hints is not None:
        model["hints"] = hints
    return {"version": 1, "discount": discount, "model": model, "solver": {"tolerance": 1e-8, **solver}}


def random_values(problem: Any, seed: int = 0) -> np.ndarray:
    """A value function that is neither concave nor monotone: the searches must not rely on shape."""
    return np.random.default_rng(seed).normal(scale=3.0, size=problem.n)
