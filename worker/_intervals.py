"""Interval bounds of an expression over a box, written as numba source.

The solver verifies a policy with one unrestricted Bellman step; on huge
grids it prunes blocks of choices whose objective is provably below the best
found, and these bounds are the proof.  They must be *sound*: for every point
of the box, the value either evaluator computes lies within the bounds.

How soundness is kept
---------------------
* An interval ``[lo, hi]`` is a closed set of the extended reals; endpoints
  are never nan.  Whenever nan is possible the interval is ``[-inf, inf]``
  ("full"), and a full operand is treated as possibly nan: functions and
  ``min``/``max`` of it are full, comparisons of it are ``[0, 1]`` unless
  every outcome agrees.
* ``+ - * /`` need no slack.  Both evaluators round them correctly, and
  rounding to nearest is monotone, so the rounded value at any point of the
  box lies between the rounded corner values computed here.  Sums chain left
  to right in the same order as the evaluators.  Possible ``inf - inf``,
  ``0 * inf``, ``inf / inf`` and a divisor interval containing 0 give full.
* ``log exp sqrt **`` are monotone in each argument on the domains used, but
  the C library and numpy's vectorised versions are each a few ulps off and
  not exactly monotone: their bounds are widened outward by `RELATIVE_SLACK`
  times their magnitude plus `ABSOLUTE_SLACK`.
* ``x**y``: with ``x >= 0`` the extremes are at the four corners (for
  ``x`` that may be 0, only when ``y >= 0``, because ``(-0.0)**-1`` is
  ``-inf``); with a possibly negative ``x`` only a single integral exponent
  is bounded (even powers through ``|x|``, odd ones are monotone, negative
  odd ones across 0 are full); anything else is full.
* Comparisons give ``[1, 1]`` when certainly true, ``[0, 0]`` when certainly
  false, else ``[0, 1]``; logic treats an interval excluding 0 as certainly
  true and ``[0, 0]`` as certainly false.

Variable names are ``{prefix}{n}_lo``/``_hi`` (``n`` counting nodes) plus
helpers ``{prefix}{n}_c1``...; the result is ``{prefix}lo``/``{prefix}hi``.
"""

from __future__ import annotations

from collections.abc import Mapping

from worker.expressions import (
    Arith,
    Call,
    Compare,
    Expression,
    Logic,
    Name,
    Negate,
    Node,
    Not,
    Number,
    Power,
    _pairwise,
    float_literal,
    variable_text,
)

RELATIVE_SLACK = 2.0**-46
"""Outward widening of ``log exp sqrt **`` bounds, relative to their
magnitude (about 64 ulps; library errors are a few ulps)."""
ABSOLUTE_SLACK = 1e-300
"""Outward widening of ``log exp sqrt **`` bounds, absolute: covers results
near underflow, where relative error means little."""

_LARGEST = repr(1.7976931348623157e308)
_FULL = ("(-np.inf)", "np.inf")

Interval = tuple[str, str]


def interval_source(
    expr: Expression, name_of_lo: Mapping[str, str], name_of_hi: Mapping[str, str], prefix: str
) -> tuple[list[str], str, str]:
    """See `worker.expressions.interval_source`."""
    if not prefix.isidentifier():
        raise ValueError(f"prefix must be an identifier, got {prefix!r}")
    missing = sorted(expr.names.difference(name_of_lo) | expr.names.difference(name_of_hi))
    if missing:
        raise ValueError(f"no bound variables given for names: {', '.join(missing)}")
    writer = _Writer(name_of_lo, name_of_hi, prefix)
    lo, hi = writer.node(expr.tree)
    writer.lines += [f"{prefix}lo = {lo}", f"{prefix}hi = {hi}"]
    return writer.lines, f"{prefix}lo", f"{prefix}hi"


def _is_full(a: Interval) -> str:
    return f"({a[0]} == -np.inf and {a[1]} == np.inf)"


class _Writer:
    def __init__(self, name_of_lo: Mapping[str, str], name_of_hi: Mapping[str, str], prefix: str) -> None:
        self.name_of_lo = name_of_lo
        self.name_of_hi = name_of_hi
        self.prefix = prefix
        self.lines: list[str] = []
        self.count = 0

    def fresh(self) -> tuple[str, str, str]:
        """New result variables ``lo``, ``hi`` and a stem for helpers."""
        self.count += 1
        stem = f"{self.prefix}{self.count}_"
        return f"{stem}lo", f"{stem}hi", stem

    def emit(self, *lines: str) -> None:
        self.lines.extend(lines)

    def node(self, node: Node) -> Interval:
        if isinstance(node, Number):
            if node.value != node.value:
                return _FULL
            literal = float_literal(node.value)
            return literal, literal
        if isinstance(node, Name):
            return variable_text(self.name_of_lo[node.id]), variable_text(self.name_of_hi[node.id])
        if isinstance(node, Negate):
            a = self.node(node.operand)
            lo, hi, _ = self.fresh()
            self.emit(f"{lo} = -{a[1]}", f"{hi} = -{a[0]}")
            return lo, hi
        if isinstance(node, Arith):
            result = self.node(node.first)
            for op, term in node.rest:
                result = self.arith(op, result, self.node(term))
            return result
        if isinstance(node, Power):
            return self.power(self.node(node.base), self.node(node.exponent))
        if isinstance(node, Compare):
            operands = [self.node(operand) for operand in node.operands]
            tests = [self.compare(op, operands[i], operands[i + 1]) for i, op in enumerate(node.ops)]
            return self.combine_truth("min", tests)
        if isinstance(node, Logic):
            truths = [self.truth(self.node(operand)) for operand in node.operands]
            return self.combine_truth("min" if node.op == "and" else "max", truths)
        if isinstance(node, Not):
            t_lo, t_hi = self.truth(self.node(node.operand))
            lo, hi, _ = self.fresh()
            self.emit(f"{lo} = 1.0 - {t_hi}", f"{hi} = 1.0 - {t_lo}")
            return lo, hi
        return self.call(node)

    def full_lines(self, lo: str, hi: str, indent: str = "    ") -> list[str]:
        return [f"{indent}{lo} = -np.inf", f"{indent}{hi} = np.inf"]

    def widen_lines(self, lo: str, hi: str, indent: str = "    ") -> list[str]:
        rel, absolute = repr(RELATIVE_SLACK), repr(ABSOLUTE_SLACK)
        return [
            f"{indent}{lo} = ({lo} - (abs({lo}) * {rel} + {absolute})) if {lo} < np.inf else {_LARGEST}",
            f"{indent}{hi} = ({hi} + (abs({hi}) * {rel} + {absolute})) if {hi} > -np.inf else -{_LARGEST}",
        ]

    def arith(self, op: str, a: Interval, b: Interval) -> Interval:
        (al, ah), (bl, bh) = a, b
        lo, hi, s = self.fresh()
        if op in "+-":
            if op == "+":
                ends, cross = ((al, bl), (ah, bh)), ((al, bh), (ah, bl))
            else:
                ends, cross = ((al, bh), (ah, bl)), ((al, bl), (ah, bh))
            self.emit(
                f"{s}c1 = {cross[0][0]} {op} {cross[0][1]}",
                f"{s}c2 = {cross[1][0]} {op} {cross[1][1]}",
                f"if {s}c1 != {s}c1 or {s}c2 != {s}c2:",
                *self.full_lines(lo, hi),
                "else:",
                f"    {lo} = {ends[0][0]} {op} {ends[0][1]}",
                f"    {hi} = {ends[1][0]} {op} {ends[1][1]}",
            )
            return lo, hi
        corners = [f"{s}c{i}" for i in range(1, 5)]
        nan_corner = " or ".join(f"{c} != {c}" for c in corners)
        if op == "*":
            head = []
            unsafe = (
                f"{nan_corner} or ({al} <= 0.0 <= {ah} and ({bl} == -np.inf or {bh} == np.inf))"
                f" or ({bl} <= 0.0 <= {bh} and ({al} == -np.inf or {ah} == np.inf))"
            )
        else:
            head = [f"if {bl} <= 0.0 <= {bh}:", *self.full_lines(lo, hi), "else:"]
            unsafe = nan_corner
        indent = "    " if head else ""
        self.emit(
            *head,
            *(
                f"{indent}{c} = {x} {op} {y}"
                for c, (x, y) in zip(corners, [(al, bl), (al, bh), (ah, bl), (ah, bh)])
            ),
            f"{indent}if {unsafe}:",
            *self.full_lines(lo, hi, indent + "    "),
            f"{indent}else:",
            f"{indent}    {lo} = min({', '.join(corners)})",
            f"{indent}    {hi} = max({', '.join(corners)})",
        )
        return lo, hi

    def power(self, a: Interval, b: Interval) -> Interval:
        (al, ah), (bl, bh) = a, b
        lo, hi, s = self.fresh()
        corners = [f"{s}c{i}" for i in range(1, 5)]
        pairs = [(al, bl), (al, bh), (ah, bl), (ah, bh)]
        self.emit(
            f"if ({bl} == 0.0 and {bh} == 0.0) or ({al} == 1.0 and {ah} == 1.0):",
            f"    {lo} = 1.0",
            f"    {hi} = 1.0",
            f"elif {_is_full(a)} or {_is_full(b)}:",
            *self.full_lines(lo, hi),
            f"elif {al} > 0.0 or ({al} >= 0.0 and {bl} >= 0.0):",
            *(f"    {c} = np.power({x}, {y})" for c, (x, y) in zip(corners, pairs)),
            f"    {lo} = min({', '.join(corners)})",
            f"    {hi} = max({', '.join(corners)})",
            *self.widen_lines(lo, hi),
            f"elif {bl} == {bh} and abs({bl}) < np.inf and np.floor({bl}) == {bl}:",
            f"    {s}small = 0.0 if {al} <= 0.0 <= {ah} else min(abs({al}), abs({ah}))",
            f"    {s}big = max(abs({al}), abs({ah}))",
            f"    {s}even = np.floor({bl} * 0.5) == {bl} * 0.5",
            f"    if {bl} > 0.0 and {s}even:",
            f"        {lo} = np.power({s}small, {bl})",
            f"        {hi} = np.power({s}big, {bl})",
            f"    elif {bl} > 0.0:",
            f"        {lo} = np.power({al}, {bl})",
            f"        {hi} = np.power({ah}, {bl})",
            f"    elif {s}even:",
            f"        {lo} = np.power({s}big, {bl})",
            f"        {hi} = np.power({s}small, {bl})",
            f"    elif {al} <= 0.0 <= {ah}:",
            *self.full_lines(lo, hi, "        "),
            "    else:",
            f"        {lo} = np.power({ah}, {bl})",
            f"        {hi} = np.power({al}, {bl})",
            *self.widen_lines(lo, hi),
            "else:",
            *self.full_lines(lo, hi),
        )
        return lo, hi

    def compare(self, op: str, a: Interval, b: Interval) -> Interval:
        (al, ah), (bl, bh) = a, b
        equal = f"({al} == {ah} and {ah} == {bl} and {bl} == {bh})"
        apart = f"({ah} < {bl} or {bh} < {al})"
        certain = {
            "<": (f"{ah} < {bl}", f"{al} >= {bh}"),
            "<=": (f"{ah} <= {bl}", f"{al} > {bh}"),
            ">": (f"{al} > {bh}", f"{ah} <= {bl}"),
            ">=": (f"{al} >= {bh}", f"{ah} < {bl}"),
            "==": (equal, apart),
            "!=": (apart, equal),
        }
        true, false = certain[op]
        lo, hi, _ = self.fresh()
        self.emit(f"{lo} = 1.0 if {true} else 0.0", f"{hi} = 0.0 if {false} else 1.0")
        return lo, hi

    def truth(self, a: Interval) -> Interval:
        """``[1, 1]`` if ``a`` is certainly nonzero, ``[0, 0]`` if certainly 0."""
        lo, hi, _ = self.fresh()
        self.emit(
            f"{lo} = 1.0 if ({a[0]} > 0.0 or {a[1]} < 0.0) else 0.0",
            f"{hi} = 0.0 if ({a[0]} == 0.0 and {a[1]} == 0.0) else 1.0",
        )
        return lo, hi

    def combine_truth(self, how: str, truths: list[Interval]) -> Interval:
        if len(truths) == 1:
            return truths[0]
        lo, hi, _ = self.fresh()
        self.emit(
            f"{lo} = {how}({', '.join(t[0] for t in truths)})",
            f"{hi} = {how}({', '.join(t[1] for t in truths)})",
        )
        return lo, hi

    def call(self, node: Call) -> Interval:
        args = [self.node(arg) for arg in node.args]
        if node.function in ("min", "max"):
            return _pairwise(args, lambda a, b: self.extreme(node.function, a, b))
        if node.function == "clip":
            return self.extreme("min", self.extreme("max", args[0], args[1]), args[2])
        if node.function == "where":
            return self.where(*args)
        (al, ah), = args
        lo, hi, _ = self.fresh()
        if node.function == "abs":
            self.emit(
                f"if {_is_full(args[0])}:",
                *self.full_lines(lo, hi),
                f"elif {al} >= 0.0:",
                f"    {lo} = {al}",
                f"    {hi} = {ah}",
                f"elif {ah} <= 0.0:",
                f"    {lo} = -{ah}",
                f"    {hi} = -{al}",
                "else:",
                f"    {lo} = 0.0",
                f"    {hi} = max(-{al}, {ah})",
            )
            return lo, hi
        # log and sqrt are nan below 0; exp of a possibly-nan operand is too.
        unsafe = _is_full(args[0]) if node.function == "exp" else f"{al} < 0.0"
        self.emit(
            f"if {unsafe}:",
            *self.full_lines(lo, hi),
            "else:",
            f"    {lo} = np.{node.function}({al})",
            f"    {hi} = np.{node.function}({ah})",
            *self.widen_lines(lo, hi),
        )
        return lo, hi

    def extreme(self, how: str, a: Interval, b: Interval) -> Interval:
        lo, hi, _ = self.fresh()
        self.emit(
            f"if {_is_full(a)} or {_is_full(b)}:",
            *self.full_lines(lo, hi),
            "else:",
            f"    {lo} = {how}({a[0]}, {b[0]})",
            f"    {hi} = {how}({a[1]}, {b[1]})",
        )
        return lo, hi

    def where(self, condition: Interval, if_true: Interval, if_false: Interval) -> Interval:
        (cl, ch), (tl, th), (fl, fh) = condition, if_true, if_false
        lo, hi, _ = self.fresh()
        self.emit(
            f"if {cl} > 0.0 or {ch} < 0.0:",
            f"    {lo} = {tl}",
            f"    {hi} = {th}",
            f"elif {cl} == 0.0 and {ch} == 0.0:",
            f"    {lo} = {fl}",
            f"    {hi} = {fh}",
            "else:",
            f"    {lo} = min({tl}, {fl})",
            f"    {hi} = max({th}, {fh})",
        )
        return lo, hi
