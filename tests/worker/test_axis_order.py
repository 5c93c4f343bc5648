"""Key order never changes meaning: ``axis_order`` in every result, and ``model.axis_order`` fixing it.

A JSON decoder that does not keep key order (MATLAB's containers.Map, R environments, Julia's Dict) hands
fixq a document whose ``states``, ``shocks``, ``define`` and ``params`` keys come in another order.  The
document must solve to the same numbers, its result must say which axis is which, and with
``model.axis_order`` the arrays must come back element for element the same.  The references here are
fixq's own solves of the unshuffled document, aligned by name with ``np.transpose``; the horizon one is also
checked against a plain-numpy backward induction written in this test.
"""

from __future__ import annotations

import copy
from typing import Any

import numpy as np
import pytest

from worker.errors import InvalidDocument
from worker.solve import solve


def workshop(**model: Any) -> dict[str, Any]:
    """An invented workshop: stock of tools ``k`` and a crew size ``h`` (both chosen), demand ``z`` a chain."""
    return {
        "version": 1,
        "discount": 0.9,
        "model": {
            "kind": "grid",
            "params": {"alpha": 0.35, "wage": "0.2 * markup", "markup": 1.1, "wear": 0.15},
            "states": {"k": {"min": 0.5, "max": 4.0, "points": 14}, "h": {"values": [0.0, 1.0, 2.0]}},
            "shocks": {"z": {"markov": {"values": [0.8, 1.0, 1.3],
                                        "matrix": [[0.7, 0.2, 0.1], [0.2, 0.6, 0.2], [0.1, 0.3, 0.6]]}}},
            "choices": {"kn": {"next_of": "k"}, "hn": {"next_of": "h"}},
            "define": {"c": "sales - wage * hn - kn + (1 - wear) * k", "sales": "z * (k ** alpha) * (1 + 0.3 * h)"},
            "reward": "log(c)",
            "feasible": ["c > 0"],
            **model,
        },
        "solver": {"tolerance": 1e-10},
        "report": {"stationary": True},
    }


def reversed_keys(document: dict[str, Any]) -> dict[str, Any]:
    """The document with the keys of states, shocks, define and params in reverse order."""
    shuffled = copy.deepcopy(document)
    model = shuffled["model"]
    for section in ("states", "shocks", "define", "params"):
        model[section] = dict(reversed(list(model[section].items())))
    return shuffled


def aligned(array: Any, order: list[str], to: list[str]) -> np.ndarray:
    """``array`` (axes in ``order``, then any trailing ones) with its axes in the order ``to``."""
    array = np.asarray(array)
    return np.transpose(array, [order.index(name) for name in to] + list(range(len(order), array.ndim)))


def test_every_result_states_its_axis_order() -> None:
    result = solve(workshop())
    assert result["axis_order"] == ["k", "h", "z"] == list(result["axes"])
    assert np.shape(result["value"]) == (14, 3, 3)
    keys = list(result)
    assert keys.index("axis_order") == keys.index("axes") + 1


def test_shuffled_keys_solve_to_the_same_numbers_aligned_by_axis_order() -> None:
    plain, shuffled = solve(workshop()), solve(reversed_keys(workshop()))
    assert shuffled["axis_order"] == ["h", "k", "z"]  # the states in the order they came, then the shock
    order, to = shuffled["axis_order"], plain["axis_order"]
    assert np.shape(shuffled["value"]) == (3, 14, 3)
    # Both certified within 1e-10 of the same fixed point.
    np.testing.assert_allclose(aligned(shuffled["value"], order, to), plain["value"], rtol=0, atol=3e-10)
    for name in ("kn", "hn"):
        np.testing.assert_array_equal(aligned(shuffled["policy"][name], order, to), plain["policy"][name])
        np.testing.assert_array_equal(aligned(shuffled["policy_index"][name], order, to), plain["policy_index"][name])
    np.testing.assert_allclose(aligned(shuffled["stationary"]["distribution"], order, to),
                               plain["stationary"]["distribution"], rtol=0, atol=1e-12)


def test_model_axis_order_gives_identical_arrays_whatever_the_key_order() -> None:
    order = ["z", "h", "k"]
    fixed, shuffled = solve(workshop(axis_order=order)), solve(reversed_keys(workshop(axis_order=order)))
    plain = solve(workshop())
    for result in (fixed, shuffled):
        assert result["axis_order"] == order == list(result["axes"])
    for key in ("value", "policy", "policy_index", "axes"):
        assert fixed[key] == shuffled[key], key
    assert fixed["stationary"]["distribution"] == shuffled["stationary"]["distribution"]
    # And they are the default layout's numbers, transposed.
    np.testing.assert_allclose(fixed["value"], aligned(plain["value"], plain["axis_order"], order), rtol=0,
                               atol=3e-10)
    np.testing.assert_array_equal(fixed["policy_index"]["kn"],
                                  aligned(plain["policy_index"]["kn"], plain["axis_order"], order))
    np.testing.assert_allclose(fixed["stationary"]["distribution"],
                               aligned(plain["stationary"]["distribution"], plain["axis_order"], order), atol=1e-12)


def test_initial_values_and_warm_starts_are_read_in_the_stated_order() -> None:
    order = ["z", "k", "h"]
    solved = solve(workshop(axis_order=order))
    # Values sent in axis_order's layout (nested, or flat row-major over it) start at the fixed point.
    for values in (solved["value"], np.ravel(solved["value"]).tolist()):
        document = workshop(axis_order=order)
        document["solver"] = {"tolerance": 1e-8, "initial": {"values": values}}
        again = solve(document)
        assert again["iterations"] <= 2
        np.testing.assert_allclose(again["value"], solved["value"], rtol=0, atol=1e-8)
    # An earlier job's result in another layout is matched by name: a default-order document starts from it.
    document = workshop()
    document["solver"] = {"tolerance": 1e-8, "initial": {"job": "earlier"}}
    warm = solve(document, warm_start={key: solved[key] for key in ("axes", "axis_order", "value")})
    assert warm["iterations"] <= 2
    np.testing.assert_allclose(warm["value"], aligned(solved["value"], order, warm["axis_order"]), atol=1e-8)
    # A value shaped in the default layout is refused, naming the shape axis_order implies.
    document = workshop(axis_order=order)
    document["solver"] = {"initial": {"values": np.zeros((14, 3, 3)).tolist()}}
    with pytest.raises(InvalidDocument) as caught:
        solve(document)
    assert caught.value.errors[0]["path"] == "solver.initial.values"
    assert "[3, 14, 3]" in caught.value.errors[0]["message"]


def test_choice_probabilities_follow_the_order_then_the_choices() -> None:
    plain = solve(workshop(taste_shocks={"scale": 0.05}))
    fixed = solve(workshop(taste_shocks={"scale": 0.05}, axis_order=["z", "k", "h"]))
    assert np.shape(fixed["choice_probabilities"]) == (3, 14, 3, 14, 3)
    np.testing.assert_allclose(
        fixed["choice_probabilities"],
        aligned(plain["choice_probabilities"], plain["axis_order"], fixed["axis_order"]), rtol=0, atol=1e-8,
    )


def test_axis_order_faults_name_the_entry() -> None:
    cases = [
        (["z", "k"], "model.axis_order", "missing h"),
        (["z", "k", "k", "h"], "model.axis_order[2]", "named twice"),
        (["z", "k", "q", "h"], "model.axis_order[2]", "not a state or shock"),
        ("k", "model.axis_order", "missing h, z"),  # one name as a string (jsonlite's auto_unbox) is a list of one
    ]
    for order, path, words in cases:
        with pytest.raises(InvalidDocument) as caught:
            solve(workshop(axis_order=order))
        assert [(e["path"], words in e["message"]) for e in caught.value.errors] == [(path, True)], caught.value.errors


ASSETS = np.linspace(0.0, 3.0, 25)
EARNINGS = [1.0, 1.2, 1.3, 0.6]
SHOCK_VALUES = [0.7, 1.0, 1.4]
SHOCK_MATRIX = [[0.6, 0.3, 0.1], [0.2, 0.6, 0.2], [0.1, 0.3, 0.6]]


def saver(**model: Any) -> dict[str, Any]:
    """An invented four-period saver with a wage shock, a cohort followed from a spread start."""
    start = np.full((ASSETS.size, len(SHOCK_VALUES)), 1.0)
    start[5:, :] = 0.0
    start[:, 2] = 0.0
    return {
        "version": 1,
        "discount": 0.95,
        "model": {
            "kind": "grid",
            "params": {"rate": "base + 0.01", "base": 0.03, "earnings": EARNINGS},
            "states": {"a": {"values": ASSETS.tolist()}},
            "shocks": {"y": {"markov": {"values": SHOCK_VALUES, "matrix": SHOCK_MATRIX}}},
            "choices": {"an": {"next_of": "a"}},
            "define": {"c": "cash - an", "cash": "(1 + rate) * a + earnings * y"},
            "feasible": ["c > 0"],
            "reward": "log(c)",
            "horizon": {"periods": len(EARNINGS)},
            **model,
        },
        "report": {"cohort": {"distribution": (start / start.sum()).tolist()}},
    }


def saver_by_numpy() -> np.ndarray:
    """Plain-numpy backward induction of :func:`saver`: the value, (period, a, y)."""
    y, P = np.array(SHOCK_VALUES), np.array(SHOCK_MATRIX)
    after = np.zeros((ASSETS.size, y.size))
    values = []
    for t in range(len(EARNINGS) - 1, -1, -1):
        c = (1.04 * ASSETS)[:, None, None] + (EARNINGS[t] * y)[None, :, None] - ASSETS[None, None, :]
        expected = after @ P.T  # (a', y)
        with np.errstate(divide="ignore", invalid="ignore"):
            q = np.where(c > 0, np.log(np.where(c > 0, c, 1.0)), -np.inf) + 0.95 * expected.T[None]
        after = q.max(axis=2)
        values.append(after)
    return np.array(values[::-1])


def test_a_horizon_keeps_period_first_and_follows_axis_order() -> None:
    plain = solve(saver())
    assert plain["axis_order"] == ["period", "a", "y"]
    np.testing.assert_allclose(plain["value"], saver_by_numpy(), rtol=0, atol=1e-12)

    document = reversed_keys(saver(axis_order=["y", "a"]))
    # The cohort's start is sent in axis_order's layout too.
    document["report"]["cohort"]["distribution"] = np.transpose(
        document["report"]["cohort"]["distribution"]).tolist()
    fixed = solve(document)
    assert fixed["axis_order"] == ["period", "y", "a"] == list(fixed["axes"])
    order, to = fixed["axis_order"], plain["axis_order"]
    np.testing.assert_allclose(aligned(fixed["value"], order, to), saver_by_numpy(), rtol=0, atol=1e-12)
    np.testing.assert_array_equal(aligned(fixed["policy"]["an"], order, to), plain["policy"]["an"])
    np.testing.assert_allclose(aligned(fixed["cohort"]["distribution"], order, to), plain["cohort"]["distribution"],
                               rtol=0, atol=1e-15)
    np.testing.assert_allclose(fixed["cohort"]["means"]["a"], plain["cohort"]["means"]["a"], rtol=1e-13)


def test_euler_profile_columns_follow_the_order_of_the_shocks() -> None:
    """One state, two shocks: the profile's columns run over the shocks' points as axis_order lists them."""
    def grower(**model: Any) -> dict[str, Any]:
        return {
            "version": 1,
            "discount": 0.9,
            "model": {
                "kind": "grid",
                "params": {"alpha": 0.3},
                "states": {"k": {"min": 0.05, "max": 0.5, "points": 40}},
                "shocks": {"z": {"markov": {"values": [0.9, 1.1], "matrix": [[0.8, 0.2], [0.2, 0.8]]}},
                           "q": {"iid": {"values": [0.95, 1.0, 1.05], "probs": [0.25, 0.5, 0.25]}}},
                "choices": {"kn": {"next_of": "k"}},
                "define": {"c": "z * q * k ** alpha - kn"},
                "reward": "log(c)",
                "feasible": ["c > 0"],
                **model,
            },
            "report": {"euler_errors": True},
        }

    plain = solve(grower())["diagnostics"]["euler_errors"]["profile"]
    fixed = solve(grower(axis_order=["q", "k", "z"]))["diagnostics"]["euler_errors"]["profile"]
    rows = len(plain["at"])
    assert plain["at"] == fixed["at"]
    as_array = lambda table: np.array([[np.nan if v is None else v for v in row] for row in table])  # noqa: E731
    expected = as_array(plain["log10_error"]).reshape(rows, 2, 3).transpose(0, 2, 1).reshape(rows, 6)
    np.testing.assert_allclose(as_array(fixed["log10_error"]), expected, rtol=0, atol=1e-9, equal_nan=True)
