"""Draws revealed after the choice (``"timing": "after_choice"``) on grid models.

References named beside each check:

* An independent plain-numpy value iteration written here (``plain_value_iteration``) on the dense
  reward ``R[s, a]`` and transition ``P[s, a, s']`` arrays each model's builder below writes by hand
  from the invented scenario's description, with its own linear interpolation and its own
  expectation over the draws.
* The stationary distribution of the policy's transition matrix, as the left eigenvector of
  eigenvalue 1 from ``numpy.linalg.eig``.
"""

from __future__ import annotations

import numpy as np
import pytest

from tests._documents import grid_document
from tests._draw_models import (
    EFFORTS,
    OFFER_PROBS,
    TOP,
    WAGES,
    WEAR,
    inventory,
    inventory_arrays,
    job_search,
    job_search_arrays,
    machine,
    machine_arrays,
)
from worker import solve
from worker.errors import InvalidDocument, TooLarge
from worker.solvers import GENERAL_METHODS


def plain_value_iteration(R: np.ndarray, P: np.ndarray, beta: float) -> tuple[np.ndarray, np.ndarray]:
    """Independent reference: value iteration on dense arrays until the MacQueen-Porteus gap is below 1e-12."""
    v = np.zeros(R.shape[0])
    while True:
        q = R + beta * (P @ v)
        new = q.max(axis=1)
        gap = np.abs(new - v).max()
        v = new
        if beta / (1 - beta) * gap < 1e-12:
            return v, q.argmax(axis=1)


MODELS = {"machine": (machine, machine_arrays), "job_search": (job_search, job_search_arrays),
          "inventory": (inventory, inventory_arrays)}


@pytest.mark.parametrize("name", sorted(MODELS))
def test_each_model_matches_an_independent_numpy_value_iteration_within_the_bound(name):
    build, arrays = MODELS[name]
    beta = 0.93
    reference, _ = plain_value_iteration(*arrays(), beta)
    result = solve(grid_document(build(), discount=beta, method="value_iteration", tolerance=1e-7))
    assert result["status"] == "converged"
    value = np.asarray(result["value"]).reshape(-1)
    assert np.abs(value - reference).max() <= result["error_bound"]
    assert "wear" not in result["axes"] and "separated" not in result["axes"] and "demand" not in result["axes"]


@pytest.mark.parametrize("name", sorted(MODELS))
def test_all_three_methods_agree_within_their_bounds(name):
    build, arrays = MODELS[name]
    beta = 0.93
    reference, _ = plain_value_iteration(*arrays(), beta)
    for method in sorted(GENERAL_METHODS):
        result = solve(grid_document(build(), discount=beta, method=method, tolerance=1e-8))
        assert result["status"] == "converged", method
        value = np.asarray(result["value"]).reshape(-1)
        assert np.abs(value - reference).max() <= max(result["error_bound"], 1e-9), method


def test_the_draws_move_the_answer():
    # The same machine with the wear drawn before the choice (an axis of the value) is another model: its
    # value averaged over the wear draw differs (the decision then sees the wear it is about to suffer).
    before = machine()
    before["shocks"]["wear"] = {"iid": {"values": WEAR, "probs": [0.4, 0.5, 0.1]}}
    after = solve(grid_document(machine(), discount=0.93))
    seen = solve(grid_document(before, discount=0.93))
    assert np.asarray(after["value"]).shape == (TOP + 1,)
    assert np.asarray(seen["value"]).shape == (TOP + 1, 3)
    assert np.abs(np.asarray(seen["value"]) @ np.array([0.4, 0.5, 0.1]) - np.asarray(after["value"])).max() > 0.01


def test_the_policy_matches_the_numpy_policy_on_the_job_search_model():
    R, P = job_search_arrays()
    _, policy = plain_value_iteration(R, P, 0.95)
    result = solve(grid_document(job_search(), discount=0.95, method="policy_iteration", tolerance=1e-10))
    accept = np.asarray(result["policy_index"]["accept"]).reshape(-1)
    effort = np.asarray(result["policy_index"]["effort"]).reshape(-1)
    np.testing.assert_array_equal(accept * len(EFFORTS) + effort, policy)
    # Effort lowers the separation chance: employed workers at high wages exert some.
    assert effort.reshape(2, 5, 5)[1, -1].min() > 0


@pytest.mark.parametrize("name", ["machine", "inventory"])
def test_stationary_distribution_matches_a_numpy_eigenvector(name):
    build, arrays = MODELS[name]
    R, P = arrays()
    document = grid_document(build(), discount=0.93, method="policy_iteration", tolerance=1e-10)
    document["report"] = {"stationary": True, "simulation": {"periods": 400, "paths": 200, "seed": 3}}
    result = solve(document)
    index = result["policy_index"]
    if name == "machine":
        policy = np.asarray(index["replace"])
    else:
        policy = np.asarray(index["order"]) * 2 + np.asarray(index["price"])
    chain = P[np.arange(P.shape[0]), policy.reshape(-1)]
    # Reference: numpy.linalg.eig of the policy's transition, the left eigenvector of eigenvalue 1.
    values, vectors = np.linalg.eig(chain.T)
    pi = np.real(vectors[:, np.argmin(np.abs(values - 1.0))])
    pi /= pi.sum()
    np.testing.assert_allclose(np.asarray(result["stationary"]["distribution"]).reshape(-1), pi, atol=1e-9)
    state = "mileage" if name == "machine" else "stock"
    grid = np.arange(P.shape[0], dtype=float)
    # Seeded paths of 80,000 periods in all: 0.15 of a grid unit (common practice for a seeded check).
    assert result["simulation"]["summary"][state]["mean"] == pytest.approx(float(pi @ grid), abs=0.15)
    first = result["simulation"]["first_path"][state]
    # Tomorrow's stock never exceeds today's stock plus the order: demand is drawn after it, never negative.
    if name == "inventory":
        order = result["simulation"]["first_path"]["order"]
        assert all(b <= a + q + 1e-12 for a, q, b in zip(first[:-1], order[:-1], first[1:]))


def test_probabilities_that_do_not_sum_to_one_are_refused_naming_the_point_and_choice():
    model = machine()
    model["shocks"]["wear"]["iid"]["probs"] = ["0.3 + 0.2 * replace", "0.5", "0.2 - 0.1 * replace"]
    with pytest.raises(InvalidDocument) as caught:
        solve(grid_document(model))
    error = caught.value.errors[0]
    assert error["path"] == "model.shocks.wear.iid.probs"
    assert "mileage = 0" in error["message"] and "replace = 1" in error["message"]
    assert "sum 1.1" in error["message"]


def test_negative_probabilities_are_refused():
    model = inventory()
    model["shocks"]["demand"]["iid"]["probs"][0] = "0.1 - 0.1 * (price - 4)"
    model["shocks"]["demand"]["iid"]["probs"][2] = "0.4 + 0.1 * (price - 4)"
    with pytest.raises(InvalidDocument) as caught:
        solve(grid_document(model))
    error = caught.value.errors[0]
    assert error["path"] == "model.shocks.demand.iid.probs"
    assert "price = 6" in error["message"] and "non-negative" in error["message"]


def test_names_are_checked():
    model = machine()
    model["shocks"]["wear"]["iid"]["probs"][1] = "0.5 + 0 * speed"
    with pytest.raises(InvalidDocument) as caught:
        solve(grid_document(model))
    assert any(e["path"] == "model.shocks.wear.iid.probs[1]" and "speed" in e["message"]
               for e in caught.value.errors)
    model = machine()
    model["shocks"]["wear"]["iid"]["probs"][1] = "0.5 + 0 * wear"
    model["feasible"] = ["wear < 3"]
    with pytest.raises(InvalidDocument) as caught:
        solve(grid_document(model))
    paths = {e["path"] for e in caught.value.errors}
    assert {"model.shocks.wear.iid.probs[1]", "model.feasible[0]"} <= paths


def test_expressions_need_the_after_choice_timing_and_after_choice_needs_iid():
    model = machine()
    del model["shocks"]["wear"]["timing"]
    with pytest.raises(InvalidDocument) as caught:
        solve(grid_document(model))
    assert caught.value.errors[0]["path"] == "model.shocks.wear.iid.probs"
    model = machine()
    model["shocks"]["wear"] = {"markov": {"values": [0, 1], "matrix": [[0.5, 0.5], [0.5, 0.5]]},
                               "timing": "after_choice"}
    with pytest.raises(InvalidDocument) as caught:
        solve(grid_document(model))
    assert caught.value.errors[0]["path"] == "model.shocks.wear.timing"


def test_continuous_choices_with_draws_are_accepted_with_a_horizon():
    # Once refused at the draw's timing; now solved by backward induction (checked against plain numpy in
    # tests/worker/test_horizon_continuous_draws.py).
    model = {
        "horizon": {"periods": 3},
        "states": {"k": {"min": 0.1, "max": 2.0, "points": 20}},
        "shocks": {"luck": {"iid": {"values": [0.9, 1.1], "probs": [0.5, 0.5]}, "timing": "after_choice"}},
        "choices": {"k_next": {"next_of": "k", "continuous": True}},
        "define": {"c": "luck * k**0.3 - k_next"},
        "reward": "log(max(c, 1e-3))",
        "feasible": ["k_next < 0.9 * k**0.3"],
    }
    result = solve(grid_document(model))
    assert result["status"] == "converged" and result["method"] == "backward_induction"
    assert np.asarray(result["value"]).shape == (3, 20)


def test_tables_over_the_budget_are_refused_at_the_draw():
    from worker.document import parse_document
    from worker.drawcheck import check_draw_tables

    with pytest.raises(TooLarge) as caught:
        solve(grid_document(job_search()), limits={"max_bytes": 40_000})
    assert caught.value.errors[0]["path"] == "model.shocks.separated.timing"
    # The door's check (service.admission) refuses the same document before any work, and passes it under the
    # worker's usual cap.
    document = parse_document(grid_document(job_search()))
    with pytest.raises(TooLarge) as caught:
        check_draw_tables(document, limits={"max_bytes": 40_000})
    assert "over the precompute budget" in caught.value.errors[0]["message"]
    check_draw_tables(document, limits={"max_bytes": 1 << 30})


def test_hints_still_apply_and_are_verified():
    # Replacing is worth more as the press wears: the policy is monotone in mileage along a next_of-free menu,
    # so the hint is about the concave search on the one choice; it must give the exact answer.
    R, P = machine_arrays()
    reference, _ = plain_value_iteration(R, P, 0.93)
    result = solve(grid_document(machine(), discount=0.93, hints={"concave": True}, tolerance=1e-8))
    assert np.abs(np.asarray(result["value"]) - reference).max() <= result["error_bound"]
    assert result["diagnostics"]["reward_storage"] == "tables"


def test_two_draws_are_drawn_independently_and_a_define_may_use_them():
    # The press with a second draw after the choice: a breakdown (probability 0.1, or 0.02 right after a
    # replacement) that costs 3 and adds one more half unit of wear; a define combines both draws.
    model = machine()
    model["shocks"]["breakdown"] = {
        "iid": {"values": [0, 1], "probs": ["0.9 + 0.08 * replace", "0.1 - 0.08 * replace"]},
        "timing": "after_choice",
    }
    model["define"] = {"moved": "0.5 * (wear + breakdown)"}
    model["next"] = {"mileage": f"min((1 - replace) * mileage + moved, {TOP})"}
    model["reward"] = "-(1 - replace) * 0.25 * mileage - replace * 6 - 0.3 * wear - 3 * breakdown"
    mileage = np.arange(TOP + 1, dtype=float)
    S = mileage.size
    R = np.zeros((S, 2))
    P = np.zeros((S, 2, S))
    for a in range(2):
        wear_probs = [0.3 + 0.2 * a, 0.5, 0.2 - 0.2 * a]
        breakdown_probs = [0.9 + 0.08 * a, 0.1 - 0.08 * a]
        for wear, p in zip(WEAR, wear_probs):
            for breakdown, q in zip((0, 1), breakdown_probs):
                R[:, a] += p * q * (-(1 - a) * 0.25 * mileage - a * 6 - 0.3 * wear - 3 * breakdown)
                x = np.minimum((1 - a) * mileage + 0.5 * (wear + breakdown), TOP)
                low = np.minimum(np.floor(x).astype(int), TOP - 1)
                P[np.arange(S), a, low] += p * q * (1 - (x - low))
                P[np.arange(S), a, low + 1] += p * q * (x - low)
    reference, _ = plain_value_iteration(R, P, 0.93)
    result = solve(grid_document(model, discount=0.93, tolerance=1e-8))
    assert np.abs(np.asarray(result["value"]) - reference).max() <= result["error_bound"]
    notes = " ".join(result["diagnostics"]["notes"])
    assert "`wear`, `breakdown` drawn after the choice (6 combinations)" in notes


def test_a_draw_in_the_reward_only_with_a_next_of_choice():
    # An invented cellar: the stock of casks is chosen directly (next_of); the price a cask fetches is drawn
    # after the choice, its distribution tilted by how many are sold today.
    model = {
        "states": {"casks": {"min": 0, "max": 6, "points": 7}},
        "shocks": {"price": {"iid": {"values": [1.0, 2.0, 4.0],
                                     "probs": ["0.2 + 0.05 * (casks - keep)", "0.5", "0.3 - 0.05 * (casks - keep)"]},
                             "timing": "after_choice"}},
        "choices": {"keep": {"next_of": "casks"}},
        "feasible": ["keep <= casks + 1"],
        "reward": "price * (casks + 1 - keep) - 0.05 * keep ** 2",
    }
    S = 7
    R = np.full((S, S), -np.inf)
    P = np.zeros((S, S, S))
    for x in range(S):
        for k in range(min(S, x + 2)):
            probs = [0.2 + 0.05 * (x - k), 0.5, 0.3 - 0.05 * (x - k)]
            R[x, k] = sum(p * v * (x + 1 - k) for p, v in zip(probs, [1.0, 2.0, 4.0])) - 0.05 * k**2
            P[x, k, k] = 1.0
    reference, _ = plain_value_iteration(R, P, 0.9)
    document = grid_document(model, discount=0.9, hints={"monotone": True}, tolerance=1e-9)
    document["report"] = {"euler_errors": True}
    result = solve(document)
    assert np.abs(np.asarray(result["value"]) - reference).max() <= result["error_bound"]
    assert result["diagnostics"]["reward_storage"] == "tables"
    assert result["diagnostics"]["hints"]["monotone"] and result["diagnostics"]["verification"]["hints_held"]
    assert "euler_errors" not in result
    # Not measured, and the note says why: the reward uses the choice directly (the probabilities move with it
    # too; tests/worker/test_euler_draws.py has the draws' own notes).
    assert any(note.startswith("Euler-equation errors were not measured") and "uses the choice `keep` directly" in note
               for note in result["diagnostics"]["notes"])


def test_a_simulation_starts_from_the_states_alone():
    document = grid_document(machine(), discount=0.93)
    document["report"] = {"simulation": {"periods": 50, "paths": 20, "seed": 1, "start": {"mileage": 3.0}}}
    first = solve(document)["simulation"]["first_path"]
    assert first["mileage"][0] == 3.0 and "wear" not in first
    # The draw moves mileage by at most one unit (two half units), after a keep from today's, after a
    # replacement from 0; the path visits grid points (the half units are split between neighbours).
    path = list(zip(first["mileage"][:-1], first["replace"][:-1], first["mileage"][1:]))
    assert all((0.0 if r else m) <= n <= (0.0 if r else m) + 1.0 for m, r, n in path)
    assert any(r for _, r, _ in path) and any(n > m for m, r, n in path if not r)
    document["report"]["simulation"]["start"] = {"mileage": 3.0, "wear": 1.0}
    with pytest.raises(InvalidDocument) as caught:
        solve(document)
    assert caught.value.errors[0]["path"] == "report.simulation.start.wear"


def test_the_plan_counts_every_draw_and_keeps_the_tables():
    from worker.document import parse_document
    from worker.estimate import grid_plan

    plan = grid_plan(parse_document(grid_document(job_search(), hints={"monotone": True})).model)
    # Two interpolated states (status, wage): four corners for each of the two values of the draw.
    assert plan.nodes == 8 and plan.shocks == len(OFFER_PROBS) and plan.n == 2 * len(WAGES) * len(OFFER_PROBS)
    assert plan.reward_storage == "tables"
    # The expected reward, then per draw its probability, two lower nodes (int32) and two weights.
    assert plan.precompute_bytes >= plan.pairs * (8 + 2 * (8 + 2 * 12))


def test_hints_with_several_choices_are_not_used_and_the_note_says_why():
    result = solve(grid_document(inventory(), discount=0.93, hints={"monotone": True}))
    notes = " ".join(result["diagnostics"]["notes"])
    assert "the monotone hint was not used" in notes and "draws after the choice" in notes
    assert result["diagnostics"]["hints"] == {"monotone": False, "concave": False}


def test_a_persistent_shock_before_the_choice_and_a_draw_after_it():
    # The press under a persistent price of its output (a two-state Markov chain seen before the choice):
    # idle time costs more when the price is high. Rows of the chain differ, so a draw's nodes must be read
    # at today's shock.
    model = machine()
    model["shocks"] = {"price": {"markov": {"values": [1.0, 3.0], "matrix": [[0.8, 0.2], [0.3, 0.7]]}},
                       **model["shocks"]}
    model["reward"] = "-(1 - replace) * 0.25 * mileage - replace * 2 * price - 0.3 * wear * price"
    chain = np.array([[0.8, 0.2], [0.3, 0.7]])
    prices = [1.0, 3.0]
    mileage = np.arange(TOP + 1, dtype=float)
    M = mileage.size
    S = 2 * M
    R = np.empty((S, 2))
    P = np.zeros((S, 2, S))
    for a in range(2):
        probs = np.array([0.3 + 0.2 * a, 0.5, 0.2 - 0.2 * a])
        for z, price in enumerate(prices):
            rows = np.arange(M) * 2 + z  # flat point: mileage first, the shock fastest
            R[rows, a] = -(1 - a) * 0.25 * mileage - a * 2 * price - 0.3 * price * (probs @ np.array(WEAR))
            for wear, p in zip(WEAR, probs):
                x = np.minimum((1 - a) * mileage + 0.5 * wear, TOP)
                low = np.minimum(np.floor(x).astype(int), TOP - 1)
                frac = x - low
                for z_next in range(2):
                    P[rows, a, low * 2 + z_next] += p * (1 - frac) * chain[z, z_next]
                    P[rows, a, (low + 1) * 2 + z_next] += p * frac * chain[z, z_next]
    reference, policy = plain_value_iteration(R, P, 0.93)
    for method in sorted(GENERAL_METHODS):
        result = solve(grid_document(model, discount=0.93, method=method, tolerance=1e-8))
        value = np.asarray(result["value"])
        assert value.shape == (M, 2)
        assert np.abs(value.reshape(-1) - reference).max() <= result["error_bound"], method
    np.testing.assert_array_equal(np.asarray(result["policy_index"]["replace"]).reshape(-1), policy)


def test_draw_probabilities_may_use_the_period_under_a_horizon():
    """P(d = 1) = 0.5 + 0.1·t; the draw sets tomorrow's state and pays in the reward only when a = 1.

    Backward induction by hand (terminal value 0, β = 0.9): V_2(x) = x + max(0, 0.7 − 0.3) = x + 0.4;
    V_1(x) = x + (0.6 − 0.3) + 0.9·(0.6 + 0.4) = x + 1.2; V_0(x) = x + (0.5 − 0.3) + 0.9·(0.5 + 1.2) = x + 1.73.
    """
    doc = {"version": 1, "discount": 0.9, "model": {
        "kind": "grid", "horizon": {"periods": 3}, "states": {"x": {"values": [0, 1]}},
        "shocks": {"d": {"iid": {"values": [0, 1], "probs": ["0.5 - 0.1 * period", "0.5 + 0.1 * period"]},
                         "timing": "after_choice"}},
        "choices": {"a": {"values": [0, 1]}}, "next": {"x": "d"}, "reward": "x + a * d - 0.3 * a"}}
    result = solve(doc)
    assert result["axis_order"] == ["period", "x"]
    np.testing.assert_allclose(result["value"], [[1.73, 2.73], [1.2, 2.2], [0.4, 1.4]], atol=1e-12)
    assert np.array(result["policy"]["a"]).tolist() == [[1, 1], [1, 1], [1, 1]]


def _many_draws(values: int) -> dict:
    """Invented: a household whose utility is scaled by a mood drawn after it saves (``values`` equally likely
    values), beside a two-state income chain; tomorrow's assets are the choice, so no state moves with the draw."""
    model = {
        "params": {"r": 0.03},
        "states": {"assets": {"min": 0.1, "max": 4.0, "points": 30}},
        "shocks": {"income": {"markov": {"values": [0.8, 1.2], "matrix": [[0.9, 0.1], [0.2, 0.8]]}},
                   "mood": {"iid": {"values": list(np.linspace(0.9, 1.1, values)), "probs": [1.0 / values] * values},
                            "timing": "after_choice"}},
        "choices": {"saving": {"next_of": "assets"}},
        "define": {"c": "(1 + r) * assets + income - saving", "felt": "mood * log(c)"},
        "reward": "felt",
        "feasible": ["c > 0"],
    }
    return grid_document(model, discount=0.9, hints={"monotone": True, "concave": True})


def test_many_draws_are_evaluated_together_and_priced(monkeypatch: pytest.MonkeyPatch) -> None:
    # The fill evaluated every expression once per combination of the draws and block of rows, and a block holds
    # every draw of its rows, so its Python work grew as the square of the draws (72 s at 20,000 values of a
    # draw in the reward, measured; now 1.6 s): each expression is evaluated once per block, all draws along a
    # leading axis.  Same answer: a plain value iteration on the expected reward (the mood's mean is 1).
    import worker.feasibility as feasibility
    from worker.document import parse_document
    from worker.estimate import estimate

    calls = {"count": 0}
    real = feasibility.evaluate

    def counted(*args, **kwargs):
        calls["count"] += 1
        return real(*args, **kwargs)

    monkeypatch.setattr(feasibility, "evaluate", counted)
    result = solve(_many_draws(2_000))
    assert result["status"] == "converged"
    assert calls["count"] < 500, calls  # one per combination and block made 16,008 here
    grid = np.linspace(0.1, 4.0, 30)
    income, chain = np.array([0.8, 1.2]), np.array([[0.9, 0.1], [0.2, 0.8]])
    cash = (1.03 * grid[:, None] + income[None, :])[:, :, None] - grid[None, None, :]  # (assets, income, next)
    R = np.where(cash > 0, np.log(np.where(cash > 0, cash, 1.0)), -np.inf).reshape(60, 30)
    P = np.zeros((60, 30, 60))
    for a in range(30):
        for z in range(2):
            for choice in range(30):
                P[2 * a + z, choice, 2 * choice:2 * choice + 2] = chain[z]
    v, _ = plain_value_iteration(R, P, 0.9)
    np.testing.assert_allclose(np.asarray(result["value"]).reshape(-1), v, rtol=0, atol=1e-6)
    # The time estimate counts the fill at every draw: ten times the draws, about ten times the fill.
    seconds = [estimate(parse_document(_many_draws(k)))["seconds"] for k in (200, 2_000)]
    assert seconds[1] > 5 * seconds[0], seconds
