"""``bellman_bnb``, the exact block search, with the two bounds that prune it.

The search walks blocks ``[a, b]`` of the last choice depth first and skips a
block when a bound proves it cannot beat the incumbent under the
lowest-index tie rule: the *slope* bound (:mod:`worker._slopes`; beside the
guess, where the objective is flat) and the *interval* bound (the interval
bound of the reward from `worker.expressions.intervals.interval_source`,
with the box narrowed by the constraints, plus ``β`` times the exact block
maximum of ``EV`` from the dyadic pyramid of :mod:`worker.kernels`).  It is
equal to ``bellman_full`` bit for bit; ``expr`` backend only.

One cohesive thing, so one module: the search and its two bounds write into
the same generated function and share its variables (``a``, ``b``,
``best``, ``descend``, the anchors of the guess pass).
"""

from __future__ import annotations

from dataclasses import dataclass

from worker import _slopes, expressions
from worker._codegen.hoist import Hoister, dependents
from worker._codegen.layout import ModelSource
from worker._codegen.writer import JIT, KernelWriter, Lines
from worker.expressions import Expression, names_in
from worker.expressions.intervals import interval_source

__all__ = [
    "BOUND_SLACK", "SLOPE_SLACK", "SlopePlan", "bellman_bnb", "slope_plan", "slope_steps", "tighten_box",
    "tree_interval",
]

BOUND_SLACK = 2.0**-40
"""Relative widening of a block's upper bound (of ``|reward bound| + |β·EV bound|``):
covers interpolation weights that sum to one only up to rounding."""
SLOPE_SLACK = 2.0**-40
"""Relative widening of the slope bound's per-step bound, far above the rounding of its few operations."""


@dataclass
class SlopePlan:
    """What the slope bound's source needs: ``steps`` are ``(name, value tree, derivative tree)`` for
    the defines the reward needs that depend on the last choice, in order, then ``("", reward tree,
    its derivative)``; the trees are hoisted against the choice, their ``@hs_`` parts computed by
    ``lines`` into the variables ``names`` maps them to."""

    names: dict[str, str]
    lines: list[str]
    steps: list[tuple[str, expressions.Node, expressions.Node]]


def slope_plan(writer: KernelWriter) -> SlopePlan | None:
    """What the slope bound needs, or None where it does not apply (see :mod:`worker._slopes`).

    It applies when the last choice is ``next_of`` the pyramid's axis and no
    state is interpolated (choice ``j`` then lands on grid point ``j``), and
    the reward is smooth in that choice.
    """
    layout, model = writer.layout, writer.model
    inner = writer.q - 1
    if (
        not writer.expr
        or layout.interpolated
        or layout.bound_kind != "pyramid"
        or layout.setter[layout.pyramid_axis] != inner
    ):
        return None
    choice = model.choices[inner]
    plan = SlopePlan(names=dict(writer.names), lines=[], steps=[])
    hoist = Hoister(dependents(model, {choice}), plan.names, plan.lines, "hs_")
    try:
        plan.steps = slope_steps(model, writer.defines, writer.reward, choice, hoist)
    except _slopes.NotSmooth:
        return None
    return plan


def slope_steps(model: ModelSource, defines: list[tuple[int, Expression | None]], reward: Expression, choice: str,
                hoist: Hoister) -> list[tuple[str, expressions.Node, expressions.Node]]:
    """``(name, value tree, derivative tree)`` along ``choice`` for the defines the reward needs that move with
    it, in order, then ``("", reward tree, its derivative)``: the trees rewritten by ``hoist`` (whose varying
    names are those that move with the choice).  Raises :class:`worker._slopes.NotSmooth` where one may jump."""
    varying = hoist.varying
    needed = set(model.reward.names)
    for name, expr in reversed(model.defines):
        if name in needed:
            needed |= set(expr.names)
    moving = {name: True for name in varying if name != choice}
    steps = []
    for k, expr in defines:
        name = model.defines[k][0]
        if expr is None or name not in varying or name not in needed:
            continue
        tree = hoist.rewrite(expr.tree)
        steps.append((name, tree, _slopes.derivative(tree, choice, moving)))
    tree = hoist.rewrite(reward.tree)
    steps.append(("", tree, _slopes.derivative(tree, choice, moving)))
    return steps


def _slope_bound(writer: KernelWriter, out: Lines, plan: SlopePlan) -> None:
    """Clears ``descend`` when the slope bound proves block ``[a, b]`` below ``best``.

    The anchor is the guess's neighbour on the block's side (``g_j ± 1``,
    evaluated in the guess pass).  For a block to the right, every step
    ``f(i+1) − f(i)`` with ``i`` from the anchor ``p`` to ``b − 1`` is at
    most ``h · max r' + β · max ΔEV``, so ``f(j) ≤ f(p) + (j − p) · step``;
    to the left, symmetrically with the least step.  ``r'`` is bounded over
    the hull of the anchor and the block, ``ΔEV`` exactly by the pyramids
    ``dpu`` (of ``ΔEV`` rounded up) and ``dpd`` (of ``−ΔEV`` rounded up).
    """
    model = writer.model
    inner = writer.q - 1
    choice = model.choices[inner]
    names = plan.names
    lo_names, hi_names = dict(names), dict(names)
    lo_names[choice], hi_names[choice] = "s_lo", "s_hi"
    axis = writer.layout.pyramid_axis
    size, stride = writer.meta.ssize(axis), writer.meta.sstride(axis)
    out.add("side = 0")
    with out.block("if o == g_o:"):
        with out.block("if left_ok and b < g_j - 1:"):
            out.add("side = -1", "p_a = g_j - 1", "i_lo = a", "i_hi = p_a", "anchor_v = left_v", "anchor_r = left_r")
        with out.block("elif right_ok and a > g_j + 1:"):
            out.add("side = 1", "p_a = g_j + 1", "i_lo = p_a", "i_hi = b", "anchor_v = right_v", "anchor_r = right_r")
    with out.block("if side != 0:"):
        offset = writer.meta.coff(inner)
        out.add(f"s_lo = cgrid[{offset} + i_lo]", f"s_hi = cgrid[{offset} + i_hi]")
        writer.outer_base(out)
        out.extend(plan.lines)
        g_lo = g_hi = "0.0"
        for k, (name, tree, slope) in enumerate(plan.steps):
            for key, value in names.items():
                lo_names.setdefault(key, value)
                hi_names.setdefault(key, value)
            if name:
                lines, lo, hi = interval_source(Expression.from_tree(tree), lo_names, hi_names, f"sv{k}_")
                out.extend(lines)
                lo_names[name], hi_names[name] = lo, hi
            lines, lo, hi = interval_source(Expression.from_tree(slope), lo_names, hi_names, f"sd{k}_")
            out.extend(lines)
            if name:
                lo_names[_slopes.prime(name)], hi_names[_slopes.prime(name)] = lo, hi
            else:
                g_lo, g_hi = lo, hi
        with out.block(f"if {g_lo} - {g_lo} == 0.0 and {g_hi} - {g_hi} == 0.0:"):
            query = f"levels, {size}, {stride}, n_outer, iz, base, i_lo, i_hi - 1)"
            with out.block("if side > 0:"):
                out.add(f"dq = pyramid_max(dpu, {query}")
                out.add(f"gh = {g_hi} * (h_max if {g_hi} >= 0.0 else h_min)", "step = gh + beta * dq")
            with out.block("else:"):
                out.add(f"dq = pyramid_max(dpd, {query}")
                out.add(f"gh = {g_lo} * (h_min if {g_lo} >= 0.0 else h_max)", "step = beta * dq - gh")
            out.add(f"step += {SLOPE_SLACK!r} * (abs(gh) + beta * abs(dq))")
            # The most the objective can rise over the anchor: at the far end when steps may go up.
            with out.block("if step > 0.0:"):
                out.add("reach = (i_hi - p_a) if side > 0 else (p_a - i_lo)")
            with out.block("else:"):
                out.add("reach = (a - p_a) if side > 0 else (p_a - b)")
            out.add("rise = reach * step")
            # Rounding of f(j) and f(p): |r(j)| is at most |r(p)| plus the hull's width times max |r'|.
            out.add(f"r_span = (s_hi - s_lo) * max(abs({g_lo}), abs({g_hi}))")
            out.add(
                "sub = anchor_v + rise + "
                f"{BOUND_SLACK!r} * (2.0 * abs(anchor_r) + r_span + 2.0 * beta * ev_abs + abs(rise))"
            )
            with out.block("if sub - sub == 0.0 and sub < best:"):
                out.add("descend = False")


def tree_interval(tree: expressions.Node, varying: set[str], names: dict[str, str], lo_names: dict[str, str],
                  hi_names: dict[str, str], prefix: str, out: Lines) -> tuple[str, str]:
    """The kernel names of the lower and upper ends of ``tree`` over a box of choices: its own variable when it is
    a name that does not move with them, else the lines of its interval bound (written to ``out``, names starting
    ``prefix``) over ``lo_names``/``hi_names`` (the moving names' ends; every other name is its point value)."""
    if isinstance(tree, expressions.Name) and tree.id not in varying:
        return names[tree.id], names[tree.id]
    for key, value in names.items():
        lo_names.setdefault(key, value)
        hi_names.setdefault(key, value)
    lines, lo, hi = interval_source(Expression.from_tree(tree), lo_names, hi_names, prefix)
    out.extend(lines)
    return lo, hi


def _block_bound(writer: KernelWriter, out: Lines) -> None:
    """Sets ``dead`` (no allowed choice in inner block ``[a, b]``) or ``ub``, an upper bound of the objective."""
    model = writer.model
    inner = writer.q - 1
    inner_name = model.choices[inner]
    varying = dependents(model, {inner_name})
    names = dict(writer.names)
    point_lines: list[str] = []
    hoist = Hoister(varying, names, point_lines, "hq_")
    lo_names, hi_names = dict(names), dict(names)
    lo_names[inner_name], hi_names[inner_name] = "c_lo", "c_hi"

    def bounds(expr: expressions.Expression, prefix: str) -> tuple[str, str]:
        tree = hoist.rewrite(expr.tree)
        out.extend(point_lines)
        point_lines.clear()
        return tree_interval(tree, varying, names, lo_names, hi_names, prefix, out)

    out.add("dead = True", "ub = -np.inf", "base = 0")
    out.add(f"c_lo = cgrid[{writer.meta.coff(inner)} + a]", f"c_hi = cgrid[{writer.meta.coff(inner)} + b]")
    for k, expr in writer.defines:
        if expr is None:
            continue
        name = model.defines[k][0]
        if name in varying:
            lo_names[name], hi_names[name] = bounds(expr, f"bd{k}_")
        else:
            out.add(f"d_{k} = {expressions.scalar_source(expr, names)}")
    depth = out.depth
    for k, expr in enumerate(writer.feasible):
        lo, hi = bounds(expr, f"bf{k}_")
        out.add(f"if not ({lo} == 0.0 and {hi} == 0.0):")
        out.depth += 1
        tighten_box(writer, out, expr.tree, varying, names, lo_names, hi_names)
    _, r_hi = bounds(writer.reward, "br_")
    out.add(f"r_hi = {r_hi}")
    with out.block("if r_hi != -np.inf:"):
        kind, axis = writer.layout.bound_kind, writer.layout.pyramid_axis
        writer.outer_base(out)
        if kind == "fixed":
            out.add("ev = EVt[iz, base]")
        elif kind == "global":
            out.add("ev = evmax[iz]")
        else:
            if writer.layout.setter[axis] == inner:
                out.add("lo_i = a", "hi_i = b")
            else:
                k = writer.layout.interpolated.index(axis)
                n_lo, n_hi = bounds(dict(writer.next)[axis], f"bn{k}_")
                grid = f"sgrid, {writer.meta.soff(axis)}, {writer.meta.ssize(axis)}"
                out.add(f"lo_i = locate_one({grid}, {n_lo})[0]", f"hi_i = locate_one({grid}, {n_hi})[0] + 1")
            size, stride = writer.meta.ssize(axis), writer.meta.sstride(axis)
            out.add(f"ev = pyramid_max(pyramid, levels, {size}, {stride}, n_outer, iz, base, lo_i, hi_i)")
        out.add("ub = r_hi + beta * ev", "dead = False")
        with out.block("if ub - ub == 0.0:"):
            out.add(f"ub += {BOUND_SLACK!r} * (abs(r_hi) + abs(beta * ev))")
    out.depth = depth


_FLIPPED = {"<": ">", "<=": ">=", ">": "<", ">=": "<=", "==": "=="}


def tighten_box(
    writer: KernelWriter, out: Lines, tree: expressions.Node, varying: set[str], names: dict[str, str],
    lo_names: dict[str, str], hi_names: dict[str, str],
) -> None:
    """Narrows the bounds of a name that a constraint compares with a point, and nests on a non-empty box.

    Only allowed choices can be the maximum, so bounds may assume every
    constraint holds: from ``c > 0`` the reward is bounded over ``c`` in
    ``[max(c_lo, tiny), c_hi]``, not over the whole block, which keeps a
    pole just outside the allowed set (``1/c``, ``log c``) out of the bound.
    Handles comparisons (chained too, and inside ``and``) of a name that
    varies in the block with a side that does not.
    """
    E = expressions
    if isinstance(tree, E.Logic) and tree.op == "and":
        for operand in tree.operands:
            tighten_box(writer, out, operand, varying, names, lo_names, hi_names)
        return
    if not isinstance(tree, E.Compare):
        return
    for left, op, right in zip(tree.operands, tree.ops, tree.operands[1:]):
        if op == "!=":
            continue
        if isinstance(right, E.Name) and right.id in varying and not (names_in(left) & varying):
            left, op, right = right, _FLIPPED[op], left
        if not (isinstance(left, E.Name) and left.id in varying) or (names_in(right) & varying):
            continue
        lo, hi = lo_names[left.id], hi_names[left.id]
        if not (lo.isidentifier() and hi.isidentifier()):
            continue
        point = expressions.scalar_source(Expression.from_tree(right), names)
        if op in (">", ">="):
            limit = f"np.nextafter({point}, np.inf)" if op == ">" else f"({point})"
            out.add(f"{lo} = max({lo}, {limit})")
        elif op in ("<", "<="):
            limit = f"np.nextafter({point}, -np.inf)" if op == "<" else f"({point})"
            out.add(f"{hi} = min({hi}, {limit})")
        else:
            out.add(f"{lo} = max({lo}, {point})", f"{hi} = min({hi}, {point})")
        out.add(f"if {lo} <= {hi}:")
        out.depth += 1


def bellman_bnb(writer: KernelWriter, plan: SlopePlan | None) -> str:
    """Source of ``bellman_bnb`` (with the slope bound when ``plan`` is given)."""
    inner = writer.q - 1
    out = Lines()
    out.add(JIT)
    with out.block(
        "def bellman_bnb(EVt, beta, ctx, pyramid, levels, evmax, guess, has_guess, leaf, "
        "dpu, dpd, slope, out_v, out_policy, out_bad, out_bad_choice, start=0, stop=-1):"
    ):
        writer.prologue(out)
        out.add(f"M = {writer.meta.csize(inner)}")
        if plan is not None:
            out.add("h_min = slope[0]", "h_max = slope[1]", "ev_abs = slope[2]")
        writer.n_choices(out, "NOUT", inner)
        axis = writer.layout.pyramid_axis
        if axis is not None:
            out.add(f"n_outer = EVt.shape[1] // ({writer.meta.ssize(axis)} * {writer.meta.sstride(axis)})")
        # Blocks [a, b] of the last choice still to be searched, depth first (each split pushes
        # two halves, so the stack never holds more than about log2(M) + 2 blocks).
        out.add("stack = np.empty((130, 2), dtype=np.int64)")
        writer.row_range(out)
        with out.block("for i in range(start, stop):"):
            writer.state_setup(out)
            out.add("best = -np.inf", "chosen = -1", "nbad = 0", "first_bad = -1", "g_o = -1", "g_j = -1")
            if plan is not None:
                out.add("left_ok = False", "right_ok = False")
                out.add("left_v = 0.0", "left_r = 0.0", "right_v = 0.0", "right_r = 0.0")
            with out.block("if has_guess and guess[i] >= 0:"):
                out.add("g_o = guess[i] // M", "g_j = guess[i] - g_o * M")
            # The guess pass (o = -1) evaluates the guess (with its neighbours, the anchors of
            # the slope bound, when there is one) through the same evaluation site as every other
            # choice: a second inline copy of the model cost about a quarter more compile time.
            # The guess's own pass then searches the rest of its line on either side.
            spread = 1 if plan is not None else 0
            out.add(f"g_lo = max(g_j - {spread}, 0)", f"g_hi = min(g_j + {spread}, M - 1)")
            out.add("first_o = -1 if g_o >= 0 else 0")
            with out.block("for o in range(first_o, NOUT):"):
                if inner:
                    out.add("rem = max(o, 0)")
                    for t in range(inner - 1, 0, -1):
                        out.add(f"j_{t} = rem % {writer.meta.csize(t)}", f"rem = rem // {writer.meta.csize(t)}")
                    out.add("j_0 = rem")
                    for t in range(inner):
                        out.add(f"c_{t} = cgrid[{writer.meta.coff(t)} + j_{t}]")
                out.add("top = 0")
                with out.block("if o < 0:"):
                    out.add("cb = g_o * M", "stack[0, 0] = g_lo", "stack[0, 1] = g_hi", "top = 1")
                with out.block("else:"):
                    out.add("cb = o * M")
                    with out.block("if o == g_o:"):
                        with out.block("if g_hi < M - 1:"):
                            out.add("stack[top, 0] = g_hi + 1", "stack[top, 1] = M - 1", "top += 1")
                        with out.block("if g_lo > 0:"):
                            out.add("stack[top, 0] = 0", "stack[top, 1] = g_lo - 1", "top += 1")
                    with out.block("else:"):
                        out.add("stack[0, 0] = 0", "stack[0, 1] = M - 1", "top = 1")
                with out.block("while top > 0:"):
                    out.add("top -= 1", "a = stack[top, 0]", "b = stack[top, 1]", "descend = False")
                    with out.block("if o < 0 or b - a < leaf:"):
                        with out.block("for c in range(cb + a, cb + b + 1):"):
                            writer.evaluate(out)
                            with out.block("if ok:"):
                                with out.block("if val > best or (val == best and c < chosen):"):
                                    out.add("best = val", "chosen = c")
                                if plan is not None:
                                    with out.block("if o < 0 and c != guess[i]:"):
                                        with out.block("if c < guess[i]:"):
                                            out.add("left_ok = True", "left_v = val", "left_r = r")
                                        with out.block("else:"):
                                            out.add("right_ok = True", "right_v = val", "right_r = r")
                            with out.block("elif bad:"):
                                out.add("nbad += 1")
                                with out.block("if first_bad < 0:"):
                                    out.add("first_bad = c")
                    with out.block("else:"):
                        # The slope bound first: beside the anchors, where it is meant to work, the
                        # interval bound cannot (the block holds choices nearly as good as the best).
                        out.add("descend = True")
                        if plan is not None:
                            _slope_bound(writer, out, plan)
                        with out.block("if descend:"):
                            _block_bound(writer, out)
                            with out.block("if dead or ub < best or (ub == best and cb + a > chosen):"):
                                out.add("descend = False")
                    with out.block("if descend:"):
                        out.add("mid = (a + b) // 2")
                        out.add("stack[top, 0] = mid + 1", "stack[top, 1] = b")
                        out.add("stack[top + 1, 0] = a", "stack[top + 1, 1] = mid", "top += 2")
            out.add("out_v[i] = best", "out_policy[i] = chosen", "out_bad[i] = nbad", "out_bad_choice[i] = first_bad")
    return out.text()
