"""Hostile documents through ``worker.solve``: each is refused quickly, naming the field.

Every case must raise a :class:`worker.errors.FixqError` within
``REFUSAL_S`` seconds whose ``errors`` carry the path of the faulty field.
The models are invented (a machine shop; a plant growing its capital).
"""

from __future__ import annotations

import copy
import json
import os
import subprocess
import sys
import time

import numpy as np
import pytest

from tests._documents import log_growth, tiny_tabular
from worker import FixqError, InfeasibleModel, InvalidDocument, TooLarge, solve
from worker.arrays import encode_array

REFUSAL_S = 1.0
"""Longest time a refusal may take (seconds)."""

CHILD_MEMORY_BYTES = 4 * 2**30
"""Address-space cap of a child process running a case that could exhaust memory (bytes)."""
CHILD_TIMEOUT_S = 30
"""Longest wait for such a child, start-up and kernel loading included (seconds)."""

REPO = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))


def tabular() -> dict:
    return tiny_tabular(
        states=["idle", "busy"],
        actions=["run", "service"],
        reward=[[1.0, 0.0], [2.0, -1.0]],
        transition=[[[0.5, 0.5], [1.0, 0.0]], [[0.2, 0.8], [0.9, 0.1]]],
    )


def grid() -> dict:
    return {"version": 1, "discount": 0.95, "model": log_growth(k_min=0.1, k_max=2.0, points=20)}


def with_change(document: dict, path: tuple, value) -> dict:
    out = copy.deepcopy(document)
    node = out
    for key in path[:-1]:
        node = node[key]
    node[path[-1]] = value
    return out


def refuse(document: dict, kind: type[FixqError] = InvalidDocument) -> FixqError:
    """Solve ``document``; assert a quick refusal of type ``kind`` and return it."""
    started = time.perf_counter()
    with pytest.raises(kind) as caught:
        solve(document)
    elapsed = time.perf_counter() - started
    assert elapsed < REFUSAL_S, f"refusal took {elapsed:.2f} s"
    assert caught.value.errors, "an error must list its faults"
    return caught.value


def paths(error: FixqError) -> list[str]:
    return [e["path"] for e in error.errors]


@pytest.fixture(scope="module", autouse=True)
def warm_grid_compiler():
    """Load the grid compiler's kernels once, so that refusal times measure refusals."""
    solve(grid())


EXPRESSIONS = {
    "injection": "__import__('os').system('echo hacked')",
    "attribute": "k.real",
    "dunder": "k.__class__",
    "lambda": "(lambda x: x)(k)",
    "indexing": "k[0]",
    "string": "'k'",
    "call outside the list": "open('/etc/passwd')",
    "comprehension": "[k for k in range(3)]",
    "walrus": "(x := k)",
    "deep nesting": "(" * 2000 + "k" + ")" * 2000,
    "long sum": " + ".join(["k"] * 100_000),
}


@pytest.mark.parametrize("name", sorted(EXPRESSIONS))
def test_expressions_outside_the_grammar(name):
    error = refuse(with_change(grid(), ("model", "reward"), EXPRESSIONS[name]))
    assert "model.reward" in paths(error)


def test_expressions_in_define_and_feasible_name_their_entry():
    error = refuse(with_change(grid(), ("model", "define", "c"), "__import__('os')"))
    assert paths(error) == ["model.define.c"]
    error = refuse(with_change(grid(), ("model", "feasible"), ["c > 0", "k.imag"]))
    assert paths(error) == ["model.feasible[1]"]


def test_unknown_names_in_expressions():
    error = refuse(with_change(grid(), ("model", "reward"), "log(c) + os"))
    assert paths(error) == ["model.reward"]


def test_a_tower_of_powers_does_not_hang():
    # Run in a child process: a hang (big-integer arithmetic) must fail the test, not stall it.
    code = f"""
import json, sys, time
sys.path.insert(0, {REPO!r})
from worker import solve, FixqError
document = json.loads(sys.stdin.read())
solve(document)  # warm the compiler
for reward in ("9**9**9**9", "log(c) + 9**9**9**9", "(2**1000)**(2**1000)", "(1 + alpha)**10**10**10"):
    document["model"]["reward"] = reward
    started = time.perf_counter()
    try:
        solve(document)
        outcome = ("solved", [])
    except FixqError as error:
        outcome = (type(error).__name__, [e["path"] for e in error.errors])
    print(json.dumps([reward, outcome, time.perf_counter() - started]))
"""
    done = subprocess.run(
        [sys.executable, "-c", code], input=json.dumps(grid()), capture_output=True, text=True, timeout=120, cwd=REPO
    )
    assert done.returncode == 0, done.stderr[-2000:]
    for line in done.stdout.splitlines():
        reward, (kind, where), seconds = json.loads(line)
        assert seconds < REFUSAL_S, (reward, seconds)
        assert kind != "solved", f"{reward!r} should be refused (it is infinite everywhere)"
        assert any(path.startswith("model.") for path in where), (reward, where)


def test_deeply_nested_json():
    nested: list = [1.0]
    for _ in range(5_000):
        nested = [nested]
    error = refuse(with_change(tabular(), ("model", "reward"), nested))
    assert all(path.startswith("model.reward") or path == "" for path in paths(error))


@pytest.mark.parametrize("bad", [float("nan"), float("inf"), -float("inf")])
def test_non_finite_numbers_in_arrays(bad):
    error = refuse(with_change(tabular(), ("model", "transition", 1, 0, 1), bad))
    assert any(path.startswith("model.transition[1][0]") for path in paths(error))
    if not np.isnan(bad):
        # NaN in a reward means "not allowed"; infinities are faults.
        error = refuse(with_change(tabular(), ("model", "reward", 0, 1), bad))
        assert any(path.startswith("model.reward[0][1]") for path in paths(error))
    packed = np.array(tabular()["model"]["transition"])
    packed[0, 1, 0] = bad
    error = refuse(with_change(tabular(), ("model", "transition"), encode_array(packed)))
    assert any(path.startswith("model.transition") for path in paths(error))


def test_non_finite_numbers_in_grid_parameters():
    error = refuse(with_change(grid(), ("model", "params", "alpha"), float("inf")))
    assert any(path.startswith("model.params.alpha") for path in paths(error))


def test_non_stochastic_rows():
    error = refuse(with_change(tabular(), ("model", "transition", 0, 1), [0.6, 0.3]))
    assert paths(error) == ["model.transition[0][1]"]
    error = refuse(with_change(tabular(), ("model", "transition", 1, 1), [1.2, -0.2]))
    assert all(path.startswith("model.transition[1][1]") for path in paths(error))
    sparse = {"entries": [[0, 0, 0, 1.0], [0, 1, 1, 1.0], [1, 0, 0, 0.5], [1, 1, 1, 1.0]]}
    error = refuse(with_change(tabular(), ("model", "transition"), sparse))
    assert all(path.startswith("model.transition") for path in paths(error))
    error = refuse(with_change(grid(), ("model", "shocks", "z", "markov", "matrix"), [[0.8, 0.3], [0.3, 0.7]]))
    assert all(path.startswith("model.shocks.z.markov.matrix") for path in paths(error))


@pytest.mark.parametrize("beta", [1.0, 1.5, 0.0, -0.5, float("nan")])
@pytest.mark.parametrize("make", [tabular, grid])
def test_discount_outside_the_unit_interval(beta, make):
    error = refuse(with_change(make(), ("discount",), beta))
    assert paths(error) == ["discount"]


def test_a_tabular_state_with_no_allowed_action():
    error = refuse(with_change(tabular(), ("model", "reward", 1), [None, None]), InfeasibleModel)
    assert paths(error) == ["model.reward[1]"]


def test_a_grid_state_with_no_feasible_choice():
    # With c = z k^α − k' − 0.5, the poorest capital levels cannot afford any k'.
    error = refuse(with_change(grid(), ("model", "define", "c"), "z * k**alpha - k_next - 0.5"), InfeasibleModel)
    assert any(path in ("model.feasible", "model.reward") for path in paths(error))
    assert "k" in error.errors[0]["message"]


def test_billion_point_grids_are_too_large():
    document = with_change(grid(), ("model", "states"), {
        "k": {"min": 0.1, "max": 2.0, "points": 100_000},
        "h": {"min": 0.1, "max": 2.0, "points": 100_000},
    })
    document["model"]["choices"] = {"k_next": {"next_of": "k"}, "h_next": {"next_of": "h"}}
    document["model"]["define"] = {"c": "z * k**alpha * h**0.2 - k_next - h_next"}
    error = refuse(document, TooLarge)
    assert paths(error) == ["model"]
    assert "MiB" in error.errors[0]["message"]
    assert error.context["estimate"]["points"] >= 10**10


def test_a_huge_choice_grid_is_too_large():
    # 2e5 states × 1e10 choices: no memory cap or time would let this finish, so
    # it runs in a child process with an address-space cap and a timeout.
    document = with_change(grid(), ("model", "states", "k", "points"), 100_000)
    document["model"]["choices"] = {"k_next": {"next_of": "k"}, "effort": {"min": 0.0, "max": 1.0, "points": 100_000}}
    document["model"]["define"] = {"c": "z * k**alpha * (1 + effort) - k_next - effort"}
    code = f"""
import json, resource, sys, time
resource.setrlimit(resource.RLIMIT_AS, ({CHILD_MEMORY_BYTES}, {CHILD_MEMORY_BYTES}))
sys.path.insert(0, {REPO!r})
from worker import solve, FixqError
document = json.loads(sys.stdin.read())
started = time.perf_counter()
try:
    solve(document)
    outcome = ["solved", [], ""]
except FixqError as error:
    outcome = [type(error).__name__, [e["path"] for e in error.errors], error.detail]
print(json.dumps(outcome + [time.perf_counter() - started]))
"""
    try:
        done = subprocess.run([sys.executable, "-c", code], input=json.dumps(document), capture_output=True,
                              text=True, timeout=CHILD_TIMEOUT_S, cwd=REPO)
    except subprocess.TimeoutExpired:
        pytest.fail(f"a 1e10-choice grid was not refused within {CHILD_TIMEOUT_S} s")
    assert done.returncode == 0, "the solve crashed instead of refusing the document: " + done.stderr[-1500:]
    kind, where, message, seconds = json.loads(done.stdout.splitlines()[-1])
    assert kind == "TooLarge", (kind, message)
    assert where == ["model"] and "MiB" in message
    assert seconds < REFUSAL_S


@pytest.mark.parametrize(
    "where, key",
    [((), "colour"), (("model",), "extra"), (("solver",), "tolerence"), (("report",), "stationery")],
)
def test_unknown_keys_are_named(where, key):
    document = tabular() | {"solver": {}, "report": {}}
    node = document
    for part in where:
        node = node[part]
    node[key] = 1
    error = refuse(document)
    assert ".".join((*where, key)) in paths(error)


def test_packed_arrays_of_the_wrong_shape_or_garbage():
    bad_base64 = {"dtype": "float64", "shape": [2, 2], "base64": "not base64 at all!"}
    error = refuse(with_change(tabular(), ("model", "reward"), bad_base64))
    assert any(path.startswith("model.reward") for path in paths(error))
    short = encode_array(np.zeros(3))
    short["shape"] = [2, 2]
    error = refuse(with_change(tabular(), ("model", "reward"), short))
    assert any(path.startswith("model.reward") for path in paths(error))
