"""What a generated module depends on, and the runtime ``ctx`` every kernel takes.

`KernelLayout` is a model's *structure* (counts of states, shocks and
choices, which state each ``next_of`` choice sets, the backend, and the
search variants that apply); `ModelSource` holds its parsed expressions.
Together they determine the generated source.  The numbers of a document —
params, grids, chains — go into `context` instead, as runtime arrays, so a
sweep over params or grid sizes reuses one compiled module.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from worker import expressions

__all__ = ["KernelLayout", "Meta", "ModelSource", "context", "layout_for"]


@dataclass(frozen=True)
class KernelLayout:
    """The structure a generated module depends on (no document numbers).

    Attributes
    ----------
    n_states, n_shocks, n_choices : int
        Counts of state axes, shock chains and choices.
    setter : tuple of (int or None)
        Per state, the choice that is ``next_of`` it, or None when it moves
        by a ``next`` expression (interpolated).
    backend : str
        ``expr`` or ``table``.
    hinted_axis : int or None
        The state axis hinted searches run along (the state the last choice
        sets, or 0), or None when hints cannot be used.  With several choices
        the hinted search runs along the last one, for every combination of
        the others.
    pyramid_axis : int or None
        The single state axis whose next index varies within a block of the
        last choice (the bound then uses exact block maxima along it), or
        None (a constant next index, or several varying: see ``bound_kind``).
    bound_kind : str
        ``fixed`` (tomorrow's grid state does not vary inside a block),
        ``pyramid`` or ``global`` (the shock's maximum over all grid states).
    draws : int
        ``table`` backend with draws after the choice and an interpolated
        state: the number of draw combinations, each with its own nodes and
        probability (read from ``ctx``; the source depends only on there
        being draws, so every count shares one module); else 0.
    """

    n_states: int
    n_shocks: int
    n_choices: int
    setter: tuple[int | None, ...]
    backend: str
    hinted_axis: int | None
    pyramid_axis: int | None
    bound_kind: str
    draws: int = 0

    @property
    def interpolated(self) -> tuple[int, ...]:
        return tuple(t for t, j in enumerate(self.setter) if j is None)

    @property
    def nodes(self) -> int:
        return 2 ** len(self.interpolated) * max(self.draws, 1)


@dataclass(frozen=True)
class ModelSource:
    """The parsed expressions of a model, with the names they may use.

    ``params``, ``states``, ``shocks``, ``choices`` are name lists in
    document order; ``defines`` is ``[(name, expression), ...]`` in order;
    ``next`` maps a state's position to its expression.
    """

    params: tuple[str, ...]
    states: tuple[str, ...]
    shocks: tuple[str, ...]
    choices: tuple[str, ...]
    defines: tuple[tuple[str, expressions.Expression], ...]
    reward: expressions.Expression
    feasible: tuple[expressions.Expression, ...]
    next: tuple[tuple[int, expressions.Expression], ...]


def layout_for(
    setter: Sequence[int | None], n_shocks: int, n_choices: int, backend: str, hints_usable: bool, draws: int = 0
) -> KernelLayout:
    """Work out the kernel layout of a model structure (``draws``: see :class:`KernelLayout`)."""
    n_states = len(setter)
    inner = n_choices - 1
    varying = [t for t, j in enumerate(setter) if j is None or j == inner]
    if not varying:
        bound_kind, pyramid_axis = "fixed", None
    elif len(varying) == 1:
        bound_kind, pyramid_axis = "pyramid", varying[0]
    else:
        bound_kind, pyramid_axis = "global", None
    hinted_axis = None
    if hints_usable and n_choices >= 1:
        # The hinted search runs along the last choice (with several, once for each combination of the others).
        own = [t for t, j in enumerate(setter) if j == inner]
        hinted_axis = own[0] if own else 0
    draws = draws if backend == "table" and None in setter else 0
    return KernelLayout(
        n_states, n_shocks, n_choices, tuple(setter), backend, hinted_axis, pyramid_axis, bound_kind, draws
    )


def _packed(grids: Sequence[np.ndarray]) -> tuple[np.ndarray, list[int], list[int], list[int]]:
    """Concatenated grids with their offsets, sizes and C-order strides."""
    sizes = [int(g.size) for g in grids]
    offsets = [sum(sizes[:t]) for t in range(len(sizes))]
    strides = [math.prod(sizes[t + 1 :]) for t in range(len(sizes))]
    flat = np.ascontiguousarray(np.concatenate(grids) if grids else np.zeros(0), dtype=np.float64)
    return flat, offsets, sizes, strides


def context(
    params: np.ndarray,
    state_grids: Sequence[np.ndarray],
    shock_table: np.ndarray,
    choice_grids: Sequence[np.ndarray],
    tables: tuple[np.ndarray, ...] | None = None,
) -> tuple[np.ndarray, ...]:
    """The ``ctx`` tuple every kernel takes.

    ``expr`` backend (``tables`` None): ``(params, state_grid, shock_table,
    choice_grid, meta)``; ``table`` backend: ``(R, next_base, node_lower,
    node_weight, meta)``, or with draws after the choice ``(R, next_base, node_lower, node_weight,
    draw_probability, meta)``.  Grids are concatenated; ``meta`` (int64) holds, in
    order, the state grids' offsets, sizes and C-order strides, then the
    choice grids' (see :class:`Meta`).  Few entries keep numba's typing of
    every kernel cheap.
    """
    state_flat, state_offsets, state_sizes, state_strides = _packed(state_grids)
    choice_flat, choice_offsets, choice_sizes, choice_strides = _packed(choice_grids)
    meta = np.array(
        state_offsets + state_sizes + state_strides + choice_offsets + choice_sizes + choice_strides, dtype=np.int64
    )
    if tables is None:
        return (
            np.ascontiguousarray(params, dtype=np.float64),
            state_flat,
            np.ascontiguousarray(shock_table, dtype=np.float64),
            choice_flat,
            meta,
        )
    return (*tables, meta)


class Meta:
    """Source text of the entries of ``meta`` for ``d`` states and ``q`` choices."""

    def __init__(self, d: int, q: int) -> None:
        self.d, self.q = d, q

    def soff(self, t: int) -> str:
        return f"meta[{t}]"

    def ssize(self, t: int) -> str:
        return f"meta[{self.d + t}]"

    def sstride(self, t: int) -> str:
        return f"meta[{2 * self.d + t}]"

    def coff(self, t: int) -> str:
        return f"meta[{3 * self.d + t}]"

    def csize(self, t: int) -> str:
        return f"meta[{3 * self.d + self.q + t}]"
