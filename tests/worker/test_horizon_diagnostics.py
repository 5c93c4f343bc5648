"""A finite horizon's diagnostics cover every period's policy, not period 0's alone.

A life cycle reaches a grid's end in some periods only (wealth peaks near retirement, an inheritance arrives
late); before, edge hits, clamped next values and a continuous choice's ends were counted on period 0's policy
alone, so a grid too short in mid-life went unreported.  The counts here are checked against the result's own
policy arrays, counted in plain numpy.  Every scenario is invented (a glassblower's household).
"""

from __future__ import annotations

from typing import Any

import numpy as np

from worker import solve

TOP = 3.0


def glassblower(choice: dict[str, Any], *, define: str, law: dict[str, str] | None = None) -> dict[str, Any]:
    """Four periods; a large sale in period 2 makes saving to the grid's top best then, and only then."""
    model: dict[str, Any] = {
        "kind": "grid",
        "params": {"R": 1.03, "inc": [0.5, 0.5, 20.0, 0.5], "inh": [0.0, 0.0, 4.0, 0.0]},
        "states": {"a": {"min": 0.0, "max": TOP, "points": 13}},
        "choices": choice,
        "define": {"c": define},
        "reward": "log(c)",
        "feasible": ["c > 0"],
        "horizon": {"periods": 4, "terminal_value": "5 * log(1 + a)"},
    }
    if law:
        model["next"] = law
    return {"version": 1, "label": "a glassblower's household (invented)", "discount": 0.95, "model": model}


def _policy(result: dict[str, Any], name: str) -> np.ndarray:
    return np.asarray(result["policy"][name], dtype=float)


def test_edge_hits_count_every_period_and_warn_naming_it() -> None:
    result = solve(glassblower({"a_next": {"next_of": "a"}}, define="R * a + inc - a_next"))
    index = np.asarray(result["policy_index"]["a_next"])  # (period, point)
    hits = result["diagnostics"]["edge_hits"]["a_next"]
    assert hits["highest"] == np.mean(index == 12) > 0.2  # period 2 saves to the top everywhere
    assert hits["lowest"] == np.mean(index == 0)
    warnings = result["diagnostics"]["warnings"]
    assert any(w.startswith("period 2: ") and "highest point of `a_next`" in w for w in warnings), warnings


def test_clamped_next_of_a_continuous_choice_counts_every_period() -> None:
    document = glassblower({"s": {"min": 0, "max": "R * a + inc", "continuous": True}},
                           define="R * a + inc - s", law={"a": "s + inh"})
    result = solve(document)
    s = _policy(result, "s")
    inheritance = np.array([0.0, 0.0, 4.0, 0.0])[:, None]
    expected = int(np.count_nonzero(s + inheritance > TOP))  # tomorrow's state off the grid, counted here
    assert expected >= 13  # every point of period 2
    assert result["diagnostics"]["continuous_choice"]["clamped_next"] == expected
    assert any(w.startswith("period 2: ") and "outside its grid" in w for w in result["diagnostics"]["warnings"])


def test_ends_of_a_continuous_next_of_choice_count_every_period() -> None:
    result = solve(glassblower({"a_next": {"next_of": "a", "continuous": True}}, define="R * a + inc - a_next"))
    a_next = _policy(result, "a_next")
    found = result["diagnostics"]["continuous_choice"]
    assert found["at_upper_end"] == np.count_nonzero(a_next >= TOP) >= 13
    assert found["at_lower_end"] == np.count_nonzero(a_next <= 0.0)


def test_settings_backward_induction_does_not_use_are_named() -> None:
    """Before, solver.max_iterations and solver.tolerance were dropped without a word under a horizon."""
    document = glassblower({"a_next": {"next_of": "a"}}, define="R * a + inc - a_next")
    document["solver"] = {"max_iterations": 2, "tolerance": 1e-3}
    result = solve(document)
    assert result["axes"]["period"] == [0, 1, 2, 3]  # every period solved: max_iterations does not stop it
    assert any("solver.tolerance, solver.max_iterations not used" in note for note in result["diagnostics"]["notes"])
    plain = solve(glassblower({"a_next": {"next_of": "a"}}, define="R * a + inc - a_next"))
    assert not any("not used: backward induction takes" in note for note in plain["diagnostics"]["notes"])


def test_a_last_period_that_spends_everything_adds_no_warning() -> None:
    """With no bequest the last period saves nothing at every point: a limit of the problem, counted, not warned."""
    document = glassblower({"a_next": {"next_of": "a"}}, define="R * a + inc - a_next")
    document["model"]["params"]["inc"] = [0.5, 0.6, 0.7, 0.5]
    document["model"]["horizon"]["terminal_value"] = 0.0
    result = solve(document)
    index = np.asarray(result["policy_index"]["a_next"])
    assert np.all(index[-1] == 0)
    assert result["diagnostics"]["edge_hits"]["a_next"]["lowest"] == np.mean(index == 0)
    assert not any(w.startswith("period ") for w in result["diagnostics"]["warnings"])
