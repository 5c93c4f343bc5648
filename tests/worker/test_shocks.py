import itertools
import math

import numpy as np
import pytest
import scipy.linalg
import scipy.sparse as sp
from scipy.stats import binom, norm

from worker.errors import InvalidDocument
from worker.shocks import (
    apply_transform,
    ar1_chain,
    iid_chain,
    markov_chain,
    product_chain,
    rouwenhorst,
    stationary_distribution,
    tauchen,
)

AR1_CASES = [
    (rho, sigma, n, mean)
    for rho, sigma, n, mean in itertools.product([-0.8, 0.0, 0.5, 0.95, 0.995], [0.01, 0.4], [2, 3, 7, 25], [0.0, 1.5])
]


def _paths(excinfo: pytest.ExceptionInfo) -> list[str]:
    return [e["path"] for e in excinfo.value.errors]


@pytest.mark.parametrize(("rho", "sigma", "n", "mean"), AR1_CASES)
def test_rouwenhorst_matches_conditional_mean_and_variance(rho, sigma, n, mean):
    # Kopecky & Suen (2010), "Finite state Markov-chain approximations to highly
    # persistent processes", Rev. Econ. Dynamics 13(3): the Rouwenhorst chain
    # reproduces E[y'|y] = (1-rho) mean + rho y and Var[y'|y] = sigma^2 exactly.
    y, P = rouwenhorst(rho, sigma, n, mean)
    conditional_mean = P @ y
    np.testing.assert_allclose(conditional_mean, (1 - rho) * mean + rho * y, rtol=0, atol=1e-12 * (1 + abs(mean)))
    conditional_variance = P @ (y - conditional_mean[:, None]).T ** 2
    np.testing.assert_allclose(np.diag(conditional_variance), sigma**2, rtol=1e-9)
    np.testing.assert_allclose(P.sum(axis=1), 1.0, rtol=0, atol=1e-13)
    assert P.min() >= 0


@pytest.mark.parametrize(("rho", "sigma", "n", "mean"), AR1_CASES)
def test_rouwenhorst_unconditional_moments_and_binomial_stationary_law(rho, sigma, n, mean):
    # Kopecky & Suen (2010): the stationary distribution is Binomial(n-1, 1/2),
    # and the chain's unconditional variance and first autocorrelation are
    # sigma^2 / (1 - rho^2) and rho.
    y, P = rouwenhorst(rho, sigma, n, mean)
    pi = binom.pmf(np.arange(n), n - 1, 0.5)
    np.testing.assert_allclose(pi @ P, pi, rtol=0, atol=1e-13)
    np.testing.assert_allclose(stationary_distribution(P), pi, rtol=0, atol=1e-12)
    variance = pi @ (y - mean) ** 2
    np.testing.assert_allclose(pi @ y, mean, rtol=0, atol=1e-12 * (1 + abs(mean)))
    np.testing.assert_allclose(variance, sigma**2 / (1 - rho**2), rtol=1e-10)
    autocovariance = pi @ ((y - mean) * (P @ (y - mean)))
    np.testing.assert_allclose(autocovariance / variance, rho, rtol=0, atol=1e-10)


def test_rouwenhorst_grid_and_two_state_base():
    # Rouwenhorst (1995) / Kopecky & Suen (2010): grid symmetric about the mean
    # with half-width sigma_y sqrt(n-1); the two-state chain is [[p, 1-p], [1-q, q]], p = q = (1+rho)/2.
    y, P = rouwenhorst(0.6, 0.2, 9, mean=-1.0)
    half = 0.2 / math.sqrt(1 - 0.36) * math.sqrt(8)
    np.testing.assert_allclose(y, np.linspace(-1 - half, -1 + half, 9), rtol=1e-14)
    _, P2 = rouwenhorst(0.6, 0.2, 2)
    np.testing.assert_allclose(P2, [[0.8, 0.2], [0.2, 0.8]], rtol=1e-15)


@pytest.mark.parametrize("rho", [-0.5, 0.3, 0.97])
def test_rouwenhorst_rows_are_binomial_convolutions(rho):
    # Derivation, checked here against an independent construction: the
    # recursion builds the law of the number of "high" switches among n-1
    # independent symmetric two-state chains with stay probability p.  From
    # state i (i high), the next count is Bin(i, p) + Bin(n-1-i, 1-p).
    n, p = 11, (1 + rho) / 2
    _, P = rouwenhorst(rho, 0.1, n)
    for i in range(n):
        row = np.convolve(binom.pmf(np.arange(i + 1), i, p), binom.pmf(np.arange(n - i), n - 1 - i, 1 - p))
        np.testing.assert_allclose(P[i], row, rtol=0, atol=1e-14)


def _tauchen_reference(rho, sigma, n, width, mean):
    # Tauchen (1986), "Finite state Markov-chain approximations to univariate and
    # vector autoregressions", Economics Letters 20(2), written out entry by entry.
    sigma_y = sigma / math.sqrt(1 - rho**2)
    y = np.linspace(mean - width * sigma_y, mean + width * sigma_y, n)
    step = y[1] - y[0]
    P = np.empty((n, n))
    for i in range(n):
        centre = (1 - rho) * mean + rho * y[i]
        for j in range(n):
            upper = norm.cdf((y[j] + step / 2 - centre) / sigma)
            lower = norm.cdf((y[j] - step / 2 - centre) / sigma)
            P[i, j] = upper if j == 0 else (1 - lower if j == n - 1 else upper - lower)
    return y, P


@pytest.mark.parametrize(
    ("rho", "sigma", "n", "width", "mean"),
    [(0.9, 0.02, 7, 3.0, 0.0), (-0.4, 0.5, 5, 2.0, 2.0), (0.0, 1.0, 2, 1.0, 0.0), (0.99, 0.1, 31, 4.0, -1.0)],
)
def test_tauchen_matches_the_published_formula(rho, sigma, n, width, mean):
    y, P = tauchen(rho, sigma, n, width, mean)
    y_ref, P_ref = _tauchen_reference(rho, sigma, n, width, mean)
    np.testing.assert_allclose(y, y_ref, rtol=1e-14, atol=1e-15)
    np.testing.assert_allclose(P, P_ref, rtol=0, atol=1e-14)
    np.testing.assert_allclose(P.sum(axis=1), 1.0, rtol=0, atol=1e-13)
    # The construction is symmetric about the mean.
    np.testing.assert_allclose(P, P[::-1, ::-1], rtol=0, atol=1e-14)
    np.testing.assert_allclose(y - mean, -(y - mean)[::-1], rtol=0, atol=1e-14)


def test_ar1_chain_dispatches_by_method():
    np.testing.assert_array_equal(ar1_chain("rouwenhorst", 0.5, 0.1, 5)[1], rouwenhorst(0.5, 0.1, 5)[1])
    np.testing.assert_array_equal(ar1_chain("tauchen", 0.5, 0.1, 5, width=2.0)[1], tauchen(0.5, 0.1, 5, 2.0)[1])
    with pytest.raises(InvalidDocument) as excinfo:
        ar1_chain("quadrature", 0.5, 0.1, 5, path="model.shocks.z.ar1")
    assert _paths(excinfo) == ["model.shocks.z.ar1.method"]


@pytest.mark.parametrize("build", [rouwenhorst, tauchen])
@pytest.mark.parametrize(
    ("kwargs", "field", "words"),
    [
        ({"rho": 1.0}, "rho", "not stationary"),
        ({"rho": -1.0}, "rho", "not stationary"),
        ({"rho": 1.3}, "rho", "strictly between -1 and 1"),
        ({"rho": float("nan")}, "rho", "finite"),
        ({"rho": True}, "rho", "finite number"),
        ({"sigma": 0.0}, "sigma", "positive"),
        ({"sigma": -0.1}, "sigma", "positive"),
        ({"sigma": float("inf")}, "sigma", "positive"),
        ({"points": 1}, "points", "at least 2"),
        ({"points": 3.0}, "points", "whole number"),
        ({"mean": float("nan")}, "mean", "finite"),
    ],
)
def test_ar1_faults_name_the_field(build, kwargs, field, words):
    args = {"rho": 0.9, "sigma": 0.1, "points": 5, "mean": 0.0} | kwargs
    with pytest.raises(InvalidDocument) as excinfo:
        build(args["rho"], args["sigma"], args["points"], mean=args["mean"], path="model.shocks.z.ar1")
    assert _paths(excinfo) == [f"model.shocks.z.ar1.{field}"]
    assert words in excinfo.value.errors[0]["message"]


@pytest.mark.parametrize("width", [0.0, -1.0, float("nan")])
def test_tauchen_width_must_be_positive(width):
    with pytest.raises(InvalidDocument) as excinfo:
        tauchen(0.9, 0.1, 5, width, path="model.shocks.z.ar1")
    assert _paths(excinfo) == ["model.shocks.z.ar1.width"]


def test_markov_chain_accepts_and_renormalises():
    values, P = markov_chain([1.0, 0.5], [[0.9, 0.1 + 5e-10], [0.3, 0.7]], path="model.shocks.r.markov")
    np.testing.assert_array_equal(values, [1.0, 0.5])
    np.testing.assert_allclose(P.sum(axis=1), 1.0, rtol=0, atol=1e-15)
    assert P.dtype == np.float64 and P.flags.c_contiguous


@pytest.mark.parametrize(
    ("values", "matrix", "path", "words"),
    [
        ([1, 2], [[1.0, 0.0, 0.0], [0.0, 1.0, 0.0]], "m.matrix", "square"),
        ([1, 2, 3], [[1.0, 0.0], [0.0, 1.0]], "m.matrix", "3 values"),
        ([1, 2, 3], [[1.0, 0, 0], [0, 1.0, 0], [0.5, 0.4, 0.0]], "m.matrix[2]", "row 2 must sum to 1"),
        ([1, 2], [[1.0, 0.0], [-0.1, 1.1]], "m.matrix[1][0]", "non-negative"),
        ([1, 2], [[1.0, 0.0], [float("nan"), 1.0]], "m.matrix[1][0]", "NaN"),
        ([1, 2], [[1.0, 0.0], [1.0]], "m.matrix[1]", "rectangular"),
        ([1, float("inf")], [[1.0, 0.0], [0.0, 1.0]], "m.values[1]", "infinity"),
        ([], [], "m.values", "non-empty"),
    ],
)
def test_markov_chain_faults_name_the_row(values, matrix, path, words):
    with pytest.raises(InvalidDocument) as excinfo:
        markov_chain(values, matrix, path="m")
    assert _paths(excinfo) == [path]
    assert words in str(excinfo.value)


def test_iid_chain_rows_equal_probs():
    values, P = iid_chain([0.0, 1.0, 4.0], [0.2, 0.5, 0.3], path="model.shocks.e.iid")
    np.testing.assert_array_equal(values, [0.0, 1.0, 4.0])
    for row in P:
        np.testing.assert_allclose(row, [0.2, 0.5, 0.3], rtol=1e-15)


@pytest.mark.parametrize(
    ("probs", "path", "words"),
    [
        ([0.2, 0.5, 0.2], "e.probs", "must sum to 1"),
        ([0.5, 0.5], "e.probs", "3 numbers"),
        ([1.2, -0.2, 0.0], "e.probs[1]", "non-negative"),
    ],
)
def test_iid_chain_faults(probs, path, words):
    with pytest.raises(InvalidDocument) as excinfo:
        iid_chain([0.0, 1.0, 4.0], probs, path="e")
    assert _paths(excinfo) == [path]
    assert words in str(excinfo.value)


def test_product_chain_matches_explicit_enumeration():
    chains = [rouwenhorst(0.7, 0.1, 3), iid_chain([-1.0, 1.0], [0.25, 0.75]), tauchen(0.2, 0.3, 4)]
    table, P = product_chain(chains)
    states = list(itertools.product(*[range(len(values)) for values, _ in chains]))
    assert table.shape == (24, 3) and P.shape == (24, 24)
    for a, state in enumerate(states):
        np.testing.assert_array_equal(table[a], [chains[k][0][i] for k, i in enumerate(state)])
        for b, target in enumerate(states):
            expected = np.prod([chains[k][1][i, j] for k, (i, j) in enumerate(zip(state, target))])
            assert P[a, b] == pytest.approx(expected, rel=1e-14, abs=1e-300)


def test_product_of_no_chains_is_one_state():
    table, P = product_chain([])
    assert table.shape == (1, 0)
    np.testing.assert_array_equal(P, [[1.0]])


def test_apply_transform():
    values = np.array([-1.0, 0.0, 2.0])
    np.testing.assert_allclose(apply_transform(values, "exp"), np.exp(values), rtol=1e-15)
    same = apply_transform(values, "none")
    np.testing.assert_array_equal(same, values)
    assert same is not values
    with pytest.raises(InvalidDocument) as excinfo:
        apply_transform(values, "log", path="model.shocks.z")
    assert _paths(excinfo) == ["model.shocks.z.transform"]
    with pytest.raises(InvalidDocument, match="overflow"):
        apply_transform(np.array([1.0, 800.0]), "exp", path="model.shocks.z")


def test_stationary_distribution_of_two_state_chain():
    # Closed form, from solving pi P = pi by hand: pi = (b, a) / (a + b) for P = [[1-a, a], [b, 1-b]].
    a, b = 0.3, 0.05
    pi = stationary_distribution(np.array([[1 - a, a], [b, 1 - b]]))
    np.testing.assert_allclose(pi, [b / (a + b), a / (a + b)], rtol=1e-14)


def test_stationary_distribution_of_periodic_chain():
    # A deterministic cycle of length 3 spends a third of the time in each state.
    P = np.roll(np.eye(3), 1, axis=1)
    np.testing.assert_allclose(stationary_distribution(P), [1 / 3] * 3, rtol=1e-14)


def test_stationary_distribution_with_transient_and_several_closed_classes():
    # Hand computation from a uniform start: state 0 is transient (stays with
    # 1/2), so it is visited 0.25 / (1 - 0.5) = 0.5 times on average and sends
    # 0.5 * 0.25 to the absorbing state 1 and 0.5 * 0.25 to the cycle {2, 3}.
    P = np.array([[0.5, 0.25, 0.25, 0.0], [0.0, 1.0, 0.0, 0.0], [0.0, 0.0, 0.0, 1.0], [0.0, 0.0, 1.0, 0.0]])
    expected = [0.0, 0.375, 0.3125, 0.3125]
    np.testing.assert_allclose(stationary_distribution(P), expected, rtol=1e-14, atol=1e-16)
    np.testing.assert_allclose(stationary_distribution(sp.csr_matrix(P)), expected, rtol=1e-14, atol=1e-16)
    np.testing.assert_allclose(stationary_distribution(np.eye(3), start=np.array([0.2, 0.0, 0.8])), [0.2, 0.0, 0.8])


def test_stationary_distribution_matches_scipy_eigenvector():
    # Independent reference: the left eigenvector of P for eigenvalue 1 (scipy.linalg.eig).
    _, P = tauchen(0.8, 0.3, 9)
    eigenvalues, left = scipy.linalg.eig(P, left=True, right=False)
    reference = np.real(left[:, np.argmin(np.abs(eigenvalues - 1))])
    np.testing.assert_allclose(stationary_distribution(P), reference / reference.sum(), rtol=1e-10)


def test_stationary_distribution_of_a_fast_mixing_sparse_chain():
    rng = np.random.default_rng(11)
    n = 5_000
    rows = np.repeat(np.arange(n), 3)
    cols = np.concatenate([np.arange(n)[:, None], rng.integers(0, n, (n, 2))], axis=1).reshape(-1)
    weights = rng.uniform(0.1, 1.0, (n, 3))
    P = sp.csr_matrix(((weights / weights.sum(axis=1, keepdims=True)).reshape(-1), (rows, cols)), shape=(n, n))
    pi = stationary_distribution(P)
    assert pi.min() >= 0 and pi.sum() == pytest.approx(1.0, abs=1e-12)
    assert np.abs(P.T @ pi - pi).sum() < 1e-13


def test_stationary_distribution_of_a_slow_mixing_sparse_chain_matches_dense():
    # A persistent shock times a sticky endogenous index: too slow for power
    # steps, so the sparse direct solve runs; the dense solve is the reference.
    _, Pz = rouwenhorst(0.995, 0.1, 7)
    stay = np.array([[0.999, 0.001], [0.002, 0.998]])
    P = sp.kron(sp.kron(sp.csr_matrix(stay), sp.csr_matrix(Pz)), sp.csr_matrix(rouwenhorst(0.99, 0.1, 30)[1])).tocsr()
    pi = stationary_distribution(P)
    assert np.abs(P.T @ pi - pi).sum() < 1e-12
    np.testing.assert_allclose(pi, stationary_distribution(P.toarray()), rtol=1e-8, atol=1e-15)


@pytest.mark.parametrize("as_sparse", [False, True])
def test_stationary_distribution_with_probabilities_spanning_many_decades(as_sparse):
    # Birth-death chain with strong upward drift: detailed balance gives
    # pi[i+1] / pi[i] = up / down, so pi[0] / pi[-1] = (1/99)**59, about 1e-118.
    n, up, down = 60, 0.99, 0.01
    P = np.zeros((n, n))
    for i in range(n):
        P[i, min(i + 1, n - 1)] += up
        P[i, max(i - 1, 0)] += down
    expected = (up / down) ** np.arange(n, dtype=np.float64)
    expected /= expected.sum()
    pi = stationary_distribution(sp.csr_matrix(P) if as_sparse else P)
    if as_sparse:
        # Fast mixing, so power steps answer: accurate in total variation.
        assert np.abs(pi - expected).sum() < 1e-13
    else:
        # The direct solve, pinned at a likely state, keeps even 1e-118 accurate.
        np.testing.assert_allclose(pi, expected, rtol=1e-9, atol=1e-300)


def _rouwenhorst_recursion(rho: float, n: int) -> np.ndarray:
    """Rouwenhorst's (1995) recursion on whole matrices, as Kopecky and Suen (2010) state it: the reference for
    the construction by binomial laws (this was fixq's own until 2026-12-05; its cost grows as n³)."""
    p = (1.0 + rho) / 2.0
    matrix = np.array([[p, 1.0 - p], [1.0 - p, p]])
    for size in range(3, n + 1):
        grown = np.zeros((size, size))
        grown[:-1, :-1] += p * matrix
        grown[:-1, 1:] += (1.0 - p) * matrix
        grown[1:, :-1] += (1.0 - p) * matrix
        grown[1:, 1:] += p * matrix
        grown[1:-1] /= 2.0  # interior rows received two contributions each
        matrix = grown
    return matrix


@pytest.mark.parametrize("rho", [-0.8, 0.0, 0.5, 0.95, 0.995])
@pytest.mark.parametrize("n", [2, 3, 5, 11, 60, 301])
def test_rouwenhorst_equals_the_recursion(rho, n):
    _, P = rouwenhorst(rho, 0.1, n)
    np.testing.assert_allclose(P, _rouwenhorst_recursion(rho, n), rtol=0, atol=2e-15)
    assert np.all(P >= 0.0)
    np.testing.assert_allclose(P.sum(axis=1), 1.0, rtol=0, atol=1e-13)


def test_the_largest_rouwenhorst_chain_accepted_is_built_at_once():
    # worker.document.limits.MAX_CHAIN_POINTS values (2,000): 0.15 s measured, where the recursion took 15 s.
    from worker.document.limits import MAX_CHAIN_POINTS

    _, P = rouwenhorst(0.95, 0.1, MAX_CHAIN_POINTS)
    np.testing.assert_allclose(P.sum(axis=1), 1.0, rtol=0, atol=1e-12)
    # The binomial law of row i (scipy's binomial distribution, independent of the construction), at three rows.
    p = (1 + 0.95) / 2
    for i in (0, 700, MAX_CHAIN_POINTS - 1):
        row = np.convolve(binom.pmf(np.arange(i + 1), i, p),
                          binom.pmf(np.arange(MAX_CHAIN_POINTS - i), MAX_CHAIN_POINTS - 1 - i, 1 - p))
        np.testing.assert_allclose(P[i], row, rtol=0, atol=1e-13)
