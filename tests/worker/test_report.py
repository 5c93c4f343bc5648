"""Stationary distributions and simulations of the policy's chain.

Independent references:

* the stationary distribution of an irreducible chain is the left
  eigenvector of P for eigenvalue 1, normalised (Perron–Frobenius), computed
  with ``scipy.linalg.eig``;
* with several closed classes, the long-run distribution from a start u puts
  on class k the mass ``u_k + u_T (I − Q)⁻¹ R_k`` (absorption probabilities of
  a chain with transient block Q; Kemeny & Snell 1960, *Finite Markov
  Chains*, ch. III, from memory), spread by class k's own stationary law;
* the law of large numbers for the simulation: the mean of N independent
  paths' averages lies within 5 standard errors of its expectation except
  with probability below 1e-6 (normal tail; Chebyshev would give 4%).  The
  variance of one path's average of correlated periods is at most the
  per-period variance (Cauchy–Schwarz), so ``sd/√paths`` bounds the
  standard error from above.
"""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pytest
import scipy.linalg
import scipy.sparse as sp

import worker.report as report
from worker.report import long_run_distribution, simulate_report, stationary_report
from worker.tabular import TabularProblem


def chain_problem(matrix: np.ndarray, labels: list | None = None) -> TabularProblem:
    """A one-action tabular problem whose only policy follows ``matrix``."""
    n = matrix.shape[0]
    return TabularProblem(np.arange(n, dtype=float).reshape(n, 1), matrix.reshape(n, 1, n), 0.9, state_labels=labels)


def random_chain(seed: int, n: int, zeros: float = 0.5) -> np.ndarray:
    rng = np.random.default_rng(seed)
    weights = rng.random((n, n)) * (rng.random((n, n)) > zeros)
    weights[np.arange(n), (np.arange(n) + 1) % n] += 0.1  # a cycle through all states: irreducible
    return weights / weights.sum(axis=1, keepdims=True)


def eig_stationary(matrix: np.ndarray) -> np.ndarray:
    values, vectors = scipy.linalg.eig(matrix.T)
    vector = np.real(vectors[:, np.argmin(np.abs(values - 1.0))])
    return vector / vector.sum()


@pytest.mark.parametrize("seed, n", [(0, 3), (1, 10), (2, 40)])
@pytest.mark.parametrize("method", ["direct", "gmres", "power"])
def test_stationary_matches_the_eigenvector(seed, n, method, monkeypatch):
    if method != "direct":
        monkeypatch.setattr(report, "DIRECT_MAX_STATES", 0)
        monkeypatch.setattr(report, "natural_pinned_lu", lambda *args: None)  # no LU above the cap
        monkeypatch.setattr(report, "POWER_FIRST_STEPS", 0)
    if method == "power":
        monkeypatch.setattr(report, "_preconditioned", lambda *args: None)
    matrix = random_chain(seed, n)
    pi, info = long_run_distribution(sp.csr_matrix(matrix))
    assert info["method"] == method
    np.testing.assert_allclose(pi, eig_stationary(matrix), atol=1e-9)
    assert info["residual"] <= 1e-9


@pytest.mark.parametrize("method", ["direct", "gmres", "power"])
def test_a_periodic_chain(method, monkeypatch):
    if method != "direct":
        monkeypatch.setattr(report, "DIRECT_MAX_STATES", 0)
        monkeypatch.setattr(report, "natural_pinned_lu", lambda *args: None)  # no LU above the cap
        monkeypatch.setattr(report, "POWER_FIRST_STEPS", 0)
    if method == "power":
        monkeypatch.setattr(report, "_preconditioned", lambda *args: None)
    cycle = np.roll(np.eye(4), 1, axis=1)
    pi, _ = long_run_distribution(sp.csr_matrix(cycle))
    np.testing.assert_allclose(pi, 0.25, atol=1e-9)


@pytest.mark.parametrize("method", ["direct", "power"])
def test_several_closed_classes_give_the_uniform_start_mixture(method, monkeypatch):
    if method != "direct":
        monkeypatch.setattr(report, "DIRECT_MAX_STATES", 0)
        monkeypatch.setattr(report, "natural_pinned_lu", lambda *args: None)  # no LU above the cap
        monkeypatch.setattr(report, "POWER_FIRST_STEPS", 0)
    if method == "power":
        monkeypatch.setattr(report, "_preconditioned", lambda *args: None)
    # states 0-1: one closed class; 2: absorbing; 3-4: transient.
    matrix = np.array([
        [0.3, 0.7, 0.0, 0.0, 0.0],
        [0.6, 0.4, 0.0, 0.0, 0.0],
        [0.0, 0.0, 1.0, 0.0, 0.0],
        [0.2, 0.0, 0.3, 0.1, 0.4],
        [0.0, 0.1, 0.5, 0.2, 0.2],
    ])
    pi, _ = long_run_distribution(sp.csr_matrix(matrix))
    transient, classes = [3, 4], [[0, 1], [2]]
    fundamental = np.linalg.inv(np.eye(2) - matrix[np.ix_(transient, transient)])
    start = np.full(5, 0.2)
    expected = np.zeros(5)
    for members in classes:
        absorbed = fundamental @ matrix[np.ix_(transient, members)].sum(axis=1)
        mass = start[members].sum() + start[transient] @ absorbed
        local = eig_stationary(matrix[np.ix_(members, members)])
        expected[members] = mass * local
    np.testing.assert_allclose(pi, expected, atol=1e-9)


def test_stationary_report_shapes_and_means():
    matrix = random_chain(3, 6)
    problem = chain_problem(matrix)
    policy = np.zeros(6, dtype=np.int64)
    out = stationary_report(problem, policy)
    pi = eig_stationary(matrix)
    np.testing.assert_allclose(out["distribution"], pi, atol=1e-10)
    assert isinstance(out["distribution"], list) and len(out["distribution"]) == 6
    assert out["means"]["state_label"] == pytest.approx(pi @ np.arange(6), abs=1e-10)
    assert out["means"]["action"] == 0.0
    assert out["method"] == "direct" and out["warnings"] == []


def spec(periods: int, paths: int, seed: int = 0, start=None) -> SimpleNamespace:
    return SimpleNamespace(periods=periods, paths=paths, seed=seed, start=start)


def test_simulated_means_converge_to_stationary_means():
    matrix = random_chain(4, 8, zeros=0.7)
    problem = chain_problem(matrix)
    policy = np.zeros(8, dtype=np.int64)
    pi = eig_stationary(matrix)
    states = np.arange(8.0)
    mean = pi @ states
    sd = np.sqrt(pi @ (states - mean) ** 2)
    paths = 20_000
    out = simulate_report(problem, policy, spec(periods=30, paths=paths, seed=11))
    summary = out["summary"]["state_label"]
    assert abs(summary["mean"] - mean) <= 5 * sd / np.sqrt(paths)
    assert summary["sd"] == pytest.approx(sd, rel=0.02)  # common practice: a loose check of the spread
    quantiles = [summary[f"p{p}"] for p in (5, 25, 50, 75, 95)]
    assert quantiles == sorted(quantiles)
    assert len(out["first_path"]["state_label"]) == 30


def test_one_step_from_a_given_start_follows_the_row():
    matrix = random_chain(5, 6)
    problem = chain_problem(matrix, labels=[f"s{i}" for i in range(6)])
    policy = np.zeros(6, dtype=np.int64)
    paths = 40_000
    out = simulate_report(problem, policy, spec(periods=2, paths=paths, seed=3, start="s2"))
    row = matrix[2]
    mean_next = row @ np.arange(6)
    sd_next = np.sqrt(row @ (np.arange(6) - mean_next) ** 2)
    # The summary averages period 0 (always state 2) and period 1.
    assert abs(2 * out["summary"]["state_label"]["mean"] - 2 - mean_next) <= 5 * sd_next / np.sqrt(paths)
    assert out["first_path"]["state_label"][0] == "s2"
    assert out["first_path"]["action"] == [0, 0]


def test_simulation_is_reproducible_and_follows_a_deterministic_chain():
    cycle = np.roll(np.eye(5), 1, axis=1)
    problem = chain_problem(cycle)
    policy = np.zeros(5, dtype=np.int64)
    out = simulate_report(problem, policy, spec(periods=7, paths=3, seed=1, start=3))
    assert out["first_path"]["state_label"] == [3, 4, 0, 1, 2, 3, 4]
    again = simulate_report(problem, policy, spec(periods=7, paths=3, seed=1, start=3))
    assert again == out
    matrix = random_chain(6, 10)
    other = chain_problem(matrix)
    a = simulate_report(other, policy[:1].repeat(10), spec(periods=50, paths=5, seed=1))
    b = simulate_report(other, policy[:1].repeat(10), spec(periods=50, paths=5, seed=2))
    assert a["first_path"] != b["first_path"]


class ExplicitZeros:
    """A chain problem whose policy matrix stores explicit zero probabilities."""

    def __init__(self, inner: TabularProblem) -> None:
        self.inner = inner

    def __getattr__(self, name):
        return getattr(self.inner, name)

    def policy_matrix(self, policy):
        n = self.inner.n
        # Row i: probability 0 on i, 0 on i+1, 1 on i+2 (mod n).
        indices = np.column_stack([np.arange(n), (np.arange(n) + 1) % n, (np.arange(n) + 2) % n]).ravel()
        data = np.tile([0.0, 0.0, 1.0], n)
        return sp.csr_matrix((data, indices, np.arange(0, 3 * n + 1, 3)), shape=(n, n))


def test_zero_probability_entries_are_never_drawn():
    problem = ExplicitZeros(chain_problem(np.full((6, 6), 1 / 6)))
    out = simulate_report(problem, np.zeros(6, dtype=np.int64), spec(periods=6, paths=1000, seed=0, start=0))
    assert out["first_path"]["state_label"] == [0, 2, 4, 0, 2, 4]
    assert out["summary"]["state_label"]["mean"] == pytest.approx(2.0)
    assert out["summary"]["state_label"]["sd"] == pytest.approx(np.sqrt(8 / 3))


@pytest.mark.parametrize("method", ["direct", "gmres"])
def test_a_chain_whose_first_state_has_almost_no_mass(method, monkeypatch):
    # A birth-death chain drifting up (up 0.8, down 0.2, reflecting ends): detailed balance gives
    # pi_i proportional to 4**i (the textbook birth-death stationary law), so state 0 carries about
    # 4**-29 of the mass. Pinning that state, as the solve once did, left a badly scaled system.
    if method != "direct":
        monkeypatch.setattr(report, "DIRECT_MAX_STATES", 0)
        monkeypatch.setattr(report, "natural_pinned_lu", lambda *args: None)  # no LU above the cap
        monkeypatch.setattr(report, "POWER_FIRST_STEPS", 0)
    n, up = 30, 0.8
    matrix = np.zeros((n, n))
    for i in range(n):
        matrix[i, min(i + 1, n - 1)] += up
        matrix[i, max(i - 1, 0)] += 1 - up
    pi, info = long_run_distribution(sp.csr_matrix(matrix))
    expected = 4.0 ** np.arange(n)
    assert info["method"] == method
    np.testing.assert_allclose(pi, expected / expected.sum(), rtol=1e-9, atol=1e-15)
