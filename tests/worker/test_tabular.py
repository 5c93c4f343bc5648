"""The tabular compiler: arrays, the Bellman step and the CompiledProblem methods.

The reference for the Bellman step is its definition,
``(Tv)(s) = max_a { r(s,a) + β Σ_s' P(s'|s,a) v(s') }`` over allowed actions
(Bellman 1957), evaluated here with plain loops.
"""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pytest

from tests._documents import array_tabular
from worker.arrays import encode_array
from worker.document import parse_document
from worker.errors import InfeasibleModel, InvalidDocument
from worker.tabular import TabularProblem, compile_tabular


def random_arrays(seed: int, n_states: int, n_actions: int) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    reward = rng.normal(size=(n_states, n_actions))
    reward[rng.random((n_states, n_actions)) < 0.3] = np.nan
    reward[:, 0] = rng.normal(size=n_states)
    weights = rng.random((n_states, n_actions, n_states)) ** 6
    return reward, weights / weights.sum(axis=2, keepdims=True)


def sparse_entries(transition: np.ndarray) -> list[list[float]]:
    s, a, t = np.nonzero(transition)
    return [[int(i), int(j), int(k), float(transition[i, j, k])] for i, j, k in zip(s, a, t)]


def test_bellman_step_matches_its_definition():
    reward, transition = random_arrays(1, 12, 4)
    problem = TabularProblem(reward, transition, 0.93)
    v = np.random.default_rng(2).normal(size=12)
    tv, policy = problem.bellman_step(v)
    for s in range(12):
        best, best_action = -np.inf, -1
        for a in range(4):
            if np.isnan(reward[s, a]):
                continue
            q = reward[s, a] + 0.93 * sum(transition[s, a, t] * v[t] for t in range(12))
            if q > best:
                best, best_action = q, a
        assert tv[s] == pytest.approx(best, rel=1e-13, abs=1e-13)
        assert policy[s] == best_action
    assert policy.dtype == np.int64 and tv.shape == (12,)


def test_ties_go_to_the_lowest_action_index():
    reward = np.array([[1.0, 1.0, 1.0], [np.nan, 2.0, 2.0]])
    transition = np.zeros((2, 3, 2))
    transition[:, :, 0] = 1.0
    problem = TabularProblem(reward, transition, 0.5)
    _, policy = problem.bellman_step(np.zeros(2))
    assert policy.tolist() == [0, 1]


def test_dense_sparse_and_packed_documents_compile_alike():
    reward, transition = random_arrays(3, 9, 3)
    dense = compile_tabular(parse_document(array_tabular(reward, transition.tolist())))
    sparse = compile_tabular(parse_document(array_tabular(reward, {"entries": sparse_entries(transition)})))
    packed_entries = encode_array(np.array(sparse_entries(transition)))
    packed = compile_tabular(parse_document(array_tabular(reward, {"entries": packed_entries})))
    for other in (sparse, packed):
        assert (dense.transition != other.transition).nnz == 0
        np.testing.assert_array_equal(dense.reward, other.reward)
    assert dense.transition.shape == (27, 9)


def test_duplicate_sparse_entries_are_summed():
    reward = np.array([[0.0], [1.0]])
    entries = [[0, 0, 1, 0.25], [0, 0, 1, 0.25], [0, 0, 0, 0.5], [1, 0, 1, 1.0]]
    problem = compile_tabular(parse_document(array_tabular(reward, {"entries": entries})))
    np.testing.assert_allclose(problem.transition.toarray(), [[0.5, 0.5], [0.0, 1.0]])


def test_rows_of_disallowed_pairs_are_ignored():
    reward = np.array([[1.0, np.nan], [0.0, 2.0]])
    transition = np.array([[[1.0, 0.0], [0.7, 0.7]], [[0.0, 1.0], [1.0, 0.0]]])  # row (0, 1) is not a distribution
    problem = compile_tabular(parse_document(array_tabular(reward, transition.tolist())))
    assert problem.transition[1].nnz == 0
    assert np.isneginf(problem.reward[0, 1])
    _, policy = problem.bellman_step(np.zeros(2))
    assert policy.tolist() == [0, 1]


def test_a_state_with_no_allowed_action_is_infeasible():
    reward = np.array([[1.0, 0.0], [np.nan, np.nan], [0.0, 0.0]])
    transition = np.full((3, 2, 3), 1 / 3)
    with pytest.raises(InfeasibleModel) as caught:
        parse_document(array_tabular(reward, transition.tolist()))
    assert [e["path"] for e in caught.value.errors] == ["model.reward[1]"]
    fake = SimpleNamespace(discount=0.9, model=SimpleNamespace(
        reward=reward, transition=transition, state_labels=lambda: [0, 1, 2], action_labels=lambda: [0, 1]))
    with pytest.raises(InfeasibleModel) as caught:
        compile_tabular(fake)
    assert [e["path"] for e in caught.value.errors] == ["model.reward[1]"]


def test_the_compiler_rechecks_rows_and_names_them():
    # A document object that slipped past validation (the schema refuses these
    # rows itself): the compiler must still refuse it, naming the row.
    reward = np.array([[1.0, 0.0], [0.0, 0.0]])
    transition = np.array([[[1.0, 0.0], [0.6, 0.6]], [[0.5, 0.5], [1.5, -0.5]]])
    fake = SimpleNamespace(discount=0.9, model=SimpleNamespace(
        reward=reward, transition=transition, state_labels=lambda: ["a", "b"], action_labels=lambda: ["x", "y"]))
    with pytest.raises(InvalidDocument) as caught:
        compile_tabular(fake)
    assert [e["path"] for e in caught.value.errors] == ["model.transition[0][1]", "model.transition[1][1]"]
    assert "sum to 1.2" in caught.value.errors[0]["message"]
    assert "non-negative" in caught.value.errors[1]["message"]

    sparse = SimpleNamespace(entries=np.array([[0, 0, 0, 1.0], [0, 1, 1, 1.0], [1, 0, 0, 0.4], [1, 1, 1, 1.0]]))
    fake.model.transition = sparse
    with pytest.raises(InvalidDocument) as caught:
        compile_tabular(fake)
    assert caught.value.errors[0]["path"] == "model.transition.entries"
    assert "state 1, action 0" in caught.value.errors[0]["message"]


def test_policy_methods_select_rows():
    reward, transition = random_arrays(4, 10, 3)
    problem = TabularProblem(reward, transition, 0.8, state_labels=[f"s{i}" for i in range(10)],
                             action_labels=["low", "mid", "high"])
    v = np.random.default_rng(5).normal(size=10)
    _, policy = problem.bellman_step(v)
    matrix = problem.policy_matrix(policy)
    expected = transition[np.arange(10), policy]
    np.testing.assert_allclose(matrix.toarray(), expected)
    np.testing.assert_array_equal(problem.policy_reward(policy), reward[np.arange(10), policy])
    np.testing.assert_allclose(problem.policy_step(v, policy), reward[np.arange(10), policy] + 0.8 * expected @ v)
    labels, indices = problem.describe_policy(policy)
    assert indices == {"action": policy.tolist()}
    assert labels == {"action": [["low", "mid", "high"][i] for i in policy]}
    assert problem.axes == {"state_label": [f"s{i}" for i in range(10)]}
    assert problem.shape == (10,) and problem.n == 10 and not problem.hints_active
    np.testing.assert_array_equal(problem.state_values()["state_label"], np.arange(10.0))
    np.testing.assert_array_equal(problem.choice_values(policy)["action"], policy.astype(float))
    assert problem.diagnostics(policy) == {}


def test_labels_from_the_document():
    reward = np.array([[1.0, 0.0], [0.0, 1.0]])
    transition = np.full((2, 2, 2), 0.5).tolist()
    doc = parse_document(array_tabular(reward, transition))
    doc_with_labels = array_tabular(reward, transition)
    doc_with_labels["model"]["states"] = ["idle", "busy"]
    doc_with_labels["model"]["actions"] = ["run", "service"]
    problem = compile_tabular(parse_document(doc_with_labels))
    assert problem.axes == {"state_label": ["idle", "busy"]}
    assert problem.describe_policy(np.array([1, 0]))[0] == {"action": ["service", "run"]}
    assert compile_tabular(doc).axes == {"state_label": [0, 1]}


def test_a_large_sparse_document_compiles_without_entry_loops():
    rng = np.random.default_rng(6)
    n_states, n_actions, successors = 20_000, 5, 10
    rows = np.repeat(np.arange(n_states * n_actions), successors)
    entries = np.column_stack([
        rows // n_actions, rows % n_actions, rng.integers(n_states, size=rows.size), np.full(rows.size, 1 / successors)
    ]).astype(np.float64)
    doc = parse_document(array_tabular(rng.normal(size=(n_states, n_actions)), {"entries": encode_array(entries)}))
    problem = compile_tabular(doc)
    assert problem.transition.shape == (n_states * n_actions, n_states)
    assert problem.transition.nnz <= rows.size
    np.testing.assert_allclose(np.asarray(problem.transition.sum(axis=1)).ravel(), 1.0)
    tv, policy = problem.bellman_step(np.ones(n_states))
    np.testing.assert_allclose(tv, np.nanmax(doc.model.reward, axis=1) + 0.9)
