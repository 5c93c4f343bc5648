"""The pinned sparse LU of a chain's stationary distribution and its column ordering (worker.stationary_lu).

Independent reference: the stationary distribution of an irreducible chain is the left eigenvector of P for
eigenvalue 1, normalised (Perron–Frobenius), computed with ``scipy.linalg.eig``.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest
import scipy.linalg
import scipy.sparse as sp

import worker.stationary_lu as stationary_lu
from worker.report import long_run_distribution


def _eigen(matrix: np.ndarray) -> np.ndarray:
    """Left eigenvector of eigenvalue 1, normalised (scipy)."""
    values, vectors = scipy.linalg.eig(matrix.T)
    vector = np.real(vectors[:, np.argmin(np.abs(values - 1.0))])
    return vector / vector.sum()


def _banded(n: int, seed: int) -> np.ndarray:
    """A chain moving to the next states down and up (one closed class) and a few others near: half-bandwidth 3."""
    rng = np.random.default_rng(seed)
    dense = np.zeros((n, n))
    for i in range(n):
        columns = np.clip(np.r_[i - 1, i + 1, i + rng.integers(-3, 4, size=3)], 0, n - 1)
        dense[i, columns] += rng.random(5) + 0.1
    return dense / dense.sum(axis=1, keepdims=True)


def _scrambled(dense: np.ndarray, seed: int) -> np.ndarray:
    order = np.random.default_rng(seed).permutation(dense.shape[0])
    return dense[np.ix_(order, order)]  # the same chain with its states renumbered at random


def _normalised(pi: np.ndarray | None) -> np.ndarray:
    assert pi is not None
    return pi / pi.sum()


def test_a_banded_chain_keeps_the_states_order_and_a_scrambled_one_gets_colamd() -> None:
    banded = _banded(200, 11)
    for dense, ordering in ((banded, "NATURAL"), (_scrambled(banded, 12), "COLAMD")):
        expected = _eigen(dense)
        keep: dict[str, Any] = {}
        k = int(np.argmax(expected))
        pi = stationary_lu.ordered_pinned_lu(sp.csr_matrix(dense), k, keep=keep)
        assert keep["ordering"] == ordering and keep["pin"] == k and keep["n"] == 200
        np.testing.assert_allclose(_normalised(pi), expected, rtol=0, atol=1e-12)
        # Without keep the same rule picks the same ordering, and the answer is the same.
        np.testing.assert_allclose(_normalised(stationary_lu.ordered_pinned_lu(sp.csr_matrix(dense), k)), expected,
                                   rtol=0, atol=1e-12)


def test_the_chosen_ordering_is_kept_for_chains_of_as_many_states(monkeypatch: pytest.MonkeyPatch) -> None:
    banded = _banded(120, 3)
    keep: dict[str, Any] = {}
    stationary_lu.ordered_pinned_lu(sp.csr_matrix(banded), 0, keep=keep)
    assert keep["ordering"] == "NATURAL"
    # A later chain (scrambled: the rule alone would pick COLAMD) reuses the kept choice without choosing again.
    monkeypatch.setattr(stationary_lu, "natural_order_fits", lambda system: pytest.fail("chose again"))
    later = _scrambled(banded, 4)
    pi = stationary_lu.ordered_pinned_lu(sp.csr_matrix(later), 5, keep=keep)
    assert keep["ordering"] == "NATURAL" and keep["pin"] == 5
    np.testing.assert_allclose(_normalised(pi), _eigen(later), rtol=0, atol=1e-12)


def test_an_lu_in_the_states_order_that_fills_past_natural_fill_is_made_again_with_colamd(
        monkeypatch: pytest.MonkeyPatch) -> None:
    banded = _banded(150, 5)
    monkeypatch.setattr(stationary_lu, "NATURAL_FILL", 0.5)
    made: list[str] = []
    splu = scipy.sparse.linalg.splu
    monkeypatch.setattr(scipy.sparse.linalg, "splu",
                        lambda system, permc_spec, **options: made.append(permc_spec)
                        or splu(system, permc_spec=permc_spec, **options))
    keep: dict[str, Any] = {}
    pi = stationary_lu.ordered_pinned_lu(sp.csr_matrix(banded), 0, keep=keep)
    assert made == ["NATURAL", "COLAMD"] and keep["ordering"] == "COLAMD"
    np.testing.assert_allclose(_normalised(pi), _eigen(banded), rtol=0, atol=1e-12)


def test_the_envelope_bounds_the_lu_made_in_the_states_order() -> None:
    # Columns 0..3 reach up to rows 0, 1, 0, 2 (U: 0 + 0 + 2 + 1); rows 0..3 reach back to columns 0, 1, 0, 1
    # (L: 0 + 0 + 2 + 2); and the diagonal.
    dense = np.array([[4.0, 0.0, 1.0, 0.0],
                      [0.0, 4.0, 0.0, 0.0],
                      [1.0, 0.0, 4.0, 1.0],
                      [0.0, 1.0, 0.0, 4.0]])
    assert stationary_lu.natural_lu_bound(sp.csc_matrix(dense)) == 3 + 4 + 4
    for dense in (_banded(200, 11), _scrambled(_banded(200, 11), 12)):
        system, _ = stationary_lu.pinned_system(sp.csr_matrix(dense), 0)
        lu = scipy.sparse.linalg.splu(system, permc_spec="NATURAL",
                                      diag_pivot_thresh=stationary_lu.NATURAL_PIVOT_THRESHOLD)
        assert (lu.perm_r == np.arange(200)).all()  # no row interchanges: diagonally dominant by columns
        # L (its unit diagonal too) and U within the envelope (SuperLU's storage also keeps its supernodes' zeros).
        assert lu.L.nnz + lu.U.nnz <= stationary_lu.natural_lu_bound(system) + 200


def test_above_the_direct_cap_an_lu_is_made_only_in_the_states_order_within_its_bound(
        monkeypatch: pytest.MonkeyPatch) -> None:
    import worker.report as report

    monkeypatch.setattr(report, "DIRECT_MAX_STATES", 50)
    banded = _banded(400, 21)
    pi, info = long_run_distribution(sp.csr_matrix(banded))
    assert info["method"] == "direct" and info["steps"] == 0 and info["residual"] <= 1e-12
    np.testing.assert_allclose(pi, _eigen(banded), rtol=0, atol=1e-10)
    system, _ = stationary_lu.pinned_system(sp.csr_matrix(banded), 0)
    assert stationary_lu.natural_lu_bound(system) <= 4 * system.nnz  # a thin envelope: the bound is far from 64
    # Past the ceiling on the LU's entries (made small here), whatever the ratio: the iterative path.
    monkeypatch.setattr(stationary_lu, "NATURAL_MAX_ENTRIES", stationary_lu.natural_lu_bound(system) - 1)
    assert not stationary_lu.natural_lu_fits(sp.csr_matrix(banded))
    assert long_run_distribution(sp.csr_matrix(banded))[1]["method"] in ("power", "gmres")
    monkeypatch.undo()
    monkeypatch.setattr(report, "DIRECT_MAX_STATES", 50)
    # Scrambled, its envelope is past NATURAL_ENVELOPE times its entries (made small here): no LU, the iterative
    # path instead, to the same distribution.
    scrambled = _scrambled(banded, 22)
    monkeypatch.setattr(stationary_lu, "NATURAL_ENVELOPE", 4)
    pi, info = long_run_distribution(sp.csr_matrix(scrambled))
    assert info["method"] in ("power", "gmres")
    np.testing.assert_allclose(pi, _eigen(scrambled), rtol=0, atol=1e-9)
    # An LU that ran out of memory (past a job's memory limit) leaves the chain to the iterative solves.
    def out_of_memory(*args: Any, **kwargs: Any) -> Any:
        raise MemoryError

    monkeypatch.setattr(scipy.sparse.linalg, "splu", out_of_memory)
    assert stationary_lu.natural_pinned_lu(sp.csr_matrix(banded), 0) is None
    monkeypatch.undo()
    monkeypatch.setattr(report, "DIRECT_MAX_STATES", 50)
    # An LU in the states' order that interchanged rows (rounding) is dropped too.
    monkeypatch.setattr(stationary_lu, "_no_interchanges", lambda lu: False)
    assert stationary_lu.natural_pinned_lu(sp.csr_matrix(banded), 0) is None
    pi, info = long_run_distribution(sp.csr_matrix(banded))
    assert info["method"] in ("power", "gmres")


def test_a_single_jobs_stationary_distribution_uses_the_shared_rule(monkeypatch: pytest.MonkeyPatch) -> None:
    made: list[str] = []
    splu = scipy.sparse.linalg.splu
    monkeypatch.setattr(scipy.sparse.linalg, "splu",
                        lambda system, permc_spec, **options: made.append(permc_spec)
                        or splu(system, permc_spec=permc_spec, **options))
    banded = _banded(200, 11)
    for dense, ordering in ((banded, "NATURAL"), (_scrambled(banded, 8), "COLAMD")):
        made.clear()
        pi, info = long_run_distribution(sp.csr_matrix(dense))
        assert made == [ordering] and info["method"] == "direct"
        np.testing.assert_allclose(pi, _eigen(dense), rtol=0, atol=1e-12)


def test_a_chain_with_two_closed_classes_gives_none() -> None:
    # States 0 and 1 are absorbing: pinned at 0, state 1's equation is 0 = 0 and the system is singular.
    two = np.array([[1.0, 0.0, 0.0], [0.0, 1.0, 0.0], [0.5, 0.0, 0.5]])
    keep: dict[str, Any] = {}
    assert stationary_lu.ordered_pinned_lu(sp.csr_matrix(two), 0, keep=keep) is None
    assert "lu" not in keep


def _spied_lus(monkeypatch: pytest.MonkeyPatch) -> list[tuple[str, int]]:
    """Every sparse LU made from here on, as ``(column ordering, entries of its factors)``."""
    import scipy.sparse.linalg

    factorise = scipy.sparse.linalg.splu
    lus: list[tuple[str, int]] = []

    def spy(A: Any, *args: Any, **kwargs: Any) -> Any:
        factor = factorise(A, *args, **kwargs)
        lus.append((kwargs.get("permc_spec", "COLAMD"), int(factor.nnz)))
        return factor

    monkeypatch.setattr(scipy.sparse.linalg, "splu", spy)
    return lus


def _random_chain(n: int, successors: int, seed: int) -> sp.csr_matrix:
    """A chain whose every state moves to ``successors`` states drawn at random: no band, no envelope."""
    rng = np.random.default_rng(seed)
    rows = np.repeat(np.arange(n), successors)
    columns = rng.integers(0, n, n * successors)
    weights = sp.csr_matrix((rng.random(n * successors) + 0.05, (rows, columns)), shape=(n, n))
    return sp.csr_matrix(sp.diags(1.0 / np.asarray(weights.sum(axis=1)).ravel()) @ weights)


def test_above_the_direct_cap_no_lu_of_unbounded_fill_is_made(monkeypatch: pytest.MonkeyPatch) -> None:
    # A random chain of 10,000 states: SuperLU's own ordering filled its LU past a job's memory limit after 19 s
    # (5,000 states: 13 million entries, 2.9 s; measured) when chains of up to 20,000 states took it.  Above
    # worker.report.DIRECT_MAX_STATES only an LU in the states' own order within its envelope's bound is made.
    from scipy.sparse.linalg import eigs

    from worker.search_trials import trial_distribution

    matrix = _random_chain(10_000, 5, 31)
    lus = _spied_lus(monkeypatch)
    pi, info = long_run_distribution(matrix)
    assert lus == [] and info["method"] in ("power", "gmres") and info["residual"] <= 1e-10
    # Independent: ARPACK's eigenvector of Pᵀ for its largest eigenvalue, 1 (Perron–Frobenius).
    values, vectors = eigs(matrix.T, k=1, which="LM", tol=1e-14)
    assert abs(values[0] - 1.0) < 1e-10
    expected = np.real(vectors[:, 0]) / np.real(vectors[:, 0]).sum()
    np.testing.assert_allclose(pi, expected, rtol=0, atol=1e-12)
    # A search's trial: the same rule, with or without the last trial's distribution to pin from.
    for previous in (None, pi):
        pi_trial, _ = trial_distribution(matrix, previous, {})
        np.testing.assert_allclose(pi_trial, expected, rtol=0, atol=1e-12)
    assert lus == []
    # A banded chain above the cap gets its LU in the states' own order, kept for the next trial's refinement
    # (steps of up to three states either way, of equal weight both ways: no well where the mass could hide).
    rng = np.random.default_rng(32)
    half = rng.random(3) + 0.1
    weights = np.r_[half[::-1], 1.0, half]  # for steps -3 … 3
    steps = np.arange(-3, 4)
    rows = np.repeat(np.arange(2_500), 7)
    columns = np.clip(rows + np.tile(steps, 2_500), 0, 2_499)
    banded = sp.csr_matrix((np.tile(weights / weights.sum(), 2_500), (rows, columns)), shape=(2_500, 2_500))
    factors: dict[str, Any] = {}
    pi_trial, info = trial_distribution(banded, None, factors)
    assert [o for o, _ in lus] == ["NATURAL"] and info["method"] == "direct" and factors["n"] == 2_500
    np.testing.assert_allclose(pi_trial, long_run_distribution(banded)[0], rtol=0, atol=1e-12)
    trial_distribution(banded, pi_trial, factors)  # pinned at the heaviest state of the last trial's answer
    pi_again, info = trial_distribution(banded, pi_trial, factors)  # pinned there again: refined with the kept LU
    assert info["method"] == "refined" and {o for o, _ in lus} == {"NATURAL"}
    np.testing.assert_allclose(pi_again, pi_trial, rtol=0, atol=1e-12)


def test_the_estimate_sizes_the_stationary_lu_a_grid_chain_makes(monkeypatch: pytest.MonkeyPatch) -> None:
    # worker.costs.stationary_lu_entries against the LU SuperLU makes (its factors' entries, which tracing of
    # Python's memory does not see) of a growth chain above the direct cap: never below it.  A share of n² leans
    # high for a policy that moves a few grid points a period, as here (7.4 times the LU made since the share
    # became 0.035, the largest measured on one-state chains: growth_3000x3 7.46 in bench/RESULTS.md's
    # bench_lu_fill --stationary table), and 1.4-2.9 times it on the savings chains there.

    from tests._documents import GROWTH, grid_document
    from worker import costs
    from worker.document import parse_document
    from worker.estimate import estimate
    from worker.solve import solve

    model = {**GROWTH, "states": {"k": {**GROWTH["states"]["k"], "points": 1_000}}}
    raw = {**grid_document(model, hints={"monotone": True, "concave": True}), "report": {"stationary": True}}
    lus = _spied_lus(monkeypatch)
    result = solve(raw)
    assert len(lus) == 1 and result["stationary"]["method"] == "direct"
    made = [entries for _, entries in lus]
    n = 1_000 * 3
    sized = costs.stationary_lu_entries(n, n * 3)  # a grid-restricted choice: one node for each of 3 shocks
    assert made[0] <= sized <= 8 * made[0], (made[0], sized)
    assert estimate(parse_document(raw))["bytes"] >= sized * costs.LU_ENTRY_BYTES
