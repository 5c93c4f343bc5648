"""The generated module of a continuous-choice model: its search kernel and its policy kernel.

One module per model *structure* (counts of states and shocks, which state
the choice sets, the interpolation, and the expressions with their numbers
lifted into params by :func:`worker._codegen.lift_literals`), loaded through
the same kernel cache as the discrete kernels (:func:`worker._codegen.load`).

The model at one value ``c_0`` of the choice is a closure ``f(c_0) -> (value,
reward)`` inside the kernel's loop over points; numba inlines it at each call
site, so the search pays no call and no reference counting.  Parts that do
not depend on the choice are computed once per point (the hoisting of
:mod:`worker._codegen.hoist`), and so are the interval's ends.

Kernels (``P`` points given by their state values ``svals`` (P, d) and shock
row ``piz`` (P,); ``EVt`` (n_shocks, n_grid) the continuation, ``D`` its
slopes along the last state for ``monotone_cubic`` (unused for ``linear``)):

* ``search(EVt, D, beta, p, sgrid, ztab, svals, piz, order, prev, guess,
  has_guess, concave, monotone, scan_n, combos, b_pyr, b_levels, ev_abs,
  b_hull, b_hd, b_proven, out_v, out_a, out_r, out_j, start, stop)`` — the maximisation over the interval at the points
  ``order[start:stop]``, once for each row of ``combos`` (the values of the
  other choices, one combination a row; one empty row without them), the
  best combination's index in ``out_j``;
  ``prev[q]`` is the position of the point before it on the same line of
  the chosen state (``-1`` at a line's start), whose choice in the same
  combination narrows that combination's bracket under ``monotone``.  See :mod:`worker.continuous.search` for the
  search itself.  A non-empty ``b_pyr`` (the max-pyramid of ``EVt`` along the chosen state, ``b_levels`` its
  level starts, ``ev_abs`` the largest ``|EVt|``) runs the branch and bound instead of the scan where the
  module has ``BOUNDED = True``; where it also has ``PROVABLE = True``, non-empty hulls ``b_hull``/``b_hd``
  (:func:`worker.continuous.bound_kernels.build_hulls`) run the proof at the incumbent first
  (:mod:`worker.continuous.bound_proof`), counting the combinations it proves at point ``i`` in ``b_proven[i]``.
* ``bound_point`` (only where the module has ``BOUNDED = True``) — that branch and bound at one point and
  combination (:mod:`worker.continuous.bound_search`), a function of its own.
* ``policy_at(p, sgrid, ztab, svals, piz, a, combos, jc, out_r, out_x,
  out_ok)`` — the reward and tomorrow's state values ``out_x`` (P, d) at the
  fixed choices ``a`` and combinations ``jc`` of the others; ``out_ok`` false
  where the choice is not allowed.
"""

from __future__ import annotations

import numpy as np

from worker import expressions
from worker._codegen.hoist import Hoister, dependents
from worker._codegen.layout import ModelSource
from worker._codegen.source import generator_hash
from worker._codegen.writer import JIT, Lines
from worker.continuous.bound_search import BOUND_ARGUMENTS, BOUND_CALL, STACK_ROWS, bound_plan, bound_search
from worker.continuous.search import (
    EDGE_TEXT,
    KINK_AXIS,
    KINK_DRAWS_AXIS,
    KINK_DRAWS_MOST,
    KINK_DRAWS_TEXT,
    KINK_TEXT,
    SEARCH_TEXT,
)
from worker.document.limits import ROW_SUM_TOLERANCE
from worker.draws import Draws
from worker.expressions import Expression

__all__ = ["BOUND_HIGH", "BOUND_LOW", "module_text"]

BOUND_LOW = "_bound_low"
BOUND_HIGH = "_bound_high"
"""Names of the interval's ends when they are expressions: two defines placed first (they use no choice)."""


def module_text(model: ModelSource, setters: tuple[int | None, ...], cubic: bool, draws: Draws | None = None) -> str:
    """Source of the continuous-choice module.

    Parameters
    ----------
    model : ModelSource
        Expressions with their numbers lifted, the continuous choice first among ``choices`` (``c_0``) and
        the other choices after it (``c_1 …``, read from the kernels' ``combos`` table); when the
        continuous choice is not ``next_of`` a state, the first two defines are the interval's ends
        (:data:`BOUND_LOW`, :data:`BOUND_HIGH`).
    setters : per state, the position in ``model.choices`` of the choice it is ``next_of``, or None
        (its ``next`` law); the state set by position 0 is the continuous choice's target, whose grid's
        ends are its interval.
    cubic : bool
        ``monotone_cubic`` (its tensor product with several states) instead of multilinear interpolation.
    draws : the shocks drawn after the choice, or None: their values and probabilities are written into the
        kernels, which take every value's expectation over their combinations (see :meth:`_Writer._draws`).
    """
    writer = _Writer(model, setters, cubic, draws)
    kernels = [writer.search(), writer.policy_at()] + ([] if writer.plan is None else [writer.bound_point()])
    header = [
        f"# fixq generated continuous-choice kernels: {writer.d} states, {writer.m} shocks, setters {setters}, "
        f"interpolation {'monotone_cubic' if cubic else 'linear'}, draws {0 if draws is None else draws.size}",
        f"# generators {generator_hash()}",
        "import numpy as np",
        "from numba import njit",
        "from worker.expressions.interval_kernels import interval_globals",
        "from worker.kernels import locate_one",
        "from worker.continuous.bound_kernels import block_max, control_rise, cubic_rise, hull_rise",
        "from worker.continuous.interp_kernels import tensor_cubic, tensor_two",
        "",
        "globals().update(interval_globals())",
        "",
        f"BOUNDED = {writer.plan is not None}",
        f"PROVABLE = {writer.plan is not None and writer.plan.provable}",
    ]
    return "\n\n\n".join(["\n".join(header), *kernels]) + "\n"


class _Writer:
    def __init__(self, model: ModelSource, setters: tuple[int | None, ...], cubic: bool,
                 draws: Draws | None) -> None:
        self.model = model
        self.draws = draws
        self.k = 0 if draws is None else draws.size
        self.setters = setters
        self.target = next((t for t, j in enumerate(setters) if j == 0), None)
        self.cubic = cubic
        self.d = len(model.states)
        self.m = len(model.shocks)
        names: dict[str, str] = {}
        names.update({name: f"p_{k}" for k, name in enumerate(model.params)})
        names.update({name: f"s_{t}" for t, name in enumerate(model.states)})
        names.update({name: f"z_{t}" for t, name in enumerate(model.shocks)})
        names.update({name: f"c_{t}" for t, name in enumerate(model.choices)})
        names.update({name: f"d_{k}" for k, (name, _) in enumerate(model.defines)})
        drawn = set() if draws is None else set(draws.names)
        if draws is not None:
            names.update({name: f"w_{t}" for t, name in enumerate(draws.names)})
        self.names = names
        self.state_lines: list[str] = []
        self.after = dependents(model, drawn)
        dependent = dependents(model, set(model.choices) | drawn)
        hoist = Hoister(dependent, names, self.state_lines, "h_")
        self.defines: list[tuple[int, Expression]] = []
        for k, (name, expr) in enumerate(model.defines):
            if name in dependent:
                self.defines.append((k, Expression.from_tree(hoist.rewrite(expr.tree))))
            else:
                self.state_lines.append(f"d_{k} = {expressions.scalar_source(expr, names)}")
        self.feasible = [Expression.from_tree(hoist.rewrite(expr.tree)) for expr in model.feasible]
        self.reward = Expression.from_tree(hoist.rewrite(model.reward.tree))
        self.next = {t: Expression.from_tree(hoist.rewrite(expr.tree)) for t, expr in model.next}
        self.probs = [] if draws is None else [
            [e if isinstance(e, float) else Expression.from_tree(hoist.rewrite(e.tree)) for e in entries]
            for entries in draws.probs
        ]
        self.plan = bound_plan(self)

    def _src(self, expr: Expression) -> str:
        return expressions.scalar_source(expr, self.names)

    def _point(self, out: Lines) -> None:
        """Unpack point ``i``: its states, its shock row, and what does not depend on the choice."""
        out.add("iz = piz[i]")
        for t in range(self.d):
            out.add(f"s_{t} = svals[i, {t}]")
        for t in range(self.m):
            out.add(f"z_{t} = ztab[iz, {t}]")
        out.extend(self.state_lines)

    def _others(self, out: Lines, combo: str) -> None:
        """The other choices' values in combination ``combo`` of the ``combos`` table."""
        for k in range(1, len(self.model.choices)):
            out.add(f"c_{k} = combos[{combo}, {k - 1}]")

    def _prologue(self, out: Lines) -> None:
        for k in range(len(self.model.params)):
            out.add(f"p_{k} = p[{k}]")
        for t in range(self.d):
            out.add(f"off_{t} = meta[{t}]", f"size_{t} = meta[{self.d + t}]", f"stride_{t} = meta[{2 * self.d + t}]")
        if self.cubic and self.d > 1:
            out.add(f"cub_lo = np.empty({self.d}, dtype=np.int64)", f"cub_w = np.empty({self.d})",
                    f"cub_s = np.empty({4 ** (self.d - 1)})")

    def _tomorrow(self, out: Lines) -> None:
        """``x_t``: tomorrow's state values at choice ``c_0`` (NaN-checked by the caller)."""
        for t in range(self.d):
            j = self.setters[t]
            out.add(f"x_{t} = c_{j}" if j is not None else f"x_{t} = {self._src(self.next[t])}")

    def _model_at_choice(self, out: Lines, continuation: bool, store: bool = False) -> None:
        """Sets ``ok``, ``r`` and (with ``continuation``) ``val`` at choice ``c_0``."""
        out.add("ok = False", "r = -np.inf", "val = -np.inf")
        for k, expr in self.defines:
            if self.draws is None or self.model.defines[k][0] not in self.after:
                out.add(f"d_{k} = {self._src(expr)}")
        depth = out.depth
        for k, expr in enumerate(self.feasible):
            out.add(f"f_{k} = {self._src(expr)}", f"if f_{k} != 0.0:")
            out.depth += 1
        if self.draws is not None:
            self._draws(out, continuation, store)
            out.depth = depth
            return
        out.add(f"r = {self._src(self.reward)}")
        with out.block("if r - r == 0.0:"):
            self._tomorrow(out)
            check = " and ".join(f"x_{t} == x_{t}" for t in range(self.d))
            with out.block(f"if {check}:"):
                out.add("ok = True")
                if continuation:
                    self._interpolate(out)
                    out.add("val = r + beta * e")
        out.depth = depth

    def _draws(self, out: Lines, continuation: bool, store: bool) -> None:
        """``r`` and ``val`` as expectations over the draws' combinations (unrolled; C order, first draw slowest).

        A candidate is allowed when every draw's probabilities are finite, non-negative and sum to one (the
        rules of :func:`worker.draws.draw_probabilities`, which raises on them at the scanned candidates and
        the policy), and every combination that can happen has a finite reward and a next state; a combination
        of probability 0 adds nothing.  With ``store``, ``out_p[i, k]`` and ``out_x[i, k, t]`` per combination.
        """
        draws = self.draws
        checks = []
        for t, entries in enumerate(self.probs):
            for v, entry in enumerate(entries):
                out.add(f"pr_{t}_{v} = {entry!r}" if isinstance(entry, float) else f"pr_{t}_{v} = {self._src(entry)}")
            total = " + ".join(f"pr_{t}_{v}" for v in range(len(entries)))
            low = " and ".join(f"pr_{t}_{v} >= -{ROW_SUM_TOLERANCE!r}" for v in range(len(entries)))
            checks.append(f"abs({total} - 1.0) <= {ROW_SUM_TOLERANCE!r} and {low}")
        out.add("good = " + " and ".join(f"({check})" for check in checks))
        with out.block("if good:"):
            out.add("acc_r = 0.0", "acc_v = 0.0")
            sizes = [v.size for v in draws.values]
            for k in range(self.k):
                index = np.unravel_index(k, sizes)
                out.add("pk = " + " * ".join(f"max(pr_{t}_{v}, 0.0)" for t, v in enumerate(index)))
                if store:
                    out.add(f"out_p[i, {k}] = pk")
                with out.block("if pk > 0.0 and good:"):
                    for t, v in enumerate(index):
                        out.add(f"w_{t} = {float(draws.values[t][v])!r}")
                    for j, expr in self.defines:
                        if self.model.defines[j][0] in self.after:
                            out.add(f"d_{j} = {self._src(expr)}")
                    out.add(f"rk = {self._src(self.reward)}")
                    self._tomorrow(out)
                    check = " and ".join(f"x_{t} == x_{t}" for t in range(self.d))
                    with out.block(f"if rk - rk == 0.0 and {check}:"):
                        out.add("acc_r += pk * rk")
                        if store:
                            for t in range(self.d):
                                out.add(f"out_x[i, {k}, {t}] = x_{t}")
                        if continuation:
                            self._interpolate(out)
                            out.add("acc_v += pk * (rk + beta * e)")
                    with out.block("else:"):
                        out.add("good = False")
            with out.block("if good:"):
                out.add("ok = True", "r = acc_r")
                if continuation:
                    out.add("val = acc_v")

    def _interpolate(self, out: Lines) -> None:
        """``e``: the continuation at ``x`` (clamped to the grid's ends)."""
        for t in range(self.d):
            out.add(f"lo_{t}, w_{t}, cl_{t} = locate_one(sgrid, off_{t}, size_{t}, x_{t})")
        if self.cubic and self.d > 1:
            for t in range(self.d):
                out.add(f"cub_lo[{t}] = lo_{t}", f"cub_w[{t}] = w_{t}")
            out.add("e = tensor_two(EVt, D, iz, sgrid, meta, cub_lo, cub_w)" if self.d == 2 else
                    "e = tensor_cubic(EVt, D, iz, sgrid, meta, cub_lo, cub_w, cub_s)")
            return
        if self.cubic:
            out.add(
                "h = sgrid[off_0 + lo_0 + 1] - sgrid[off_0 + lo_0]",
                "t1 = w_0",
                "t2 = t1 * t1",
                "t3 = t2 * t1",
                "e = ((2.0 * t3 - 3.0 * t2 + 1.0) * EVt[iz, lo_0] + (t3 - 2.0 * t2 + t1) * h * D[iz, lo_0]"
                " + (3.0 * t2 - 2.0 * t3) * EVt[iz, lo_0 + 1] + (t3 - t2) * h * D[iz, lo_0 + 1])",
            )
            return
        out.add("e = 0.0")
        for corner in range(2**self.d):
            bits = [(corner >> t) & 1 for t in range(self.d)]
            weight = " * ".join(f"w_{t}" if bit else f"(1.0 - w_{t})" for t, bit in enumerate(bits))
            index = " + ".join(f"stride_{t} * (lo_{t} + {bit})" for t, bit in enumerate(bits))
            out.add(f"wk = {weight}")
            with out.block("if wk != 0.0:"):
                out.add(f"e += wk * EVt[iz, {index}]")

    def _closure(self, out: Lines) -> None:
        """``f(c_0) -> (value, reward, tomorrow's states)``: the model at one choice, inlined where it is called."""
        with out.block("def f(c_0):"):
            for t in range(self.d):
                out.add(f"x_{t} = np.nan")
            self._model_at_choice(out, continuation=True)
            out.add("return val, r, (" + "".join(f"x_{t}, " for t in range(self.d)) + ")")

    def search(self) -> str:
        out = Lines()
        out.add(JIT)
        out.add(
            "def search(EVt, D, beta, p, sgrid, meta, ztab, svals, piz, order, prev, guess, has_guess, concave, "
            "monotone, scan_n, combos, b_pyr, b_levels, ev_abs, b_hull, b_hd, b_proven, out_v, out_a, out_r, out_j, "
            "start, stop):"
        )
        out.depth += 1
        self._prologue(out)
        if self.plan is not None:
            out.add(f"b_lev = np.empty({STACK_ROWS}, dtype=np.int64)", f"b_q = np.empty({STACK_ROWS}, dtype=np.int64)",
                    f"b_ub = np.empty({STACK_ROWS})", "bounded = b_pyr.shape[0] > 0")
        out.add("line_a = np.full(combos.shape[0], np.nan)", "line_d = np.full(combos.shape[0], np.nan)", "last_q = -1")
        with out.block("for q in range(start, stop):"):
            out.add("i = order[q]", "near = prev[q] >= 0 and prev[q] == last_q", "follows = monotone and near",
                    "last_q = q")
            self._point(out)
            if self.target is not None:
                t = self.target
                out.add(f"low = sgrid[off_{t}]", f"high = sgrid[off_{t} + size_{t} - 1]",
                        f"grid_off = off_{t}", f"grid_size = size_{t}")
            else:
                out.add("low = d_0", "high = d_1", "grid_off = -1", "grid_size = 0")
            out.add("best_v = -np.inf", "best_a = np.nan", "best_r = -np.inf", "best_j = 0")
            with out.block("for cc in range(combos.shape[0]):"):
                self._others(out, "cc")
                self._closure(out)
                kinks = "" if self.cubic else self._kinks(out)
                out.add("moved = np.nan")  # the guess's move, set by SEARCH_TEXT's concave branch only
                if self.plan is None:
                    out.extend(SEARCH_TEXT.replace("#KINK#", kinks).strip("\n").split("\n"))
                else:  # the branch and bound of worker.continuous.bound_search where it holds, else the scan
                    with out.block("if bounded and not concave:"):
                        out.extend(BOUND_CALL.strip("\n").split("\n"))
                    with out.block("else:"):
                        out.extend(SEARCH_TEXT.replace("#KINK#", "").strip("\n").split("\n"))
                    out.extend(kinks.strip("\n").split("\n"))
                out.extend(EDGE_TEXT.strip("\n").split("\n"))
                out.add("line_a[cc] = x if fx > -np.inf else np.nan", "line_d[cc] = moved")
                with out.block("if cc == 0 or fx > best_v:"):
                    out.add("best_v = fx", "best_a = x", "best_r = rx", "best_j = cc")
            out.add("out_v[i] = best_v", "out_a[i] = best_a", "out_r[i] = best_r", "out_j[i] = best_j")
        return out.text()

    def bound_point(self) -> str:
        """``bound_point``: the branch and bound of :mod:`worker.continuous.bound_search` at point ``i`` and
        combination ``cc`` — a function of its own, so that numba compiles it apart from ``search`` (inlined there,
        it doubled the compile time)."""
        out = Lines()
        out.add(JIT)
        out.add(f"def bound_point({BOUND_ARGUMENTS}):")
        out.depth += 1
        self._prologue(out)
        t = self.target
        out.add(f"grid_off = off_{t}", f"grid_size = size_{t}", f"b_outer = EVt.shape[1] // (size_{t} * stride_{t})",
                "b_root = 0")
        with out.block(f"while (1 << b_root) < size_{t} - 1:"):
            out.add("b_root += 1")
        self._point(out)
        self._others(out, "cc")
        self._closure(out)
        out.extend(bound_search(self, self.plan).strip("\n").split("\n"))
        out.add("return x, fx, rx, proven")
        return out.text()

    def _kinks(self, out: Lines) -> str:
        """The kink polish (see :data:`worker.continuous.search.KINK_TEXT`) along every state axis; with draws
        after the choice along every state under every combination of them (writing their closure ``draw_states`` to
        ``out``), or none above :data:`~worker.continuous.search.KINK_DRAWS_MOST`."""
        if self.draws is None:
            axes = []
            for t in range(self.d):
                slope = "1.0" if t == self.target else f"(xs2[{t}] - xs[{t}]) / (x2 - x)"
                axes.append(KINK_AXIS.format(t=t, slope=slope))
            return KINK_TEXT.replace("#AXES#", "\n".join(axes))
        if self.k * self.d > KINK_DRAWS_MOST:
            return ""
        self._draw_states(out)
        axes = []
        for t in range(self.d):
            slope = "1.0" if t == self.target else "(xs2[i_d] - xs[i_d]) / (x2 - x_best)"
            axes.append(KINK_DRAWS_AXIS.format(t=t, k=self.k, d=self.d, slope=slope))
        return KINK_DRAWS_TEXT.replace("#AXES#", "\n".join(axes))

    def _draw_states(self, out: Lines) -> None:
        """``draw_states(c_0)``: tomorrow's states under each combination of the draws (C order, each state in turn)."""
        with out.block("def draw_states(c_0):"):
            for k, expr in self.defines:
                if self.model.defines[k][0] not in self.after:
                    out.add(f"d_{k} = {self._src(expr)}")
            sizes = [v.size for v in self.draws.values]
            names = []
            for k in range(self.k):
                for t, v in enumerate(np.unravel_index(k, sizes)):
                    out.add(f"w_{t} = {float(self.draws.values[t][v])!r}")
                for j, expr in self.defines:
                    if self.model.defines[j][0] in self.after:
                        out.add(f"d_{j} = {self._src(expr)}")
                self._tomorrow(out)
                for t in range(self.d):
                    out.add(f"xg_{k}_{t} = x_{t}")
                    names.append(f"xg_{k}_{t}")
            out.add("return (" + "".join(f"{name}, " for name in names) + ")")

    def policy_at(self) -> str:
        out = Lines()
        out.add(JIT)
        out.add("def policy_at(p, sgrid, meta, ztab, svals, piz, a, combos, jc, out_r, out_x, out_ok, out_p):")
        out.depth += 1
        self._prologue(out)
        with out.block("for i in range(a.shape[0]):"):
            self._point(out)
            out.add("c_0 = a[i]")
            self._others(out, "jc[i]")
            if self.draws is not None:
                for t in range(self.d):
                    out.add(f"x_{t} = np.nan")
            self._model_at_choice(out, continuation=False, store=True)
            out.add("out_ok[i] = ok", "out_r[i] = r")
            if self.draws is None:
                with out.block("if ok:"):
                    for t in range(self.d):
                        out.add(f"out_x[i, {t}] = x_{t}")
        return out.text()
