"""Simulated paths of a continuous-choice model: states off the grid, the policy interpolated.

Each path starts at ``start`` — the state values as given (not moved to a
grid point) and the nearest point of each shock — or, when absent, at a grid
point drawn from the stationary distribution (Young lotteries, see
:mod:`worker.continuous.problem`).  Every period the choice is the solved
policy interpolated multilinearly along the state grids at the path's
state, for its shock point; tomorrow's state is the choice itself for the
``next_of`` state and the ``next`` expressions for the others (evaluated with
numpy); a value outside a grid is moved to its nearer end and counted.  With
other (discrete) choices beside the continuous one, the path takes the
combination of them chosen at the grid point of largest multilinear weight
(the nearest corner), and the continuous choice interpolated over the corners
that chose the same combination (their weights renormalised), so two regimes
are never averaged.  The
shock moves by its chain: one uniform draw per path, located in the
cumulative sums of the chain's row (``numpy.random.default_rng(seed)``; the
same seed gives the same paths).
"""

from __future__ import annotations

from typing import Any

import numpy as np

from worker.draws import draw_probabilities
from worker.errors import InvalidDocument
from worker.expressions import evaluate
from worker.grids import locate

__all__ = ["simulate_paths"]


def simulate_paths(problem: Any, policy: np.ndarray, spec: Any, path: str,
                   stationary: Any, summarise: Any) -> dict[str, Any]:
    """Summary and first path of ``spec.paths`` simulated paths; the keys of :func:`worker.report.simulate_report`.

    ``stationary(matrix) -> (pi, info)`` gives the distribution to draw starts from; ``summarise(samples)``
    the summary of one series (both from :mod:`worker.report`, which calls this).
    """
    data = problem.model_data
    periods, paths = int(spec.periods), int(spec.paths)
    rng = np.random.default_rng(spec.seed)
    n_z = data.n_shocks
    d = len(data.states)
    chosen_values, combos = problem.split_policy(policy)
    values = chosen_values.reshape(data.n_grid, n_z)
    combos = combos.reshape(data.n_grid, n_z)
    others = problem.choice_values(policy)
    warnings: list[str] = []
    if spec.start is None:
        pi, info = stationary(problem.policy_matrix(policy))
        warnings.extend(info["warnings"])
        cumulative = np.cumsum(pi)
        first = np.minimum(np.searchsorted(cumulative, rng.random(paths) * cumulative[-1], side="right"), pi.size - 1)
        env = data.state_env(first)
        x = np.column_stack([env[name][:, 0] for name in data.states])
        z = first % n_z
    else:
        x, z = _start(data, spec.start, path, paths)
    chain = np.cumsum(data.transition, axis=1)
    states = np.empty((periods, paths, d))
    shocks = np.empty((periods, paths), dtype=np.int64)
    chosen = np.empty((periods, paths))
    picked = {name: np.empty((periods, paths)) for name in problem.others}
    clamped = 0
    for t in range(periods):
        states[t], shocks[t] = x, z
        a, at = _interpolate(data, values, combos, x, z)
        chosen[t] = a
        fixed = {name: others[name].reshape(data.n_grid, n_z)[at, z] for name in problem.others}
        for name, value in fixed.items():
            picked[name][t] = value
        if t + 1 == periods:
            break
        x, out = _tomorrow(problem, data, x, z, {problem.choice: a, **fixed}, rng)
        clamped += out
        draws = rng.random(paths) * chain[z, -1]
        z = np.minimum((chain[z] <= draws[:, None]).sum(axis=1), n_z - 1)
    if clamped:
        warnings.append(f"{clamped} simulated next states fell outside their grid and were moved to its nearer end")
    series = {name: states[:, :, k] for k, name in enumerate(data.states)}
    series.update({name: data.shock_table[shocks, k] for k, name in enumerate(data.shocks)})
    series[problem.choice] = chosen
    series.update(picked)
    summary = {name: summarise(sample) for name, sample in series.items()}
    first_path = {name: sample[:, 0].tolist() for name, sample in series.items()}
    return {"periods": periods, "paths": paths, "seed": spec.seed, "summary": summary, "first_path": first_path,
            "warnings": warnings, "interpolated": True}


def _start(data: Any, start: Any, path: str, paths: int) -> tuple[np.ndarray, np.ndarray]:
    names = [*data.states, *data.shocks]
    if not isinstance(start, dict):
        if len(names) != 1:
            raise InvalidDocument.at(path, f"give a value for each of {', '.join(names)}")
        start = {names[0]: start}
    errors = [{"path": f"{path}.{name}", "message": f"not an axis; the axes are {', '.join(names)}"}
              for name in sorted(set(start) - set(names))]
    errors += [{"path": f"{path}.{name}", "message": "a start value is needed for this axis"}
               for name in names if name not in start]
    for name in names:
        value = start.get(name)
        if name in start and (isinstance(value, bool) or not isinstance(value, (int, float)) or not np.isfinite(value)):
            errors.append({"path": f"{path}.{name}", "message": f"expected a finite number, got {value!r}"})
    if errors:
        raise InvalidDocument(errors)
    x = np.array([[min(max(float(start[name]), grid[0]), grid[-1])
                   for name, grid in zip(data.states, data.state_grids)]] * paths)
    index = [int(np.argmin(np.abs(values - float(start[name]))))
             for name, values in zip(data.shocks, data.shock_values)]
    z = int(np.ravel_multi_index(tuple(index), tuple(v.size for v in data.shock_values))) if index else 0
    return x, np.full(paths, z, dtype=np.int64)


def _interpolate(data: Any, values: np.ndarray, combos: np.ndarray, x: np.ndarray,
                 z: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The policy at states ``x`` (paths, d) and shock rows ``z``: ``(the continuous choice, the grid point
    whose combination of the other choices is taken)``; multilinear along the state grids over the corners
    that chose the nearest corner's combination."""
    sizes = data.state_sizes
    strides = [int(np.prod(sizes[t + 1:])) for t in range(len(sizes))]
    located = [locate(grid, x[:, t])[:2] for t, grid in enumerate(data.state_grids)]
    corners = 2 ** len(sizes)
    index = np.zeros((corners, x.shape[0]), dtype=np.int64)
    weight = np.ones((corners, x.shape[0]))
    for corner in range(corners):
        for t, (lower, share) in enumerate(located):
            bit = (corner >> t) & 1
            index[corner] += strides[t] * (lower + bit)
            weight[corner] *= share if bit else 1.0 - share
    paths = np.arange(x.shape[0])
    nearest = index[np.argmax(weight, axis=0), paths]
    same = combos[index, z[None, :]] == combos[nearest, z][None, :]
    kept = np.where(same, weight, 0.0)
    out = (kept * values[index, z[None, :]]).sum(axis=0) / kept.sum(axis=0)
    return out, nearest


def _tomorrow(problem: Any, data: Any, x: np.ndarray, z: np.ndarray,
              chosen: dict[str, np.ndarray], rng: np.random.Generator) -> tuple[np.ndarray, int]:
    """Tomorrow's states (paths, d) after the choices ``chosen`` (name → (paths,)), moved into the grids, and
    how many were moved; with draws after the choice, each path's combination is drawn by its probabilities
    at the path's state and choice (checked by the rules of :func:`worker.draws.draw_probabilities`)."""
    env: dict[str, Any] = dict(zip(data.params, data.param_values.tolist()))
    env.update({name: x[:, t] for t, name in enumerate(data.states)})
    env.update({name: data.shock_table[z, k] for k, name in enumerate(data.shocks)})
    env.update(chosen)
    a = chosen[problem.choice]
    with np.errstate(all="ignore"):
        draws = data.draws
        for name, expr in data.source.defines:
            if draws is None or name not in draws.dependent:
                env[name] = evaluate(expr, env)
        if draws is not None:
            shaped = {name: np.asarray(value, dtype=np.float64).reshape(-1, 1) for name, value in env.items()
                      if np.ndim(value) == 1}
            probs = draw_probabilities(draws, {**env, **shaped}, (a.size, 1), np.ones((a.size, 1), dtype=bool),
                                       lambda r, c: f"simulated path {r}")[:, :, 0]
            cumulative = np.cumsum(probs, axis=0)
            k = np.minimum((cumulative < rng.random(a.size) * cumulative[-1]).sum(axis=0), draws.size - 1)
            index = np.unravel_index(k, [v.size for v in draws.values])
            env.update({name: values[i] for name, values, i in zip(draws.names, draws.values, index)})
            for name, expr in data.source.defines:
                if name in draws.dependent:
                    env[name] = evaluate(expr, env)
        laws = dict(data.source.next)
        out = np.empty_like(x)
        moved = 0
        for t, grid in enumerate(data.state_grids):
            setter = data.setter[t]
            value = chosen[data.choices[setter]] if setter is not None else np.broadcast_to(
                evaluate(laws[t], env), a.shape)
            moved += int(np.count_nonzero((value < grid[0]) | (value > grid[-1])))
            out[:, t] = np.clip(value, grid[0], grid[-1])
    return out, moved
