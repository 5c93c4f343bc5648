"""The bundled examples: valid, labelled as invented, small, served, and each solved with the
property that makes it worth showing."""

from __future__ import annotations

import copy
import json
import os
import re
import shutil
import subprocess
import sys
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import httpx
import numpy as np
import pytest
from fastapi import FastAPI
from scipy.interpolate import PchipInterpolator
from scipy.optimize import brentq, minimize_scalar
from scipy.stats import binom

from service import plots, problems
from service.embedded_redis import EmbeddedRedis
from service.examples import DESCRIPTIONS, UnknownExample, example_names, list_examples, load_example
from service.routers.examples import router as examples_router
from tests.service._http import make_client
from tests.service._live_server import LiveServer
from worker import solve
from worker.document import parse_document
from worker.estimate import estimate

EXPECTED = {
    "beekeeper_savings",
    "bike_shop_inventory",
    "courier_van_replacement",
    "fishery_harvest",
    "glassblower_life_cycle",
    "household_saving",
    "machine_replacement",
    "plant_capacity",
    "roastery_growth",
    "translator_contracts",
}
MAX_PAIRS = 500_000
"""Most (state, choice) pairs an example may have: a size that solves in about a second on
one core once compiled (common practice here, not a timed test)."""


@pytest.fixture(scope="module")
def solved() -> Iterator[dict[str, dict[str, Any]]]:
    cache: dict[str, dict[str, Any]] = {}

    class Results(dict):
        def __missing__(self, name: str) -> dict[str, Any]:
            cache[name] = solve(load_example(name))
            self[name] = cache[name]
            return cache[name]

    yield Results()


def test_the_examples_are_the_expected_ones() -> None:
    assert set(example_names()) == EXPECTED
    assert set(DESCRIPTIONS) == EXPECTED


@pytest.mark.parametrize("name", sorted(EXPECTED))
def test_example_is_a_valid_small_invented_scenario(name: str) -> None:
    document = load_example(name)
    parsed = parse_document(document)
    assert "invented scenario" in document["label"]
    assert {"example", "invented"} <= set(document["tags"])
    assert DESCRIPTIONS[name].strip()
    assert estimate(parsed)["pairs"] <= MAX_PAIRS


def test_list_and_load() -> None:
    listed = list_examples()
    assert [e["name"] for e in listed] == sorted(EXPECTED)
    by_name = {e["name"]: e for e in listed}
    assert by_name["machine_replacement"]["kind"] == "tabular"
    assert by_name["machine_replacement"]["points"] == 10
    assert by_name["household_saving"]["points"] == 160 * 5
    first = load_example("household_saving")
    first["model"]["params"]["r"] = 99.0
    assert load_example("household_saving")["model"]["params"]["r"] != 99.0
    for bad in ("nope", "../pyproject", "Household_Saving", ""):
        with pytest.raises(UnknownExample):
            load_example(bad)


@pytest.fixture
def examples_client() -> Iterator[httpx.Client]:
    app = FastAPI()
    problems.install(app)
    app.include_router(examples_router)
    with make_client(app) as client:
        yield client


def test_examples_routes(examples_client: httpx.Client) -> None:
    listing = examples_client.get("/v1/examples").json()
    assert listing["next"] is None
    assert [e["name"] for e in listing["data"]] == sorted(EXPECTED)
    assert examples_client.get("/v1/examples/translator_contracts").json() == load_example("translator_contracts")
    missing = examples_client.get("/v1/examples/space_elevator")
    assert missing.status_code == 404
    assert missing.headers["content-type"] == problems.PROBLEM_JSON
    assert "machine_replacement" in missing.json()["detail"]


def test_machine_shop_replaces_at_and_beyond_a_wear_threshold(solved: dict[str, Any]) -> None:
    document = load_example("machine_replacement")
    result = solved["machine_replacement"]
    actions = result["policy"]["action"]
    threshold = actions.index("replace")
    assert 0 < threshold < len(actions) - 1, "the threshold should be interior, or the example shows nothing"
    assert actions == ["keep running"] * threshold + ["replace"] * (len(actions) - threshold)

    # Independent check: plain value iteration in dense numpy on the same arrays
    # (the Bellman optimality equation; contraction at rate beta, Banach's theorem).
    model = document["model"]
    n = len(model["states"])
    reward = np.array([[np.nan if r is None else r for r in row] for row in model["reward"]])
    transition = np.zeros((n, 2, n))
    for s, a, s_next, p in model["transition"]["entries"]:
        transition[int(s), int(a), int(s_next)] += p
    beta = document["discount"]
    v = np.zeros(n)
    for _ in range(2000):
        v = np.nanmax(reward + beta * transition @ v, axis=1)
    assert np.max(np.abs(np.array(result["value"]) - v)) <= result["error_bound"] + 1e-9


def test_bike_shop_orders_up_to_a_level_below_a_reorder_point(solved: dict[str, Any]) -> None:
    document = load_example("bike_shop_inventory")
    result = solved["bike_shop_inventory"]
    stock = np.array(result["axes"]["stock"])
    order = np.array(result["policy"]["order"])
    ordering = order > 0
    reorder_point = int(ordering.sum())
    assert 0 < reorder_point < stock.size, "the reorder point should be interior, or the example shows nothing"
    # The fixed delivery fee gives an (s, S) policy (Scarf 1960): order exactly at stock <= s, up to one level S.
    assert ordering.tolist() == [True] * reorder_point + [False] * (stock.size - reorder_point)
    assert np.unique(stock[ordering] + order[ordering]).size == 1

    # Independent check: plain value iteration in dense numpy, demand drawn after the order and the price.
    model = document["model"]
    params = model["params"]
    demand = np.array(model["shocks"]["demand"]["iid"]["values"], dtype=float)
    prices = model["choices"]["price"]["values"]
    n = stock.size
    reward = np.full((n, n, len(prices)), -np.inf)
    transition = np.zeros((n, n, len(prices), n))
    for x in range(n):
        for q in range(n - x):
            for j, price in enumerate(prices):
                s = price - 6
                probs = np.array([0.05 + 0.075 * s, 0.2 + 0.075 * s, 0.35, 0.25 - 0.075 * s, 0.15 - 0.075 * s])
                sold = np.minimum(x + q, demand)
                left = x + q - sold
                reward[x, q, j] = probs @ (price * sold - params["unit_cost"] * q - params["delivery_fee"] * (q > 0)
                                           - params["holding"] * left)
                np.add.at(transition[x, q, j], left.astype(int), probs)
    beta = document["discount"]
    v = np.zeros(n)
    while True:
        new = (reward + beta * transition @ v).reshape(n, -1).max(axis=1)
        gap, v = np.abs(new - v).max(), new
        if beta / (1 - beta) * gap < 1e-11:
            break
    assert np.max(np.abs(np.array(result["value"]) - v)) <= result["error_bound"] + 1e-9


def test_courier_van_replacement_probabilities_rise_with_the_odometer(solved: dict[str, Any]) -> None:
    document = load_example("courier_van_replacement")
    result = solved["courier_van_replacement"]
    p = np.asarray(result["choice_probabilities"])[:, :, 1]
    assert np.all(np.diff(p, axis=0) > 0), "replacing gets likelier as the van ages, at every route load"
    assert p[0].max() < 0.01 and p[-1].min() > 0.95, "the probability should run the whole range"
    # Hotz & Miller (1993): log(P_replace/P_keep) = (v_replace − v_keep)/s, the choice-specific values
    # computed here in numpy from the returned value and the document's numbers.
    params, beta = document["model"]["params"], document["discount"]
    scale = document["model"]["taste_shocks"]["scale"]
    load = np.array(document["model"]["shocks"]["route_load"]["iid"]["values"])
    probs = np.array(document["model"]["shocks"]["route_load"]["iid"]["probs"])
    expected = np.asarray(result["value"]) @ probs
    odometer = np.arange(90.0)[:, None]
    keep = -params["upkeep"] * odometer + beta * expected[np.minimum(odometer + load, 89).astype(int)]
    replace = -(params["new_van"] - params["resale"] * (89 - odometer)) + beta * expected[0]
    np.testing.assert_allclose(np.log(p / (1 - p)), (replace - keep) / scale, rtol=0, atol=1e-6)
    pi = np.asarray(result["stationary"]["distribution"])
    assert result["stationary"]["means"]["replace"] == pytest.approx(float((pi * p).sum()), abs=1e-12)


def test_translator_accepts_and_keeps_exactly_the_fees_above_the_reservation_fee(solved: dict[str, Any]) -> None:
    document = load_example("translator_contracts")
    result = solved["translator_contracts"]
    beta = document["discount"]
    model = document["model"]
    n = (len(model["states"]) - 1) // 2
    offers, contracts = slice(1, 1 + n), slice(1 + n, 1 + 2 * n)
    fees = np.array([row[0] for row in model["reward"][offers]])
    odd_jobs = model["reward"][0][1]
    quiet = 0.0
    draws = np.zeros(n)
    ends = 0.0
    for s, a, s_next, p in model["transition"]["entries"]:
        if s == 0 and a == 1:
            if s_next == 0:
                quiet += p
            else:
                draws[int(s_next) - 1] += p
        if s == 1 and a == 0 and s_next == 0:
            ends = p
    assert quiet + draws.sum() == pytest.approx(1.0, abs=1e-9) and 0 < ends < 1

    # Derived from the Bellman equation: with R the value of being without a contract and a
    # contract at fee w worth W(w) = (w + beta*ends*R) / (1 - beta*(1 - ends)), accepting pays
    # iff w >= (1 - beta) R =: w*, and R = odd_jobs + beta*E[max(V(next), R)] gives
    # w* - odd_jobs = beta / (1 - beta + beta*ends) * sum_i draws_i * max(w_i - w*, 0),
    # solved here with scipy's brentq instead of by iteration.
    def gap(w: float) -> float:
        return (w - odd_jobs) - beta / (1 - beta + beta * ends) * np.sum(draws * np.maximum(fees - w, 0.0))

    reservation = brentq(gap, odd_jobs, fees.max())
    assert fees.min() < reservation < fees.max()
    actions = result["policy"]["action"]
    assert actions[0] == "decline"
    assert [a == "accept" for a in actions[offers]] == list(fees >= reservation)
    assert [a == "accept" for a in actions[contracts]] == list(fees >= reservation)
    # Values: R without a contract; an offer or a contract at w is worth R + max(w - w*, 0) / (1 - beta + beta*ends).
    without = reservation / (1 - beta)
    expected = without + np.maximum(fees - reservation, 0.0) / (1 - beta + beta * ends)
    value = np.array(result["value"])
    assert abs(value[0] - without) <= result["error_bound"] + 1e-6
    assert np.max(np.abs(value[offers] - expected)) <= result["error_bound"] + 1e-6
    assert np.max(np.abs(value[contracts] - expected)) <= result["error_bound"] + 1e-6


def rouwenhorst_matrix(points: int, rho: float) -> np.ndarray:
    """Rouwenhorst (1995) transition matrix written as a sum of binomial draws: with state i the
    number of 'up' components among points - 1, each staying put with probability p = (1 + rho)/2,
    tomorrow's count is Binomial(i, p) + Binomial(points - 1 - i, 1 - p) (Kopecky and Suen, 2010,
    Review of Economic Dynamics 13(3); formula from memory, checked by its row sums and mean)."""
    p = (1 + rho) / 2
    m = points - 1
    matrix = np.zeros((points, points))
    for i in range(points):
        stay = binom.pmf(np.arange(i + 1), i, p)
        flip = binom.pmf(np.arange(m - i + 1), m - i, 1 - p)
        matrix[i] = np.convolve(stay, flip)
    return matrix


def test_household_saving_rule(solved: dict[str, Any]) -> None:
    document = load_example("household_saving")
    result = solved["household_saving"]
    assets = np.array(result["axes"]["assets"])
    income = np.array(result["axes"]["income"])
    saving = np.array(result["policy"]["assets_next"])
    assert saving.shape == (assets.size, income.size)

    # Saving rises with wealth and with income (monotone policy of a concave problem;
    # Stokey and Lucas, Recursive Methods, 1989, ch. 9 — from memory).
    assert (np.diff(saving, axis=0) >= 0).all()
    assert (np.diff(saving, axis=1) >= 0).all()
    # The borrowing limit binds for poor, low-income households and for nobody at the top income.
    at_limit = saving == assets[0]
    assert at_limit[0, 0]
    binding_rows = np.flatnonzero(at_limit[:, 0])
    assert list(binding_rows) == list(range(binding_rows.size)), "the limit binds on a bottom range of wealth"
    assert (np.diff(at_limit.sum(axis=0)) <= 0).all()
    assert not at_limit[:, -1].any()
    assert not at_limit[-1].any()

    # Independent check of the whole pipeline: one Bellman step in numpy with the chain rebuilt
    # from its binomial form. If ||V - V*|| <= e then ||TV - V|| <= (1 + beta) e.
    params = document["model"]["params"]
    ar1 = document["model"]["shocks"]["income"]["ar1"]
    transition = rouwenhorst_matrix(ar1["points"], ar1["rho"])
    assert np.allclose(transition.sum(axis=1), 1.0)
    half_width = ar1["sigma"] / np.sqrt(1 - ar1["rho"] ** 2) * np.sqrt(ar1["points"] - 1)
    assert np.allclose(income, np.exp(np.linspace(-half_width, half_width, ar1["points"])))
    beta, gamma, r = document["discount"], params["gamma"], params["r"]
    value = np.array(result["value"])
    consumption = (1 + r) * assets[:, None, None] + income[None, :, None] - assets[None, None, :]
    with np.errstate(invalid="ignore", divide="ignore"):
        utility = np.where(consumption > 0, consumption ** (1 - gamma) / (1 - gamma), -np.inf)
    continuation = value @ transition.T  # [a_next, y] -> E[V(a_next, y') | y]
    objective = utility + beta * continuation.T[None, :, :]
    bellman = objective.max(axis=2)
    assert np.max(np.abs(bellman - value)) <= (1 + beta) * result["error_bound"] + 1e-9
    assert np.array_equal(assets[objective.argmax(axis=2)], saving)


def test_beekeeper_saves_continuously_and_one_scipy_bellman_step_agrees(solved: dict[str, Any]) -> None:
    document = load_example("beekeeper_savings")
    result = solved["beekeeper_savings"]
    savings = np.array(result["axes"]["savings"])
    harvest = np.array(result["axes"]["harvest"])
    policy = np.array(result["policy"]["savings_next"])
    assert result["policy_index"] is None, "a continuous choice comes back as values only"
    assert policy.shape == (savings.size, harvest.size)
    continuous = result["diagnostics"]["continuous_choice"]
    assert continuous["interpolation"] == "monotone_cubic" and continuous["certified"] is False
    assert continuous["search"] == "brent_from_bracket" and continuous["monotone_narrowing"]
    assert continuous["clamped_next"] == 0 and continuous["at_upper_end"] == 0, "the grid should be wide enough"
    assert any("not a proof" in note for note in result["diagnostics"]["notes"])

    # Most choices lie between grid points: the point of a continuous choice.
    off_grid = np.min(np.abs(policy[:, :, None] - savings[None, None, :]), axis=2) > 1e-9
    assert off_grid.mean() > 0.9
    # Saving rises with savings and with the harvest (monotone policy of a concave problem; Stokey and
    # Lucas, Recursive Methods, 1989, ch. 9 — from memory); the borrowing limit binds at the bottom.
    assert (np.diff(policy, axis=0) >= 0).all()
    assert (np.diff(policy, axis=1) >= 0).all()
    assert policy[0, 0] == savings[0] and (policy[-1] > savings[0]).all()

    # Independent check: one step of the fitted Bellman operator with scipy's PchipInterpolator (the same
    # Fritsch–Carlson slopes, with Fritsch–Butland's weighted harmonic mean inside and the three-point
    # formula at the ends, per scipy's documentation) and scipy's bounded minimize_scalar after a scan of
    # 201 points. With linear interpolation ||Tv − v|| <= (1 + beta)·error_bound would be a theorem; with
    # monotone_cubic it is the same arithmetic and no proof, so this is a check of the numbers, not of a bound.
    params = document["model"]["params"]
    ar1 = document["model"]["shocks"]["harvest"]["ar1"]
    beta, gamma, r = document["discount"], params["gamma"], params["r"]
    transition = rouwenhorst_matrix(ar1["points"], ar1["rho"])
    expected_value = np.array(result["value"]) @ transition.T  # [savings_next, harvest today]
    bellman = np.empty_like(policy)
    chosen = np.empty_like(policy)
    for z in range(harvest.size):
        tomorrow = PchipInterpolator(savings, expected_value[:, z])
        for i in range(savings.size):
            cash = (1 + r) * savings[i] + harvest[z]

            def loss(x: Any, cash: float = cash, tomorrow: Any = tomorrow) -> Any:
                spending = np.maximum(cash - x, 1e-300)
                return -(spending ** (1 - gamma) / (1 - gamma) + beta * tomorrow(x))

            top = min(savings[-1], cash)
            scan = np.linspace(savings[0], top, 201)[: 200 if top == cash else 201]
            k = int(np.argmin(loss(scan)))
            refined = minimize_scalar(loss, bounds=(scan[max(k - 1, 0)], scan[min(k + 1, scan.size - 1)]),
                                      method="bounded", options={"xatol": 1e-12})
            best = min((float(loss(scan[k])), float(scan[k])), (float(refined.fun), float(refined.x)))
            bellman[i, z], chosen[i, z] = -best[0], best[1]
    assert np.max(np.abs(bellman - np.array(result["value"]))) <= (1 + beta) * result["error_bound"]
    # Within a millionth of the grid's width (common practice for an argmax near a flat top).
    assert np.max(np.abs(chosen - policy)) <= 1e-6 * (savings[-1] - savings[0])


def test_beekeeper_euler_errors_beat_the_same_choice_restricted_to_the_grid(solved: dict[str, Any]) -> None:
    continuous = solved["beekeeper_savings"]["diagnostics"]["euler_errors"]
    document = load_example("beekeeper_savings")
    del document["model"]["choices"]["savings_next"]["continuous"], document["model"]["interpolation"]
    restricted = solve(document)["diagnostics"]["euler_errors"]
    assert continuous["define"] == restricted["define"] == "spending"
    assert continuous["points"] >= 10 * len(solved["beekeeper_savings"]["axes"]["savings"])
    # What the example shows: on the same 120-point grid, the continuous choice's errors are orders of
    # magnitude below the grid-restricted choice's (measured about 2 in the worst and 3.7 on average).
    assert continuous["max_log10"] <= restricted["max_log10"] - 1.5
    assert continuous["mean_log10"] <= restricted["mean_log10"] - 3.0
    assert continuous["weighted_mean_log10"] < -4


def test_beekeeper_stationary_distribution_splits_mass_by_young_lotteries(solved: dict[str, Any]) -> None:
    document = load_example("beekeeper_savings")
    result = solved["beekeeper_savings"]
    savings = np.array(result["axes"]["savings"])
    policy = np.array(result["policy"]["savings_next"])
    ar1 = document["model"]["shocks"]["harvest"]["ar1"]
    transition = rouwenhorst_matrix(ar1["points"], ar1["rho"])
    n_a, n_z = policy.shape

    # Independent check: Young (2010, JEDC 34(1)) lotteries built here in numpy — each choice's mass
    # split between its two neighbouring grid points in proportion — and the stationary distribution
    # solved as a linear system (mu = mu M, sum mu = 1) by numpy's least squares.
    lower = np.clip(np.searchsorted(savings, policy, side="right") - 1, 0, n_a - 2)
    share = (policy - savings[lower]) / (savings[lower + 1] - savings[lower])
    lottery = np.zeros((n_a * n_z, n_a * n_z))
    for i in range(n_a):
        for z in range(n_z):
            row = i * n_z + z
            lottery[row, lower[i, z] * n_z:(lower[i, z] + 1) * n_z] += (1 - share[i, z]) * transition[z]
            lottery[row, (lower[i, z] + 1) * n_z:(lower[i, z] + 2) * n_z] += share[i, z] * transition[z]
    system = np.vstack([lottery.T - np.eye(n_a * n_z), np.ones(n_a * n_z)])
    target = np.zeros(n_a * n_z + 1)
    target[-1] = 1.0
    mu = np.linalg.lstsq(system, target, rcond=None)[0].reshape(n_a, n_z)
    distribution = np.array(result["stationary"]["distribution"])
    assert np.max(np.abs(distribution - mu)) <= 1e-10
    # A lottery in proportion keeps the mean, so in the long run savings and next season's savings agree.
    means = result["stationary"]["means"]
    assert means["savings"] == pytest.approx(means["savings_next"], rel=1e-9)
    assert means["savings"] == pytest.approx(float(np.sum(mu.sum(axis=1) * savings)), rel=1e-9)


def test_plant_capacity_rises_with_capacity_and_demand(solved: dict[str, Any]) -> None:
    document = load_example("plant_capacity")
    result = solved["plant_capacity"]
    capacity = np.array(result["axes"]["capacity"])
    policy = np.array(result["policy"]["capacity_next"])
    assert (np.diff(policy, axis=0) >= 0).all()
    assert (np.diff(policy, axis=1) >= 0).all()
    assert (policy[:, -1] > policy[:, 0]).any(), "demand should matter somewhere"
    assert policy[-1, 0] > policy[0, 0]
    # Irreversible: next capacity never below the depreciated current capacity.
    depreciation = document["model"]["params"]["depreciation"]
    assert (policy >= (1 - depreciation) * capacity[:, None] - 1e-12).all()
    # The monotone hint held (a broken promise would be reported as a warning).
    assert not [w for w in result["diagnostics"]["warnings"] if "hint" in w]


def test_fishery_harvest_is_monotone_in_the_stock(solved: dict[str, Any]) -> None:
    result = solved["fishery_harvest"]
    stock = np.array(result["axes"]["stock"])
    harvest = np.array(result["policy"]["harvest"])
    assert (np.diff(harvest, axis=0) >= 0).all()
    assert (harvest <= stock[:, None] + 1e-12).all()
    # A depleted stock is left alone to regrow; a large one is fished.
    assert (harvest[0] == 0).all()
    assert (harvest[-1] > 0).all()


def test_roastery_builds_more_capacity_with_more_capacity_customers_and_taste(solved: dict[str, Any]) -> None:
    document = load_example("roastery_growth")
    result = solved["roastery_growth"]
    policy = np.array(result["policy"]["capacity_next"])
    assert policy.shape == (30, 30, 2)
    assert (np.diff(policy, axis=0) >= 0).all()
    assert (policy[:, :, 1] >= policy[:, :, 0]).all()
    assert (policy[:, -1, :] >= policy[:, 0, :]).all()
    assert (policy[:, -1, :] > policy[:, 0, :]).any()
    layout = plots.axis_layout(result, document)
    assert layout == plots.AxisLayout(states=("capacity", "customers"), shocks=("taste",))
    assert b"<image" in plots.value_plot(result, layout=layout, shock_index=1)


def test_glassblower_saves_while_working_and_draws_down_in_retirement(solved: dict[str, Any]) -> None:
    result = solved["glassblower_life_cycle"]
    document = load_example("glassblower_life_cycle")
    periods = document["model"]["horizon"]["periods"]
    assert result["method"] == "backward_induction" and result["status"] == "converged"
    assert list(result["axes"]) == ["period", "savings", "orders"] and len(result["axes"]["period"]) == periods
    savings = np.array(result["axes"]["savings"])
    chosen = np.array(result["policy"]["savings_next"])
    assert chosen.shape == (periods, savings.size, 3)
    assert (np.diff(chosen, axis=1) >= 0).all()  # more savings today, never less tomorrow
    assert result["diagnostics"]["verification"]["hints_held"]
    retired = np.arange(periods) >= 65 - 25
    comfortable = savings > 1.0
    assert (chosen[retired][:, comfortable] < savings[comfortable][None, :, None]).all()
    # In mid-career with good orders and little saved, the glassblower puts money aside.
    assert (chosen[10:30, 0, 2] > 0).all()
    # A retiree with nothing saved lives on the pension and leaves nothing: its value is the recursion
    # V_t = u(pension) + (1 - s_t)·B(0) + β s_t V_{t+1}, V_T = B(0), written here by hand.
    assert (chosen[retired][:, 0, :] == 0).all()
    params = document["model"]["params"]
    gamma, beta = params["gamma"], document["discount"]
    utility = params["pension"] ** (1 - gamma) / (1 - gamma)
    left = params["bequest"] / (1 - gamma)
    by_hand = [left]
    for t in range(periods - 1, 65 - 25 - 1, -1):
        survival = params["survival"][t]
        by_hand.append(utility + (1 - survival) * left + beta * survival * by_hand[-1])
    value = np.array(result["value"])
    np.testing.assert_allclose(value[retired][:, 0, 0], by_hand[:0:-1], rtol=1e-12)
    assert result["error_bound"] < 1e-9
    # The cohort starts with nothing saved: its wealth builds up over the working years and is run down
    # in retirement (a hump peaking around 65).
    wealth = np.array(result["cohort"]["means"]["savings"])
    peak = int(wealth.argmax())
    assert wealth[0] == 0.0 and 35 <= peak <= 41 and wealth[peak] > 1.0
    assert (np.diff(wealth[: peak + 1]) >= 0).all() and (np.diff(wealth[peak:]) < 0).all()


def test_examples_survive_a_json_round_trip_unchanged() -> None:
    # What the dashboard and the client scripts do: fetch, edit, post back.
    for name in EXPECTED:
        document = load_example(name)
        assert parse_document(copy.deepcopy(document)) is not None


CLIENTS = Path(__file__).resolve().parents[2] / "service" / "examples" / "clients"


@pytest.fixture(scope="module")
def live_server(redis_server: EmbeddedRedis, tmp_path_factory: pytest.TempPathFactory) -> Iterator[LiveServer]:
    # Database 2 of the private server: other tests empty database 0 between tests.
    server = LiveServer(redis_server.url.rsplit("/", 1)[0] + "/2", tmp_path_factory.mktemp("live"), FIXQ_AUTH="off")
    try:
        server.start()
        server.start_worker()
        yield server
    finally:
        server.stop()


def run_client(command: list[str], server: LiveServer, cwd: Path) -> subprocess.CompletedProcess[str]:
    env = {**os.environ, "FIXQ_URL": server.url}
    env.pop("FIXQ_KEY", None)
    done = subprocess.run(command, cwd=cwd, env=env, capture_output=True, text=True, timeout=240)
    assert done.returncode == 0, f"{command} failed:\n{done.stdout}\n{done.stderr}\n{server.logs()}"
    return done


def test_the_python_client_example_runs_against_a_live_server(live_server: LiveServer, tmp_path: Path) -> None:
    output = run_client([sys.executable, str(CLIENTS / "python_httpx.py")], live_server, tmp_path).stdout
    assert "converged after" in output
    assert "policy array shape (160, 5) (assets x income)" in output
    rows = [line.split() for line in output.splitlines()[-8:]]
    assert [float(row[0]) for row in rows] == sorted(float(row[0]) for row in rows)
    assert float(rows[0][1]) == -1.0  # the poorest, lowest-income household sits at the borrowing limit


@pytest.mark.skipif(not (shutil.which("curl") and shutil.which("jq")), reason="curl and jq are needed for this example")
def test_the_curl_lifecycle_example_runs_against_a_live_server(live_server: LiveServer, tmp_path: Path) -> None:
    output = run_client(["bash", str(CLIENTS / "curl_lifecycle.sh"), str(tmp_path)], live_server, tmp_path).stdout
    assert '{"points":10,"choice_points":2}' in output
    assert re.search(r"job [0-9a-f]{16} is done", output)
    assert "wear 8\treplace" in output and "new\tkeep running" in output
    table = (tmp_path / "result.csv").read_text().splitlines()
    assert table[0] == "state_label,value,action" and len(table) == 11
    assert (tmp_path / "policy.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    canceled = json.loads(output.strip().splitlines()[-1])
    assert canceled["state"] in ("canceled", "running", "done")


@pytest.mark.parametrize("script", ["julia_http.jl", "stata_curl.do"])
def test_untested_client_examples_say_so(script: str) -> None:
    text = (CLIENTS / script).read_text()
    assert "NOT TESTED HERE" in text
    assert "/v1/examples/household_saving" in text
    assert "/result" in text
