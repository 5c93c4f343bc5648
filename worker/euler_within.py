"""Choices that set no state beside choices that do: maximised out within the period.

A workshop's daily effort, say (invented), beside its savings and its tools chosen for tomorrow.  A choice ``e``
that sets no state, whose value no law of motion and no draw's probability uses (directly or through a define),
changes nothing tomorrow: given today's state and the choices that set states, the best ``e`` is the one with
the largest expected reward today (:func:`maximised`; over the draws after the choice, where feasible), and the
value ``V(s) = max_x max_e [r(s, x, e) + β E V(s'(s, x))]`` is ``max_x [r*(s, x) + β E V(s')]`` with
``r*(s, x) = max_e r(s, x, e)``.  Where the best ``e`` does not switch near ``(s, x)``, ``r*`` has the slopes of
``r`` at the ``e`` chosen (the envelope theorem over a finite set), so each setting choice's Euler equation
(:mod:`worker.euler_choices`) holds with ``e`` at that value today and tomorrow.  A law or probability that uses
``e`` would carry it into tomorrow (:func:`within_reason` names it, and the errors are not measured).
"""

from __future__ import annotations

import itertools

import numpy as np

from worker.euler_points import Companions, PointsRule, combinations, draw_weights, environment
from worker.euler_setup import EulerSetup
from worker.expressions import names_in
from worker.expressions.evaluator import evaluate_tree
from worker.feasibility import ModelData

__all__ = ["maximised", "no_state_choices", "within_note", "within_reason"]


def no_state_choices(data: ModelData) -> tuple[str, ...]:
    """The choices of ``data`` that set no state (not ``next_of`` one), in the model's order."""
    setting = {j for j in data.setter if j is not None}
    return tuple(name for j, name in enumerate(data.choices) if j not in setting)


def within_note(data: ModelData) -> str:
    """The part of a note that names the choices setting no state, maximised out within the period ("" with
    none)."""
    names = no_state_choices(data)
    if not names:
        return ""
    return (f"; {', '.join(f'`{name}`' for name in names)}, setting no state, maximised out within the period "
            "(the best expected reward today) in the equations of the choices that set states")


def within_reason(data: ModelData, names: tuple[str, ...]) -> str:
    """Why the choices ``names`` (setting no state) cannot be maximised out within the period: a law of motion,
    or a probability of a draw after the choice, that uses one (directly or through a define); "" when none
    does."""
    moving: dict[str, str] = {name: name for name in names}
    for define, expr in data.source.defines:
        used = [moving[used] for used in names_in(expr.tree) if used in moving]
        if used:
            moving[define] = used[0]
    for position, law in data.source.next:
        used = sorted(moving[name] for name in names_in(law.tree) if name in moving)
        if used:
            return (f"the law of motion of `{data.states[position]}` moves with `{used[0]}`, a choice that sets no "
                    "state, so that choice is not maximised out within the period")
    draws = data.draws
    for entries in () if draws is None else draws.probs:
        for entry in entries:
            used = sorted(moving[name] for name in (set() if isinstance(entry, float) else names_in(entry.tree))
                          if name in moving)
            if used:
                return (f"a probability of a draw after the choice moves with `{used[0]}`, a choice that sets no "
                        "state, so that choice is not maximised out within the period")
    return ""


def maximised(data: ModelData, found: EulerSetup, rules: dict[str, PointsRule]) -> Companions:
    """``beside(points) -> {choice: e}`` of the companions of ``found`` (by their ``rules``) and of every choice
    that sets no state, maximised out within the period at ``points`` (m, states), every shock point: the value of
    its grid (of their combinations, C order, the first on ties) with the largest expected reward over the draws
    after the choice, where every feasibility expression holds, the setting choices at their ``rules``' values
    (``found.choice``'s among them).  Where no value is feasible the first is kept (the reward is then not
    finite there, and the point not measured)."""
    names = no_state_choices(data)
    grids = [np.asarray(data.choice_grids[data.choices.index(name)], dtype=np.float64) for name in names]
    rows = np.array(list(itertools.product(*grids)), dtype=np.float64)  # (combinations, names)
    companions = [choice for _, choice in found.companions]
    position = data.states.index(found.state)
    shocks = data.shock_table[None, :, :]

    def beside(points: np.ndarray) -> dict[str, np.ndarray]:
        setting = {name: rules[name](points) for name in companions}
        if not names:
            return setting
        x = rules[found.choice](points)
        columns = {name: points[:, t:t + 1] for t, name in enumerate(data.states) if t != position}
        columns.update(setting)
        k = points[:, position:position + 1]
        best = np.full(x.shape, -np.inf)
        chosen = np.zeros(x.shape, dtype=np.int64)
        with np.errstate(all="ignore"):
            for r, row in enumerate(rows):
                values = {name: np.full(x.shape, value) for name, value in zip(names, row)}
                total = np.zeros(x.shape)
                draws = combinations(data)
                for d, drawn in enumerate(draws):
                    env = environment(data, found, k, shocks, x, {**columns, **values, **drawn})
                    if d == 0:
                        chances = draw_weights(data, env, x.shape)
                        allowed = np.ones(x.shape, dtype=bool)
                        for expr in data.source.feasible:
                            allowed &= np.broadcast_to(evaluate_tree(expr.tree, env), x.shape) != 0.0
                    reward = np.broadcast_to(evaluate_tree(data.source.reward.tree, env), x.shape)
                    total = total + np.where(chances[d] > 0.0, chances[d] * reward, 0.0)
                total = np.where(allowed & ~np.isnan(total), total, -np.inf)
                better = total > best
                best, chosen = np.where(better, total, best), np.where(better, r, chosen)
        return {**setting, **{name: rows[chosen, column] for column, name in enumerate(names)}}

    return beside
