"""Grid models against solutions known outside fixq.

Each test solves a problem document through ``worker.solve`` (fixq's real
path) and compares with a closed form from the literature or with scipy.
The calibrations are invented numbers in the usual ranges.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.linalg

from tests._documents import LQ, grid_document
from worker import solve

# Brock, W. A. and L. J. Mirman (1972), "Optimal economic growth and uncertainty: the
# discounted case", Journal of Economic Theory 4(3), 479-513.  Log utility, output
# z·k**α, full depreciation: k' = z·k**α − c.
#
# Closed form (derived here by guess and verify).  Guess V(k, z) = A(z) + B·log k.
#   FOC in k':        1/(z k^α − k') = β B / k'          ⇒  k' = βB/(1 + βB) · z k^α
#   envelope in k:    V_k = α z k^(α−1) / c = B / k       ⇒  c = α z k^α / B
#   both together:    α/B = 1/(1 + βB)                    ⇒  B = α / (1 − αβ),  k' = αβ z k^α
#   constants:        A(z) = C0 + log z / (1 − αβ) + β Σ_z' P[z, z'] A(z'),
#                     C0 = log(1 − αβ) + αβ/(1 − αβ) · log(αβ)
#   so A = (I − βP)⁻¹ (C0 + log z / (1 − αβ)); without shocks A = C0 / (1 − β).
# The derivation uses only E[· | z], so it holds exactly for a finite chain P.
ALPHA, BETA = 0.3, 0.9


def _brock_mirman(z_values: np.ndarray, P: np.ndarray) -> tuple[float, np.ndarray]:
    B = ALPHA / (1 - ALPHA * BETA)
    C0 = math.log(1 - ALPHA * BETA) + ALPHA * BETA / (1 - ALPHA * BETA) * math.log(ALPHA * BETA)
    A = np.linalg.solve(np.eye(len(z_values)) - BETA * P, C0 + np.log(z_values) / (1 - ALPHA * BETA))
    return B, A


def _brock_mirman_model(points: int, shocks: dict | None) -> dict:
    k_star = (ALPHA * BETA) ** (1 / (1 - ALPHA))
    model = {
        "params": {"alpha": ALPHA},
        "states": {"k": {"min": 0.5 * k_star, "max": 2.0 * k_star, "points": points}},
        "choices": {"k_next": {"next_of": "k"}},
        "define": {"c": "z * k**alpha - k_next" if shocks else "k**alpha - k_next"},
        "reward": "log(c)",
        "feasible": ["c > 0"],
    }
    if shocks:
        model["shocks"] = shocks
    return model


@pytest.mark.parametrize("stochastic", [False, True], ids=["deterministic", "markov"])
def test_brock_mirman_policy_and_value(stochastic: bool) -> None:
    points = 300
    if stochastic:
        z_values, P = np.array([0.9, 1.1]), np.array([[0.8, 0.2], [0.3, 0.7]])
        shocks = {"z": {"markov": {"values": z_values.tolist(), "matrix": P.tolist()}}}
    else:
        z_values, P, shocks = np.array([1.0]), np.eye(1), None
    result = solve(grid_document(_brock_mirman_model(points, shocks), discount=BETA, method="howard"))
    assert result["status"] == "converged"

    k = np.array(result["axes"]["k"])
    value = np.array(result["value"]).reshape(points, len(z_values))
    policy = np.array(result["policy"]["k_next"]).reshape(points, len(z_values))
    B, A = _brock_mirman(z_values, P)
    exact_value = A[None, :] + B * np.log(k)[:, None]
    exact_policy = ALPHA * BETA * z_values[None, :] * k[:, None] ** ALPHA
    step = k[1] - k[0]

    # Policy: the objective is strictly concave in k', so the best grid point lies in the grid
    # cell around the continuous maximiser; the discrete continuation differs from the exact
    # one by O(h^2) (below), which cannot move the choice by a whole further step.
    assert np.max(np.abs(policy - exact_policy)) <= step * (1 + 1e-9)

    # Value: choosing k' on the grid loses at most ½·max|F''|·h² per period against the
    # exact maximiser, F(k') = log(z k^α − k') + βB log k' (F'' = −1/c² − βB/k'²), so
    # 0 ≤ V − V_h ≤ ½·max|F''|·h²/(1 − β), plus the solver's certified error bound.
    c_min = (1 - ALPHA * BETA) * z_values.min() * k[0] ** ALPHA * 0.5
    k_next_min = exact_policy.min() - step
    curvature = 1 / c_min**2 + BETA * B / k_next_min**2
    allowance = 0.5 * curvature * step**2 / (1 - BETA)
    gap = exact_value - value
    bound = result["error_bound"]
    assert gap.min() >= -bound - 1e-12
    assert gap.max() <= allowance + bound
    assert gap.max() < 1e-3  # the allowance itself is small on this grid (about 1e-4)


# Discounted linear–quadratic control against scipy's Riccati solver
# (scipy.linalg.solve_discrete_are; Anderson and Moore, "Optimal Filtering", 1979, for the DARE).
# State x' = a x + b u, reward −(q x² + r u²), discount β.  With V(x) = −P x², the Bellman
# equation is the discounted Riccati equation P = q + β a² P − (β a b P)² / (r + β b² P), which is
# the standard DARE for A = √β·a, B = √β·b, Q = q, R = r; the policy is u = −F x with
# F = β a b P / (r + β b² P).  The model is the shared LQ on wider grids.
LQ_BETA = 0.95


def test_linear_quadratic_against_riccati() -> None:
    a, b, q, r = (LQ["params"][name] for name in ("a", "b", "q", "r"))
    P = float(scipy.linalg.solve_discrete_are(
        np.array([[math.sqrt(LQ_BETA) * a]]), np.array([[math.sqrt(LQ_BETA) * b]]), np.array([[q]]), np.array([[r]])
    )[0, 0])
    F = LQ_BETA * a * b * P / (r + LQ_BETA * b * b * P)

    x_points, u_points = 201, 801
    model = {
        **LQ,
        "states": {"x": {"min": -2.0, "max": 2.0, "points": x_points}},
        "choices": {"u": {"min": -3.0, "max": 3.0, "points": u_points}},
    }
    result = solve(grid_document(model, discount=LQ_BETA, method="howard"))
    assert result["status"] == "converged"
    x = np.array(result["axes"]["x"])
    value = np.array(result["value"])
    u = np.array(result["policy"]["u"])
    interior = np.abs(x) <= 1.5

    # Value: the grid value V_h sits below −P x² (fewer choices, and linear interpolation of a
    # concave function lies below it).  Per period the chord of −P x'² misses by at most
    # P·h_x²/4 and the u grid loses at most ½·2(r + βb²P)·(h_u/2)²; both accumulate over
    # 1/(1 − β) periods.  Near the ends, interpolation meets clamping, so compare the interior.
    h_x, h_u = 4.0 / (x_points - 1), 6.0 / (u_points - 1)
    allowance = (LQ_BETA * P * h_x**2 / 4 + (r + LQ_BETA * b * b * P) * (h_u / 2) ** 2) / (1 - LQ_BETA)
    gap = -P * x**2 - value
    assert gap[interior].min() >= -result["error_bound"] - 1e-12
    assert gap[interior].max() <= allowance + result["error_bound"]

    # Policy: an error δ in the objective moves the maximiser of a parabola of curvature
    # κ = 2(r + βb²P) by at most √(2δ/κ), plus one step of the u grid.
    kappa = 2 * (r + LQ_BETA * b * b * P)
    tolerance = math.sqrt(2 * LQ_BETA * allowance / kappa) + h_u
    assert np.max(np.abs(u[interior] + F * x[interior])) <= tolerance
