"""A continuous choice with draws after it through a finite horizon: an invented retiree draws down savings.

Invented scenario (all numbers made up): a retiree with wealth ``w`` spends any amount ``c`` of it each year;
after the choice the market return is drawn (0.85, 1.03 or 1.2) and so is a medical bill (0 or 0.6), whose
chance rises with age (a per-period param) and falls a little with spending (care bought today); a pension
is paid each year and falls after the third; the years are discounted by ``β`` times a survival chance; a
bequest is valued at the end.

References, named beside each check: an independent plain-numpy backward induction written here, each
period's spending found by a fine brute-force scan and polished by ``scipy.optimize.minimize_scalar``
(bounded) around it, tomorrow's value read by ``numpy.interp`` (the same linear interpolation); the cohort
against a numpy forward pass over Young (2010) lotteries, one per draw combination weighted by its
probability.
"""

from __future__ import annotations

import copy
from typing import Any

import numpy as np
import pytest
from scipy.interpolate import PchipInterpolator
from scipy.optimize import minimize_scalar

from service.checkpoints import decode_checkpoint, encode_checkpoint
from worker.errors import Canceled, InvalidDocument
from worker.solve import solve

BETA = 0.96
LOW, HIGH, POINTS = 0.2, 8.0, 31
PERIODS = 6
RETURNS, RETURN_PROBS = np.array([0.85, 1.03, 1.2]), np.array([0.25, 0.5, 0.25])
BILLS = np.array([0.0, 0.6])
SICK = [0.05, 0.08, 0.12, 0.17, 0.23, 0.3]
PENSION = [0.4, 0.4, 0.4, 0.3, 0.3, 0.3]
SURVIVE = [0.99, 0.98, 0.97, 0.95, 0.93, 0.9]
SPEND_LOW = 0.05
CARE = 0.3
"""How much spending on oneself lowers the chance of a bill (a param, not a number in the expressions, so that a test
changing it by period compiles the same kernels)."""
PROFILE = (SICK, PENSION, SURVIVE)


def retiree(**report: Any) -> dict[str, Any]:
    return {"version": 1, "discount": BETA, "model": {
        "kind": "grid",
        "params": {"sick": SICK, "pension": PENSION, "survive": SURVIVE, "care": CARE},
        "states": {"wealth": {"min": LOW, "max": HIGH, "points": POINTS}},
        "shocks": {
            "ret": {"iid": {"values": RETURNS.tolist(), "probs": RETURN_PROBS.tolist()}, "timing": "after_choice"},
            "bill": {"iid": {"values": BILLS.tolist(),
                             "probs": ["1 - sick * (1 - care * spend / wealth)", "sick * (1 - care * spend / wealth)"]},
                     "timing": "after_choice"},
        },
        "choices": {"spend": {"min": SPEND_LOW, "max": "wealth", "continuous": True, "points": 60}},
        "next": {"wealth": f"min(max((wealth - spend) * ret + pension - bill, {LOW}), {HIGH})"},
        "reward": "log(spend)",
        "horizon": {"periods": PERIODS, "discount": "discount * survive", "terminal_value": "3 * log(wealth + 0.5)"}},
        "report": report}


def _parts(t: int, w: float, c: np.ndarray, profile: tuple = PROFILE) -> tuple[np.ndarray, np.ndarray]:
    """Per draw combination (first axis; return slowest), at spendings ``c``: probability and next wealth (the
    document's expressions, written in numpy); ``profile`` the per-period (sick, pension, survive)."""
    sick, pension, _ = profile
    p_bill = sick[t] * (1 - CARE * c / w)
    probs, nxt = [], []
    for ret, p_ret in zip(RETURNS, RETURN_PROBS):
        for bill, p in zip(BILLS, (1 - p_bill, p_bill)):
            probs.append(p_ret * p)
            nxt.append(np.minimum(np.maximum((w - c) * ret + pension[t] - bill, LOW), HIGH))
    return np.array(probs), np.array(nxt)


def _linear(grid: np.ndarray, values: np.ndarray) -> Any:
    return lambda x: np.interp(x, grid, values)


def _reference(profile: tuple = PROFILE, interpolant: Any = _linear) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """``V_t(w) = max_c Σ_k p_k(c) [log c + β_t V_{t+1}(next_k(c))]`` from ``V_T = 3 log(w + 0.5)``, ``V_{t+1}``
    read between grid points by ``interpolant(grid, values)`` (a callable)."""
    grid = np.linspace(LOW, HIGH, POINTS)
    values = np.empty((PERIODS + 1, POINTS))
    policy = np.empty((PERIODS, POINTS))
    values[PERIODS] = 3 * np.log(grid + 0.5)
    for t in range(PERIODS - 1, -1, -1):
        after, beta = interpolant(grid, values[t + 1]), BETA * profile[2][t]
        for i, w in enumerate(grid):
            def objective(c: Any, t: int = t, w: float = w) -> Any:
                probs, nxt = _parts(t, w, np.asarray(c, dtype=np.float64), profile)
                return np.log(c) + beta * (probs * after(nxt)).sum(axis=0)

            fine = np.linspace(SPEND_LOW, w, 2001)
            scanned = objective(fine)
            k = int(np.argmax(scanned))
            found = minimize_scalar(lambda c: -float(objective(c)), method="bounded", options={"xatol": 1e-12},
                                    bounds=(fine[max(k - 1, 0)], fine[min(k + 1, fine.size - 1)]))
            policy[t, i], values[t, i] = (found.x, -found.fun) if -found.fun >= scanned[k] else (fine[k], scanned[k])
    return grid, values[:PERIODS], policy


@pytest.fixture(scope="module")
def reference() -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    return _reference()


@pytest.fixture(scope="module")
def solved() -> dict[str, Any]:
    return solve(retiree(cohort={"start": {"wealth": 3.0}}, simulation={"paths": 4000, "periods": PERIODS, "seed": 7}))


def test_values_and_policy_match_a_plain_numpy_backward_induction(solved: dict[str, Any], reference: tuple) -> None:
    grid, values, policy = reference
    assert solved["status"] == "converged" and solved["method"] == "backward_induction"
    # Reference: the plain-numpy backward induction above (scipy's bounded search on a brute-force bracket).
    # Measured: values within 4e-10 relative, spending within 1.3e-7.
    np.testing.assert_allclose(np.asarray(solved["value"]), values, rtol=1e-8)
    np.testing.assert_allclose(np.asarray(solved["policy"]["spend"]), policy, atol=1e-5)
    assert solved["axes"]["period"] == list(range(PERIODS))
    assert solved["diagnostics"]["continuous_choice"]["certified"] is True


def test_the_concave_hint_searches_each_period_and_is_verified(reference: tuple) -> None:
    # Brent's method from a bracket in each period, then the unrestricted step at the same V_{t+1}; the
    # spending objective is concave here.  Reference: the plain-numpy backward induction above.
    document = retiree()
    document["model"]["hints"] = {"concave": True}
    result = solve(document)
    _, values, _ = reference
    assert result["diagnostics"]["verification"]["periods"] == PERIODS
    np.testing.assert_allclose(np.asarray(result["value"]), values, rtol=1e-8)


def test_the_error_bound_is_the_rounding_allowance_accumulated_over_the_periods(solved: dict[str, Any]) -> None:
    # The recursion of worker.solvers.backward: e_t = 16 ε max(|V_t|, |V_{t+1}|) + β_t e_{t+1}, e_T = 0.
    values = np.asarray(solved["value"])
    terminal = np.abs(3 * np.log(np.linspace(LOW, HIGH, POINTS) + 0.5)).max()
    scales = [max(np.abs(values[t]).max(), np.abs(values[t + 1]).max() if t + 1 < PERIODS else terminal)
              for t in range(PERIODS)]
    e, expected = 0.0, np.empty(PERIODS)
    for t in range(PERIODS - 1, -1, -1):
        e = 16 * np.finfo(float).eps * scales[t] + BETA * SURVIVE[t] * e
        expected[t] = e
    np.testing.assert_allclose(solved["diagnostics"]["horizon"]["rounding_allowance"], expected, rtol=1e-12)
    assert solved["error_bound"] == pytest.approx(expected.max(), rel=1e-12)


def test_the_cohort_moves_by_young_lotteries_per_draw(solved: dict[str, Any]) -> None:
    # Reference: a numpy forward pass, each period's transition built here from the solved policy, each draw
    # combination's next wealth split between its two neighbouring grid points (Young 2010), weighted by its
    # probability.
    grid = np.linspace(LOW, HIGH, POINTS)
    policy = np.asarray(solved["policy"]["spend"])
    mu = np.zeros(POINTS)
    mu[int(np.argmin(np.abs(grid - 3.0)))] = 1.0
    expected = [mu]
    for t in range(PERIODS - 1):
        P = np.zeros((POINTS, POINTS))
        for i, w in enumerate(grid):
            probs, nxt = _parts(t, w, np.asarray(policy[t, i]))
            for p, x in zip(probs, nxt):
                j = min(int(np.searchsorted(grid, x, side="right")) - 1, POINTS - 2)
                share = (x - grid[j]) / (grid[j + 1] - grid[j])
                P[i, j] += p * (1 - share)
                P[i, j + 1] += p * share
        expected.append(expected[-1] @ P)
    np.testing.assert_allclose(np.asarray(solved["cohort"]["distribution"]), np.array(expected), atol=1e-12)
    means = solved["cohort"]["means"]
    np.testing.assert_allclose(means["wealth"], np.array(expected) @ grid, rtol=1e-12)
    np.testing.assert_allclose(means["spend"], (np.array(expected) * policy).sum(axis=1), rtol=1e-12)


def test_simulated_paths_draw_after_the_choice_as_the_cohort_moves(solved: dict[str, Any]) -> None:
    # The paths start at the cohort's start and each step draws from the period's transition (the draw after
    # the choice, then the lottery): their mean wealth by period is the cohort's up to sampling error (4,000
    # paths; a tolerance of several standard errors, common practice).
    simulated = np.asarray(solved["simulation"]["by_period"]["wealth"])
    expected = np.asarray(solved["cohort"]["means"]["wealth"])
    spread = np.sqrt(np.asarray(solved["cohort"]["distribution"]) @ np.linspace(LOW, HIGH, POINTS) ** 2
                     - expected**2)
    assert np.all(np.abs(simulated - expected) <= 5 * spread / np.sqrt(4000) + 1e-12)


class _MemoryCheckpoint:
    """A checkpoint store in memory, holding the bytes the service would write to Redis."""

    def __init__(self) -> None:
        self.payload: bytes | None = None

    def load(self) -> dict[str, Any] | None:
        return None if self.payload is None else decode_checkpoint(self.payload)

    def save(self, state: dict[str, Any]) -> None:
        self.payload = encode_checkpoint(state)


def test_a_checkpoint_by_period_resumes_with_the_next_period(solved: dict[str, Any]) -> None:
    document = retiree()
    document["solver"] = {"checkpoint_s": 1e-9}
    store = _MemoryCheckpoint()
    polls = iter(range(100))
    with pytest.raises(Canceled):
        solve(document, checkpoint=store, should_stop=lambda: next(polls) >= 2)
    assert store.load()["iteration"] == 2
    entries: list[dict[str, Any]] = []
    resumed = solve(document, checkpoint=store, on_progress=entries.append)
    assert resumed["diagnostics"]["resumed_from_iteration"] == 2
    assert [entry["period"] for entry in entries] == [3, 2, 1, 0]
    np.testing.assert_array_equal(np.asarray(resumed["value"]), np.asarray(solved["value"]))
    np.testing.assert_array_equal(np.asarray(resumed["policy"]["spend"]), np.asarray(solved["policy"]["spend"]))


def test_probabilities_breaking_the_rules_in_a_later_period_are_named_with_it() -> None:
    # In period 4 a "care" effect so strong that a high spender's chance of a bill goes below zero (invented).
    document = retiree()
    model = document["model"]
    model["params"]["care"] = [CARE, CARE, CARE, CARE, 1.5, CARE]
    assert model["shocks"]["bill"]["iid"]["probs"] == ["1 - sick * (1 - care * spend / wealth)",
                                                       "sick * (1 - care * spend / wealth)"]
    with pytest.raises(InvalidDocument) as caught:
        solve(document)
    error = caught.value.errors[0]
    assert error["path"] == "model.shocks.bill.iid.probs"
    assert error["message"].startswith("in period 4:") and "spend" in error["message"]


def test_the_same_life_without_per_period_params_matches_its_own_reference() -> None:
    # No list params (the model is the same in every period): period 0's checks hold for all, and the step
    # takes the same expectation.  Reference: the plain-numpy backward induction with the lists made constant.
    document = copy.deepcopy(retiree())
    model = document["model"]
    model["params"] = {"sick": 0.1, "pension": 0.35, "survive": 0.97, "care": CARE}
    _, values, _ = _reference(([0.1] * PERIODS, [0.35] * PERIODS, [0.97] * PERIODS))
    result = solve(document)
    np.testing.assert_allclose(np.asarray(result["value"]), values, rtol=1e-8)



def test_monotone_cubic_interpolation_matches_a_pchip_backward_induction() -> None:
    # Reference: the plain-numpy backward induction above with tomorrow's value read by scipy's
    # PchipInterpolator (Fritsch-Carlson monotone cubic, the same slopes as the kernels': Fritsch-Butland's
    # harmonic mean inside, the three-point formula at the ends).
    document = retiree(cohort={"start": {"wealth": 3.0}})
    document["model"]["interpolation"] = "monotone_cubic"
    result = solve(document)
    _, values, policy = _reference(interpolant=PchipInterpolator)
    np.testing.assert_allclose(np.asarray(result["value"]), values, rtol=1e-8)
    np.testing.assert_allclose(np.asarray(result["policy"]["spend"]), policy, atol=1e-5)
    assert result["diagnostics"]["continuous_choice"]["certified"] is False
    # The cohort still moves by the Young lotteries of every draw (whatever the interpolation): one unit of mass.
    np.testing.assert_allclose(np.asarray(result["cohort"]["distribution"]).sum(axis=1), 1.0, rtol=1e-12)
