"""Shocks as the result returns them and as papers quote them, and a reward written with ``where`` for γ = 1.

* ``chains`` in the result: each shock's discretised chain, checked against Tauchen (1986) written here with
  scipy's normal CDF;
* an AR(1) given by its unconditional standard deviation ``sd``: the chain of ``sigma = sd sqrt(1 - rho^2)``
  (the AR(1) identity Var(y) = sigma^2 / (1 - rho^2)); Rouwenhorst's chain has exactly that variance
  (Kopecky & Suen 2010);
* ``where(gamma == 1, log(c), c ** (1 - gamma) / (1 - gamma))``: the branch not taken (1/0 at γ = 1) does
  not make a point infeasible, on every path of the solver (tables, compiled hinted search, continuous
  choice, the endogenous grid method) and in the service's feasibility check.
"""

from __future__ import annotations

import copy
import math
from typing import Any

import numpy as np
import pytest
from scipy.stats import norm

from worker import solve
from worker.document import parse_document
from worker.errors import InvalidDocument
from worker.feasibility import check_feasibility


def _household(reward: str, gamma: float, shock: dict[str, Any] | None = None) -> dict[str, Any]:
    """Invented: a household saving in `a` out of income `y` at interest r."""
    return {
        "version": 1, "discount": 0.95, "solver": {"tolerance": 1e-9},
        "model": {
            "kind": "grid", "params": {"r": 0.02, "gamma": gamma},
            "states": {"a": {"min": 0.0, "max": 10.0, "points": 30}},
            "shocks": {"y": shock or {"markov": {"values": [0.5, 1.5], "matrix": [[0.9, 0.1], [0.1, 0.9]]}}},
            "choices": {"save": {"next_of": "a"}},
            "define": {"c": "(1 + r) * a + y - save"},
            "reward": reward, "feasible": ["c > 0"],
        },
    }


def _tauchen(rho: float, sigma: float, points: int, width: float) -> tuple[np.ndarray, np.ndarray]:
    """Tauchen (1986), written here: values over ±width unconditional sd, cells between midpoints."""
    half = width * sigma / math.sqrt(1 - rho**2)
    values = np.linspace(-half, half, points)
    step = values[1] - values[0]
    upper = norm.cdf((values[None, :] + step / 2 - rho * values[:, None]) / sigma)
    lower = norm.cdf((values[None, :] - step / 2 - rho * values[:, None]) / sigma)
    matrix = upper - lower
    matrix[:, 0], matrix[:, -1] = upper[:, 0], 1 - lower[:, -1]
    return values, matrix


def test_the_result_returns_each_shocks_chain() -> None:
    shock = {"ar1": {"rho": 0.6, "sigma": 0.1, "points": 5, "method": "tauchen", "width": 2.5}, "transform": "exp"}
    document = _household("log(c)", 1.0, shock)
    document["model"]["shocks"]["w"] = {"markov": {"values": [0.0, 1.0], "matrix": [[0.7, 0.3], [0.4, 0.6]]}}
    document["model"]["define"]["c"] = "(1 + r) * a + y + 0.1 * w - save"
    chains = solve(document)["chains"]
    values, matrix = _tauchen(0.6, 0.1, 5, 2.5)
    np.testing.assert_allclose(chains["y"]["values"], np.exp(values), rtol=1e-14)
    np.testing.assert_allclose(chains["y"]["transition"], matrix, rtol=0, atol=1e-14)
    assert chains["w"] == {"values": [0.0, 1.0], "transition": [[0.7, 0.3], [0.4, 0.6]]}


def test_a_draw_after_the_choice_is_not_a_chain() -> None:
    document = _household("log(c)", 1.0)
    document["model"]["shocks"]["luck"] = {"iid": {"values": [0.0, 0.2], "probs": [0.5, 0.5]},
                                           "timing": "after_choice"}
    document["model"]["define"]["c"] = "(1 + r) * a + y - save"
    document["model"]["next"] = {}
    document["model"]["reward"] = "log(c) + luck"
    assert set(solve(document)["chains"]) == {"y"}


@pytest.mark.parametrize("method", ["tauchen", "rouwenhorst"])
def test_an_ar1_given_by_its_unconditional_sd_is_the_chain_of_its_innovation_sd(method: str) -> None:
    rho, sd = 0.9, 0.2
    by_sd = {"ar1": {"rho": rho, "sd": sd, "points": 7, "method": method}}
    by_sigma = {"ar1": {"rho": rho, "sigma": sd * math.sqrt(1 - rho**2), "points": 7, "method": method}}
    chain_sd = parse_document(_household("log(c)", 1.0, by_sd)).model.shocks["y"].chain()
    chain_sigma = parse_document(_household("log(c)", 1.0, by_sigma)).model.shocks["y"].chain()
    np.testing.assert_allclose(chain_sd[0], chain_sigma[0], rtol=1e-14)
    np.testing.assert_allclose(chain_sd[1], chain_sigma[1], rtol=0, atol=1e-14)
    if method == "rouwenhorst":
        # Kopecky & Suen (2010): Rouwenhorst's chain has the process's unconditional variance exactly.
        values, matrix = chain_sd
        eigenvalues, vectors = np.linalg.eig(matrix.T)
        pi = np.real(vectors[:, np.argmin(abs(eigenvalues - 1))])
        pi /= pi.sum()
        assert math.isclose(math.sqrt(pi @ values**2 - (pi @ values) ** 2), sd, rel_tol=1e-10)


@pytest.mark.parametrize(("given", "path", "words"), [
    ({}, "model.shocks.y.ar1.sigma", "neither given"),
    ({"sigma": 0.1, "sd": 0.2}, "model.shocks.y.ar1.sd", "both given"),
    ({"sd": 0.0}, "model.shocks.y.ar1.sd", "must be positive"),
])
def test_an_ar1_needs_exactly_one_of_sigma_and_sd(given: dict[str, float], path: str, words: str) -> None:
    shock = {"ar1": {"rho": 0.5, "points": 3, **given}}
    with pytest.raises(InvalidDocument) as caught:
        parse_document(_household("log(c)", 1.0, shock))
    assert any(e["path"] == path and words in e["message"] for e in caught.value.errors), caught.value.errors


CRRA = "where(gamma == 1, log(c), c ** (1 - gamma) / (1 - gamma))"


@pytest.mark.parametrize("variant", ["tables", "hints", "continuous", "endogenous_grid"])
@pytest.mark.parametrize("gamma", [1.0, 2.0])
def test_a_crra_reward_written_with_where_solves_at_gamma_one(variant: str, gamma: float) -> None:
    """The same solve as the reward written for that γ alone: log(c) at 1, c^(1-γ)/(1-γ) otherwise."""
    documents = []
    for reward in (CRRA, "log(c)" if gamma == 1 else "c ** (1 - gamma) / (1 - gamma)"):
        document = _household(reward, gamma)
        if variant != "tables":
            document["model"]["hints"] = {"monotone": True, "concave": True}
        if variant in ("continuous", "endogenous_grid"):
            document["model"]["choices"]["save"]["continuous"] = True
        if variant == "endogenous_grid":
            document["solver"]["method"] = "endogenous_grid"
        documents.append(document)
    with_where, plain = (solve(copy.deepcopy(d)) for d in documents)
    assert with_where["status"] == plain["status"] == "converged"
    np.testing.assert_allclose(with_where["value"], plain["value"], rtol=0, atol=1e-9)
    assert not any("not finite" in w or "NaN" in w for w in with_where["diagnostics"]["warnings"])
    assert check_feasibility(parse_document(documents[0]))["unresolved"] == 0
