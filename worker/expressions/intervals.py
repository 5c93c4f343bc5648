"""Interval bounds of an expression over a box, written as numba source.

The solver verifies a policy with one unrestricted Bellman step; on huge
grids it prunes blocks of choices whose objective is provably below the best
found, and these bounds are the proof.  They must be *sound*: at every point
of the box, the value either evaluator computes lies within the bounds.

`interval_source` writes one line per operation, each a call of a small
jitted helper of :mod:`worker.expressions.interval_kernels` through the
global name `GLOBAL_NAME`; the rules that keep the bounds sound are in that
module's docstring.  Writing the branches inline instead made kernels several
times slower to compile, because numba's compile time grows faster than
linearly with the branches of a function.  This module itself does not
import numba, so the code generator can write bounds without loading it.

Variable names are ``{prefix}{n}_lo``/``_hi`` with ``n`` counting nodes; the
result is ``{prefix}lo``/``{prefix}hi``.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping

from worker.expressions.nodes import (
    Arith,
    Compare,
    Expression,
    Logic,
    Name,
    Negate,
    Node,
    Not,
    Number,
    Power,
    pairwise,
)
from worker.expressions.scalar import GLOBAL_NAME, float_literal, variable_text

__all__ = ["GLOBAL_NAME", "interval_source"]


Interval = tuple[str, str]


def interval_source(
    expr: Expression, name_of_lo: Mapping[str, str], name_of_hi: Mapping[str, str], prefix: str
) -> tuple[list[str], str, str]:
    """Numba source lines bounding ``expr`` over a box of its names.

    When each name lies in ``[lo, hi]`` (the caller's float64 variables
    ``name_of_lo[name]`` and ``name_of_hi[name]``), the lines set two float64
    variables that bound the expression at every point of the box, as
    computed by either evaluator.  Where nan is possible the bounds are
    ``(-inf, inf)``; comparisons and logic give bounds within ``[0, 1]``.
    The rules are in the docstring of :mod:`worker.expressions.interval_kernels`.

    Parameters
    ----------
    expr : Expression
    name_of_lo, name_of_hi : mapping of document name to source text
        The caller's variables holding each name's lower and upper bound.
    prefix : str
        Start of every variable the lines assign, to keep them apart from
        the caller's (an identifier, e.g. ``"r0_"``).

    Returns
    -------
    lines : list of str
        Plain assignments, one per line, for a function whose globals include
        `worker.expressions.interval_kernels.interval_globals` (they call
        helpers jitted once per process).  They also run in plain CPython.
    lo, hi : str
        The names of the variables holding the bounds.
    """
    if not prefix.isidentifier():
        raise ValueError(f"prefix must be an identifier, got {prefix!r}")
    missing = sorted(expr.names.difference(name_of_lo) | expr.names.difference(name_of_hi))
    if missing:
        raise ValueError(f"no bound variables given for names: {', '.join(missing)}")
    writer = _Writer(name_of_lo, name_of_hi, prefix)
    lo, hi = writer.node(expr.tree)
    writer.lines += [f"{prefix}lo = {lo}", f"{prefix}hi = {hi}"]
    return writer.lines, f"{prefix}lo", f"{prefix}hi"


class _Writer:
    def __init__(self, name_of_lo: Mapping[str, str], name_of_hi: Mapping[str, str], prefix: str) -> None:
        self.name_of_lo = name_of_lo
        self.name_of_hi = name_of_hi
        self.prefix = prefix
        self.lines: list[str] = []
        self.count = 0

    def fresh(self) -> Interval:
        self.count += 1
        return f"{self.prefix}{self.count}_lo", f"{self.prefix}{self.count}_hi"

    def helper(self, name: str, *operands: Interval) -> Interval:
        lo, hi = self.fresh()
        args = ", ".join(end for operand in operands for end in operand)
        self.lines.append(f"{lo}, {hi} = {GLOBAL_NAME}.{name}({args})")
        return lo, hi

    def assign(self, lo_text: str, hi_text: str) -> Interval:
        lo, hi = self.fresh()
        self.lines += [f"{lo} = {lo_text}", f"{hi} = {hi_text}"]
        return lo, hi

    def node(self, node: Node) -> Interval:
        if isinstance(node, Number):
            if node.value != node.value:
                return "(-np.inf)", "np.inf"
            literal = float_literal(node.value)
            return literal, literal
        if isinstance(node, Name):
            return variable_text(self.name_of_lo[node.id]), variable_text(self.name_of_hi[node.id])
        if isinstance(node, Negate):
            lo, hi = self.node(node.operand)
            return self.assign(f"-{hi}", f"-{lo}")
        if isinstance(node, Arith):
            names = {"+": "add", "-": "subtract", "*": "multiply", "/": "divide"}
            result = self.node(node.first)
            for op, term in node.rest:
                result = self.helper(names[op], result, self.node(term))
            return result
        if isinstance(node, Power):
            return self.helper("power", self.node(node.base), self.node(node.exponent))
        if isinstance(node, Compare):
            operands = [self.node(operand) for operand in node.operands]
            tests = [self.helper(_COMPARE_HELPERS[op], operands[i], operands[i + 1]) for i, op in enumerate(node.ops)]
            return _fold_left(tests, lambda a, b: self.helper("logical_and", a, b))
        if isinstance(node, Logic):
            operands = [self.node(operand) for operand in node.operands]
            return _fold_left(operands, lambda a, b: self.helper(f"logical_{node.op}", a, b))
        if isinstance(node, Not):
            return self.helper("logical_not", self.node(node.operand))
        args = [self.node(arg) for arg in node.args]
        if node.function in ("min", "max"):
            name = "minimum" if node.function == "min" else "maximum"
            return pairwise(args, lambda a, b: self.helper(name, a, b))
        if node.function == "clip":
            return self.helper("minimum", self.helper("maximum", args[0], args[1]), args[2])
        if node.function == "where":
            return self.helper("where", *args)
        return self.helper("absolute" if node.function == "abs" else node.function, args[0])


_COMPARE_HELPERS = {
    "<": "less", "<=": "less_equal", ">": "greater", ">=": "greater_equal", "==": "equal", "!=": "not_equal",
}


def _fold_left(items: list[Interval], combine: Callable[[Interval, Interval], Interval]) -> Interval:
    result = items[0]
    for item in items[1:]:
        result = combine(result, item)
    return result
