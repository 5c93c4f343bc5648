"""The tabular model: a finite Markov decision problem given as arrays, and its checks.

A tabular model has one choice, named ``action``, whose values are the labels
in ``actions``.  Its checks are vectorised: a valid document with millions of
entries costs a few whole-array reductions, and the element-wise searches
that name faulty entries run only when something is wrong.
"""

from __future__ import annotations

from collections.abc import Iterable
from typing import Annotated, Any, Literal, Union

import numpy as np
from pydantic import Discriminator, Field, Tag, model_validator

from worker.document._faults import Fault, capped, fault, number, raise_faults
from worker.document._fields import Cube, LabelsOrCount, NullableMatrix, Part, Rows4
from worker.document.horizon import TabularHorizon, tabular_horizon_faults
from worker.document.limits import ROW_SUM_TOLERANCE
from worker.document.taste_shocks import TasteShocks, taste_choice_faults
from worker.errors import join_path


class SparseTransition(Part):
    """Transition probabilities as a list of non-zero entries."""

    entries: Rows4 = Field(
        description=(
            "One row [s, a, s_next, p] per non-zero probability: from state index s under action index a, "
            "tomorrow's state is s_next with probability p. Indices count from 0. Entries repeating the same "
            "(s, a, s_next) are added together. Nested lists or a packed array of shape [N, 4]."
        )
    )


def _transition_form(value: Any) -> str | None:
    if isinstance(value, dict):
        return (
            "<sparse>"
            if "entries" in value
            else "<dense>"
            if "base64" in value or "dtype" in value or "shape" in value
            else None
        )
    if isinstance(value, SparseTransition):
        return "<sparse>"
    return "<dense>" if isinstance(value, (list, np.ndarray)) else None


class TabularModel(Part):
    """A finite Markov decision problem: a list of states, a list of actions, the reward of each
    action in each state, and the probabilities of tomorrow's state."""

    kind: Literal["tabular"] = Field(description='Always "tabular" for this kind of model.')
    states: LabelsOrCount = Field(
        description="The states: a list of distinct labels, or their number (then they are labelled 0, 1, 2, ...)."
    )
    actions: LabelsOrCount = Field(
        description="The actions: a list of distinct labels, or their number (then they are labelled 0, 1, 2, ...)."
    )
    reward: NullableMatrix = Field(
        description=(
            "reward[s][a]: the reward of taking action a in state s, paid this period. null means the action "
            "is not allowed in that state (in a packed array, NaN stands for null). Every state needs at least "
            "one allowed action. Shape [states, actions]."
        )
    )
    transition: Annotated[
        Union[Annotated[Cube, Tag("<dense>")], Annotated[SparseTransition, Tag("<sparse>")]],
        Discriminator(
            _transition_form,
            custom_error_type="fixq_transition",
            custom_error_message=(
                "expected a dense array (nested lists or a packed array) or a sparse object {\"entries\": ...}"
            ),
        ),
    ] = Field(
        description=(
            "transition[s][a][s_next]: the probability that tomorrow's state is s_next after action a in "
            "state s; shape [states, actions, states]. Or, sparse, an object with entries. For every allowed "
            "(state, action) pair the probabilities must be non-negative and sum to 1 (within 1e-9); rows of "
            "pairs that are not allowed are ignored."
        )
    )
    taste_shocks: TasteShocks | None = Field(
        default=None,
        description=(
            "Optional taste shocks on the actions: the result then carries choice_probabilities, the logit "
            "probability of each action in each state."
        ),
    )

    horizon: TabularHorizon | None = Field(
        default=None,
        description=(
            "A finite number of periods, solved by backward induction (absent: an infinite horizon). The value "
            "and the policy then have a first axis, period."
        ),
    )

    @property
    def n_states(self) -> int:
        """Number of states."""
        return self.states if isinstance(self.states, int) else len(self.states)

    @property
    def n_actions(self) -> int:
        """Number of actions."""
        return self.actions if isinstance(self.actions, int) else len(self.actions)

    def state_labels(self) -> list[str] | list[int]:
        """The state labels; a count ``n`` gives ``[0, ..., n-1]``."""
        return list(range(self.states)) if isinstance(self.states, int) else list(self.states)

    def action_labels(self) -> list[str] | list[int]:
        """The action labels; a count ``n`` gives ``[0, ..., n-1]``."""
        return list(range(self.actions)) if isinstance(self.actions, int) else list(self.actions)

    @model_validator(mode="after")
    def _check_model(self) -> TabularModel:
        raise_faults(tabular_faults(self) + tabular_horizon_faults(self)
                     + taste_choice_faults(self.taste_shocks, ["action"]))
        return self


def tabular_faults(model: Any) -> list[Fault]:
    """Every fault of a tabular model's labels, shapes and probabilities (paths relative to it)."""
    faults = _label_faults(model.states, "states", "state") + _label_faults(model.actions, "actions", "action")
    n_states, n_actions = model.n_states, model.n_actions
    reward = model.reward
    if reward.shape != (n_states, n_actions):
        faults.append(
            fault(
                "reward",
                f"reward has shape {list(reward.shape)}, but with {n_states} states and {n_actions} actions "
                f"reward[s][a] must have shape [{n_states}, {n_actions}]",
            )
        )
        return faults
    allowed = ~np.isnan(reward)
    stuck = np.flatnonzero(~allowed.any(axis=1))
    faults += capped(
        (
            fault(
                join_path("reward", int(s)),
                f"{_state(model, s)} has no allowed action: every reward in its row is null",
                "infeasible",
            )
            for s in stuck
        ),
        stuck.size,
        "reward",
        "states with no allowed action",
    )
    if isinstance(model.transition, np.ndarray):
        return faults + _dense_faults(model, model.transition, allowed)
    return faults + _sparse_faults(model, model.transition.entries, allowed)


def _label_faults(labels: list[str] | int, where: str, noun: str) -> list[Fault]:
    if isinstance(labels, int):
        return []
    repeats = len(labels) - len(set(labels))
    if not repeats:
        return []

    def duplicates() -> Iterable[Fault]:
        first: dict[str, int] = {}
        for i, label in enumerate(labels):
            if label in first:
                yield fault(
                    join_path(where, i), f'duplicate {noun} label "{label}" (first used at index {first[label]})'
                )
            else:
                first[label] = i

    return capped(duplicates(), repeats, where, "duplicate labels")


def _state(model: Any, s: int) -> str:
    return f'state "{model.states[s]}" (index {s})' if isinstance(model.states, list) else f"state {s}"


def _action(model: Any, a: int) -> str:
    return f'action "{model.actions[a]}" (index {a})' if isinstance(model.actions, list) else f"action {a}"


def _dense_faults(model: Any, transition: np.ndarray, allowed: np.ndarray) -> list[Fault]:
    n_states, n_actions = allowed.shape
    if transition.shape != (n_states, n_actions, n_states):
        return [
            fault(
                "transition",
                f"transition has shape {list(transition.shape)}, but transition[s][a][s'] must have shape "
                f"[{n_states}, {n_actions}, {n_states}] (states, actions, next states)",
            )
        ]
    negative = (transition < 0) & allowed[:, :, None] if transition.size and transition.min() < 0 else None
    faults: list[Fault] = []
    if negative is not None:
        where = np.argwhere(negative)
        faults = capped(
            (
                fault(
                    join_path("transition", *map(int, ix)), f"probability {number(transition[tuple(ix)])} is negative"
                )
                for ix in where
            ),
            len(where),
            "transition",
            "negative probabilities",
        )
    sums = transition.sum(axis=2)
    off = allowed & (np.abs(sums - 1.0) > ROW_SUM_TOLERANCE)
    if negative is not None:
        off &= ~negative.any(axis=2)
    rows = np.argwhere(off)
    faults += capped(
        (fault(join_path("transition", int(s), int(a)), _row_message(model, s, a, sums[s, a])) for s, a in rows),
        len(rows),
        "transition",
        "rows that do not sum to 1",
    )
    return faults


def _row_message(model: Any, s: int, a: int, total: float) -> str:
    return (
        f"the probabilities of tomorrow's state from {_state(model, s)} under {_action(model, a)} sum to "
        f"{number(total)}; they must sum to 1 (within {ROW_SUM_TOLERANCE:g})"
    )


_ENTRY_COLUMNS = ("state index", "action index", "next-state index")


def _sparse_faults(model: Any, entries: np.ndarray, allowed: np.ndarray) -> list[Fault]:
    n_states, n_actions = allowed.shape
    where = "transition.entries"
    if entries.ndim != 2 or entries.shape[1] != 4:
        return [fault(where, f"expected rows of 4 numbers [s, a, s_next, p], got shape {list(entries.shape)}")]
    columns = np.ascontiguousarray(entries.T)
    sizes = (n_states, n_actions, n_states)
    # Whole-column reductions first: a valid document never pays for the
    # element-wise searches below, which run only to name the faulty entries.
    in_range = bool(columns.size == 0 or all(columns[c].min() >= 0 and columns[c].max() < sizes[c] for c in range(3)))
    index = columns[:3].astype(np.int64) if in_range else None
    if index is None or np.any(index != columns[:3]):
        return _entry_faults(columns, sizes, where)
    p = columns[3]
    if p.size and (p.min() < 0 or p.max() > 1):
        return _entry_faults(columns, sizes, where)
    pair = index[0] * n_actions + index[1]
    sums = np.bincount(pair, weights=p, minlength=n_states * n_actions)
    off = np.flatnonzero(allowed.ravel() & (np.abs(sums - 1.0) > ROW_SUM_TOLERANCE))
    return capped(
        (fault(where, _row_message(model, *divmod(int(k), n_actions), sums[k])) for k in off),
        off.size,
        where,
        "(state, action) pairs whose probabilities do not sum to 1",
    )


def _entry_faults(columns: np.ndarray, sizes: tuple[int, int, int], where: str) -> list[Fault]:
    """Faults naming each entry with a bad index or probability; columns is (4, N)."""
    faults: list[Fault] = []
    for col in range(3):
        values = columns[col]
        outside = (values < 0) | (values >= sizes[col])
        fractional = ~outside & (values != np.floor(values))
        noun = "actions" if col == 1 else "states"
        rows = np.flatnonzero(outside | fractional)
        faults += capped(
            (
                fault(
                    join_path(where, int(r), col),
                    f"{_ENTRY_COLUMNS[col]} {number(values[r])} is not a whole number"
                    if fractional[r]
                    else f"{_ENTRY_COLUMNS[col]} {number(values[r])} is out of range: with {sizes[col]} {noun} it "
                         f"must be 0 to {sizes[col] - 1}",
                )
                for r in rows
            ),
            rows.size,
            where,
            f"bad {_ENTRY_COLUMNS[col].replace('index', 'indices')}",
        )
    p = columns[3]
    rows = np.flatnonzero((p < 0) | (p > 1))
    faults += capped(
        (fault(join_path(where, int(r), 3), f"probability {number(p[r])} is outside [0, 1]") for r in rows),
        rows.size,
        where,
        "probabilities outside [0, 1]",
    )
    return faults
