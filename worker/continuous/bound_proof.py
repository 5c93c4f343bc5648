"""The proof at the incumbent that runs before the branch and bound of a ``next_of`` continuous choice.

The unrestricted step that verifies the hints (:meth:`worker.solvers.loop.Loop.verify`) starts each point's
branch and bound (:mod:`worker.continuous.bound_search`) at the hinted step's choice ``x0``.  Its block bound
cannot prune the blocks beside the optimum (the reward falls where the continuation rises, and the two are
bounded apart), so without this proof it descends to the leaves at every point.  Where it holds, this
proof returns the incumbent at once; where it does not hold or does not apply, the branch and bound runs as
before.

What is proved
--------------
With ``W`` the continuation (with ``linear`` interpolation: the linear interpolant of the ``EVt`` row of the
point's shock along the chosen state, node values ``W_j`` at grid nodes ``s_j``), ``f(x) = r(x) + β W(x)`` and
``H`` the upper concave hull of the nodes (:func:`worker.continuous.bound_kernels.build_hulls`, built once per
step; ``H`` plus the row's *deficit* is at least ``W`` everywhere, ``W`` being linear between nodes), each side of
``x0`` is cut into a *near* piece ``[x0, x0 + t]`` and a *far* piece ``[x0 + t, hi_b]`` (on the left, mirrored),
with ``t = PROOF_REACH`` Brent tolerances at ``x0``.  Over a piece with anchor ``a`` (``x0`` for the near piece,
its inner end for the far one, evaluated beside the guess (:func:`guess_text`): it must be allowed and finite), by
the mean value theorem as in :mod:`worker._codegen.static_proof`, every allowed ``x`` of the piece has

    f(x) ≤ f(a) + G·(x − a) + β (H(x) + deficit − W(a)),

with ``G`` the upper end (right side) or the lower end (left side) of the interval bound of ``r'``
(:func:`worker._codegen.block_search.slope_steps`, :mod:`worker._slopes`) over the piece's choice box.  The
right-hand side is concave and piecewise linear in ``x``: its maximum over the piece is one bisection
over the hull's segments (:func:`worker.continuous.bound_kernels.hull_rise`).  The proof holds when every
non-empty piece's bound is at most ``f(x0)`` plus the slack below; the answer is then ``x0`` with its value
and reward: no choice beats it by more than the slack (twice the slack, strictly: the computed bound is within
one slack of the exact one, and one more is allowed because at the optimum of a concave objective the bound
*equals* ``f(x0)``, so a test without it would fail by rounding at half the points).  That is about ``2**-39``
of the values' size, below any value tolerance a solve is given; a better choice by less goes unnoticed where
the branch and bound's Brent refinement might have found it.  The near piece
is there because ``x0`` is only within Brent's tolerance of the optimum: one piece from ``x0`` to ``hi_b``
would rise by ``f'(x0)`` times a grid interval, while the near piece rises by ``f'(x0)·t`` (about ``f''·t²``)
and the far piece's anchor is past the optimum.

With ``monotone_cubic`` (one state), ``W`` on grid interval ``[s_j, s_{j+1}]`` is the cubic Hermite piece of the
node values and the kernel's slopes ``D``.  ``H`` is then the upper concave hull of the pieces' Bézier control
points (:func:`worker.continuous.bound_kernels.build_controls`; a piece lies in their convex hull), which touches
``W`` at the nodes where the data are concave but lies above it inside the intervals by about ``h²·W''``, so the
hull bound is used only from an anchor at a grid node.  Each side is cut into three pieces: *near*
``[x0, x0 + t]`` (anchor ``x0``), *mid* ``[x0 + t, s_k]`` up to the first node ``s_k`` beyond it (anchor
``x0 + t``), and *far* ``[s_k, hi_b]`` (anchor ``s_k``, evaluated beside the guess too; ``W(s_k)`` is the node's
value, which the kernel reads exactly); on the left, mirrored (``s_k`` the last node at or below ``x0 − t``).  The
far piece has the hull bound above.  The near and mid pieces have, by the mean value theorem for ``r`` and ``W``,

    f(x) ≤ f(a) + (G + β·M)·(x − a),

with ``M`` the largest ``W'`` over ``[a, hi]`` (right; on the left the smallest over ``[lo, a]``, and ``G`` the
lower end): ``W'`` is a quadratic on each interval, whose extremes over a sub-interval are at its ends or its
vertex (:func:`~worker.continuous.bound_kernels.cubic_rise`, which widens them for the rounding of the
coefficients and of ``t``).  The rounding of the control points and the kernel's reading of ``W`` at
``s_j + w·h`` (``w`` rounded) for ``x`` are covered by a per-row *widening* (``2**-46·(max|Y| + S·max|X|)``,
``S`` the control polygon's steepest slope, which bounds ``|W'|``), added like the deficit to every piece's bound;
the Hermite form's own rounding (a few ulps of ``|W_j| + |W_{j+1}| + h(|D_j| + |D_{j+1}|)/7``, the slopes being at
most three secants) is within the slack's ``2β·max|EV|``.

The mean value theorem needs ``r`` continuous on the segment between the anchor and every allowed ``x`` and
differentiable inside it, with ``r'`` in the tree's bound; :mod:`worker._slopes` (its Soundness section)
gives that wherever the used end of the bound is a number, and refuses (:class:`worker._slopes.NotSmooth`,
then no proof is written) what may jump.  The constraints narrow the choice's box, and a define's box only
where the bounds of its derivative exclude 0 (it is then monotone on the box, so a constraint holding at the
anchor and at ``x`` holds between them): the rule, the rounding of the limits and the acceptance of an
infinite unused end are those of :mod:`worker._codegen.static_proof` (its
:func:`~worker._codegen.static_proof.narrow_lines`).  A box that reaches a pole of the reward (``c → 0``
under ``c**(1 − γ)``) without a constraint narrowing it has an infinite end, and the proof fails there; a
piece that the narrowing empties fails too (conservatively).

Slack: :data:`~worker._codegen.block_search.BOUND_SLACK` times ``2|r(a)| + 2|f(x0)| + |G|·(width of the
piece) + 2β·max|EV| + |rise|``, which covers the rounding of ``f(a)`` and of ``f(x)`` at a
choice near the bound (its reward is then within ``|f(x0)| + β·max|EV|`` of the bound's size), of the hull's
interpolation and of the deficit (ulps of ``max|EV|``), the bisection's sign tests (a wrong sign moves the
maximum by a few ulps of ``|G|·width``: :func:`~worker.continuous.bound_kernels.hull_rise`), and the
intervals' own slack on ``r'``.  The same slack serves ``monotone_cubic``: its further roundings are inside the
rise itself (the widening of the control points and of the kernel's reading of ``x``, the widened extremes of
``W'``, and ``2**-48·(|G| + β|M|)`` times the reach for the product ``(G + β·M)·(x − a)``).

Where it runs: only where the incumbent is the last step's own choice at the same value function — the
verification, whose guess is the hinted step's choices at the same ``v``
(:meth:`worker.continuous.problem.ContinuousProblem._bellman` keeps the last step's ``v`` and choices in
``last_step``).  An unhinted solve's steps start from the last iteration's policy at another ``v``; there a
proof within its slack would keep every choice whose optimum moved by less than Brent's tolerance, so the
policy would not follow small changes of the model at all (a search's finite differences in a param saw no
change, and its least squares stalled), and the branch and bound refines as before.

What is local: nothing beyond the branch and bound's own rules; the proof applies to ``linear`` and
``monotone_cubic`` interpolation with the chosen state the only state and no draws (several states keep the
branch and bound).  Each point's proof reads that point and the step's hulls only, so the bits are the
same on any number of threads.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from worker import _slopes, expressions
from worker._codegen.block_search import BOUND_SLACK, slope_steps, tree_interval
from worker._codegen.hoist import Hoister, dependents
from worker._codegen.static_proof import constraint_limits, inward_limit, narrow_lines
from worker._codegen.writer import Lines
from worker.continuous.search import SQRT_EPS

__all__ = ["PROOF_REACH", "ProofPlan", "guess_text", "proof_plan", "proof_text"]

PROOF_REACH = 4.0
"""Width of each side's near piece, in Brent tolerances (``SQRT_EPS·|x0| + tol_abs``) at the incumbent (count:
Brent stops within about one of the optimum, so the far piece's anchor lies past it)."""


@dataclass
class ProofPlan:
    """``varying`` the names that move with the choice (their derivatives' names too); ``steps`` as
    :func:`worker._codegen.block_search.slope_steps` gives them, with ``lines`` computing their
    hoisted parts and the narrowing limits (variables ``limits`` lists per name) into the variables ``names``
    maps them to."""

    choice: str
    varying: set[str]
    steps: list[tuple[str, expressions.Node, expressions.Node]]
    lines: list[str]
    names: dict[str, str]
    limits: dict[str, list[tuple[str, str, bool]]]
    cubic: bool = False


def proof_plan(writer: Any, names: dict[str, str]) -> ProofPlan | None:
    """The proof's plan for a :class:`worker.continuous.source._Writer` whose bound holds, or None where it does
    not apply (see the module docstring); ``names`` are the branch and bound's (its per-point variables)."""
    w = writer
    if w.d != 1 or w.draws is not None or w.target != 0:
        return None
    model = w.model
    choice = model.choices[0]
    names = dict(names)
    lines: list[str] = []
    hoist = Hoister(dependents(model, {choice}), names, lines, "pq_")
    try:
        steps = slope_steps(model, w.defines, w.reward, choice, hoist)
    except _slopes.NotSmooth:
        return None
    found: dict[str, list[tuple[str, str, bool]]] = {}
    for expr in w.feasible:
        constraint_limits(hoist.rewrite(expr.tree), hoist.varying, names, found, set())
    limits: dict[str, list[tuple[str, str, bool]]] = {}
    for name, items in found.items():
        for op, point, fixed in items:
            variable = f"pf_lim{len(lines)}"
            lines.append(f"{variable} = {inward_limit(op, point)}")
            limits.setdefault(name, []).append((op, variable, fixed))
    varying = hoist.varying | {_slopes.prime(name) for name in hoist.varying}
    return ProofPlan(choice, varying, steps, lines, names, limits, bool(w.cubic))


def guess_text(guess: str, cubic: bool = False) -> str:
    """``guess`` (:data:`worker.continuous.bound_search.GUESS_TEXT`, which evaluates ``xg = g``) in a loop that also
    evaluates the anchors ``g ± t`` when there are hulls, into ``pf_fr``/``pf_rr`` (right) and ``pf_fl``/``pf_rl``
    (left): through the guess's own lines, so the model is not inlined once more.  With ``cubic`` also the nodes
    ``pf_nr`` (the first beyond ``g + t``, index ``pf_jr``; ``hi_b`` where it is past it) and ``pf_nl`` (the last
    at or below ``g − t``, ``pf_jl``; ``lo_b`` likewise), into ``pf_fnr``/``pf_rnr`` and ``pf_fnl``/``pf_rnl``."""
    lines = guess.strip("\n").split("\n")
    assert lines[0] == "xg = g"
    out = Lines()
    out.add(f"pf_t = {PROOF_REACH!r} * ({SQRT_EPS!r} * abs(g) + tol_abs)",
            "pf_fr = -np.inf", "pf_rr = -np.inf", "pf_fl = -np.inf", "pf_rl = -np.inf")
    ends = "min(g + pf_t, hi_b) if e_g == 1 else max(g - pf_t, lo_b)"
    if cubic:
        out.add("pf_fnr = -np.inf", "pf_rnr = -np.inf", "pf_fnl = -np.inf", "pf_rnl = -np.inf",
                "pf_jr, _pf_w, _pf_c = locate_one(sgrid, grid_off, grid_size, min(g + pf_t, hi_b))", "pf_jr += 1",
                "pf_nr = min(max(sgrid[grid_off + pf_jr], min(g + pf_t, hi_b)), hi_b)",
                "pf_jl, _pf_w, _pf_c = locate_one(sgrid, grid_off, grid_size, max(g - pf_t, lo_b))",
                "pf_nl = max(min(sgrid[grid_off + pf_jl], max(g - pf_t, lo_b)), lo_b)")
        ends = f"({ends}) if e_g < 3 else (pf_nr if e_g == 3 else pf_nl)"
    with out.block(f"for e_g in range({5 if cubic else 3} if b_hull.shape[0] > 0 else 1):"):
        out.add(f"xg = g if e_g == 0 else ({ends})")
        out.extend(lines[1:])
        with out.block("if e_g == 1:"):
            out.add("pf_fr = fg", "pf_rr = rg")
        with out.block("elif e_g == 2:"):
            out.add("pf_fl = fg", "pf_rl = rg")
        if cubic:
            with out.block("elif e_g == 3:"):
                out.add("pf_fnr = fg", "pf_rnr = rg")
            with out.block("elif e_g == 4:"):
                out.add("pf_fnl = fg", "pf_rnl = rg")
    return out.text()


def proof_text(plan: ProofPlan) -> str:
    """The lines (at the depth of ``BOUND_TEXT``'s ``#PROOF#``) that set ``proven`` and empty the block stack
    when the proof holds; they read the incumbent ``x``/``fx``/``rx``, the guess ``g`` and the hulls
    ``b_hull``/``b_hd`` (empty: no proof)."""
    out = Lines()
    out.depth = 1
    with out.block("if b_hull.shape[0] > 0 and x == g and fx - fx == 0.0:"):
        out.extend(plan.lines)
        out.add("proven = True")
        if plan.cubic:  # 0 near right [g, g + t], 1 mid right [g + t, pf_nr], 2 far right [pf_nr, hi_b], 3-5 left
            with out.block("for pf_k in range(6):"):
                out.add("pf_right = pf_k < 3", "pf_m = min(g + pf_t, hi_b) if pf_right else max(g - pf_t, lo_b)",
                        "pf_kind = pf_k % 3", "pf_n = pf_nr if pf_right else pf_nl",
                        "pf_a = g if pf_kind == 0 else (pf_m if pf_kind == 1 else pf_n)",
                        "pf_o = pf_m if pf_kind == 0 else (pf_n if pf_kind == 1 else (hi_b if pf_right else lo_b))",
                        "pf_lo = min(pf_a, pf_o)", "pf_hi = max(pf_a, pf_o)")
                with out.block("if not pf_lo < pf_hi:"):
                    out.add("continue")
                out.add("pf_f = fx if pf_kind == 0 else ((pf_fr if pf_right else pf_fl) if pf_kind == 1 else "
                        "(pf_fnr if pf_right else pf_fnl))",
                        "pf_r = rx if pf_kind == 0 else ((pf_rr if pf_right else pf_rl) if pf_kind == 1 else "
                        "(pf_rnr if pf_right else pf_rnl))")
                _piece_bound(out, plan, True)
        else:  # 0 near right [g, g + t], 1 far right [g + t, hi_b], 2 near left, 3 far left
            with out.block("for pf_k in range(4):"):
                out.add("pf_right = pf_k < 2", "pf_m = min(g + pf_t, hi_b) if pf_right else max(g - pf_t, lo_b)",
                        "pf_a = g if pf_k % 2 == 0 else pf_m")
                out.add("pf_lo = (g if pf_k == 0 else pf_m) if pf_right else (pf_m if pf_k == 2 else lo_b)",
                        "pf_hi = (pf_m if pf_k == 0 else hi_b) if pf_right else (g if pf_k == 2 else pf_m)")
                with out.block("if not pf_lo < pf_hi:"):
                    out.add("continue")
                out.add("pf_f = fx if pf_k % 2 == 0 else (pf_fr if pf_k == 1 else pf_fl)",
                        "pf_r = rx if pf_k % 2 == 0 else (pf_rr if pf_k == 1 else pf_rl)")
                _piece_bound(out, plan, False)
        with out.block("if proven:"):
            out.add("top = 0")
    return out.text()


def _piece_bound(out: Lines, plan: ProofPlan, cubic: bool) -> None:
    """The lines, inside the loop over pieces, that bound the piece ``[pf_lo, pf_hi]`` with anchor ``pf_a``
    (value ``pf_f``, reward ``pf_r``) and clear ``proven`` (leaving the loop) where the bound exceeds ``fx``."""
    names = plan.names
    lo_names, hi_names = dict(names), dict(names)
    lo_names[plan.choice], hi_names[plan.choice] = "pf_lo", "pf_hi"
    out.add("pf_empty = False")
    narrow_lines(out, plan.limits.get(plan.choice, []), "pf_lo", "pf_hi", None, "pf_empty")
    g_lo = g_hi = "0.0"
    for k, (name, tree, slope) in enumerate(plan.steps):
        if name:
            lo_names[name], hi_names[name] = tree_interval(tree, plan.varying, names, lo_names, hi_names, f"pv{k}_",
                                                           out)
        d_lo, d_hi = tree_interval(slope, plan.varying, names, lo_names, hi_names, f"pd{k}_", out)
        if name:
            lo_names[_slopes.prime(name)], hi_names[_slopes.prime(name)] = d_lo, d_hi
            narrow_lines(out, plan.limits.get(name, []), lo_names[name], hi_names[name], (d_lo, d_hi), "pf_empty")
        else:
            g_lo, g_hi = d_lo, d_hi
    out.add(f"pf_s = {g_hi} if pf_right else {g_lo}", "pf_ub = np.inf")
    with out.block("if not pf_empty and pf_f - pf_f == 0.0 and pf_s - pf_s == 0.0:"):
        grid = "sgrid[grid_off:grid_off + grid_size]"
        if cubic:
            with out.block("if pf_kind < 2:"):
                out.add(f"pf_rise = cubic_rise(EVt, D, {grid}, b_hd, iz, beta, pf_s, pf_lo, pf_hi, pf_a, pf_right)")
            with out.block("else:"):  # the anchor is a node, where the kernel reads the node's value exactly
                out.add("pf_j = pf_jr if pf_right else pf_jl",
                        "pf_wa = EVt[iz, pf_j] if pf_a == sgrid[grid_off + pf_j] else np.nan",
                        "pf_rise = control_rise(b_hd, b_hull, iz, beta, pf_s, pf_lo, pf_hi, pf_a, pf_wa)")
        else:
            out.add(f"pf_rise = hull_rise(EVt, {grid}, b_hull, b_hd[:, 0], iz, beta, pf_s, pf_lo, pf_hi, pf_a)")
        out.add(f"pf_ub = pf_f + pf_rise - {BOUND_SLACK!r} * (2.0 * abs(pf_r) + 2.0 * abs(fx) + "
                "abs(pf_s) * (pf_hi - pf_lo) + 2.0 * beta * ev_abs + abs(pf_rise))")
    with out.block("if not pf_ub <= fx:"):
        out.add("proven = False", "break")
