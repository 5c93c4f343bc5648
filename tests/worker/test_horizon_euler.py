"""Euler-equation errors of a continuous choice with a finite horizon, on finite-horizon cake eating.

Reference: the finite-horizon cake-eating problem with log utility, whose consumption rule is the textbook
closed form ``c_t = W_t (1 − β) / (1 − β^(T−t))``, whatever the gross return ``R`` on the cake kept
(``W_{t+1} = R (W_t − c_t)``; with log utility the income and substitution effects of ``R`` cancel), so
the Euler equation ``1/c_t = β R / c_{t+1}`` holds exactly along it; the unit-free error ``|1 − c̃/c|`` is
Judd (1992)'s.  A return of 1.05 keeps the grid's lowest point feasible (keeping it leaves something to
eat).  The solved policy differs from the
closed form only by the interpolation of tomorrow's value and the search's tolerance, so the errors are
tiny with the shape-preserving cubic, and larger with linear interpolation (whose value has kinks at
the grid points).
"""

from __future__ import annotations

from typing import Any

import numpy as np

from worker import solve

BETA = 0.9
PERIODS, EXTRA = 6, 3
RETURN = 1.05


def cake(interpolation: str) -> dict[str, Any]:
    """Cake eating with the closed-form value of EXTRA more periods as the terminal value, so the rule of a
    (PERIODS + EXTRA)-period problem holds in every period; choose tomorrow's cake `wn`, eat c = w − wn / R."""
    total = PERIODS + EXTRA
    A = (1 - BETA ** (total - np.arange(total + 1))) / (1 - BETA)
    B = np.zeros(total + 1)
    for t in range(total - 2, -1, -1):  # the closed form's constant, A_t log W + B_t (substituted into Bellman)
        B[t] = -np.log(A[t]) + BETA * A[t + 1] * np.log(RETURN * BETA * A[t + 1] / A[t]) + BETA * B[t + 1]
    return {
        "version": 1,
        "discount": BETA,
        "model": {
            "kind": "grid",
            "params": {"A": float(A[PERIODS]), "B": float(B[PERIODS]), "R": RETURN},
            "states": {"w": {"min": 0.005, "max": 2.0, "points": 300, "spacing": "log"}},
            "choices": {"wn": {"next_of": "w", "continuous": True}},
            "define": {"c": "w - wn / R"},
            "feasible": ["c > 0"],
            "reward": "log(c)",
            "interpolation": interpolation,
            "hints": {"concave": True},
            "horizon": {"periods": PERIODS, "terminal_value": "A * log(w) + B"},
        },
        "report": {"euler_errors": True},
    }


def test_continuous_cake_eating_has_tiny_euler_errors_in_every_period_but_the_last() -> None:
    result = solve(cake("monotone_cubic"))
    errors = result["diagnostics"]["euler_errors"]
    by_period = errors["by_period"]
    # The terminal period has no Euler equation: periods 0 .. T−2 are measured.
    assert by_period["period"] == list(range(PERIODS - 1))
    assert errors["define"] == "c" and errors["points"] > 0.8 * (errors["points"] + errors["constrained"])
    # Tiny: the closed-form rule satisfies the Euler equation exactly, and the solved one is within the cubic's
    # h² of it (h = the step of log w, about 0.02, so h² ≈ 4e-4; common practice: errors of that order or below).
    assert max(by_period["mean_log10"]) < -4.5 and errors["mean_log10"] < -4.5
    assert errors["max_log10"] == max(by_period["max_log10"])
    # The worst errors sit at the grid's lowest points, where tomorrow's cake leaves the grid and its value is
    # read at the end; above the cake from which no path leaves the grid, period 0's errors stay below 1e-4.
    at = np.array(errors["profile"]["at"])
    measured = np.array(errors["profile"]["log10_error"], dtype=float)
    inside = at >= 0.005 / 0.7**PERIODS
    assert np.nanmax(measured[inside]) < -4 and np.isfinite(measured[inside]).mean() > 0.99
    assert any("each period's own search" in note for note in result["diagnostics"]["notes"])
    # The same measure is not blind: linear interpolation of tomorrow's value is visibly worse.
    linear = solve(cake("linear"))["diagnostics"]["euler_errors"]
    assert linear["mean_log10"] > errors["mean_log10"] + 1


def test_the_measured_consumption_follows_the_closed_form_rule() -> None:
    # The policy the errors are measured on is the closed-form rule c_t = W (1 − β) / (1 − β^(T'−t)), T' the
    # whole horizon with the EXTRA periods the terminal value stands for.
    result = solve(cake("monotone_cubic"))
    w = np.array(result["axes"]["w"])
    eaten = w[None, :] - np.array(result["policy"]["wn"]) / RETURN
    total = PERIODS + EXTRA
    for t in range(PERIODS):
        safe = w >= 0.005 / 0.7 ** (PERIODS - t)  # no path from here reaches below the grid's lowest point
        rule = w[safe] * (1 - BETA) / (1 - BETA ** (total - t))
        assert np.abs(eaten[t, safe] / rule - 1).max() < 2e-3
