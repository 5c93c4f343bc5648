"""Searches of several unknowns (:mod:`worker.search_several`) against references written here.

The economy (invented) is the households of tests/worker/test_search.py, restated here (a test module imports
no other), with a tax ``tau`` on earnings paid back as a lump sum ``tau * w``: two unknowns, the interest rate
and the tax, and two conditions, market clearing and the share of households at the borrowing limit.  The two
conditions vanish along nearly parallel curves and differ in size by orders of magnitude (a mean of about 5, a
mass of about 0.03): the badly conditioned case bounded least squares failed on from 5 of 5 starts (max_trials
or not_met, even from (0.12, 0.045)).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest
from scipy.optimize import brentq

from tests._documents import savings_market
from worker.search_several import find_common_root
from worker.solve import solve

GRID = 30.0 * np.linspace(0.0, 1.0, 40) ** 2
"""The asset grid of "power" spacing, written here: min + (max - min) u^exponent."""
MARKET = {"unknowns": {"r": {"min": 0.0, "max": 0.052}}, "conditions": ["mean(a) - capital_demand"],
          "tolerance": 1e-6}
TARGET = 0.032
"""The share of households at the borrowing limit (invented)."""
BOTH = {"unknowns": {"r": {"min": 0.0, "max": 0.052}, "tau": {"min": 0.0, "max": 0.3}},
        "conditions": ["mean(a) - capital_demand", f"mass(a <= 0) - {TARGET}"], "tolerance": 1e-6}


def _taxed(search: dict[str, Any] | None, r: float = 0.02, tau: float = 0.1) -> dict[str, Any]:
    model = savings_market(define={"c": "(1 + r) * a + (1 - tau) * w * y + tau * w - save"})
    model["params"] = {**model["params"], "r": r, "tau": tau}
    document = {"version": 1, "discount": 0.95, "model": model, "solver": {"method": "howard", "tolerance": 1e-10}}
    if search is not None:
        document["search"] = search
    return document


@pytest.fixture(scope="module")
def nested() -> tuple[float, float]:
    """The reference: scipy's brentq over tau, each evaluation fixq's one-unknown search for r (a job of its
    own) and the mass at a = 0 of its result's stationary distribution, summed here in numpy."""
    found: dict[float, float] = {}

    def share_at_limit(tau: float) -> float:
        result = solve(_taxed(MARKET, tau=tau))
        assert result["search"]["status"] == "converged"
        found[tau] = result["search"]["unknowns"]["r"]
        pi = np.asarray(result["stationary"]["distribution"])
        assert np.allclose(np.asarray(result["axes"]["a"]), GRID)
        return float(pi[0].sum()) - TARGET

    tau = brentq(share_at_limit, 0.1, 0.2, xtol=1e-10)
    share_at_limit(tau)
    return found[tau], tau


@pytest.mark.parametrize("start", [(0.045, 0.12), (0.047, 0.2), (0.044, 0.09), (0.046, 0.15), (0.02, 0.1)])
def test_r_and_a_tax_are_found_from_several_starts_where_a_nested_loop_finds_them(
    start: tuple[float, float], nested: tuple[float, float]
) -> None:
    r0, tau0 = start
    result = solve(_taxed(BOTH, r=r0, tau=tau0))
    search = result["search"]
    assert search["status"] == "converged", result["diagnostics"]["warnings"]
    assert all(abs(v) <= 1e-6 for v in search["residuals"])
    # Found only from a certifying trial that met the tolerance, and every trial inside the brackets.
    last = search["trials"][-1]
    assert last["certified"] and last["residuals"] == search["residuals"]
    assert all(0.0 <= row["unknowns"]["r"] <= 0.052 and 0.0 <= row["unknowns"]["tau"] <= 0.3
               for row in search["trials"])
    assert len(search["trials"]) <= 25, len(search["trials"])
    r, tau = nested
    # The nested loop's own tolerances (1e-6 on each condition) allow about this much (its sensitivities).
    assert abs(search["unknowns"]["r"] - r) <= 1e-7, (search["unknowns"], r)
    assert abs(search["unknowns"]["tau"] - tau) <= 2e-6, (search["unknowns"], tau)
    # Only that some of the 40 points choose the top of this short grid (a true warning of the grid).
    assert all("highest point of `save`" in warning for warning in result["diagnostics"]["warnings"])


def test_a_repeated_condition_is_said_not_to_identify_the_unknowns() -> None:
    search = {**BOTH, "conditions": ["mean(a) - capital_demand", "2 * (mean(a) - capital_demand)"]}
    result = solve(_taxed(search, r=0.045, tau=0.12))
    warnings = " ".join(result["diagnostics"]["warnings"])
    assert "not identified" in warnings and "2 * (mean(a) - capital_demand)" in warnings, warnings


def test_conditions_with_no_common_root_in_the_brackets_say_why_not_only_that_trials_ran_out() -> None:
    # Half the households at the limit is more than any tax in the bracket gives (3-5 % here, measured).
    search = {**BOTH, "conditions": ["mean(a) - capital_demand", "mass(a <= 0) - 0.5"]}
    result = solve(_taxed(search, r=0.045, tau=0.12))
    status = result["search"]["status"]
    assert status == "not_met", status
    warning = result["diagnostics"]["warnings"][-1]
    assert "did NOT meet" in warning and "tau" in warning and "max_trials" not in warning, warning
    assert len(result["search"]["trials"]) < 60  # it stops on its own, before max_trials
    # The result is at the point where the conditions were smallest, solved by a certifying trial.
    last = result["search"]["trials"][-1]
    assert last["certified"] and last["unknowns"] == result["search"]["unknowns"]


class _Done(Exception):
    pass


def test_a_badly_scaled_noisy_system_is_solved_inside_its_box() -> None:
    """F = (1e3 (x0 - 0.3) + 1e2 (x1 - 0.6), 1e-3 (x1 - x0^2 - 0.51) - 1e-4 (x0 - 0.3)) plus noise of 1e-9 of
    the first's scale: the root (0.3, 0.6) by hand; conditions six orders apart and nearly parallel near it."""
    rng = np.random.default_rng(7)
    seen: list[tuple[float, ...]] = []

    def residuals(x: tuple[float, ...]) -> list[float]:
        seen.append(x)
        x0, x1 = x
        f = [1e3 * (x0 - 0.3) + 1e2 * (x1 - 0.6) + 1e-6 * rng.standard_normal(),
             1e-3 * (x1 - x0 ** 2 - 0.51) - 1e-4 * (x0 - 0.3) + 1e-12 * rng.standard_normal()]
        if abs(f[0]) <= 1e-5 and abs(f[1]) <= 1e-10:
            raise _Done
        return f

    with pytest.raises(_Done):
        find_common_root(residuals, np.array([0.0, 0.0]), np.array([1.0, 1.0]), np.array([0.9, 0.1]), 1e-10,
                         ["x0", "x1"], ["f0", "f1"], [])
    assert np.allclose(seen[-1], (0.3, 0.6), atol=1e-6)
    assert all(0.0 <= v <= 1.0 for x in seen for v in x)
    assert len(seen) <= 40


def test_a_search_of_two_unknowns_stopped_after_some_trials_resumes_them_from_its_checkpoint() -> None:
    """The Newton steps are chosen from the residuals alone, so a resumed search asks for the same trials: those
    made before the stop are answered from the checkpoint, and it ends where an uninterrupted search does."""
    from tests._memory_checkpoint import MemoryCheckpoint
    from worker.errors import Canceled

    document = _taxed(BOTH, r=0.047, tau=0.2)
    document["solver"]["checkpoint_s"] = 1e-9
    fresh = solve(_taxed(BOTH, r=0.047, tau=0.2))["search"]
    memory = MemoryCheckpoint()
    first: list[dict[str, Any]] = []
    with pytest.raises(Canceled):
        solve(document, checkpoint=memory, on_progress=first.append, should_stop=lambda: len(first) >= 7)
    second: list[dict[str, Any]] = []
    resumed = solve(document, checkpoint=memory, on_progress=second.append)
    assert resumed["diagnostics"]["resumed_from_iteration"] == 7
    assert [row["unknowns"] for row in resumed["search"]["trials"]] == [row["unknowns"] for row in fresh["trials"]]
    assert len(second) == len(fresh["trials"]) - 7 and resumed["search"]["unknowns"] == fresh["unknowns"]
    assert resumed["search"]["status"] == "converged"
