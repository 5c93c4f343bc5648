"""Python source of an expression for numba kernels: `scalar_source`.

Generated source is not eval of user text
-----------------------------------------
`scalar_source` (and `worker.expressions.intervals.interval_source`) write
Python source for numba from the *validated tree*, never from the text.
Their output holds only tokens written here (operators, parentheses,
``np.log``, ``np.float64``, ``if``/``else``, the helper calls of
`worker.expressions.intervals`), the variable names the caller chose for
each document name, and numbers written with ``repr(float(x))`` (or
``np.inf``/``np.nan``).  A document name is only ever used as a key to look
up the caller's variable; its characters never reach the output, so no
document can make the generated code do anything but arithmetic on the
caller's variables.

The source follows the semantics in the package docstring
(:mod:`worker.expressions`), as the numpy evaluator does.  With an exponent
known only at run time (a param, or an expression of params such as
``1 - gamma``) it calls ``scalar_power`` of
:mod:`worker.expressions.interval_kernels`, which computes the common
exponents (−2, −1, 1/2, 1, 2) without ``pow``, as compilers do for constant
exponents: the same values as ``pow`` (within 1.5 ulp for −2), at a
fraction of its cost.  A name starting with `LITERAL_PREFIX` stands for a
number the code generator moved out of the source (see
:mod:`worker._codegen.literals`); a power with such a base or exponent is
written plainly, as it was with the number in the source.
"""

from __future__ import annotations

import math
from collections.abc import Mapping

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

__all__ = ["GLOBAL_NAME", "LITERAL_PREFIX", "float_literal", "scalar_source", "source_nesting", "variable_text"]

LITERAL_PREFIX = "@lit"
"""Start of the names that stand for numbers moved out of generated source (never a document name)."""

GLOBAL_NAME = "fixq_intervals"
"""The global name generated lines use for :mod:`worker.expressions.interval_kernels` (its interval helpers and
``scalar_power``); every generated module binds it (``interval_globals``)."""


def float_literal(value: float) -> str:
    """Python source for a float64 constant (negative ones parenthesised)."""
    if math.isnan(value):
        return "np.nan"
    if math.isinf(value):
        return "np.inf" if value > 0 else "(-np.inf)"
    text = repr(float(value))
    return f"({text})" if math.copysign(1.0, value) < 0 else text


def variable_text(text: str) -> str:
    """A caller's variable name, parenthesised unless it is a plain identifier."""
    return text if text.isidentifier() else f"({text})"


def scalar_source(expr: Expression, name_of: Mapping[str, str]) -> str:
    """Python source of one scalar float64 expression for a numba function.

    Meant for ``@njit(error_model="numpy", fastmath=False)`` with ``np``
    bound to numpy; in plain CPython ``**`` and ``/`` would raise instead.
    Comparisons and logic are written without branches (``np.float64`` of
    booleans, ``&``, ``|``), because numba's compile time grows faster than
    linearly with the branches of a function; only ``where`` and chained
    comparisons compile to a conditional expression.

    Parameters
    ----------
    expr : Expression
    name_of : mapping of document name to source text
        The caller's variable for each name in ``expr.names`` (such as
        ``"s0"`` or ``"p[0]"``); it must hold a float64.
    """
    missing = sorted(expr.names.difference(name_of))
    if missing:
        raise ValueError(f"no variable given for names: {', '.join(missing)}")
    return _scalar(expr.tree, name_of)


def _scalar(node: Node, name_of: Mapping[str, str]) -> str:
    def of(child: Node) -> str:
        return _scalar(child, name_of)

    if isinstance(node, Number):
        return float_literal(node.value)
    if isinstance(node, Name):
        return variable_text(name_of[node.id])
    if isinstance(node, Negate):
        return f"(-{of(node.operand)})"
    if isinstance(node, Not):
        return f"np.float64({of(node.operand)} == 0.0)"
    if isinstance(node, Arith):
        return "(" + of(node.first) + "".join(f" {op} {of(term)}" for op, term in node.rest) + ")"
    if isinstance(node, Power):
        base, exponent = of(node.base), of(node.exponent)
        # A number moved out of the source stays a plain power, as it was written in it.
        lifted = any(isinstance(x, Name) and x.id.startswith(LITERAL_PREFIX) for x in (node.base, node.exponent))
        if isinstance(node.exponent, Number) or lifted:
            return f"({base} ** {exponent})"
        # A runtime exponent (a param, or an expression of params such as 1 - gamma): the compiler cannot
        # fold the common ones as it does constants, and a call of pow costs about ten times a division.
        return f"{GLOBAL_NAME}.scalar_power({base}, {exponent})"
    if isinstance(node, Compare):
        chain = of(node.operands[0]) + "".join(
            f" {op} {of(operand)}" for op, operand in zip(node.ops, node.operands[1:])
        )
        # A chain must stay a chain (its middle operands written once), and
        # Python compiles it to branches; a single comparison needs none.
        return f"np.float64({chain})" if len(node.ops) == 1 else f"(1.0 if {chain} else 0.0)"
    if isinstance(node, Logic):
        # `&` and `|` of booleans: no short-circuit branches for numba to type.
        joiner = " & " if node.op == "and" else " | "
        return "np.float64(" + joiner.join(f"({of(operand)} != 0.0)" for operand in node.operands) + ")"
    args = [of(arg) for arg in node.args]
    if node.function in ("log", "exp", "sqrt", "abs"):
        return f"np.{node.function}({args[0]})"
    if node.function in ("min", "max"):
        ufunc = "np.minimum" if node.function == "min" else "np.maximum"
        return pairwise(args, lambda a, b: f"{ufunc}({a}, {b})")
    if node.function == "clip":
        return f"np.minimum(np.maximum({args[0]}, {args[1]}), {args[2]})"
    return f"({args[1]} if {args[0]} != 0.0 else {args[2]})"


def source_nesting(source: str) -> int:
    """Deepest parenthesis (or bracket) nesting of generated ``source``."""
    depth = deepest = 0
    for char in source:
        if char in "([":
            depth += 1
            deepest = max(deepest, depth)
        elif char in ")]":
            depth -= 1
    return deepest
