"""What a solved grid model reports beside its answer: edge hits, clamped next values, excluded rewards.

:class:`GridDiagnostics` is the diagnostics half of
:class:`worker.gridproblem.GridProblem` (a base class of it), kept apart so
that the Bellman and fixed-policy code reads in one sitting.
"""

from __future__ import annotations

from types import ModuleType
from typing import Any, Callable

import numpy as np

from worker.draws import draw_probabilities
from worker.estimate import GridPlan
from worker.expressions import evaluate
from worker.feasibility import ModelData
from worker.grids import locate
from worker.problem import Hints

__all__ = ["EDGE_WARNING_SHARE", "SCAN_MAX_PAIRS", "GridDiagnostics", "choice_real_ends_of", "end_warnings",
           "real_ends_of"]

EDGE_WARNING_SHARE = 0.01
"""Share of points at the lowest or highest point of a choice grid above which the diagnostics warn."""
SCAN_MAX_PAIRS = 20_000_000
"""On the fly, (point, choice) pairs up to which the diagnostics count clamped pairs over all choices."""
CLIMBED_SCOPE = (
    " evaluated while the static choice was maximised out (under the concave hint its other values were proven "
    "lower without evaluating them)"
)
"""Said of counted pairs when a climb along the static choice filled the tables (:mod:`worker.statickernel`)."""


def end_warnings(choice: str, grid: np.ndarray, lowest: float, highest: float, state: str | None,
                 real: tuple[str, ...] = ()) -> list[str]:
    """The warnings about the shares ``lowest`` and ``highest`` of points choosing an end of ``grid``: the
    choice's own grid, or for a choice ``next_of`` a ``state`` that state's grid.  At :data:`EDGE_WARNING_SHARE` or
    more, unless ``real`` (the state's ``real_ends``, or the choice's own for a grid of its own) lists that end
    as a real limit of the problem.  Grid and continuous choices alike."""
    grid_of = f"choice `{choice}`" if state is None else f"the grid of state `{state}`"
    declare = f"model.choices.{choice}.real_ends" if state is None else f"model.states.{state}.real_ends"
    warnings = []
    if highest >= EDGE_WARNING_SHARE and "max" not in real:
        warnings.append(
            f"{highest:.1%} of points choose the highest point of `{choice}` ({grid[-1]:.6g}): the best choice "
            f"may lie beyond the grid; consider a larger max for {grid_of}"
            + (f", or list \"max\" in {declare} if it is a real limit" if declare else "")
        )
    if lowest >= EDGE_WARNING_SHARE and "min" not in real:
        warnings.append(
            f"{lowest:.1%} of points choose the lowest point of `{choice}` ({grid[0]:.6g}): unless that is a "
            f"real limit of the problem (a borrowing limit, say), consider a smaller min for {grid_of}"
            + (f"; if it is, list \"min\" in {declare}" if declare else "")
        )
    return warnings


def real_ends_of(doc: Any) -> dict[str, tuple[str, ...]]:
    """Each state's ``real_ends`` (grid models; empty otherwise)."""
    states = getattr(doc.model, "states", None)
    return {name: tuple(axis.real_ends) for name, axis in states.items()} if isinstance(states, dict) else {}


def choice_real_ends_of(doc: Any) -> dict[str, tuple[str, ...]]:
    """Each choice's own ``real_ends`` (a grid or menu of its own; grid models; empty otherwise)."""
    choices = getattr(doc.model, "choices", None)
    return {name: tuple(spec.real_ends) for name, spec in choices.items()} if isinstance(choices, dict) else {}


class GridDiagnostics:
    """The ``diagnostics`` of :class:`worker.problem.CompiledProblem` for grid models.

    Reads the attributes :class:`~worker.gridproblem.GridProblem` sets (the
    ones annotated below).
    """

    n: int
    plan: GridPlan
    reward_storage: str
    hints: Hints
    timings: dict[str, float]
    bridge_note: str
    _data: ModelData
    _full: ModelData
    _real_ends: dict[str, tuple[str, ...]]
    _choice_real_ends: dict[str, tuple[str, ...]]
    _static: tuple[str, ...]
    _kernels: ModuleType | None
    _ctx: tuple[np.ndarray, ...]
    _counts: dict[str, Any]
    _last_exact: dict[str, Any] | None
    _nodes: Callable[[np.ndarray], tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]]
    _zero_continuation: Callable[[], np.ndarray]

    def _choice_indices(self, policy: np.ndarray) -> tuple[np.ndarray, ...]:
        """Per choice of the model (static ones too), the (n,) grid index ``policy`` (kernel choices) picks."""
        policy = np.asarray(policy, dtype=np.int64).reshape(self.n)
        dynamic = np.unravel_index(policy, self._data.choice_sizes)
        if not self._static:
            return dynamic
        full = self._full
        pick = self._counts["static_pick"][np.arange(self.n), policy]
        static = iter(np.unravel_index(pick, [g.size for name, g in zip(full.choices, full.choice_grids)
                                              if name in self._static]))
        kept = iter(dynamic)
        return tuple(next(static) if name in self._static else next(kept) for name in full.choices)

    def diagnostics(self, policy: np.ndarray, *, all_pairs: bool = True) -> dict[str, Any]:
        """Reward storage, hints, edge hits per choice, clamped next values and excluded rewards, with warnings.

        ``all_pairs=False`` skips counting clamped pairs over every choice on the fly (a finite horizon's later
        periods: :mod:`worker.periods` keeps the first period's count).
        """
        data = self._full
        warnings: list[str] = []
        notes = [f"reward storage {self.reward_storage}: {self.bridge_note or self.plan.reason}"]
        if self._static:
            names = ", ".join(f"`{name}`" for name in self._static)
            notes.append(
                f"{names} affect{'s' if len(self._static) == 1 else ''} nothing tomorrow: maximised out within the "
                "period once, with the reward tables, for each value of the other choices"
            )
        if data.draws is not None:
            names = ", ".join(f"`{name}`" for name in data.draws.names)
            notes.append(
                f"{names} drawn after the choice ({data.draws.size:,} combinations), integrated out within the "
                "period: rewards are expectations over the draws and tomorrow's point the mixture over them"
            )
        if self.plan.hint_note:
            notes.append(self.plan.hint_note)
        model_choices = self._choice_indices(policy)
        edge_hits = {}
        for j, (name, grid, index) in enumerate(zip(data.choices, data.choice_grids, model_choices)):
            lowest = float(np.mean(index == 0))
            highest = float(np.mean(index == grid.size - 1))
            edge_hits[name] = {"lowest": lowest, "highest": highest}
            if not self._is_choice_grid(j):
                continue
            state = self._state_of(j)
            real = self._real_ends.get(state, ()) if state is not None else self._choice_real_ends.get(name, ())
            warnings += end_warnings(name, grid, lowest, highest, state, real)
        result: dict[str, Any] = {
            "reward_storage": self.reward_storage,
            "hints": {"monotone": self.hints.monotone, "concave": self.hints.concave},
            "edge_hits": edge_hits,
            "maximised_within_period": list(self._static),
        }
        clamped = self._clamped(policy, warnings, all_pairs)
        if clamped is not None:
            result["clamped_next"] = clamped
        excluded = self._excluded(warnings)
        if excluded is not None:
            result["nonfinite_rewards"] = excluded
        result["timings"] = dict(self.timings)
        result["notes"] = notes
        result["warnings"] = warnings
        return result

    def _is_choice_grid(self, j: int) -> bool:
        """True for ``next_of`` choices and min/max/points grids, whose ends are arbitrary; not for menus."""
        return not self._full.choice_is_menu[j]

    def _state_of(self, j: int) -> str | None:
        """The state choice ``j`` is ``next_of``, or None."""
        return next((self._full.states[t] for t, setter in enumerate(self._full.setter) if setter == j), None)

    def _clamped(self, policy: np.ndarray, warnings: list[str], all_pairs: bool = True) -> dict[str, Any] | None:
        data = self._data
        interpolated = [data.states[t] for t, j in enumerate(data.setter) if j is None]
        if not interpolated:
            return None
        policy = np.asarray(policy, dtype=np.int64).reshape(self.n)
        if self.reward_storage == "on_the_fly":
            at_policy = int(self._nodes(policy)[3].sum())
        else:
            at_policy = self._clamped_at_policy_numpy(policy)
        overall: dict[str, Any] | None
        if self.reward_storage == "tables":
            count, allowed = self._counts["clamped"], self._counts["allowed"]
            overall = {"count": count, "share": count / max(allowed, 1), "of": "allowed (state, choice) pairs"
                       + (CLIMBED_SCOPE if self._counts.get("climbed") else "")}
        elif all_pairs and data.n * data.n_choices <= SCAN_MAX_PAIRS:
            allowed_per = np.empty(self.n, dtype=np.int64)
            clamped_per = np.empty(self.n, dtype=np.int64)
            bad_per = np.empty(self.n, dtype=np.int64)
            self._kernels.scan_pairs(self._zero_continuation(), self._ctx, allowed_per, clamped_per, bad_per)
            count, allowed = int(clamped_per.sum()), int(allowed_per.sum())
            overall = {"count": count, "share": count / max(allowed, 1), "of": "allowed (state, choice) pairs"}
        else:
            overall = None
        names = ", ".join(f"`{name}`" for name in interpolated)
        result = {
            "states": interpolated,
            "policy": {"count": at_policy, "share": at_policy / self.n},
            "all_pairs": overall,
        }
        if overall is None:
            result["note"] = f"not counted over all {data.n * data.n_choices:,} pairs (more than {SCAN_MAX_PAIRS:,})"
        if at_policy:
            warnings.append(
                f"under the final policy, tomorrow's {names} falls outside its grid at {at_policy:,} of {self.n:,} "
                f"points ({at_policy / self.n:.1%}) and was moved to the nearest end; consider widening the grid"
            )
        return result

    def _clamped_at_policy_numpy(self, policy: np.ndarray) -> int:
        data = self._full
        rows = np.arange(self.n, dtype=np.int64)
        env: dict[str, Any] = dict(zip(data.params, data.param_values.tolist()))
        env.update({k: v[:, 0] for k, v in data.state_env(rows).items()})
        env.update(
            {
                name: grid[index]
                for name, grid, index in zip(data.choices, data.choice_grids, self._choice_indices(policy))
            }
        )
        clamped = np.zeros(self.n, dtype=bool)
        draws = data.draws
        if draws is not None:
            # With draws after the choice: counted where some draw that can happen leaves the grid.
            env = {k: np.asarray(v)[:, None] if np.ndim(v) else v for k, v in env.items()}
        with np.errstate(all="ignore"):
            for name, expr in data.source.defines:
                if draws is None or name not in draws.dependent:
                    env[name] = evaluate(expr, env)
            if draws is not None:
                probs = draw_probabilities(draws, env, (self.n, 1), np.ones((self.n, 1), dtype=bool),
                                           lambda r, c: data.describe_state(r))[:, :, 0]
            for k in range(draws.size if draws is not None else 1):
                if draws is not None:
                    env.update(draws.combination(k))
                    for name, expr in data.source.defines:
                        if name in draws.dependent:
                            env[name] = evaluate(expr, env)
                for t, expr in data.source.next:
                    values = np.broadcast_to(evaluate(expr, env), (self.n, 1) if draws is not None else (self.n,))
                    out = locate(data.state_grids[t], values)[2].reshape(self.n)
                    clamped |= out if draws is None else out & (probs[k] > 0)
        return int(clamped.sum())

    def _excluded(self, warnings: list[str]) -> dict[str, Any] | None:
        data = self._full
        if self.reward_storage == "tables":
            count, example = self._counts["bad"], self._counts["bad_example"]
            scope = "all (state, choice) pairs" + (CLIMBED_SCOPE if self._counts.get("climbed") else "")
        else:
            if self._last_exact is None:
                return None
            bad = self._last_exact["bad"]
            count = int(bad.sum())
            example = None
            if count:
                i = int(np.flatnonzero(bad)[0])
                example = (i, int(self._last_exact["bad_choice"][i]))
            scope = "the (state, choice) pairs the last exact step evaluated"
        if not count:
            return None
        state, choice = data.describe_state(example[0]), data.describe_choice(example[1])
        warnings.append(
            f"the reward (or a next value) is NaN or +inf at {count:,} feasible (state, choice) pairs, e.g. at "
            f"{state} with {choice}; those pairs were treated as not allowed. This usually means an expression "
            "leaves its domain (a log or fractional power of a negative number): check `reward`, `define` and "
            "`feasible`"
        )
        return {"count": count, "scope": scope, "example": {"state": state, "choice": choice}}

