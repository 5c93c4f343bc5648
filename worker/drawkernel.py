"""The reward tables of a grid model with draws after the choice, filled in compiled code.

:func:`worker.gridtables.precompute_tables` fills them with numpy, one array
operation per expression per draw over blocks of (point, choice) pairs; on
the job-search benchmark (3,200 points × 10 choices × 2 draws) that took
about 5 ms of array temporaries.  :func:`draw_tables` evaluates the model
pointwise in a generated numba kernel (the expressions inlined through
:class:`worker._codegen.writer.KernelWriter`), and gives the same tables and
counts, entry by entry in the same order of operations:

* the parts of the expressions that depend on no choice and no draw are
  computed once per point, those that depend on a choice but no draw once
  per (point, choice), the rest once per combination of the draws;
* each draw's probabilities, where the pair is feasible, must be finite,
  non-negative and sum to one within ``ROW_SUM_TOLERANCE``; a combination's
  probability is the product of its draws' (first draw first, negatives
  within the tolerance counted as 0, an infeasible pair's all 0);
* the expected reward sums ``p_k · r_k`` over the combinations ``k`` with
  ``p_k > 0``, from 0.0 in C order; a pair is allowed when it is feasible, the
  expected reward is finite and no combination with ``p_k > 0`` gives a NaN
  next value; each combination's nodes are located as
  :func:`worker.grids.locate` does (``worker.kernels.locate_one``), at the
  grid's start for one that cannot happen.

A point or choice whose probabilities are wrong is only flagged here: the
numpy fill then runs and raises its error, which names the first offending
point and choice.  The generated module is loaded like the search kernels
(:func:`worker._codegen.load`), its name the hash of its text, whose header
carries the hash of the generators and of this file.  The numbers in the
expressions are lifted into the params vector (:func:`worker._codegen.lift_literals`),
so another calibration reuses the compiled module.
"""

from __future__ import annotations

import functools
import hashlib
import math
import pathlib
from typing import Any

import numpy as np

from worker import _codegen, expressions, threadpool
from worker._codegen.hoist import Hoister, dependents
from worker._codegen.layout import ModelSource
from worker._codegen.source import generator_hash
from worker._codegen.writer import JIT, KernelWriter, Lines
from worker.document.limits import ROW_SUM_TOLERANCE
from worker.expressions import Expression
from worker.feasibility import ModelData
from worker.gridtables import RewardTables, precompute_tables

__all__ = ["DrawWriter", "draw_source", "draw_tables"]


@functools.cache
def _own_hash() -> str:
    return hashlib.sha256(pathlib.Path(__file__).read_bytes()).hexdigest()[:16]


class DrawWriter(KernelWriter):
    """A :class:`KernelWriter` (``expr`` layout) that also knows the draws after the choice.

    ``draws`` are the draws' names, ``dependent`` the draws and the defines
    computed from them, ``probs`` per draw its entries: an expression (lifted)
    or None for a number (read from the runtime table ``DQ``).  Nothing that
    depends on a draw is hoisted out of the loop over the combinations.
    """

    def __init__(
        self, layout: Any, model: ModelSource, draws: tuple[str, ...], dependent: frozenset[str],
        probs: list[list[Expression | None]],
    ) -> None:
        self.draws = draws
        self.draw_dependent = dependent
        self.raw_probs = probs
        super().__init__(layout, model)

    def _prepare(self, model: ModelSource) -> None:
        names = self.names
        names.update({name: f"p_{k}" for k, name in enumerate(model.params)})
        names.update({name: f"s_{t}" for t, name in enumerate(model.states)})
        names.update({name: f"z_{t}" for t, name in enumerate(model.shocks)})
        names.update({name: f"c_{t}" for t, name in enumerate(model.choices)})
        names.update({name: f"d_{k}" for k, (name, _) in enumerate(model.defines)})
        names.update({name: f"g_{t}" for t, name in enumerate(self.draws)})
        varying = dependents(model, set(model.choices) | set(self.draws))
        hoist = Hoister(varying, names, self.state_lines, "h_")

        def lifted(expr: Expression) -> Expression:
            return Expression.from_tree(hoist.rewrite(expr.tree))

        self.defines = []
        self.draw_defines: list[tuple[int, Expression]] = []
        for k, (name, expr) in enumerate(model.defines):
            if name in self.draw_dependent:
                self.draw_defines.append((k, lifted(expr)))
            elif name in varying:
                self.defines.append((k, lifted(expr)))
            else:
                self.state_lines.append(f"d_{k} = {expressions.scalar_source(expr, names)}")
        self.feasible = [lifted(expr) for expr in model.feasible]
        self.reward = lifted(model.reward)
        self.next = [(t, lifted(expr)) for t, expr in model.next]
        self.probs = [[None if e is None else lifted(e) for e in entries] for entries in self.raw_probs]

    def source(self, expr: Expression) -> str:
        return expressions.scalar_source(expr, self.names)


def draw_source(writer: DrawWriter) -> str:
    """Source of the module with ``draw_fill`` for the ``expr`` layout, model and draws of ``writer``."""
    sizes = [len(entries) for entries in writer.probs]
    out = Lines()
    out.add(
        f"# fixq generated draw-table kernel: {writer.d} states, {writer.m} shocks, {writer.q} choices, "
        f"draws {sizes}",
        f"# setter {writer.layout.setter}",
        f"# generators {generator_hash()} {_own_hash()}",
        "import numpy as np",
        "from numba import njit",
        "from worker.expressions.interval_kernels import interval_globals",
        "",
        "globals().update(interval_globals())",
        "",
        "",
    )
    out.add(JIT)
    with out.block("def draw_fill(ctx, DV, DQ, tol, out_R, out_lo, out_w, out_pd, out_cl, out_counts, start, stop):"):
        out.add("p = ctx[0]", "sgrid = ctx[1]", "ztab = ctx[2]", "cgrid = ctx[3]", "meta = ctx[4]")
        writer.params(out)
        out.add("NZ = ztab.shape[0]")
        writer.n_choices(out)
        out.add("K = out_pd.shape[2]")
        for t, size in enumerate(sizes):
            out.add(f"Q_{t} = np.empty({size})")
        with out.block("for i in range(start, stop):"):
            writer.state_setup(out)
            out.add("allowed = 0", "nbad = 0", "first_bad = -1", "clamps = 0", "feasible_any = 0", "wrong = 0")
            for k, (t, _) in enumerate(writer.next):
                out.add(f"lo_{k} = i_{t}")
            _choice_count(writer, out, start=True)
            with out.block("for c in range(NC):"):
                _choice_count(writer, out, start=False)
                for k, expr in writer.defines:
                    out.add(f"d_{k} = {writer.source(expr)}")
                out.add("feas = True")
                for k, expr in enumerate(writer.feasible):
                    out.add(f"feas = feas and ({writer.source(expr)}) != 0.0")
                with out.block("if not feas:"):
                    _not_feasible(writer, out)
                _probabilities(writer, out, sizes)
                out.add("reward = 0.0", "nan_next = False", "clamped = False", "kd = 0")
                for t, size in enumerate(sizes):
                    out.add(f"for j_d{t} in range({size}):")
                    out.depth += 1
                    out.add(f"g_{t} = DV[{t}, j_d{t}]")
                out.add("pk = " + " * ".join(f"Q_{t}[j_d{t}]" for t in range(len(sizes))))
                for k, expr in writer.draw_defines:
                    out.add(f"d_{k} = {writer.source(expr)}")
                out.add(f"rk = {writer.source(writer.reward)}")
                with out.block("if pk > 0.0:"):
                    out.add("reward += pk * rk")
                out.add("out_pd[i, c, kd] = pk")
                for k, (t, expr) in enumerate(writer.next):
                    out.add(f"n_{k} = {writer.source(expr)}")
                    with out.block(f"if n_{k} != n_{k} or pk <= 0.0:"):
                        with out.block(f"if n_{k} != n_{k} and pk > 0.0:"):
                            out.add("nan_next = True")
                        out.add(f"n_{k} = sgrid[{writer.meta.soff(t)}]")
                    _locate(out, k, t, writer.meta.soff(t), writer.meta.ssize(t))
                    out.add(f"out_lo[i, c, kd, {k}] = lo_{k}", f"out_w[i, c, kd, {k}] = w_{k}")
                    with out.block(f"if cl_{k} and pk > 0.0:"):
                        out.add("clamped = True")
                out.add("kd += 1")
                out.depth -= len(sizes)
                out.add("ok = feas and reward - reward == 0.0 and not nan_next", "out_cl[i, c] = clamped")
                with out.block("if feas:"):
                    out.add("feasible_any += 1")
                with out.block("if ok:"):
                    out.add("out_R[i, c] = reward", "allowed += 1")
                    with out.block("if clamped:"):
                        out.add("clamps += 1")
                with out.block("else:"):
                    out.add("out_R[i, c] = -np.inf")
                    with out.block("if feas and reward != -np.inf:"):
                        out.add("nbad += 1")
                        with out.block("if first_bad < 0:"):
                            out.add("first_bad = c")
            out.add(
                "out_counts[i, 0] = allowed", "out_counts[i, 1] = nbad", "out_counts[i, 2] = first_bad",
                "out_counts[i, 3] = clamps", "out_counts[i, 4] = feasible_any", "out_counts[i, 5] = wrong",
            )
    return out.text() + "\n"


def _choice_count(writer: DrawWriter, out: Lines, *, start: bool) -> None:
    """The choices' indices ``j_t`` of flat choice ``c`` (C order) and their values ``c_t``, counted up from the last
    choice's rather than divided out of ``c`` (the loop visits ``c = 0, 1, …``): ``start`` sets them before the
    first, one below it.  Two integer divisions a pair fewer, about 8 % of the fill on the job-search benchmark."""
    last = writer.q - 1
    if start:
        out.add(*(f"j_{t} = 0" for t in range(last)), f"j_{last} = -1")
        return
    out.add(f"j_{last} += 1")
    for t in range(last, 0, -1):
        out.add(f"if j_{t} == {writer.meta.csize(t)}:")
        out.depth += 1
        out.add(f"j_{t} = 0", f"j_{t - 1} += 1")
    out.depth -= last
    for t in range(writer.q):
        out.add(f"c_{t} = cgrid[{writer.meta.coff(t)} + j_{t}]")


def _not_feasible(writer: DrawWriter, out: Lines) -> None:
    """An infeasible pair's entries, what the full loop below gives it, then on to the next choice: every
    probability 0, so each combination's next value is the grid's start, located at interval 0 with weight 0
    (grids are strictly increasing) and not clamped; the reward ``-inf``.  On the job-search benchmark 65 % of
    the pairs are infeasible, and this skips their expressions and searches."""
    with out.block("for kd in range(K):"):
        out.add("out_pd[i, c, kd] = 0.0")
        for k in range(len(writer.next)):
            out.add(f"out_lo[i, c, kd, {k}] = 0", f"out_w[i, c, kd, {k}] = 0.0")
    out.add("out_cl[i, c] = False", "out_R[i, c] = -np.inf", "continue")


def _locate(out: Lines, k: int, t: int, offset: str, size: str) -> None:
    """``lo_k, w_k, cl_k``: ``n_k`` bracketed on state ``t``'s grid exactly as ``worker.kernels.locate_one`` does,
    written inline (a call costs numba more than the arithmetic), the last interval ``lo_k`` and today's point
    ``i_t`` tried before the binary search.

    ``locate_one``'s ``lower`` is the number of grid points at most ``x`` less one, clipped to
    ``[0, size − 2]``; an interval ``g`` in that range is that answer when ``(g == 0 or grid[g] <= x)`` and
    ``(g == size − 2 or x < grid[g + 1])`` (a NaN ``x`` passes only where ``size == 2``, whose one interval is
    the search's answer too).
    """
    out.add(f"x = n_{k}", f"O = {offset}", f"top = {size} - 2")

    def fits(g: str) -> str:
        return f"{g} <= top and ({g} == 0 or sgrid[O + {g}] <= x) and ({g} == top or x < sgrid[O + {g} + 1])"

    out.add(f"g = lo_{k}")
    with out.block(f"if not ({fits('g')}):"):
        out.add(f"g = i_{t}")
        with out.block(f"if not ({fits('g')}):"):
            out.add("lo = 0", "hi = top + 2")
            with out.block("if x != x:"):
                out.add("lo = hi")
            with out.block("else:"):
                with out.block("while lo < hi:"):
                    out.add("mid = (lo + hi) >> 1")
                    with out.block("if sgrid[O + mid] <= x:"):
                        out.add("lo = mid + 1")
                    with out.block("else:"):
                        out.add("hi = mid")
            out.add("g = min(max(lo - 1, 0), top)")
    out.add(f"lo_{k} = g", "left = sgrid[O + g]", f"w_{k} = (x - left) / (sgrid[O + g + 1] - left)")
    with out.block(f"if w_{k} < 0.0:"):
        out.add(f"w_{k} = 0.0")
    with out.block(f"elif w_{k} > 1.0:"):
        out.add(f"w_{k} = 1.0")
    out.add(f"cl_{k} = x < sgrid[O] or x > sgrid[O + top + 1]")


def _probabilities(writer: DrawWriter, out: Lines, sizes: list[int]) -> None:
    """Each draw's probabilities into ``Q_t``: checked where the pair is feasible (``wrong`` counts the pairs
    where some draw's are not finite, non-negative and summing to one), then ``max(q, 0)``, or 0 where the
    pair is not feasible."""
    for t, entries in enumerate(writer.probs):
        for j, expr in enumerate(entries):
            out.add(f"Q_{t}[{j}] = " + (f"DQ[{t}, {j}]" if expr is None else writer.source(expr)))
    with out.block("if feas:"):
        out.add("fine = True")
        for t, size in enumerate(sizes):
            out.add("total = 0.0")
            with out.block(f"for j in range({size}):"):
                out.add(f"q = Q_{t}[j]", "total += q")
                with out.block("if not (q - q == 0.0 and q >= -tol):"):
                    out.add("fine = False")
            with out.block("if not abs(total - 1.0) <= tol:"):
                out.add("fine = False")
        with out.block("if not fine:"):
            out.add("wrong += 1")
    for t, size in enumerate(sizes):
        with out.block(f"for j in range({size}):"):
            out.add(f"Q_{t}[j] = max(Q_{t}[j], 0.0) if feas else 0.0")


@functools.lru_cache(maxsize=64)
def _module_text(
    source: ModelSource, setter: tuple[int | None, ...], names: tuple[str, ...], dependent: frozenset[str],
    probs: tuple[tuple[Expression | None, ...], ...],
) -> tuple[str, tuple[float, ...]]:
    """The kernel module's text and the numbers lifted out of the expressions (``probs``: per draw, each entry's
    expression or None for a number).  Kept by structure: a solve of the same model writes nothing again."""
    # The probabilities' expressions go through the lifting with the model's, after its feasibility.
    listed = tuple(e for entries in probs for e in entries if e is not None)
    wide = ModelSource(source.params, source.states, source.shocks, source.choices, source.defines, source.reward,
                       source.feasible + listed, source.next)
    kernel_model, literals = _codegen.lift_literals(wide)
    count = len(source.feasible)
    lifted = iter(kernel_model.feasible[count:])
    kernel_probs = [[None if e is None else next(lifted) for e in entries] for entries in probs]
    kernel_model = ModelSource(kernel_model.params, kernel_model.states, kernel_model.shocks,
                               kernel_model.choices, kernel_model.defines, kernel_model.reward,
                               kernel_model.feasible[:count], kernel_model.next)
    layout = _codegen.layout_for(setter, len(source.shocks), len(source.choices), "expr", False)
    writer = DrawWriter(layout, kernel_model, names, dependent, kernel_probs)
    return draw_source(writer), literals


def draw_tables(data: ModelData) -> tuple[RewardTables, dict[str, Any]]:
    """The tables and counts of ``precompute_tables(data)`` for a model with draws after the choice and an
    interpolated state, filled by the generated kernel (the numpy fill raises the error of wrong probabilities).

    The counts also hold ``clamped_pairs`` (n, C) bool: whether some draw that can happen takes the pair's
    next value off its grid (``diagnostics.clamped_next`` at the policy reads it).
    """
    draws = data.draws
    if draws is None or None not in data.setter:
        raise ValueError("draw_tables needs draws after the choice and a state moved by a next expression")
    if any(data.state_grids[t].size < 2 for t, j in enumerate(data.setter) if j is None):
        return precompute_tables(data)  # a one-point grid cannot be interpolated on: numpy's error
    probs = tuple(tuple(e if isinstance(e, Expression) else None for e in entries) for entries in draws.probs)
    text, literals = _module_text(data.source, data.setter, draws.names, draws.dependent, probs)
    module = _codegen.load(text)
    params = _codegen.kernel_params(data.param_values, literals)
    ctx = _codegen.context(params, data.state_grids, data.shock_table, data.choice_grids, None)
    widest = max(v.size for v in draws.values)
    DV = np.zeros((len(draws.names), widest))
    DQ = np.zeros((len(draws.names), widest))
    for t, (values, entries) in enumerate(zip(draws.values, draws.probs)):
        DV[t, : values.size] = values
        for j, entry in enumerate(entries):
            DQ[t, j] = 0.0 if isinstance(entry, Expression) else float(entry)

    n, n_choices, k_draws = data.n, data.n_choices, draws.size
    interpolated = [t for t, j in enumerate(data.setter) if j is None]
    R = np.empty((n, n_choices))
    lower = np.empty((n, n_choices, k_draws, len(interpolated)), dtype=np.int32)
    weight = np.empty((n, n_choices, k_draws, len(interpolated)))
    probability = np.empty((n, n_choices, k_draws))
    clamped = np.empty((n, n_choices), dtype=np.bool_)
    per_row = np.empty((n, 6), dtype=np.int64)
    threads = threadpool.threads_for(n, n_choices)
    blocks = threadpool.row_blocks(n, threads * threadpool.BLOCKS_PER_THREAD if threads > 1 else 1)
    threadpool.run_blocks(
        lambda start, stop: module.draw_fill(ctx, DV, DQ, ROW_SUM_TOLERANCE, R, lower, weight, probability, clamped,
                                             per_row, start, stop),
        blocks,
        threads,
    )
    if per_row[:, 5].any():
        return precompute_tables(data)  # raises the error naming the first point and choice whose are wrong
    strides = [math.prod(data.state_sizes[t + 1 :]) for t in range(len(data.states))]
    choice_index = np.unravel_index(np.arange(n_choices), data.choice_sizes)
    next_base = np.zeros(n_choices, dtype=np.int64)
    for t, j in enumerate(data.setter):
        if j is not None:
            next_base += strides[t] * choice_index[j]
    bad_rows = np.flatnonzero(per_row[:, 1])
    counts = {
        "allowed": int(per_row[:, 0].sum()),
        "bad": int(per_row[:, 1].sum()),
        "bad_example": (int(bad_rows[0]), int(per_row[bad_rows[0], 2])) if bad_rows.size else None,
        "clamped": int(per_row[:, 3].sum()),
        "any_feasible": per_row[:, 4] > 0,
        "any_allowed": per_row[:, 0] > 0,
        "static_pick": None,
        "clamped_pairs": clamped,
    }
    return (R, next_base, lower, weight, probability), counts
