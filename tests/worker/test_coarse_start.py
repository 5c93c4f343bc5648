"""The coarse start (worker.coarse_start): a solve from zeros on a fine grid begins from the model on a coarser one.

The start never moves the fixed point, only the way there: each solve here is compared with the same document
started from zeros (``solver.initial`` given as an array of zeros, which is not a coarse start).  The model is
invented growth with log utility and full depreciation (the structure of tests/worker/test_continuous.py, so
its kernels are compiled once for both).
"""

from __future__ import annotations

import copy
from typing import Any

import numpy as np
import pytest
from scipy.interpolate import PchipInterpolator

from tests._documents import aging_saver, log_growth
from tests._memory_checkpoint import Crash, MemoryCheckpoint
from worker.coarse_start import COARSE_LEAST_POINTS, COARSE_MIN_POINTS, carried_value, coarse_document, starts_coarse
from worker.document import parse_document
from worker.solve import solve

ALPHA = 0.3
BETA = 0.95
BOTH = {"concave": True, "monotone": True}


def _growth(points: int, interpolation: str = "linear", **solver: Any) -> dict[str, Any]:
    """Invented growth on ``k ∈ [0.05, 0.4]`` with a continuous choice (tests/worker/test_continuous.py's)."""
    model = log_growth(alpha=ALPHA, k_min=0.05, k_max=0.4, points=points, interpolation=interpolation)
    model["choices"] = {"k_next": {"next_of": "k", "continuous": True}}
    model["hints"] = BOTH
    return {"version": 1, "discount": BETA, "model": model,
            "solver": {"method": "howard", "tolerance": 1e-10, **solver}}


def _from_zeros(document: dict[str, Any]) -> dict[str, Any]:
    """``document`` started from an array of zeros: the same start a plain solve makes, without a coarse start."""
    plain = copy.deepcopy(document)
    points = plain["model"]["states"]["k"]["points"]
    plain["solver"]["initial"] = {"values": np.zeros((points, 2)).tolist()}
    return plain


@pytest.mark.parametrize("interpolation", ["linear", "monotone_cubic"])
def test_a_coarse_start_reaches_the_same_fixed_point_in_fewer_iterations(interpolation: str) -> None:
    document = _growth(4 * COARSE_MIN_POINTS, interpolation)
    coarse = solve(document)
    plain = solve(_from_zeros(document))
    start = coarse["diagnostics"]["coarse_start"]
    # 640 points: a level of 160, then one of 40 (the fewest a coarse grid gets).
    assert start["points"] == {"k": COARSE_MIN_POINTS} and start["levels"] == 2
    assert start["iterations"] > 0 and 0.0 < start["seconds"] <= coarse["seconds"]
    assert "coarse_start" not in plain["diagnostics"]
    assert coarse["status"] == plain["status"] == "converged"
    assert coarse["iterations"] < plain["iterations"]
    # Both are within their bounds of the one fixed point (a proof with linear interpolation).
    gap = np.abs(np.array(coarse["value"]) - np.array(plain["value"])).max()
    assert gap <= coarse["error_bound"] + plain["error_bound"]
    # The policies maximise the same objective at values equal up to the bounds (1e-10), where the objective is
    # flat: equal to a small share of the grid step (measured: 2.7e-7 with linear, the step 5.5e-4).
    step = (0.4 - 0.05) / (4 * COARSE_MIN_POINTS - 1)
    assert np.abs(np.array(coarse["policy"]["k_next"]) - np.array(plain["policy"]["k_next"])).max() < 0.01 * step


def test_a_small_grid_has_no_coarse_start() -> None:
    result = solve(_growth(COARSE_MIN_POINTS - 1))
    assert "coarse_start" not in result["diagnostics"]


def test_which_solves_start_coarse() -> None:
    fine = _growth(COARSE_MIN_POINTS)
    assert starts_coarse(parse_document(fine))
    assert not starts_coarse(parse_document(_growth(COARSE_MIN_POINTS - 1)))
    assert not starts_coarse(parse_document(_from_zeros(fine)))  # a start of the user's own
    on_grid = copy.deepcopy(fine)
    on_grid["model"]["choices"] = {"k_next": {"next_of": "k"}}  # grid-restricted: its iterations are cheap
    assert not starts_coarse(parse_document(on_grid))
    assert not starts_coarse(parse_document(_growth(COARSE_MIN_POINTS, method="endogenous_grid")))
    assert starts_coarse(parse_document(_growth(COARSE_MIN_POINTS, method="value_iteration")))
    aging = aging_saver(None)  # a finite horizon: backward induction has no start to improve
    aging["model"]["states"] = {name: dict(axis, points=COARSE_MIN_POINTS) if "points" in axis else axis
                                for name, axis in aging["model"]["states"].items()}
    assert not starts_coarse(parse_document(aging))


def test_a_coarse_document_keeps_everything_but_the_large_grids() -> None:
    document = _growth(1_000)
    document["model"]["states"]["level"] = {"values": list(np.linspace(0.9, 1.1, 10))}
    document["model"]["define"] = {"c": "z * level * k**alpha - k_next"}
    document["model"]["next"] = {"level": "level"}
    document["report"] = {"stationary": True}
    coarse = coarse_document(parse_document(document))
    assert coarse.model.states["k"].points == 250
    assert coarse.model.states["k"].grid()[[0, -1]].tolist() == [0.05, 0.4]
    assert coarse.model.states["level"].size == 10  # below the threshold: as it was
    assert not coarse.report.stationary
    assert coarse.solver == parse_document(document).solver
    given = _growth(2)
    given["model"]["states"]["k"] = {"values": list(np.linspace(0.05, 0.4, 201) ** 1.5)}
    values = coarse_document(parse_document(given)).model.states["k"].values
    # Every fourth value and the last: 0, 4, ..., 200.
    assert np.array_equal(values, np.linspace(0.05, 0.4, 201)[::4] ** 1.5)
    small = coarse_document(parse_document(_growth(COARSE_MIN_POINTS)))
    assert small.model.states["k"].points == COARSE_LEAST_POINTS


def test_the_carry_is_the_monotone_cubic_of_the_coarse_values() -> None:
    # Reference: scipy's PchipInterpolator, the Fritsch–Carlson interpolant with the same weighted harmonic mean
    # slopes at interior nodes (Fritsch & Butland 1984); its end slopes differ, so the end intervals are left out.
    coarse = np.linspace(0.0, 2.0, 21) ** 2
    fine = np.linspace(0.0, 4.0, 301)
    values = np.column_stack([np.log1p(coarse), np.sqrt(1.0 + 3.0 * coarse)])
    carried = carried_value({"k": coarse, "z": [0.9, 1.1]}, values.reshape(-1), {"k": fine, "z": [0.9, 1.1]})
    carried = carried.reshape(fine.size, 2)
    inner = (fine >= coarse[1]) & (fine <= coarse[-2])
    for column in range(2):
        reference = PchipInterpolator(coarse, values[:, column])(fine)
        assert np.abs(carried[inner, column] - reference[inner]).max() < 1e-12
    assert np.allclose(carried[[0, -1]], values[[0, -1]], rtol=0, atol=1e-14)  # the ends are kept
    line = carried_value({"k": coarse, "z": [0.9, 1.1]}, np.repeat(3.0 * coarse - 1.0, 2),
                         {"k": fine, "z": [0.9, 1.1]})
    assert np.allclose(line, np.repeat(3.0 * fine - 1.0, 2), rtol=0, atol=1e-12)  # a line is carried exactly


def test_a_resumed_solve_starts_from_its_checkpoint_not_a_coarse_start() -> None:
    document = _growth(COARSE_MIN_POINTS, checkpoint_s=1e-6)
    store = MemoryCheckpoint(crash_after=2)
    with pytest.raises(Crash):
        solve(document, checkpoint=store)
    resumed = solve(document, checkpoint=store)
    assert resumed["diagnostics"]["resumed_from_iteration"] >= 1
    assert "coarse_start" not in resumed["diagnostics"]
    whole = solve(document)
    assert "coarse_start" in whole["diagnostics"]
    gap = np.abs(np.array(resumed["value"]) - np.array(whole["value"])).max()
    assert gap <= resumed["error_bound"] + whole["error_bound"]
