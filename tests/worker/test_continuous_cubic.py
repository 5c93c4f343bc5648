"""Monotone cubic interpolation with several state variables: the tensor product of Fritsch–Carlson lines.

References outside fixq: scipy's ``PchipInterpolator`` (the same one-dimensional rules, applied here line by
line, last state first) for the interpolant; for the model, the closed form of Brock & Mirman (1972),
"Optimal economic growth and uncertainty: the discounted case", JET 4(3): with ``u = log c`` and
``c = A z k**alpha − k'`` the optimal policy is ``k' = alpha · beta · A · z · k**alpha`` whatever the
processes of ``A`` and ``z``.  Here ``A`` is a second state (a productivity level drifting by ``A' = A**rho``,
so tomorrow's ``A`` falls between its grid points) and ``z`` a two-state chain; the calibration is invented.
"""

from __future__ import annotations

import copy
from typing import Any

import numpy as np
import pytest
from scipy.interpolate import PchipInterpolator

from tests._thread_spy import spy_run_blocks
from worker import environment, threadpool
from worker.continuous.interp_kernels import monotone_slopes, tensor_cubic, tensor_two
from worker.document import parse_document
from worker.errors import InvalidDocument
from worker.solve import solve

ALPHA, BETA, RHO = 0.3, 0.95, 0.6

GROWTH: dict[str, Any] = {
    "kind": "grid",
    "params": {"alpha": ALPHA, "rho": RHO},
    "states": {"k": {"min": 0.05, "max": 0.4, "points": 12}, "A": {"min": 0.7, "max": 1.4, "points": 6}},
    "shocks": {"z": {"markov": {"values": [0.9, 1.1], "matrix": [[0.8, 0.2], [0.3, 0.7]]}, "transform": "none"}},
    "choices": {"k_next": {"next_of": "k", "continuous": True}},
    "next": {"A": "A**rho"},
    "define": {"c": "A * z * k**alpha - k_next"},
    "reward": "log(c)",
    "feasible": ["c > 0"],
    "hints": {"concave": True},
}
"""Invented growth with a productivity state: the exact policy stays inside the capital grid everywhere."""


def _document(k_points: int, a_points: int, how: str, **report: Any) -> dict[str, Any]:
    model = copy.deepcopy(GROWTH)
    model["states"]["k"]["points"] = k_points
    model["states"]["A"]["points"] = a_points
    model["interpolation"] = how
    return {"version": 1, "discount": BETA, "model": model, "solver": {"method": "howard", "tolerance": 1e-9},
            "report": report}


def _policy_error(result: dict[str, Any]) -> float:
    k, a, z = (np.array(result["axes"][name]) for name in ("k", "A", "z"))
    exact = ALPHA * BETA * a[None, :, None] * z[None, None, :] * k[:, None, None] ** ALPHA
    return float(np.abs(np.array(result["policy"]["k_next"]) - exact).max())


@pytest.fixture(scope="module")
def solved() -> dict[tuple[str, int], dict[str, Any]]:
    return {(how, k): solve(_document(k, k // 2, how))
            for how in ("linear", "monotone_cubic") for k in (12, 24)}


def test_cubic_is_markedly_more_accurate_than_linear_on_the_same_grid(solved: dict) -> None:
    for points in (12, 24):
        linear, cubic = _policy_error(solved["linear", points]), _policy_error(solved["monotone_cubic", points])
        assert solved["monotone_cubic", points]["status"] == "converged"
        # Measured here: 1.4e-2 against 2.0e-3 at 12 × 6 points, 6.4e-3 against 1.2e-4 at 24 × 12.
        assert cubic < linear / 5, (points, linear, cubic)
    # Linear falls about as the grid step (halving it halves the error); the cubic several times faster.
    assert _policy_error(solved["monotone_cubic", 24]) < _policy_error(solved["monotone_cubic", 12]) / 8
    assert _policy_error(solved["monotone_cubic", 24]) < 3e-4


def test_the_result_says_the_bound_is_not_a_proof(solved: dict) -> None:
    result = solved["monotone_cubic", 12]
    described = result["diagnostics"]["continuous_choice"]
    assert described["interpolation"] == "monotone_cubic" and described["certified"] is False
    assert any("not a proof" in note for note in result["diagnostics"]["notes"])
    assert result["policy_index"] is None


def test_value_iteration_reaches_howards_fixed_point() -> None:
    howard = solve(_document(12, 6, "monotone_cubic"))
    document = _document(12, 6, "monotone_cubic")
    document["solver"]["method"] = "value_iteration"
    plain = solve(document)
    gap = np.abs(np.array(howard["value"]) - np.array(plain["value"])).max()
    assert gap <= howard["error_bound"] + plain["error_bound"] + 1e-9


def test_the_stationary_distribution_and_a_simulation_work_with_two_states() -> None:
    result = solve(_document(12, 6, "monotone_cubic", stationary=True,
                             simulation={"periods": 50, "paths": 20, "seed": 3}))
    stationary = result["stationary"]
    assert np.array(stationary["distribution"]).sum() == pytest.approx(1.0, abs=1e-12)
    # Young (2010) lotteries keep the mean: a state and the choice that sets it have the same long-run mean.
    assert stationary["means"]["k"] == pytest.approx(stationary["means"]["k_next"], abs=1e-9)
    path = result["simulation"]["first_path"]
    assert len(path["k"]) == 50 and len(path["A"]) == 50


def _sequential_pchip(grids: list[np.ndarray], values: np.ndarray, point: np.ndarray) -> float:
    """scipy's PCHIP along the last axis of ``values`` at ``point[-1]``, then along each earlier axis."""
    current = values
    for axis in range(len(grids) - 1, -1, -1):
        current = PchipInterpolator(grids[axis], current, axis=axis)(point[axis])
        current = np.asarray(current)
    return float(current)


@pytest.mark.parametrize("sizes", [(5, 7), (2, 6), (3, 2), (4, 3, 5), (6, 2, 3)])
def test_the_tensor_product_matches_scipy_pchip_line_by_line(sizes: tuple[int, ...]) -> None:
    # Fritsch & Carlson (1980) in one dimension, as scipy.interpolate.PchipInterpolator implements it; the
    # tensor product applies it along the last state first, then along each earlier one.
    rng = np.random.default_rng(len(sizes) * 10 + sizes[0])
    grids = [np.cumsum(rng.uniform(0.1, 1.0, size)) for size in sizes]
    shocks = 2
    values = rng.normal(size=(shocks, *sizes))
    values[1] = np.cumsum(np.abs(values[1]), axis=0)
    flat = np.ascontiguousarray(values.reshape(shocks, -1))
    slopes = np.empty_like(flat)
    monotone_slopes(grids[-1], flat.reshape(-1, sizes[-1]), slopes.reshape(-1, sizes[-1]))
    d = len(sizes)
    sgrid = np.concatenate(grids)
    offsets = np.concatenate([[0], np.cumsum(sizes)[:-1]])
    strides = [int(np.prod(sizes[t + 1:])) for t in range(d)]
    meta = np.array([*offsets, *sizes, *strides], dtype=np.int64)
    scratch = np.empty(4 ** (d - 1))
    for _ in range(60):
        point = np.array([rng.uniform(grid[0], grid[-1]) for grid in grids])
        if rng.random() < 0.3:  # a grid node along one axis
            axis = int(rng.integers(d))
            point[axis] = grids[axis][int(rng.integers(sizes[axis]))]
        lo = np.array([min(max(np.searchsorted(g, x, side="right") - 1, 0), g.size - 2)
                       for g, x in zip(grids, point)], dtype=np.int64)
        w = np.array([(x - g[k]) / (g[k + 1] - g[k]) for g, x, k in zip(grids, point, lo)])
        for iz in range(shocks):
            found = tensor_cubic(flat, slopes, iz, sgrid, meta, lo, w, scratch)
            assert found == pytest.approx(_sequential_pchip(grids, values[iz], point), rel=1e-11, abs=1e-11)
            if d == 2:  # the two-state form written out gives the same number
                assert tensor_two(flat, slopes, iz, sgrid, meta, lo, w) == found


def test_more_than_three_states_are_refused_at_interpolation() -> None:
    document = _document(6, 4, "monotone_cubic")
    for name in ("b", "e"):
        document["model"]["states"][name] = {"min": 0.0, "max": 1.0, "points": 3}
        document["model"]["next"][name] = name
    with pytest.raises(InvalidDocument) as info:
        parse_document(document)
    assert any(e["path"] == "model.interpolation" and "at most 3 states" in e["message"]
               for e in info.value.errors), info.value.errors


def test_three_states_run_the_general_tensor_product() -> None:
    # A third state B that drifts (B' = B**0.5, between grid points) and enters nothing: the value must not
    # depend on it (the cubic of a constant line is that constant), and the policy is still Brock–Mirman's.
    document = _document(12, 6, "monotone_cubic")
    document["model"]["states"]["B"] = {"min": 0.5, "max": 2.0, "points": 5}
    document["model"]["next"]["B"] = "B**0.5"
    result = solve(document)
    assert result["status"] == "converged"
    value = np.array(result["value"])  # (k, A, B, z)
    assert np.abs(value - value[:, :, :1, :]).max() <= 1e-9
    k, a, z = (np.array(result["axes"][name]) for name in ("k", "A", "z"))
    exact = ALPHA * BETA * a[None, :, None, None] * z[None, None, None, :] * k[:, None, None, None] ** ALPHA
    two_states = _policy_error(solve(_document(12, 6, "monotone_cubic")))
    assert np.abs(np.array(result["policy"]["k_next"]) - exact).max() == pytest.approx(two_states, rel=1e-3)


def test_two_threads_give_the_bits_of_one(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(threadpool, "THREAD_MIN_PAIRS", 0)
    calls = spy_run_blocks(monkeypatch)
    results = []
    for threads in ("1", "2"):
        monkeypatch.setenv(environment.SOLVE_THREADS, threads)
        result = solve(_document(24, 12, "monotone_cubic"))
        assert calls and calls[-1][0] == int(threads)
        results.append((result["iterations"], result["error_bound"], np.array(result["value"]).tobytes(),
                        np.array(result["policy"]["k_next"]).tobytes()))
    assert results[0] == results[1]
