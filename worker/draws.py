"""Shocks drawn after the choice: their numbers, their evaluation with numpy, and their size.

A grid model's shock with ``"timing": "after_choice"`` is an iid draw
revealed after the period's choice (see the README, "Draws revealed after
the choice").  It is not an axis of the value function: for each (point,
choice) the reward is its expectation over the draws and tomorrow's state is
the mixture over them, each draw's next state split between grid points as
without draws.  Several such shocks are drawn independently given the point
and choice: their combinations (C order, first shock slowest) carry the
product of their probabilities.

Only the ``tables`` reward storage solves such a model: the tables hold the
expected reward and, per (point, choice), every draw's interpolation nodes
with the draw's probability (:func:`worker.gridtables.precompute_tables`),
and the generated kernels fold the probability into the nodes' weights
(:meth:`worker._codegen.writer.KernelWriter.nodes`).  Nothing here imports
numba (the service's door checks the tables' size with :mod:`worker.drawcheck`).
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np

from worker.document.limits import ROW_SUM_TOLERANCE
from worker.drawnames import draw_dependent, draw_names
from worker.errors import InvalidDocument, join_path
from worker.expressions import Expression, evaluate, parse
from worker.shocks import apply_transform

__all__ = ["Draws", "draw_probabilities", "model_draws"]


@dataclass(frozen=True)
class Draws:
    """The after-choice draws of a grid model.

    Attributes
    ----------
    names : tuple of str
        The draws, in document order.
    values : list of (k_d,) float64
        Each draw's values (transform applied).
    probs : list of list of (float or Expression)
        Each draw's probabilities, one entry per value.
    dependent : frozenset of str
        The draws and the defines computed from them (evaluated once per combination).
    """

    names: tuple[str, ...]
    values: list[np.ndarray]
    probs: list[list[float | Expression]]
    dependent: frozenset[str]

    @property
    def size(self) -> int:
        """Combinations of the draws' values."""
        return math.prod(v.size for v in self.values)

    def combination(self, k: int) -> dict[str, float]:
        """The draws' values in combination ``k``."""
        index = np.unravel_index(k, [v.size for v in self.values])
        return {name: float(v[i]) for name, v, i in zip(self.names, self.values, index)}


def model_draws(model: Any) -> Draws | None:
    """The after-choice draws of a validated grid model, or None."""
    names = draw_names(model)
    if not names:
        return None
    values, probs = [], []
    for name in names:
        spec = model.shocks[name]
        where = join_path("model", "shocks", name)
        values.append(np.asarray(apply_transform(np.asarray(spec.iid.values, dtype=np.float64), spec.transform,
                                                 path=where), dtype=np.float64))
        probs.append([
            parse(entry, path=join_path(where, "iid", "probs", k)) if isinstance(entry, str) else float(entry)
            for k, entry in enumerate(list(spec.iid.probs))
        ])
    return Draws(names, values, probs, frozenset(draw_dependent(model)))


def draw_probabilities(
    draws: Draws, env: dict[str, Any], shape: tuple[int, int], feasible: np.ndarray,
    describe: Callable[[int, int], str],
) -> np.ndarray:
    """Probabilities ``(K, rows, columns)`` of every combination of the draws at a block of (point, choice) pairs.

    Each draw's probabilities are checked where the pair is feasible: finite, non-negative, summing to one
    (both within ``ROW_SUM_TOLERANCE``; a probability that far below 0, a rounding error, counts as 0).
    ``describe(r, c)`` names the block's pair ``(r, c)`` in the error.

    Raises
    ------
    InvalidDocument
        At ``model.shocks.<name>.iid.probs``, naming the first offending point and choice.
    """
    per_draw = []
    for name, entries in zip(draws.names, draws.probs):
        with np.errstate(all="ignore"):
            if any(isinstance(e, Expression) for e in entries):
                table = np.stack([np.broadcast_to(np.asarray(evaluate(e, env) if isinstance(e, Expression) else e,
                                                             dtype=np.float64), shape) for e in entries])
            else:  # numbers only: one broadcast, not one per value (20,000 values made it most of a fill)
                table = np.broadcast_to(np.asarray(entries, dtype=np.float64).reshape(-1, 1, 1),
                                        (len(entries), *shape))
        total = table.sum(axis=0)
        # An expression that should give 0 may round to -1e-17: that much below 0 counts as 0.
        wrong = feasible & ~(np.isfinite(table).all(axis=0) & (table >= -ROW_SUM_TOLERANCE).all(axis=0)
                             & (np.abs(total - 1.0) <= ROW_SUM_TOLERANCE))
        if wrong.any():
            r, c = np.argwhere(wrong)[0]
            shown = ", ".join(f"{p:.6g}" for p in table[:, r, c])
            raise InvalidDocument.at(
                join_path("model", "shocks", name, "iid", "probs"),
                f"at {describe(int(r), int(c))} the probabilities are [{shown}] (sum {total[r, c]:.12g}); they "
                f"must be non-negative and sum to 1 (within {ROW_SUM_TOLERANCE:g}) at every point and feasible "
                "choice",
            )
        per_draw.append(np.where(feasible, np.maximum(table, 0.0), 0.0))
    out = per_draw[0]
    for table in per_draw[1:]:
        out = (out[:, None] * table[None, :]).reshape(-1, *shape)
    return out
