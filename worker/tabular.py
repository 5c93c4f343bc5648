"""Tabular documents (``kind: tabular``) compiled to a :class:`CompiledProblem`.

A finite Markov decision problem with ``S`` states and ``A`` actions is held
as two arrays:

* ``reward`` — (S, A) float64, ``-inf`` where an action is not allowed;
* ``transition`` — one CSR matrix of shape (S·A, S) whose row ``s·A + a`` is
  the distribution of tomorrow's state after action ``a`` in state ``s``
  (rows of disallowed pairs are empty).

The Bellman step is then one sparse matrix–vector product and an ``argmax``:
``Q = R + β·(T @ v).reshape(S, A)``, with no Python loop over states.  With
taste shocks (``taste_scale``) the maximum is the smoothed one of
:mod:`worker.taste`, and the evaluation of a policy (Howard's method, policy
iteration, the stationary distribution, simulation) mixes the actions by the
logit probabilities of the last Bellman step, entropy term included.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import scipy.sparse as sp

from worker.errors import InfeasibleModel, InvalidDocument, join_path
from worker.problem import Hints, PolicySteps
from worker.taste import check_scale, entropy_reward, smoothed_max

__all__ = ["ROW_SUM_TOLERANCE", "STATE_AXIS", "TabularProblem", "compile_tabular"]

STATE_AXIS = "state_label"
"""Name of a tabular result's one axis (its values are the state labels); not ``state``, which
names a job's lifecycle state beside it."""

ROW_SUM_TOLERANCE = 1e-9
"""Allowed deviation of a transition row's sum from 1 (absolute, unitless)."""

_MAX_LISTED_FAULTS = 20
"""At most this many faulty rows are listed in one error (the rest are counted)."""


class TabularProblem:
    """A finite MDP as arrays; implements :class:`worker.problem.CompiledProblem`.

    Parameters
    ----------
    reward : (S, A) float64
        ``-inf`` (or NaN) marks an action that is not allowed in a state.
    transition : (S·A, S) sparse matrix, or (S, A, S) dense array
        Row ``s·A + a`` is the law of tomorrow's state after ``a`` in ``s``.
        Rows of disallowed pairs are ignored (emptied).
    discount : float
        β in (0, 1).
    state_labels, action_labels : list, optional
        Labels reported in ``axes`` and ``policy``; default ``0..S-1`` / ``0..A-1``.
    taste_scale : float, optional
        The scale ``s > 0`` of extreme-value taste shocks on the actions (None: none).

    No validation happens here beyond shapes: :func:`compile_tabular` checks a
    document's arrays and names the faulty field.
    """

    hints_active = False
    hints = Hints()
    policy_steps: PolicySteps | None = None
    """Evaluation steps go through :meth:`policy_matrix` (a sparse product is already one call)."""

    def __init__(
        self,
        reward: np.ndarray,
        transition: sp.spmatrix | sp.sparray | np.ndarray,
        discount: float,
        *,
        state_labels: list[Any] | None = None,
        action_labels: list[Any] | None = None,
        taste_scale: float | None = None,
    ) -> None:
        reward = np.array(reward, dtype=np.float64)
        if reward.ndim != 2:
            raise ValueError(f"reward must be (S, A), got shape {reward.shape}")
        n_states, n_actions = reward.shape
        allowed = np.isfinite(reward)
        reward[~allowed] = -np.inf
        if isinstance(transition, np.ndarray):
            if transition.shape != (n_states, n_actions, n_states):
                raise ValueError(f"dense transition must be {(n_states, n_actions, n_states)}, got {transition.shape}")
            matrix = sp.csr_matrix(transition.reshape(n_states * n_actions, n_states))
        else:
            matrix = sp.csr_matrix(transition)
            if matrix.shape != (n_states * n_actions, n_states):
                raise ValueError(f"sparse transition must be {(n_states * n_actions, n_states)}, got {matrix.shape}")
        if not allowed.all():
            row_allowed = np.repeat(allowed.ravel(), np.diff(matrix.indptr))
            matrix.data[~row_allowed] = 0.0
        matrix.eliminate_zeros()

        self.discount = float(discount)
        self.n_states = n_states
        self.n_actions = n_actions
        self.shape: tuple[int, ...] = (n_states,)
        self.n = n_states
        self.reward = reward
        self.allowed = allowed
        self.transition = matrix
        self.state_labels = list(range(n_states)) if state_labels is None else list(state_labels)
        self.action_labels = list(range(n_actions)) if action_labels is None else list(action_labels)
        self.axes: dict[str, list[Any]] = {STATE_AXIS: self.state_labels}
        self._rows = np.arange(n_states)
        self.taste_scale = None if taste_scale is None else check_scale(taste_scale)
        self._probabilities: np.ndarray | None = None
        self._most_probable: np.ndarray | None = None

    def bellman_step(
        self, v: np.ndarray, *, restricted: bool = False, policy_guess: np.ndarray | None = None
    ) -> tuple[np.ndarray, np.ndarray]:
        """One Bellman step; ``restricted`` and ``policy_guess`` are ignored (no hints).

        Parameters
        ----------
        v : (S,) float64

        Returns
        -------
        Tv : (S,) float64
        policy : (S,) int64, the lowest-index maximising action per state (with taste
            shocks: the most probable one; the step's probabilities are kept for evaluation).
        """
        q = self.transition @ v
        q *= self.discount
        q = q.reshape(self.n_states, self.n_actions)
        q += self.reward
        if self.taste_scale is not None:
            value, self._probabilities, policy = smoothed_max(q, self.taste_scale)
            self._most_probable = policy
            return value, policy
        policy = q.argmax(axis=1)
        return q[self._rows, policy], policy.astype(np.int64, copy=False)

    def choice_probabilities(self, policy: np.ndarray) -> np.ndarray:
        """(S, A) logit probabilities of the last Bellman step, whose most probable actions are ``policy``.

        Raises
        ------
        ValueError
            No Bellman step was taken, or ``policy`` is not the last step's most probable choice (the
            solvers always evaluate the policy of the step they just took).
        """
        if self._probabilities is None or self._most_probable is None:
            raise ValueError("choice probabilities exist only after a Bellman step of a model with taste shocks")
        if not np.array_equal(self._most_probable, policy):
            raise ValueError("the policy is not the most probable choice of the last Bellman step")
        return self._probabilities

    def _pair_rows(self, policy: np.ndarray) -> np.ndarray:
        return self._rows * self.n_actions + np.asarray(policy, dtype=np.int64)

    def policy_matrix(self, policy: np.ndarray) -> sp.csr_matrix:
        """``P_σ``: (S, S) CSR, the rows of ``transition`` the policy selects (taste shocks: the rows of
        every action mixed by its probability, ``Σ_a π(a|s) P(·|s, a)``)."""
        if self.taste_scale is None:
            return sp.csr_matrix(self.transition[self._pair_rows(policy)])
        weights = self.choice_probabilities(policy)
        pairs = self.n_states * self.n_actions
        mixer = sp.csr_matrix(
            (weights.ravel(), np.arange(pairs), np.arange(0, pairs + 1, self.n_actions)),
            shape=(self.n_states, pairs),
        )
        return sp.csr_matrix(mixer @ self.transition)

    def policy_reward(self, policy: np.ndarray) -> np.ndarray:
        """``r_σ``: (S,) float64 (taste shocks: ``Σ_a π(a|s)·(r(s, a) − s·log π(a|s))``)."""
        if self.taste_scale is not None:
            return entropy_reward(self.reward, self.choice_probabilities(policy), self.taste_scale)
        return self.reward[self._rows, np.asarray(policy, dtype=np.int64)]

    def policy_step(self, v: np.ndarray, policy: np.ndarray) -> np.ndarray:
        """``r_σ + β P_σ v``: (S,) → (S,)."""
        return self.policy_reward(policy) + self.discount * (self.policy_matrix(policy) @ v)

    def describe_policy(self, policy: np.ndarray) -> tuple[dict[str, Any], dict[str, Any]]:
        """``({"action": [labels]}, {"action": [indices]})``, one entry per state."""
        index = np.asarray(policy, dtype=np.int64)
        labels = np.empty(self.n_actions, dtype=object)
        labels[:] = self.action_labels
        return {"action": labels[index].tolist()}, {"action": index.tolist()}

    def choice_values(self, policy: np.ndarray) -> dict[str, np.ndarray]:
        """``{"action": (S,) float64}``: the chosen action's index (taste shocks: its expected index)."""
        if self.taste_scale is not None:
            return {"action": self.choice_probabilities(policy) @ self.combination_values()["action"]}
        return {"action": np.asarray(policy, dtype=np.float64)}

    def combination_values(self) -> dict[str, np.ndarray]:
        """``{"action": (A,)}``: each action's index (the columns of the choice probabilities)."""
        return {"action": np.arange(self.n_actions, dtype=np.float64)}

    def choice_axes(self) -> dict[str, list[Any]]:
        """The choice axes of ``choice_probabilities``: ``{"action": labels}``."""
        return {"action": self.action_labels}

    def pair_transition(self) -> sp.csr_matrix:
        """(S·A, S) CSR: row ``s·A + a`` is tomorrow's law after action ``a`` in state ``s`` (simulation
        with taste shocks draws the action, then tomorrow's state from its row)."""
        return self.transition

    def state_values(self) -> dict[str, np.ndarray]:
        """``{"state_label": (S,) float64}``: each state's index."""
        return {STATE_AXIS: self._rows.astype(np.float64)}

    def diagnostics(self, policy: np.ndarray) -> dict[str, Any]:
        """Tabular problems have no grid edges to report: ``{}``."""
        return {}


def compile_tabular(doc: Any) -> TabularProblem:
    """Compile a validated ``kind: tabular`` document.

    Parameters
    ----------
    doc : worker.document.ProblemDocument
        ``doc.model`` is a ``TabularModel``: ``reward`` (S, A) with NaN for
        "not allowed", ``transition`` an (S, A, S) array or a sparse object
        whose ``entries`` is an (N, 4) array of ``(s, a, s_next, p)`` rows.

    Raises
    ------
    InfeasibleModel
        A state has no allowed action (``model.reward[s]``).
    InvalidDocument
        A transition row of an allowed pair is negative, non-finite or does not
        sum to 1 (``model.transition[s][a]`` or ``model.transition.entries``).
        The schema checks these too; the compiler re-checks because a wrong
        row would silently give a wrong answer.
    """
    model = doc.model
    reward = np.asarray(model.reward, dtype=np.float64)
    n_states, n_actions = reward.shape
    allowed = np.isfinite(reward)
    _check_feasible(allowed)

    raw = model.transition
    if isinstance(raw, np.ndarray):
        transition: sp.csr_matrix | np.ndarray = raw
        where = "dense"
    else:
        transition = _entries_to_csr(np.asarray(raw.entries, dtype=np.float64), n_states, n_actions)
        where = "entries"
    problem = TabularProblem(
        reward,
        transition,
        doc.discount,
        state_labels=model.state_labels(),
        action_labels=model.action_labels(),
        taste_scale=_taste_scale(model),
    )
    _check_rows(problem, where)
    return problem


def _taste_scale(model: Any) -> float | None:
    """``model.taste_shocks.scale``, or None without taste shocks."""
    taste = getattr(model, "taste_shocks", None)
    return None if taste is None else float(taste.scale)


def _entries_to_csr(entries: np.ndarray, n_states: int, n_actions: int) -> sp.csr_matrix:
    """(N, 4) ``(s, a, s_next, p)`` rows → (S·A, S) CSR; duplicates are summed.

    Row and column indices are formed straight from the float columns (exact
    below 2**53) in the narrowest index type.  Entries already in row order —
    the usual way a client writes them — become the CSR arrays as they are
    (row pointers from a ``bincount``); others go through scipy's
    counting-sort conversion from COO.  No Python loop over entries.
    Repeated (s, a, s_next) entries may stay as separate CSR entries: every
    use of the matrix (products, row selection, row sums, sampling) adds
    them up, and a negative one (which only a sum can make valid) forces an
    explicit summation.
    """
    shape = (n_states * n_actions, n_states)
    if entries.size == 0:
        return sp.csr_matrix(shape, dtype=np.float64)
    index_type = np.int32 if max(shape[0], entries.shape[0]) < 2**31 - 1 else np.int64
    row = (entries[:, 0] * n_actions + entries[:, 1]).astype(index_type)
    column = entries[:, 2].astype(index_type)
    data = np.ascontiguousarray(entries[:, 3])
    if np.all(row[1:] >= row[:-1]):
        indptr = np.zeros(shape[0] + 1, dtype=index_type)
        np.cumsum(np.bincount(row, minlength=shape[0]), out=indptr[1:])
        matrix = sp.csr_matrix((data, column, indptr), shape=shape)
    else:
        matrix = sp.coo_matrix((data, (row, column)), shape=shape).tocsr()
    if not np.all(matrix.data >= 0):
        matrix.sum_duplicates()
    return matrix


def _check_feasible(allowed: np.ndarray) -> None:
    stuck = np.flatnonzero(~allowed.any(axis=1))
    if stuck.size:
        errors = [
            {
                "path": join_path("model", "reward", int(s)),
                "message": "this state has no allowed action (every reward is null)",
            }
            for s in stuck[:_MAX_LISTED_FAULTS]
        ]
        raise InfeasibleModel(errors, states=stuck.tolist())


def _check_rows(problem: TabularProblem, where: str) -> None:
    matrix = problem.transition
    n_actions = problem.n_actions
    allowed = problem.allowed.ravel()
    bad_value = np.zeros(matrix.shape[0], dtype=bool)
    bad_entry = ~(matrix.data >= 0) | ~np.isfinite(matrix.data)
    if bad_entry.any():
        row_of_entry = np.repeat(np.arange(matrix.shape[0]), np.diff(matrix.indptr))
        bad_value[row_of_entry[bad_entry]] = True
    sums = np.asarray(matrix.sum(axis=1)).ravel()
    bad_sum = allowed & ~(np.abs(sums - 1.0) <= ROW_SUM_TOLERANCE)
    faulty = np.flatnonzero(allowed & (bad_value | bad_sum))
    if not faulty.size:
        return
    errors = []
    for row in faulty[:_MAX_LISTED_FAULTS]:
        s, a = divmod(int(row), n_actions)
        if bad_value[row]:
            message = "transition probabilities must be finite and non-negative"
        else:
            message = f"transition probabilities sum to {sums[row]:.12g}, not 1 (tolerance {ROW_SUM_TOLERANCE:g})"
        if where == "dense":
            errors.append({"path": join_path("model", "transition", s, a), "message": message})
        else:
            errors.append({"path": "model.transition.entries", "message": f"state {s}, action {a}: {message}"})
    more = faulty.size - len(errors)
    if more > 0:
        errors.append({"path": "model.transition", "message": f"{more} more rows are faulty"})
    raise InvalidDocument(errors)
