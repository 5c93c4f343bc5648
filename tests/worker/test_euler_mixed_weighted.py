"""The stationary-weighted mean of the Euler-equation errors of a continuous choice beside a discrete one.

The invented work-or-not-and-save household of :mod:`tests._mixed_models`, its exact solver written in plain
numpy there; the stationary distribution and the weights are computed here, independently of fixq.
"""

from __future__ import annotations

import numpy as np
import pytest

from tests._documents import with_horizon
from tests._mixed_models import CHAIN, INCOME, exact_fixed_point, household_document, independent_euler_errors
from worker.solve import solve


def _young(grid: np.ndarray, save: np.ndarray) -> np.ndarray:
    """Young (2010), JEDC 34(1): each next asset level's mass split between its two neighbouring grid points in
    proportion to its distance from them, then income moves by its chain; π Q = π by least squares, (a, y)."""
    lower = np.clip(np.searchsorted(grid, save, side="right") - 1, 0, grid.size - 2)
    share = (save - grid[lower]) / (grid[lower + 1] - grid[lower])
    n_z = INCOME.size
    matrix = np.zeros((grid.size * n_z, grid.size * n_z))
    for i in range(grid.size):
        for z in range(n_z):
            for bit, weight in ((0, 1 - share[i, z]), (1, share[i, z])):
                matrix[i * n_z + z, (lower[i, z] + bit) * n_z + np.arange(n_z)] += weight * CHAIN[z]
    system = np.vstack([(np.eye(matrix.shape[0]) - matrix).T, np.ones(matrix.shape[0])])
    target = np.zeros(matrix.shape[0] + 1)
    target[-1] = 1.0
    return np.linalg.lstsq(system, target, rcond=None)[0].reshape(grid.size, n_z)


def test_the_weighted_mean_beside_a_discrete_choice_is_the_independent_one() -> None:
    # Judd (1992): |1 − c̃/c| with 1/c̃ = β Σ_z' P[z, z'] (1 + r)/c''(a', z') for log utility; measured where
    # today's work choice and every tomorrow's agree and the saving is more than one local grid step from both
    # grid ends (fixq's rule, common practice); weights: the stationary distribution (Young 2010, above) read
    # linearly along assets at the test points, renormalised over the points measured.
    result = solve(household_document({"concave": True}, stationary=True, euler_errors=True))
    grid = np.array(result["axes"]["a"])
    v, save_grid, _ = exact_fixed_point(grid)
    k, save, error, measured = independent_euler_errors(v, grid)
    stationary = _young(grid, save_grid)
    weights = np.stack([np.interp(k, grid, stationary[:, z]) for z in range(INCOME.size)], axis=1)
    reference = float(weights[measured] @ error[measured] / weights[measured].sum())
    found = result["diagnostics"]["euler_errors"]
    # Equal up to the search's own precision (it stops within about 1.5e-8 of the choice).
    np.testing.assert_allclose(np.array(result["stationary"]["distribution"]), stationary, rtol=0, atol=1e-6)
    assert found["points"] == pytest.approx(int(measured.sum()), abs=2)
    assert found["weighted_mean_log10"] == pytest.approx(reference, abs=1e-4)
    # The weights matter here: the stationary mass sits at low assets, where the errors differ from the mean
    # (measured: fixq −2.08986, this computation −2.08986, the unweighted mean −2.143; one run).
    assert abs(reference - error[measured].mean()) > 0.03  # measured 0.053 (one run)
    assert not any("no weighted mean" in note for note in result["diagnostics"]["notes"])


def test_a_finite_horizon_beside_a_discrete_choice_gives_no_weighted_mean() -> None:
    # No stationary distribution in a finite horizon (the schema: infinite horizon only).
    document = with_horizon(household_document({"concave": True}, euler_errors=True),
                            {"periods": 3, "terminal_value": 0.0})
    errors = solve(document)["diagnostics"]["euler_errors"]
    assert "weighted_mean_log10" not in errors and "_weight" not in errors
