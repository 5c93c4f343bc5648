"""Proofs, per line, that no other value of a static choice beats the one a climb found.

A static choice (hours worked; :mod:`worker.staticchoices`) is maximised out
of the reward for every (point, value of the other choices) -- a *line*.
Under the ``concave`` hint :mod:`worker.statickernel` climbs along it from
the best value of the neighbouring line and stops at a peak ``j*``.  The
hint is a promise, never trusted: every line is then verified, exactly, by
the code this module writes, and the verification costs a few interval
operations per line instead of an evaluation of every value.

The proof on one side
---------------------
Along the static choice ``h`` (grid values increasing) the reward is
``f(j) = r(h_j)``.  Take an evaluated, allowed *anchor* ``a`` (first
``j* + 1``) and the block of every value beyond it, ``[a + 1, last]``.  By
the mean value theorem, for ``j`` in that block

    r(h_j) − r(h_a) = (h_j − h_a) · r'(ξ),   ξ between h_a and h_j,

so an upper bound ``G`` of ``r'`` over the *hull* ``[h_a, h_last]`` gives
``f(j) ≤ f(a) + (h_j − h_a)·G``: at most ``f(a) + (h_{a+1} − h_a)·G`` when
``G ≤ 0``, at most ``f(a) + (h_last − h_a)·G`` otherwise.  When that is at
most the best value (a tie beyond the best loses to it: ties go to the lower
index), nothing on that side can win.  To the left (block ``[0, a − 1]``,
first ``a = j* − 1``) a lower bound of ``r'`` over ``[h_0, h_a]`` does the
same, and there the bound must be strictly below the best.  When a proof
fails, the anchor's neighbour is evaluated and becomes the anchor
(``PROOF_TRIES`` times per side), then the rest of that side is simply
evaluated: a false hint costs time, never exactness.  A value better than
the climb's found this way is counted as a broken promise.  The two sides'
proofs are written with their own variables and run one after the other in
straight-line code, which the processor overlaps.

The theorem needs ``r`` differentiable at every point between ``h_a`` and
``h_j``; a proof uses one end of the bound of ``r'`` and needs that end to
be a number.  Where a nan is possible the bounds are full, so the proof
fails; an end is otherwise infinite only where a finite quantity overflows,
or where a narrowed define (below) comes arbitrarily near 0 without reaching
it (a divisor whose bounds contain 0 gives the full interval), and in both
cases ``r'`` exists at every point of the segment.

``r'`` is written by :func:`worker._slopes.derivative` (which refuses
expressions that may jump along ``h``; the rules there also say why a finite
bound means ``r`` is smooth on the hull) and bounded by
:func:`worker.expressions.intervals.interval_source`.  To keep it cheap, its
parts that depend on nothing but the params and ``h`` (``h**(1 − α)``, the
marginal disutility of hours) are bounded once per kernel call over every
prefix hull ``[h_0, h_a]`` and suffix hull ``[h_a, h_last]`` (tables
``VT_lo``/``VT_hi``), and its parts that do not depend on ``h`` are computed
once per line; per proof remain the few operations that mix the two.

Constraints
-----------
Only allowed values can win, so a constraint comparing a define (or ``h``)
with something fixed along the line (``c > 0``) may narrow that define's
bounds -- but the mean value theorem runs along the whole segment between
``h_a`` and ``h_j``, and both ends being allowed says nothing of the middle
in general.  The narrowing is therefore applied only where the bounds of the
define's derivative over the hull exclude 0: the define is then monotone on
the hull, the constraint holds on the whole segment between two allowed
ends, and the bounds of ``r'`` need only cover that segment.  (This keeps
``log c`` with ``c`` reaching 0 at few hours provable.)  Other constraints
are not used: the bounds then cover the whole hull, a superset.

A line on which the climb's start is not allowed is first bounded as a
whole (:func:`none_allowed_source`): when a constraint is false everywhere
on it, nothing there is allowed and nothing is evaluated, as the search over
every value would have found (lines where a large next capital leaves
nothing to eat at any hours: 12% of the elastic-labour benchmark's, where
they cost a third of the table's time).  Otherwise every value is searched.

Rounding
--------
The intervals enclose the computed values of each part (their rules are in
:mod:`worker.expressions.interval_kernels`); the mean value theorem is about
the exact function.  As in the exact block search's slope bound
(:mod:`worker._codegen.block_search`), the bound is widened by ``SLACK``
(``2**-40``, about 4,000 ulps) times the magnitudes of the anchor's value,
the step and the bound itself, which covers the difference between the
computed and the exact reward at the anchor and at ``j`` (a few ulps of
their magnitude for a reward computed without catastrophic cancellation),
the rounding of ``h_j − h_a`` and of the product, and the intervals' own
slack on ``r'``.  A reward whose computed value is off by more than that (a
difference of nearly equal large terms) is outside this argument, as it is
for the block search's.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field

from worker import _slopes, expressions
from worker._codegen.hoist import Hoister, dependents
from worker._codegen.writer import KernelWriter, Lines
from worker.expressions import Expression, names_in
from worker.expressions.intervals import interval_source

__all__ = ["PROOF_TRIES", "SLACK", "ProofPlan", "constraint_limits", "inward_limit", "narrow_lines", "proof_plan"]

SLACK = 2.0**-40
"""Relative widening of a side's bound (of |anchor| + |step| + |bound|; see the module docstring)."""
PROOF_TRIES = 4
"""Proofs tried per side of a line, each from the next anchor outward, before the rest of that side is
simply evaluated (count; where the hint holds the first proof succeeds on nearly every line)."""

_FLIPPED = {"<": ">", "<=": ">=", ">": "<", ">=": "<="}
_HELPER_LINE = re.compile(r"^(\w+), (\w+) = fixq_intervals\.(add|subtract|multiply|divide)\((.*)\)$")
_FULL = "(-np.inf)", "np.inf"
_NAN_TEST = re.compile(r"^\s*if (\w+) != \1 or (\w+) != \2:$")
_ALIAS = re.compile(r"^\s*(\w+) = -?(\w+)$")
_SAFE_HELPERS = frozenset({"add", "subtract", "multiply", "divide"})


def _specialised(lines: list[str]) -> list[str]:
    """``lines`` of :func:`interval_source` with ``+ - * /`` written inline, each followed by a nan test.

    Each case encloses what the helper of :mod:`worker.expressions.interval_kernels`
    encloses, by the same argument (rounding to nearest is monotone, so the
    computed value at any point of the box lies between the computed corner
    values), and any nan end -- which is where a nan may occur inside the box
    -- becomes the full interval, as there: a sum or difference takes the two
    corners that bound it; a product with a single point (both ends the same
    variable) two corners chosen by its sign, or ``[0, 0]`` for a zero point
    and a finite interval; a quotient by a single point likewise, and of a
    non-negative by a positive interval ``[lo/hi', hi/lo']``, else the helper.
    The proofs run millions of times per table, where the helpers' general
    cases were most of their cost, and every helper call site costs the
    kernel some 20-50 ms of compile time (measured).
    """
    result: list[str] = []
    for line in lines:
        match = _HELPER_LINE.match(line)
        if match is None:
            result.append(line)
            continue
        lo, hi, op, args = match.group(1), match.group(2), match.group(3), match.group(4).split(", ")
        al, ah, bl, bh = args
        full = [f"    {lo} = {_FULL[0]}", f"    {hi} = {_FULL[1]}"]
        if op in ("add", "subtract"):
            sign, first, second = ("+", bl, bh) if op == "add" else ("-", bh, bl)
            result += [f"{lo} = {al} {sign} {first}", f"{hi} = {ah} {sign} {second}"]
        elif op == "multiply" and (al == ah or bl == bh):
            p, (xl, xh) = (al, (bl, bh)) if al == ah else (bl, (al, ah))
            result += [f"if {p} > 0.0:", f"    {lo} = {p} * {xl}", f"    {hi} = {p} * {xh}",
                       f"elif {p} < 0.0:", f"    {lo} = {p} * {xh}", f"    {hi} = {p} * {xl}",
                       f"elif {p} == 0.0 and {xl} > -np.inf and {xh} < np.inf:", f"    {lo} = 0.0", f"    {hi} = 0.0",
                       "else:", *full]
        elif op == "divide" and bl == bh:
            result += [f"if {bl} > 0.0:", f"    {lo} = {al} / {bl}", f"    {hi} = {ah} / {bl}",
                       f"elif {bl} < 0.0:", f"    {lo} = {ah} / {bl}", f"    {hi} = {al} / {bl}",
                       "else:", *full]
        elif op == "divide":
            result += [f"if {bl} > 0.0 and {al} >= 0.0:", f"    {lo} = {al} / {bh}", f"    {hi} = {ah} / {bl}",
                       "else:", f"    {line}"]
        else:
            result.append(line)  # two intervals: the helper as written
            continue
        result += [f"if {lo} != {lo} or {hi} != {hi}:", *full]
    return result


class _Tabulator(Hoister):
    """Hoists the sub-trees that depend on the static choice and constants only, recording each tree."""

    def __init__(self, varying: set[str], choice: str, names: dict[str, str]) -> None:
        super().__init__(varying, names, [], "vt")
        self.choice = choice
        self.trees: list[expressions.Node] = []

    def point(self, node: expressions.Node) -> expressions.Node:
        if isinstance(node, (expressions.Number, expressions.Name)) or self.choice not in names_in(node):
            return node
        if node not in self.trees:  # the same part in several trees is bounded once
            self.trees.append(node)
        return expressions.Name(f"@vt{self.trees.index(node)}")


@dataclass
class ProofPlan:
    """What the proofs need: ``tables`` (trees of ``h`` and constants, bounded over hulls), ``line_lines``
    (the per-line parts, into variables that ``names`` maps them to), ``steps`` (``(define, value tree,
    derivative tree)`` for the defines the reward needs that move with ``h``, in order, then ``("", None,
    reward derivative)``) and ``limits`` (per define or ``h``: ``(op, variable, fixed)`` of the constraints
    that may narrow it, the variable set by ``fixed_lines`` once per kernel call when ``fixed``, else by
    ``line_lines``).  ``values`` (define, tree) and ``tests`` (the constraints) bound the allowed set over a
    whole line."""

    choice: str
    offset: str
    tables: list[expressions.Node]
    names: dict[str, str]
    line_lines: list[str]
    fixed_lines: list[str]
    steps: list[tuple[str, expressions.Node | None, expressions.Node]]
    values: list[tuple[str, expressions.Node]] = field(default_factory=list)
    tests: list[expressions.Node] = field(default_factory=list)
    limits: dict[str, list[tuple[str, str, bool]]] = field(default_factory=dict)


def proof_plan(writer: KernelWriter, axis: int, constant: set[str]) -> ProofPlan | None:
    """The plan for static choice ``axis`` of ``writer``'s model, or None where ``r`` may jump along it.

    ``writer`` is a plain :class:`KernelWriter` (its trees not yet rewritten
    for the static kernel); ``constant`` holds the variables of its
    per-point lines that depend on params only.
    """
    model = writer.model
    choice = model.choices[axis]
    moving = dependents(model, {choice})
    needed = set(model.reward.names)
    for name, expr in reversed(model.defines):
        if name in needed:
            needed |= set(expr.names)
    names = dict(writer.names)
    static_names = {choice} | set(model.params) | {f"@{v}" for v in constant}
    everything = set(names) | {_slopes.prime(name) for name in moving}
    tabulator = _Tabulator(everything - static_names, choice, names)
    line_lines: list[str] = []
    for k, expr in writer.defines:
        name = model.defines[k][0]
        if expr is not None and name not in moving:
            line_lines.append(f"d_{k} = {expressions.scalar_source(expr, names)}")
    steps: list[tuple[str, expressions.Node | None, expressions.Node]] = []
    varying = {name: True for name in moving if name != choice}
    try:
        for k, expr in writer.defines:
            name = model.defines[k][0]
            if expr is None or name not in moving or name not in needed:
                continue
            steps.append((name, expr.tree, _slopes.derivative(expr.tree, choice, varying)))
        steps.append(("", None, _slopes.derivative(writer.reward.tree, choice, varying)))
    except _slopes.NotSmooth:
        return None
    # The allowed set over the whole line, for lines where the climb's start is not allowed.
    tested = set().union(*(expr.names for expr in model.feasible)) if model.feasible else set()
    for name, expr in reversed(model.defines):
        if name in tested:
            tested |= set(expr.names)
    values = [(model.defines[k][0], expr.tree) for k, expr in writer.defines
              if expr is not None and model.defines[k][0] in moving and model.defines[k][0] in tested]
    tests = [expr.tree for expr in writer.feasible]
    steps = [
        (name, None if value is None else tabulator.rewrite(value), tabulator.rewrite(slope))
        for name, value, slope in steps
    ]
    values = [(name, tabulator.rewrite(tree)) for name, tree in values]
    tests = [tabulator.rewrite(tree) for tree in tests]
    per_line = Hoister(moving | {_slopes.prime(n) for n in moving} | {f"@vt{k}" for k in range(len(tabulator.trees))},
                       names, line_lines, "w")
    steps = [
        (name, None if value is None else per_line.rewrite(value), per_line.rewrite(slope))
        for name, value, slope in steps
    ]
    values = [(name, per_line.rewrite(tree)) for name, tree in values]
    tests = [per_line.rewrite(tree) for tree in tests]
    plan = ProofPlan(choice, writer.meta.coff(axis), tabulator.trees, names, line_lines, [], steps, values, tests)
    for expr in writer.feasible:
        constraint_limits(expr.tree, moving, names, plan.limits, static_names)
    _limit_lines(plan)
    return plan


def constraint_limits(
    tree: expressions.Node, moving: set[str], names: dict[str, str], found: dict[str, list[tuple[str, str, bool]]],
    constant: set[str],
) -> None:
    """Comparisons (chained, or inside ``and``) of a name that moves with the choice with a side that does not:
    ``found[name]`` gets ``(op, fixed side's source, whether it depends on ``constant`` names only)``."""
    E = expressions
    if isinstance(tree, E.Logic) and tree.op == "and":
        for operand in tree.operands:
            constraint_limits(operand, moving, names, found, constant)
        return
    if not isinstance(tree, E.Compare):
        return
    for left, op, right in zip(tree.operands, tree.ops, tree.operands[1:]):
        if op not in _FLIPPED:
            continue
        if isinstance(right, E.Name) and right.id in moving and not (names_in(left) & moving):
            left, op, right = right, _FLIPPED[op], left
        if not (isinstance(left, E.Name) and left.id in moving) or (names_in(right) & moving):
            continue
        point = expressions.scalar_source(Expression.from_tree(right), names)
        found.setdefault(left.id, []).append((op, point, names_in(right) <= constant))


def _limit_lines(plan: ProofPlan) -> None:
    """The narrowing limits into variables ``lim<k>`` (the fixed side rounded inward for ``<``, ``>``), once per
    kernel call when they depend on constants only, else once per line."""
    count = 0
    for name, limits in plan.limits.items():
        moved = []
        for op, point, fixed in limits:
            point = inward_limit(op, point)
            (plan.fixed_lines if fixed else plan.line_lines).append(f"lim{count} = {point}")
            moved.append((op, f"lim{count}", fixed))
            count += 1
        plan.limits[name] = moved


def inward_limit(op: str, point: str) -> str:
    """The source of a narrowing limit: the fixed side ``point`` of a comparison ``op``, rounded inward for the
    strict ones (``x > p`` allows ``x >= nextafter(p, inf)`` only)."""
    if op == ">":
        return f"np.nextafter({point}, np.inf)"
    if op == "<":
        return f"np.nextafter({point}, -np.inf)"
    return point


def table_source(plan: ProofPlan, out: Lines) -> None:
    """Fill ``VT_lo``/``VT_hi`` (side 0: suffix hulls ``[h_a, h_last]``, side 1: prefix hulls ``[h_0, h_a]``)."""
    count = max(len(plan.tables), 1)
    out.extend(plan.fixed_lines)
    out.add(f"VT_lo = np.zeros((2, {count}, NS))", f"VT_hi = np.zeros((2, {count}, NS))")
    lo_names = dict(plan.names)
    hi_names = dict(plan.names)
    lo_names[plan.choice], hi_names[plan.choice] = "hb_lo", "hb_hi"
    with out.block("for sd in range(2):"):
        with out.block("for a in range(NS):"):
            out.add(f"hb_lo = cgrid[{plan.offset} + (a if sd == 0 else 0)]",
                    f"hb_hi = cgrid[{plan.offset} + (NS - 1 if sd == 0 else a)]")
            # The helpers as written: this runs 2 × NS times per call, and inline code compiles slower.
            for k, tree in enumerate(plan.tables):
                lines, lo, hi = interval_source(Expression.from_tree(tree), lo_names, hi_names, f"tb{k}_")
                out.extend(lines)
                out.add(f"VT_lo[sd, {k}, a] = {lo}", f"VT_hi[sd, {k}, a] = {hi}")


def _needed_nan_tests(lines: list[str]) -> list[str]:
    """``lines`` without the tests that turn a nan end into the full interval where no helper needs them.

    A nan end may stay nan while it only flows into ``+ - * /`` (written
    inline, or by their helpers, which return the full interval for a nan
    operand), into ``max``/``min`` with it first (numba returns the nan), into
    the narrowing's tests (false for nan: no narrowing) and into the final
    test of the bound (which requires a number).  The other helpers assume
    ends that are never nan, so whatever reaches one, directly or through
    plain assignments, keeps its test.
    """
    sensitive: set[str] = set()
    aliases: list[tuple[str, str]] = []
    for line in lines:
        match = re.search(r"= fixq_intervals\.(\w+)\((.*)\)$", line)
        if match and match.group(1) not in _SAFE_HELPERS:
            sensitive.update(arg for arg in match.group(2).split(", ") if arg.isidentifier())
        alias = _ALIAS.match(line)
        if alias:
            aliases.append((alias.group(1), alias.group(2)))
    for target, source in reversed(aliases):
        if target in sensitive:
            sensitive.add(source)
    kept: list[str] = []
    skip = 0
    for line in lines:
        if skip:
            skip -= 1
            continue
        test = _NAN_TEST.match(line)
        if test and not ({test.group(1), test.group(2)} & sensitive):
            skip = 2
            continue
        kept.append(line)
    return kept


def proof_source(plan: ProofPlan, out: Lines, side: int) -> None:
    """Lines setting ``proven_r`` (``side`` +1) or ``proven_l`` (−1): no value beyond the anchor can win.

    The anchor is ``ar`` (right) or ``al`` (left); the lines read it, ``best``
    and the anchor's reward ``rs[anchor]``, and the per-line lines
    (:attr:`ProofPlan.line_lines`) must have run on this line.  The two
    sides' lines use their own variables, so the statickernel runs them one
    after the other in straight-line code, where the processor overlaps them.
    """
    whole = out
    out = Lines()
    tag, a = ("r", "ar") if side > 0 else ("l", "al")
    lo_names, hi_names = dict(plan.names), dict(plan.names)
    off = plan.offset
    hull_lo, hull_hi = f"{tag}hb_lo", f"{tag}hb_hi"
    out.add(f"proven_{tag} = False", f"empty_{tag} = False")
    if side > 0:
        out.add(f"{hull_lo} = cgrid[{off} + {a}]", f"{hull_hi} = cgrid[{off} + NS - 1]")
    else:
        out.add(f"{hull_lo} = cgrid[{off}]", f"{hull_hi} = cgrid[{off} + {a}]")
    lo_names[plan.choice], hi_names[plan.choice] = hull_lo, hull_hi
    _narrow(plan, out, "", hull_lo, hull_hi, None, tag)
    sd = 0 if side > 0 else 1
    for k in range(len(plan.tables)):
        out.add(f"{tag}vt{k}_lo = VT_lo[{sd}, {k}, {a}]", f"{tag}vt{k}_hi = VT_hi[{sd}, {k}, {a}]")
        lo_names[f"@vt{k}"], hi_names[f"@vt{k}"] = f"{tag}vt{k}_lo", f"{tag}vt{k}_hi"
    g_lo = g_hi = "0.0"
    for k, (name, value, slope) in enumerate(plan.steps):
        if value is not None:
            lines, lo, hi = interval_source(Expression.from_tree(value), lo_names, hi_names, f"{tag}pv{k}_")
            out.extend(_specialised(lines))
            lo_names[name], hi_names[name] = lo, hi
        lines, d_lo, d_hi = interval_source(Expression.from_tree(slope), lo_names, hi_names, f"{tag}pd{k}_")
        out.extend(_specialised(lines))
        if name:
            lo_names[_slopes.prime(name)], hi_names[_slopes.prime(name)] = d_lo, d_hi
            _narrow(plan, out, name, lo_names[name], hi_names[name], (d_lo, d_hi), tag)
        else:
            g_lo, g_hi = d_lo, d_hi
    grid = f"cgrid[{off} + "
    if side > 0:
        # f(j) <= f(a) + (h_j - h_a) * G over the block [a + 1, last]: largest at its near end when G <= 0.
        with out.block(f"if not empty_r and {g_hi} == {g_hi} and {g_hi} < np.inf:"):
            out.add(f"dist_r = {grid}ar + 1] - {grid}ar] if {g_hi} <= 0.0 else {grid}NS - 1] - {grid}ar]",
                    f"step_r = dist_r * {g_hi}")
            _finish(out, "r", "ar", "<=")
    else:
        # f(j) <= f(a) - (h_a - h_j) * G over the block [0, a - 1]: largest at its near end when G >= 0.
        with out.block(f"if not empty_l and {g_lo} == {g_lo} and {g_lo} > -np.inf:"):
            out.add(f"dist_l = {grid}al] - {grid}al - 1] if {g_lo} >= 0.0 else {grid}al] - {grid}0]",
                    f"step_l = -(dist_l * {g_lo})")
            _finish(out, "l", "al", "<")
    whole.extend(_needed_nan_tests(out.lines))


def none_allowed_source(plan: ProofPlan, out: Lines) -> None:
    """Lines setting ``none_allowed`` when some constraint is false at every value of the static choice.

    Bounds every constraint over the whole line (the hull of all its
    values: the tables of side 0 at anchor 0) and reads a bound of exactly
    ``[0, 0]`` as false everywhere (the rule of the comparison helpers).
    Lines with no allowed value are common where a large next capital
    leaves nothing to eat at any hours; their climb's start is not allowed,
    and this saves the search over every value there.
    """
    lo_names, hi_names = dict(plan.names), dict(plan.names)
    off = plan.offset
    lo_names[plan.choice], hi_names[plan.choice] = "nhb_lo", "nhb_hi"
    out.add("none_allowed = False", f"nhb_lo = cgrid[{off}]", f"nhb_hi = cgrid[{off} + NS - 1]")
    for k in range(len(plan.tables)):
        out.add(f"nvt{k}_lo = VT_lo[0, {k}, 0]", f"nvt{k}_hi = VT_hi[0, {k}, 0]")
        lo_names[f"@vt{k}"], hi_names[f"@vt{k}"] = f"nvt{k}_lo", f"nvt{k}_hi"
    # The helpers as written: this runs on few lines, and inline code compiles slower.
    for k, (name, tree) in enumerate(plan.values):
        lines, lo, hi = interval_source(Expression.from_tree(tree), lo_names, hi_names, f"nv{k}_")
        out.extend(lines)
        lo_names[name], hi_names[name] = lo, hi
    for k, tree in enumerate(plan.tests):
        lines, lo, hi = interval_source(Expression.from_tree(tree), lo_names, hi_names, f"nt{k}_")
        out.extend(lines)
        with out.block(f"if {lo} == 0.0 and {hi} == 0.0:"):
            out.add("none_allowed = True")


def _finish(out: Lines, tag: str, a: str, test: str) -> None:
    out.add(f"ub_{tag} = rs[{a}] + step_{tag}")
    with out.block(f"if ub_{tag} == -np.inf:"):
        out.add(f"proven_{tag} = True")  # every allowed value beyond is below any finite one
    with out.block(f"elif ub_{tag} - ub_{tag} == 0.0:"):
        out.add(f"ub_{tag} += {SLACK!r} * (2.0 * abs(rs[{a}]) + abs(step_{tag}) + abs(ub_{tag}))",
                f"proven_{tag} = ub_{tag} {test} best")


def _narrow(
    plan: ProofPlan, out: Lines, name: str, lo: str, hi: str, slope: tuple[str, str] | None, tag: str
) -> None:
    """Narrow ``[lo, hi]`` by the constraints on ``name`` (``""``: the static choice) where it is monotone."""
    narrow_lines(out, plan.limits.get(name or plan.choice, []), lo, hi, slope, f"empty_{tag}")


def narrow_lines(
    out: Lines, limits: list[tuple[str, str, bool]], lo: str, hi: str, slope: tuple[str, str] | None, empty: str
) -> None:
    """Lines narrowing the bounds ``[lo, hi]`` of a name by its constraints' limits (variables, as
    :func:`inward_limit` writes them) where the bounds ``slope`` of its derivative exclude 0 (always for the
    choice itself: ``slope`` None), setting ``empty`` when nothing is left (see the module docstring)."""
    if not limits:
        return
    test = "True" if slope is None else f"{slope[0]} > 0.0 or {slope[1]} < 0.0"
    with out.block(f"if {test}:"):
        for op, limit, _ in limits:
            if op in (">", ">="):
                out.add(f"{lo} = max({lo}, {limit})")
            else:
                out.add(f"{hi} = min({hi}, {limit})")
        with out.block(f"if not ({lo} <= {hi}):"):
            out.add(f"{empty} = True")
