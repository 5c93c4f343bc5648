"""The climb along a static choice under the concave hint, verified line by line by bounds of the reward's slope
(worker/_codegen/static_proof.py): the tables equal the search over every value, whether the hint holds or not."""

from __future__ import annotations

import numpy as np
import pytest

from tests._documents import grid_document as document
from worker import solve
from worker.document import parse_document
from worker.estimate import grid_plan
from worker.feasibility import model_data
from worker.statickernel import static_tables

LABOUR = {
    "params": {"alpha": 0.36, "delta": 0.08, "chi": 20.0, "eta": 0.5},
    "states": {"k": {"min": 1.0, "max": 3.0, "points": 30}},
    "shocks": {"z": {"markov": {"values": [0.95, 1.05], "matrix": [[0.9, 0.1], [0.1, 0.9]]}, "transform": "none"}},
    "choices": {"k_next": {"next_of": "k"}, "h": {"min": 0.1, "max": 1.0, "points": 46}},
    "define": {"c": "z * k**alpha * h**(1 - alpha) + (1 - delta) * k - k_next"},
    "reward": "log(c) - chi * h**(1 + 1 / eta) / (1 + 1 / eta)",
    "feasible": ["c > 0"],
}
"""Invented growth with elastic labour, a small version of bench/baseline_elastic_labour.py's calibration (where
few hours leave nothing to eat at high k', so the feasible hours start part way along the line)."""
BOTH = {"monotone": True, "concave": True}


def _tables(model: dict, climb: bool) -> tuple[np.ndarray, dict]:
    (R, _, _, _), counts = static_tables(model_data(parse_document(document(model))), ("h",), climb=climb)
    return R, counts


def _plain_tables(model: dict, bump: float = 0.0) -> tuple[np.ndarray, np.ndarray]:
    """Independent numpy: the best reward over every h and its lowest index, (k, z, k'), for ``LABOUR`` (+ bump)."""
    params = model["params"]
    k = np.linspace(1.0, 3.0, 30)
    z = np.array([0.95, 1.05])
    h = np.linspace(0.1, 1.0, 46)
    c = (z[None, :, None, None] * k[:, None, None, None] ** params["alpha"] * h ** (1 - params["alpha"])
         + (1 - params["delta"]) * k[:, None, None, None] - k[None, None, :, None])
    power = 1 + 1 / params["eta"]
    with np.errstate(divide="ignore", invalid="ignore"):
        r = np.where(c > 0, np.log(np.where(c > 0, c, 1.0)), -np.inf) - params["chi"] * h**power / power
    r = r + bump * np.abs(h - 0.5)
    return r.max(axis=3), r.argmax(axis=3)


@pytest.mark.parametrize("bump", [0.0, 3.0])
def test_verified_climb_equals_the_search_over_every_hour(bump: float) -> None:
    # bump 3.0 adds 3|h − 0.5|: two peaks along the hours on many lines, so the climb is often wrong there.
    model = dict(LABOUR, reward=LABOUR["reward"] + f" + {bump} * abs(h - 0.5)") if bump else LABOUR
    climbed, climbed_counts = _tables(model, climb=True)
    scanned, scanned_counts = _tables(model, climb=False)
    assert np.array_equal(climbed, scanned)
    assert np.array_equal(climbed_counts["static_pick"], scanned_counts["static_pick"])
    # Against numpy (a different evaluator: the values agree to rounding, the picks exactly).
    plain_R, plain_pick = _plain_tables(model, bump)
    assert np.array_equal(np.isfinite(climbed.reshape(plain_R.shape)), np.isfinite(plain_R))
    finite = np.isfinite(plain_R)
    assert np.allclose(climbed.reshape(plain_R.shape)[finite], plain_R[finite], rtol=1e-13, atol=0)
    assert np.array_equal(climbed_counts["static_pick"].reshape(plain_pick.shape)[finite], plain_pick[finite])
    lines = climbed.size
    if bump:
        note = climbed_counts["static_note"]
        assert note is not None and "the concave hint did not hold along `h`" in note
        broken = int(note.split("on ", 1)[1].split(" of", 1)[0].replace(",", ""))
        assert 0 < broken < lines
    else:
        assert climbed_counts["static_note"] is None
        # The proofs replace evaluations: about three hours per line (the peak and its neighbours).
        assert climbed_counts["allowed"] < 4 * lines < scanned_counts["allowed"] / 3


def test_a_root_utility_with_a_power_in_its_slope_is_verified_exactly() -> None:
    # sqrt(c) and c**-0.5 in the slope: the interval helpers for powers see the bounds of c (invented utility).
    model = dict(LABOUR, reward="2 * sqrt(c) - chi * h**3 / 3 + 0.1 * c**0.7")
    climbed, climbed_counts = _tables(model, climb=True)
    scanned, scanned_counts = _tables(model, climb=False)
    assert np.array_equal(climbed, scanned)
    assert np.array_equal(climbed_counts["static_pick"], scanned_counts["static_pick"])
    assert climbed_counts["static_note"] is None
    assert climbed_counts["allowed"] < scanned_counts["allowed"] / 3


def test_limits_on_hours_and_on_a_falling_define_narrow_the_bounds_soundly() -> None:
    # Leisure l = 1 − h falls with hours; `l >= 0.2` and `h <= 0.9` narrow the bounds (an invented household).
    model = dict(LABOUR, define={**LABOUR["define"], "l": "1 - h"}, reward="log(c) + 0.5 * log(l) - h**2",
                 feasible=["c > 0", "l >= 0.2", "h <= 0.9"])
    climbed, climbed_counts = _tables(model, climb=True)
    scanned, scanned_counts = _tables(model, climb=False)
    assert np.array_equal(climbed, scanned)
    assert np.array_equal(climbed_counts["static_pick"], scanned_counts["static_pick"])
    assert climbed_counts["static_note"] is None
    assert climbed_counts["allowed"] < scanned_counts["allowed"] / 3


@pytest.mark.parametrize("change", [
    {"reward": "min(log(c), 0.5) - h**2"},  # a kink: the slope's bounds are the hull of both sides
    {"reward": "0.0 * h + k"},  # flat along the hours: every value ties, the lowest wins
    {"feasible": ["c >= 0.5 and h > 0.2"]},  # limits inside a conjunction
])
def test_other_shapes_and_limits_are_verified_exactly(change: dict) -> None:
    model = dict(LABOUR, **change)
    climbed, climbed_counts = _tables(model, climb=True)
    scanned, scanned_counts = _tables(model, climb=False)
    assert np.array_equal(climbed, scanned)
    assert np.array_equal(climbed_counts["static_pick"], scanned_counts["static_pick"])
    assert climbed_counts["static_note"] is None


def test_hours_allowed_on_two_intervals_are_still_searched_exactly() -> None:
    # Hours near 0.5 are not allowed (an invented rule): the climb may stop at the gap, the verification does not.
    model = dict(LABOUR, feasible=["c > 0", "abs(h - 0.5) > 0.12"])
    climbed, climbed_counts = _tables(model, climb=True)
    scanned, scanned_counts = _tables(model, climb=False)
    assert np.array_equal(climbed, scanned)
    assert np.array_equal(climbed_counts["static_pick"], scanned_counts["static_pick"])


def test_a_reward_that_jumps_along_hours_is_searched_in_full_and_said_so() -> None:
    # A bonus for working at least 0.6 (invented): no slope bound exists, so the climb is not used.
    model = dict(LABOUR, reward=LABOUR["reward"] + " + where(h >= 0.6, 0.05, 0.0)")
    climbed, counts = _tables(model, climb=True)
    scanned, _ = _tables(model, climb=False)
    assert np.array_equal(climbed, scanned)
    assert "the concave hint was not used along `h`" in counts["static_note"]
    assert "maximised over all its values" in counts["static_note"]
    # The plan knows it before any kernel runs (worker.hintuse.jumps_along), so the notes agree.
    plan = grid_plan(parse_document(document(model, hints=BOTH)).model)
    assert plan.concave and not plan.static_concave
    assert grid_plan(parse_document(document(LABOUR, hints=BOTH)).model).static_concave
    result = solve(document(model, hints=BOTH))
    notes = result["diagnostics"]["notes"]
    assert any("the concave hint was not used along `h`" in note for note in notes)
    assert not any("maximised out by climbing" in note for note in notes)


def test_hinted_solve_matches_the_unhinted_one_and_a_numpy_value_iteration() -> None:
    hinted, plain = solve(document(LABOUR, hints=BOTH)), solve(document(LABOUR))
    assert hinted["status"] == plain["status"] == "converged"
    assert hinted["policy_index"] == plain["policy_index"]
    assert np.abs(np.array(hinted["value"]) - np.array(plain["value"])).max() <= (
        hinted["error_bound"] + plain["error_bound"])
    assert not any("did not hold" in note for note in hinted["diagnostics"]["notes"])
    # Independent: numpy value iteration over the hours-out tables of _plain_tables, β = 0.95 (the documents').
    R, best_h = _plain_tables(LABOUR)  # (k, z, k')
    P = np.array([[0.9, 0.1], [0.1, 0.9]])
    v = np.zeros((30, 2))
    for _ in range(2000):
        new = (R + 0.95 * (v @ P.T).T[None, :, :]).max(axis=2)
        done = np.abs(new - v).max() < 1e-12
        v = new
        if done:
            break
    k_index = (R + 0.95 * (v @ P.T).T[None, :, :]).argmax(axis=2)
    h_index = np.take_along_axis(best_h, k_index[:, :, None], axis=2)[:, :, 0]
    assert np.abs(np.array(hinted["value"]) - v).max() <= hinted["error_bound"] + 1e-10
    assert np.array_equal(np.array(hinted["policy_index"]["k_next"]), k_index)
    assert np.array_equal(np.array(hinted["policy_index"]["h"]), h_index)
    assert len(np.unique(h_index)) > 1  # hours respond to capital and productivity
