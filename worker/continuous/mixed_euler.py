"""Euler-equation errors of a continuous choice beside other (discrete) choices.

For each combination ``d`` of the other choices' values, the model with them fixed at ``d`` (as params)
has one choice, and :mod:`worker.euler` (several states: :mod:`worker.euler_states`) measures its Euler
equation (Judd 1992) as for any one-choice model: at the test points where the search chose ``d`` today
*and* at every tomorrow's state it leads to (every shock point tomorrow; the other states by their laws,
every draw after the choice) — there the envelope condition holds with ``d`` on both days.  A finite
horizon measures each period so (:mod:`worker.horizon_euler`), today's search against ``V_{t+1}`` and
tomorrow's against ``V_{t+2}``.  A test point where the best combination differs today or tomorrow is
skipped (counted as ``constrained``, and the note gives their number): across a switch the value
function has a kink, and the first-order condition of the continuous choice alone need not hold there.
The choices at test points are the fitted problem's own search there, as for a continuous choice alone.
Where another state's law moves with the chosen state or the choice, its terms read the slopes of the solved
value (:mod:`worker.euler_laws`, ``slopes``) as for a choice alone: the one value the search maximises against,
whichever combination is fixed, and at the measured points the combination is the same today and tomorrow.

The pooled errors: ``max_log10`` the largest over the combinations, ``mean_log10`` the mean over every
point measured, ``profile`` the worst at each test point.  With the stationary distribution (an infinite
horizon's ``report.stationary``), ``weighted_mean_log10`` weights every point measured by it, read at the
test point as for one choice (:func:`worker.euler.euler_errors`, :func:`worker.euler_states.states_errors`),
renormalised over the points measured in all combinations: each combination weighs its own points, and
their sums pool them (:func:`worker.euler.pooled_weighted_mean`; a test point is measured in one
combination at most, the one chosen there).
"""

from __future__ import annotations

import dataclasses
from typing import Any, Callable

import numpy as np

from worker import _codegen
from worker.euler import EulerSetup, between_points, euler_errors, pooled_weighted_mean, setup
from worker.euler_laws import SlopeParts
from worker.euler_points import ValueParts, combinations, environment, next_points
from worker.euler_states import states_errors, test_points
from worker.feasibility import ModelData

__all__ = ["mixed_errors", "mixed_euler_report", "mixed_setup", "searcher"]


def fixed_model(data: ModelData, others: tuple[str, ...], values: np.ndarray) -> ModelData:
    """``data`` with the choices ``others`` made params of the given ``values``: a one-choice model."""
    keep = [j for j, name in enumerate(data.choices) if name not in others]
    source = data.source
    params = (*data.params, *others)
    return dataclasses.replace(
        data,
        params=params,
        param_values=np.concatenate([data.param_values, np.asarray(values, dtype=np.float64)]),
        choices=tuple(data.choices[j] for j in keep),
        choice_grids=[data.choice_grids[j] for j in keep],
        choice_is_menu=tuple(data.choice_is_menu[j] for j in keep),
        setter=tuple(None if j is None or j not in keep else keep.index(j) for j in data.setter),
        span_choice=0,
        source=_codegen.ModelSource(params=params, states=source.states, shocks=source.shocks,
                                    choices=tuple(data.choices[j] for j in keep), defines=source.defines,
                                    reward=source.reward, feasible=source.feasible, next=source.next),
    )


def mixed_euler_report(problem: Any, v: np.ndarray, discount: float, values: ValueParts | None = None,
                       distribution: np.ndarray | None = None,
                       slopes: SlopeParts | None = None) -> tuple[dict[str, Any] | None, str]:
    """``(diagnostics.euler_errors or None, note)`` of a solved continuous choice beside other choices;
    ``distribution`` the stationary one over the flat points, (n,), for ``weighted_mean_log10``; ``slopes`` the
    value's slopes where a law moves with the chosen state or the choice (:mod:`worker.euler_laws`)."""
    data = problem.model_data
    found = mixed_setup(problem, data)
    if not isinstance(found, EulerSetup):
        return None, found
    search = searcher(problem, v)
    return mixed_errors(problem, data, discount, search, (data, search), values, distribution, slopes)


def mixed_setup(problem: Any, data: ModelData) -> EulerSetup | str:
    """The Euler setup of the model with the other choices fixed, or a note why there is none.

    Another choice that sets tomorrow's value of a state is not this module's: its combination changes with
    its state from one day to the next, so the test points where the same combination is chosen today and at
    every state tomorrow (the rule here) would be few or none, and its state has no law to move by in the
    model with it fixed: :mod:`worker.continuous.setters_euler` measures that model (each choice its own
    equation), and its callers ask it first.
    """
    setting = [name for name in problem.others if data.setter.count(data.choices.index(name))]
    if setting:
        raise ValueError(f"`{setting[0]}` sets a state: worker.continuous.setters_euler measures this model")
    found = setup(fixed_model(data, problem.others, problem.combos[0]))
    if not isinstance(found, EulerSetup):
        return found or ("Euler-equation errors were not measured: they need a continuous choice that sets "
                         "tomorrow's value of a state (next_of)")
    return found


Search = Callable[[np.ndarray], tuple[np.ndarray, np.ndarray]]
"""``search(points) -> (choice, combination)``: at points (m, states) — or (m,) with one state — every shock
point, both (m, shock points)."""


def searcher(problem: Any, v: np.ndarray, enter: Callable[[], None] | None = None) -> Search:
    """The fitted problem's search against the value ``v`` (remembered by the points asked for); ``enter``
    puts the problem in its period first (a finite horizon's)."""
    data = problem.model_data
    n_z, d = data.n_shocks, len(data.states)
    remembered: dict[bytes, tuple[np.ndarray, np.ndarray]] = {}

    def search(points: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        points = np.ascontiguousarray(points, dtype=np.float64).reshape(-1, d)
        key = points.tobytes()
        if key not in remembered:
            if enter is not None:
                enter()
            m = points.shape[0]
            rows = np.tile(np.arange(n_z, dtype=np.int64), m)
            _, chosen = problem.choose_at(v, np.repeat(points, n_z, axis=0), rows, None)
            remembered[key] = (chosen[:, 0].reshape(m, n_z), chosen[:, 1].astype(np.int64).reshape(m, n_z))
        return remembered[key]

    return search


def mixed_errors(problem: Any, data: ModelData, discount: float, search: Search,
                 tomorrow: tuple[ModelData, Search], values: ValueParts | None = None,
                 distribution: np.ndarray | None = None,
                 slopes: SlopeParts | None = None) -> tuple[dict[str, Any], str]:
    """The pooled errors over the combinations of the other choices, and the note; ``data`` and ``search`` are
    today's (params, search), ``tomorrow`` the next period's (the same in an infinite horizon); ``values`` and
    ``slopes`` as :func:`worker.euler_points.errors_at` takes them (the solved value's, whatever the combination:
    every combination's equation reads the one value tomorrow); ``distribution`` the stationary one (infinite
    horizon)."""
    n_z = data.n_shocks
    several = len(data.states) > 1
    data_next, search_next = tomorrow
    parts = []
    for d, combo in enumerate(problem.combos):
        model, model_next = fixed_model(data, problem.others, combo), fixed_model(data_next, problem.others, combo)
        found = setup(model)
        today = _at_combination(model, found, search, search_next, d)
        if several:
            parts.append(states_errors(model, found, discount, today, distribution,
                                       tomorrow=(model_next, lambda points: search_next(points)[0]), values=values,
                                       pooling=True, slopes=slopes))
        else:
            parts.append(euler_errors(model, found, discount, lambda k, today=today: today(k[:, None]),
                                      distribution, tomorrow=(model_next, lambda k: search_next(k)[0]),
                                      values=values, pooling=True))
    total = (test_points(data, found)[0].shape[0] if several else between_points(data.state_grids[0]).size) * n_z
    return _pooled(parts, total, parts[0]["define"], distribution is not None)


def _at_combination(model: ModelData, found: EulerSetup, search: Search, search_next: Search,
                    d: int) -> Callable[[np.ndarray], np.ndarray]:
    """The rule of combination ``d`` at points (m, states): the searched choice where ``d`` is chosen today and
    at every state it leads to tomorrow (every draw after the choice, every shock point), else the grid's
    lower end, which the measurement skips as constrained."""
    position = model.states.index(found.state)
    low = model.state_grids[position][0]
    shocks = model.shock_table[None, :, :]
    n_z = model.n_shocks

    def today(points: np.ndarray) -> np.ndarray:
        x, combo = search(points)
        keep = combo == d
        k = points[:, position:position + 1]
        others = {name: points[:, t:t + 1] for t, name in enumerate(model.states) if t != position}
        for drawn in combinations(model):
            env = environment(model, found, k, shocks, x, {**others, **drawn})
            _, after = search_next(next_points(model, found, env, x))
            keep &= (after.reshape(x.shape[0], n_z, n_z) == d).all(axis=2)
        return np.where(keep, x, low)

    return today


def _pooled(parts: list[dict[str, Any]], total: int, define: str,
            weighted: bool) -> tuple[dict[str, Any] | None, str]:
    points = sum(part["points"] for part in parts)
    undefined = sum(part["undefined"] for part in parts)
    measured = [part for part in parts if part["points"]]
    worst = max((part["max_log10"] for part in measured), default=None)
    mean = sum(part["mean_log10"] * part["points"] for part in measured) / points if points else None
    profile = dict(parts[0]["profile"])
    rows = [[max((value for value in values if value is not None), default=None) for values in zip(*column)]
            for column in zip(*(part["profile"]["log10_error"] for part in parts))]
    profile["log10_error"] = rows
    skipped = total - points - undefined
    note = (f"Euler-equation errors of the continuous choice at the chosen combination of the others: "
            f"{skipped:,} test points skipped (where a limit may bind, or the best combination differs today or "
            "at a state tomorrow, where the value function has a kink)")
    result = {"max_log10": worst, "mean_log10": mean, "points": points, "constrained": skipped,
              "undefined": undefined, "define": define, "profile": profile}
    if weighted:
        result["weighted_mean_log10"] = pooled_weighted_mean(parts)
    return result, note
