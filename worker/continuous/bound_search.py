"""The unrestricted search of a ``next_of`` continuous choice by branch and bound over grid intervals.

Without the ``concave`` hint (every step of an unhinted solve, and the
unrestricted step that verifies the hints), :mod:`worker.continuous.search`
scans up to ``GRID_SCAN_MAX`` grid points of the chosen state and refines the
best one.  Where this module's bound holds (:func:`bound_plan`), the
generated kernel runs :data:`BOUND_TEXT` instead:

* the *incumbent* starts at the point's guess (the previous policy: the
  hinted step's choice in the verification), clamped into the interval;
* *blocks* are aligned dyadic runs of grid intervals ``[g_j, g_{j+1}]`` of
  the chosen state (block ``q`` of level ``l``: intervals ``q·2**l …
  (q+1)·2**l − 1``), cut to those meeting the interval ``[lo_b, hi_b]``.  A
  block's upper bound is the interval bound of the reward over its choices
  (:func:`worker.expressions.intervals.interval_source`, with the box
  narrowed by the constraints as the grid-restricted branch and bound
  does; a block where a constraint certainly fails is dropped) plus ``β``
  times the largest continuation over the block, widened by
  :data:`~worker._codegen.block_search.BOUND_SLACK` of ``|reward bound| +
  β·max |EV|`` (the rounding of the interpolation's weights and of the
  cubic's Hermite form);
* the largest continuation over a block is the largest *node* value of its
  intervals (:func:`worker.continuous.bound_kernels.block_max`, from the
  max-pyramid of ``EVt`` along the chosen state).  That is exact for
  ``linear`` interpolation, and for ``monotone_cubic`` with one state: with
  the slopes of :func:`worker.continuous.interp_kernels.monotone_slopes`
  every node slope is between 0 and 3 times the secant of each interval
  beside it (0 where the data turn, that is at a local extremum or a flat
  secant; inside, the Fritsch–Butland weighted harmonic mean, at most
  ``3(h0 + h1)/(2h1 + h0)`` and ``3(h0 + h1)/(h1 + 2h0)`` times the two
  secants, both at most 3; at the grid's ends the three-point formula, set
  to 0 when its sign differs from the secant's, below twice the secant when
  the data do not turn and capped at three times it when they do; with two
  points both slopes are the secant), which is inside the square
  ``[0, 3]²`` of Fritsch & Carlson (1980, "Monotone piecewise
  cubic interpolation", SIAM J. Numer. Anal. 17(2)), so each interval's
  piece is monotone and lies between its two node values.  With several
  states, tomorrow's other states must not move with the choice: the
  continuation is then a sum of lines along the chosen state with the
  other states' non-negative multilinear weights, bounded by the weighted
  sum of the lines' block maxima.  The tensor-product cubic's weights can
  be negative, so it keeps the scan;
* blocks are searched depth first, the child with the higher bound first; a
  block whose bound is at most the incumbent is skipped, another halved,
  down to blocks of ``2**LEAF_LEVEL`` intervals, whose intervals are then
  searched one by one: from the better end, which is kept when a point a
  tolerance inside is no better, else by Brent's method inside the interval
  (the one of :mod:`worker.continuous.search`; both ends of an interval are
  evaluated, so the answer is never below a grid point's value).

Before the blocks, where :mod:`worker.continuous.bound_proof` applies (``linear`` or ``monotone_cubic``, the chosen
state the only one, a reward :mod:`worker._slopes` can differentiate) and the step's hulls are given, the
*proof at the incumbent* runs (``#PROOF#``): where it shows that no choice beats the guess by more than the
slack, the block stack is emptied and the incumbent is the answer; elsewhere the blocks are searched as below.

What is proved: no skipped block holds a choice whose value (as the kernel
computes it) exceeds the incumbent when it was skipped, up to the slack, so
the answer is at least the value at every grid point and at every choice
of a skipped block.  What is local: inside one grid interval of a block not
skipped, the objective is taken to be single-peaked (the end test and
Brent's method), as the scan's refinement takes it between two grid points.
Every point's answer depends on that point alone (the values of the ends
kept for the next interval are reset at each point and combination), so the
bits are the same on any number of threads.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from worker import expressions
from worker._codegen.block_search import BOUND_SLACK, tighten_box, tree_interval
from worker._codegen.hoist import Hoister, dependents
from worker._codegen.writer import Lines
from worker.continuous.bound_proof import guess_text, proof_plan, proof_text
from worker.continuous.search import NARROW_TEXT, XTOL_SHARE, brent_loop

__all__ = [
    "BOUND_ARGUMENTS", "BOUND_CALL", "BOUND_TEXT", "LEAF_LEVEL", "STACK_ROWS", "BoundPlan", "bound_plan",
    "bound_search",
]

LEAF_LEVEL = 3
"""Blocks of at most ``2**LEAF_LEVEL`` grid intervals are searched interval by interval, without bounds of their
own: on the accuracy benchmark a bound costs about seven evaluations of the objective, an interval's end test two."""
STACK_ROWS = 130
"""Rows of the block stack (each split pushes two halves, so depth first it holds about 2·log2(intervals))."""

BOUND_ARGUMENTS = ("EVt, D, beta, p, sgrid, meta, ztab, svals, piz, i, combos, cc, guess, has_guess, lo_b, hi_b, "
                   "b_pyr, b_levels, ev_abs, b_lev, b_q, b_ub, b_hull, b_hd")
"""The arguments of the generated ``bound_point``: the search kernel's, the point ``i``, the combination ``cc``, the
interval ``[lo_b, hi_b]`` (narrowed under ``monotone``), the pyramid, the block stack and the hulls of the proof at
the incumbent (:mod:`worker.continuous.bound_proof`; empty: no proof)."""

BOUND_CALL = f"""{NARROW_TEXT}width = hi_b - lo_b
x, fx, rx, proven = bound_point({BOUND_ARGUMENTS})
if proven:
    b_proven[i] += 1
"""
"""What the search kernel runs in place of the scan: the interval, narrowed as the scan narrows it, then
``bound_point``, counting in ``b_proven`` the combinations where the proof at the incumbent held; the kink polish
follows as after the scan."""

GUESS_TEXT = """xg = g
fg, rg, _xk = f(xg)
if xg == g and fg > fx:
    x = g
    fx = fg
    rx = rg
"""
"""The evaluation of the guess ``g`` at ``#GUESS#`` of :data:`BOUND_TEXT`: it becomes the incumbent.  The proof at
the incumbent (:func:`worker.continuous.bound_proof.guess_text`) evaluates its anchors through the same lines, in a
loop whose first point is ``g`` (one inline copy of the model less to compile)."""

BOUND_TEXT = f"""
proven = False
x = np.nan
fx = -np.inf
rx = -np.inf
width = hi_b - lo_b
if width == 0.0:
    fx, rx, _xk = f(lo_b)
    x = lo_b
elif width > 0.0:
    tol_abs = {XTOL_SHARE!r} * width
    k0, _w0, _c0 = locate_one(sgrid, grid_off, grid_size, lo_b)
    k1, _w1, _c1 = locate_one(sgrid, grid_off, grid_size, hi_b)
    if k1 > k0 and sgrid[grid_off + k1] >= hi_b:
        k1 -= 1
#PREPARE#
    g = guess[i] if has_guess else np.nan
    if g == g:
        g = min(max(g, lo_b), hi_b)
#GUESS#
    b_lev[0] = b_root
    b_q[0] = 0
    b_ub[0] = np.inf
    top = 1
#PROOF#
    n0_x = np.nan
    n0_f = -np.inf
    n0_r = -np.inf
    n1_x = np.nan
    n1_f = -np.inf
    n1_r = -np.inf
    while top > 0:
        top -= 1
        lev = b_lev[top]
        q = b_q[top]
        if b_ub[top] <= fx:
            continue
        if lev > {LEAF_LEVEL}:
            lc = lev - 1
            ub_0 = -np.inf
            ub_1 = -np.inf
            for side in range(2):
                qc = 2 * q + side
                ca = max(qc << lc, k0)
                cz = min(((qc + 1) << lc) - 1, k1)
                ub = -np.inf
                if ca <= cz:
                    c_lo = max(sgrid[grid_off + ca], lo_b)
                    c_hi = min(sgrid[grid_off + cz + 1], hi_b)
#BOUND#
                if side == 0:
                    ub_0 = ub
                else:
                    ub_1 = ub
            for side in range(2):
                right = (side == 0) == (ub_0 >= ub_1)
                ub = ub_1 if right else ub_0
                if not ub <= fx:
                    b_lev[top] = lc
                    b_q[top] = 2 * q + 1 if right else 2 * q
                    b_ub[top] = ub
                    top += 1
            continue
        ja = max(q << lev, k0)
        jb = min(((q + 1) << lev) - 1, k1)
        for j in range(ja, jb + 1):
            a = max(sgrid[grid_off + j], lo_b)
            b = min(sgrid[grid_off + j + 1], hi_b)
            x1 = np.nan
            f1 = -np.inf
            r1 = -np.inf
            for e_k in range(4):
                if e_k == 0:
                    xe = a
                elif e_k == 1:
                    xe = b
                elif e_k == 2:
                    if f1 > -np.inf:
                        continue
                    xe = 0.5 * (a + b)
                else:
                    if not f1 > -np.inf:
                        break
                    step_e = 2.0 * (1.4901161193847656e-08 * abs(x1) + tol_abs)
                    if b - a <= 2.0 * step_e:
                        break
                    xe = x1 + step_e if x1 == a else (x1 - step_e if x1 == b else x1)
                    if xe == x1:
                        break
                if xe == n0_x:
                    fe = n0_f
                    re = n0_r
                elif xe == n1_x:
                    fe = n1_f
                    re = n1_r
                else:
                    fe, re, _xk = f(xe)
                    if e_k < 2:
                        if e_k == 0:
                            n0_x = xe
                            n0_f = fe
                            n0_r = re
                        else:
                            n1_x = xe
                            n1_f = fe
                            n1_r = re
                if fe > f1:
                    x1 = xe
                    f1 = fe
                    r1 = re
            if not f1 > -np.inf:
                continue
            if x1 == a or x1 == b:
                if f1 > fx:
                    x = x1
                    fx = f1
                    rx = r1
                continue
            xb = x1
            wb = x1
            vb = x1
            gx = -f1
            gw = gx
            gv = gx
            fb = f1
            rb = r1
            dd = 0.0
            ee = 0.0
{brent_loop(12, x="xb", w="wb", v="vb", fx="fb", rx="rb", mid="mid_b")}            if fb > fx:
                x = xb
                fx = fb
                rx = rb
"""
"""The body of ``bound_point`` after its point is unpacked and ``f`` written (with ``grid_off``, ``grid_size``,
``b_outer`` (lines of ``EVt`` beside the chosen state's) and ``b_root`` (the level of one block over every
interval) in scope): leaves the best choice, value and reward in ``x``, ``fx``, ``rx``, and ``proven`` (the proof
at the incumbent held).  ``#PREPARE#`` is where the bound's parts fixed at the point go, ``#PROOF#`` the proof's
lines (:func:`worker.continuous.bound_proof.proof_text`; they empty the block stack when it holds), ``#GUESS#``
:data:`GUESS_TEXT`, ``#BOUND#``
the lines setting ``ub`` for the choices ``[c_lo, c_hi]`` of intervals ``ca … cz`` (block ``qc`` of level ``lc``);
``b_lev``/``b_q``/``b_ub`` are the block stack."""


@dataclass
class BoundPlan:
    """What the bound needs beyond the continuous writer: the names that move with the choice, and the names of
    the writer's variables (a copy: the bound's own are added to it)."""

    varying: set[str]
    names: dict[str, str]
    provable: bool = False


def bound_plan(writer: Any) -> BoundPlan | None:
    """The plan of the bound for a :class:`worker.continuous.source._Writer`, or None where it does not hold.

    It holds for a choice that is ``next_of`` a state (the target), without draws after the choice, with
    ``linear`` interpolation or ``monotone_cubic`` with one state, when no other state's law moves with the
    choice (see the module docstring).
    """
    w = writer
    if w.target is None or w.draws is not None or (w.cubic and w.d > 1):
        return None
    choice = w.model.choices[0]
    varying = dependents(w.model, {choice})
    for t in range(w.d):
        if t != w.target and (w.setters[t] == 0 or (t in w.next and expressions.names_in(w.next[t].tree) & varying)):
            return None
    return BoundPlan(varying=varying, names=dict(w.names))


def bound_search(writer: Any, plan: BoundPlan) -> str:
    """:data:`BOUND_TEXT` with its ``#PREPARE#`` and ``#BOUND#`` lines written for the writer's model."""
    w = writer
    model = w.model
    choice = model.choices[0]
    varying = plan.varying
    names = plan.names
    prepare = Lines()
    prepare.depth = 1
    point_lines: list[str] = []
    hoist = Hoister(varying, names, point_lines, "bq_")
    # Defines that do not move with the choice (they may move with the other choices): one value each.
    trees: dict[int, expressions.Node] = {}
    for k, expr in w.defines:
        name = model.defines[k][0]
        if name in varying:
            trees[k] = hoist.rewrite(expr.tree)
        else:
            names[name] = f"bd_{k}"
            point_lines.append(f"bd_{k} = {expressions.scalar_source(expr, names)}")
    feasible = [hoist.rewrite(expr.tree) for expr in w.feasible]
    reward = hoist.rewrite(w.reward.tree)
    others = [t for t in range(w.d) if t != w.target]
    for t in others:  # tomorrow's other states: their laws, or the other choices they are next_of
        j = w.setters[t]
        law = f"c_{j}" if j is not None else expressions.scalar_source(w.next[t], names)
        point_lines.append(f"ox_{t} = {law}")
    prepare.extend(point_lines)
    if others:
        _continuation_weights(prepare, others)

    bound = Lines()
    bound.depth = 5
    lo_names, hi_names = dict(names), dict(names)
    lo_names[choice], hi_names[choice] = "c_lo", "c_hi"

    def interval(tree: expressions.Node, prefix: str) -> tuple[str, str]:
        return tree_interval(tree, varying, names, lo_names, hi_names, prefix, bound)

    bound.add("ub = -np.inf")
    for k, tree in trees.items():
        name = model.defines[k][0]
        lo_names[name], hi_names[name] = interval(tree, f"bd{k}_")
    depth = bound.depth
    for k, tree in enumerate(feasible):
        lo, hi = interval(tree, f"bf{k}_")
        bound.add(f"if not ({lo} == 0.0 and {hi} == 0.0):")
        bound.depth += 1
        tighten_box(None, bound, tree, varying, names, lo_names, hi_names)
    _, r_hi = interval(reward, "br_")
    with bound.block(f"if {r_hi} != -np.inf:"):
        t = w.target
        query = f"b_pyr, b_levels, EVt, size_{t}, stride_{t}, b_outer, iz, "
        if others:
            terms = " + ".join(f"ow_{m} * block_max({query}ob_{m}, lc, qc)" for m in range(2 ** len(others)))
            bound.add(f"ev = {terms}")
        else:
            bound.add(f"ev = block_max({query}0, lc, qc)")
        bound.add(f"ub = {r_hi} + beta * ev")
        with bound.block("if ub - ub == 0.0:"):
            bound.add(f"ub += {BOUND_SLACK!r} * (abs({r_hi}) + beta * ev_abs)")
    bound.depth = depth
    proof = None if others else proof_plan(w, names)
    plan.provable = proof is not None
    text = BOUND_TEXT.replace("#PREPARE#", prepare.text()).replace("#BOUND#", bound.text())
    guess = GUESS_TEXT if proof is None else guess_text(GUESS_TEXT, proof.cubic)
    text = text.replace("#GUESS#\n", "".join(f"        {line}\n" for line in guess.strip("\n").split("\n")))
    return text.replace("#PROOF#\n", "" if proof is None else proof_text(proof) + "\n")


def _continuation_weights(out: Lines, others: list[int]) -> None:
    """``ow_m``/``ob_m``: the multilinear weight and flat base index (0 on the target) of each corner ``m`` of
    the other states' cells around their tomorrow's values ``ox_t`` (NaN weights if any is not a number)."""
    for t in others:
        out.add(f"olo_{t}, ow1_{t}, _ocl_{t} = locate_one(sgrid, off_{t}, size_{t}, ox_{t})")
    for m in range(2 ** len(others)):
        bits = [(m >> k) & 1 for k in range(len(others))]
        weight = " * ".join(f"ow1_{t}" if bit else f"(1.0 - ow1_{t})" for t, bit in zip(others, bits))
        base = " + ".join(f"stride_{t} * (olo_{t} + {bit})" for t, bit in zip(others, bits))
        out.add(f"ow_{m} = {weight}", f"ob_{m} = {base}")
