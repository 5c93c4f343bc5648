"""The expression language of grid models (DESIGN.md section 3b).

Grammar
-------
Nothing outside this list is accepted:

* decimal number literals (``2``, ``0.33``, ``1e-6``), converted to float64;
* names (``k``, ``alpha``): which names exist is checked by `check_names`;
* unary ``-`` and ``+``; binary ``+ - * / **``;
* comparisons ``< <= > >= == !=``, chained as in ``0 < k <= 1``
  (``0 < k and k <= 1``, with ``k`` evaluated once);
* ``and``, ``or``, ``not``; parentheses;
* calls to ``log exp sqrt abs`` (one argument), ``min max`` (two or more),
  ``where(condition, if_true, if_false)`` and ``clip(x, lo, hi)``.

The text goes through ``ast.parse(text, mode="eval")`` and then a whitelist
walk that refuses anything else, naming what it found and where.  Every
refusal is a `worker.errors.InvalidDocument` carrying the caller's ``path``.

The tree
--------
`Expression.tree` is made of the frozen node classes below, which code
generators elsewhere may walk: `Number` (``value``), `Name` (``id``),
`Negate` and `Not` (``operand``), `Arith` (``first`` and ``rest``, a tuple of
``(op, term)`` applied left to right, ops all from ``+ -`` or all from
``* /``), `Power` (``base``, ``exponent``), `Compare` (``operands``, ``ops``),
`Logic` (``op`` ``"and"``/``"or"``, ``operands``) and `Call` (``function``,
``args``).  Unary ``+`` leaves no node; parts made of numbers only are
folded into one `Number`.

Semantics
---------
Every value is float64, and both evaluators (`evaluate` with numpy,
`scalar_source` for numba kernels) implement the same rules:

* arithmetic and ``log exp sqrt abs`` follow IEEE 754 as numpy does, never
  raising: ``log(-1)`` is nan, ``1/0`` is inf, ``0**-1`` is inf, ``0/0`` is nan;
* ``x**y`` is C99 ``pow``: a negative base with an integral exponent is fine
  (``(-2)**3 == -8``), with any other exponent it gives nan;
  ``(-inf)**0.5 == inf`` and ``(-0.0)**0.5 == +0.0`` (numpy's own shortcut
  through ``sqrt`` is corrected);
* comparisons give 1.0 or 0.0 (any comparison with nan is false, except
  ``!=``);
* ``and``, ``or``, ``not`` and the condition of ``where`` treat any nonzero
  value as true, nan included, and ``and``/``or``/``not`` give 1.0 or 0.0;
* ``min`` and ``max`` propagate nan; ``clip(x, lo, hi)`` is
  ``min(max(x, lo), hi)`` (so ``hi`` wins when ``lo > hi``);
* sub-expressions made of numbers only are folded at parse time in float64
  (``9**9**9**9`` becomes inf at once).

The two evaluators agree bit for bit on ``+ - * /``, comparisons, logic,
``where``, ``min``, ``max``, ``abs``, ``clip``, ``sqrt`` and on ``**`` with
a constant exponent of 0, 0.5, 1, 2 or -1 (the tests pin this, signed zeros
included).  Otherwise ``log``, ``exp`` and ``**`` may differ in the last bits,
because numpy uses vectorised implementations of them while numba calls the
C library; the interval bounds of ``_intervals`` allow for that.  With an
exponent that is a variable (a param) and a base that is one, the numba
source computes ``1/x`` when it is -1 and ``x*x`` when it is 2, as compilers
do for constant exponents: the same values as ``pow`` but for its last bit,
at a fraction of its cost.

Generated source is not eval of user text
-----------------------------------------
`scalar_source` and `interval_source` write Python source for numba from the
*validated tree*, never from the text.  Their output holds only tokens this
module writes itself (operators, parentheses, ``np.log``, ``np.float64``,
``if``/``else``, the helper calls of ``worker._intervals``), the variable
names the caller chose for each document name, and numbers written with
``repr(float(x))`` (or ``np.inf``/``np.nan``).  A document name is only ever
used as a key to look up the caller's variable; its characters never reach
the output, so no document can make the generated code do anything but
arithmetic on the caller's variables.

Limits
------
`MAX_LENGTH`, `MAX_DEPTH` and `MAX_NODES` are the defaults of `parse`.
"""

from __future__ import annotations

import ast
import difflib
import math
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass
from typing import TypeVar, Union

import numpy as np

from worker.errors import InvalidDocument

__all__ = [
    "DEPTH_CEILING",
    "FUNCTIONS",
    "MAX_DEPTH",
    "MAX_LENGTH",
    "MAX_NODES",
    "Arith",
    "Call",
    "Compare",
    "Expression",
    "Logic",
    "Name",
    "Negate",
    "Node",
    "Not",
    "Number",
    "Power",
    "check_names",
    "evaluate",
    "interval_globals",
    "interval_source",
    "parse",
    "scalar_source",
]

MAX_LENGTH = 2000
"""Longest expression text `parse` accepts by default, in characters."""
MAX_DEPTH = 40
"""Deepest nesting `parse` accepts by default, in levels of the tree: each
operator or call inside another adds one, while a run of ``+``/``-`` (or
``*``/``/``) at one level counts once.  Parentheses, and runs of signs, may
not nest deeper either."""
MAX_NODES = 500
"""Most parts `parse` accepts by default, in tree nodes: numbers, names,
operators and calls."""
DEPTH_CEILING = 64
"""Largest ``max_depth`` `parse` allows, in levels: it keeps evaluation
recursion shallow and generated source well under Python's limit of 200
nested parentheses."""

FUNCTIONS: dict[str, tuple[int, int | None]] = {
    "log": (1, 1),
    "exp": (1, 1),
    "sqrt": (1, 1),
    "abs": (1, 1),
    "min": (2, None),
    "max": (2, None),
    "where": (3, 3),
    "clip": (3, 3),
}
"""Callable functions and their (fewest, most) arguments; ``None``: no limit."""


@dataclass(frozen=True, slots=True)
class Number:
    value: float


@dataclass(frozen=True, slots=True)
class Name:
    id: str


@dataclass(frozen=True, slots=True)
class Negate:
    operand: Node


@dataclass(frozen=True, slots=True)
class Arith:
    """``first op1 term1 op2 term2 ...``, left to right; the ops are all from
    ``+ -`` or all from ``* /``."""

    first: Node
    rest: tuple[tuple[str, Node], ...]


@dataclass(frozen=True, slots=True)
class Power:
    base: Node
    exponent: Node


@dataclass(frozen=True, slots=True)
class Compare:
    """``operands[0] ops[0] operands[1] ops[1] ...`` (a chained comparison)."""

    operands: tuple[Node, ...]
    ops: tuple[str, ...]


@dataclass(frozen=True, slots=True)
class Logic:
    op: str  # "and" | "or"
    operands: tuple[Node, ...]


@dataclass(frozen=True, slots=True)
class Not:
    operand: Node


@dataclass(frozen=True, slots=True)
class Call:
    function: str
    args: tuple[Node, ...]


Node = Union[Number, Name, Negate, Arith, Power, Compare, Logic, Not, Call]


@dataclass(frozen=True, slots=True)
class Expression:
    """A parsed, validated expression.

    ``names`` are the free names it uses, ``functions`` the functions its
    text calls, ``tree`` the validated tree (constant parts folded).
    """

    text: str
    tree: Node
    names: frozenset[str]
    functions: frozenset[str]

    def __str__(self) -> str:
        return self.text


# Parsing ------------------------------------------------------------------

_ARITH_SYMBOLS: dict[type, str] = {ast.Add: "+", ast.Sub: "-", ast.Mult: "*", ast.Div: "/"}
_ARITH_GROUP = {"+": "+-", "-": "+-", "*": "*/", "/": "*/"}
_COMPARE_SYMBOLS: dict[type, str] = {
    ast.Lt: "<", ast.LtE: "<=", ast.Gt: ">", ast.GtE: ">=", ast.Eq: "==", ast.NotEq: "!=",
}
_REFUSED_OPERATORS: dict[type, str] = {
    ast.FloorDiv: "floor division (`//`) is not allowed",
    ast.Mod: "the remainder operator (`%`) is not allowed",
    ast.MatMult: "matrix multiplication (`@`) is not allowed",
    ast.BitAnd: "the bitwise operator `&` is not allowed; use `and`",
    ast.BitOr: "the bitwise operator `|` is not allowed; use `or`",
    ast.BitXor: "the operator `^` is not allowed; for powers write `**`",
    ast.LShift: "shift operators (`<<`, `>>`) are not allowed",
    ast.RShift: "shift operators (`<<`, `>>`) are not allowed",
    ast.Invert: "the operator `~` is not allowed; use `not`",
    ast.Is: "`is` is not allowed; use `==`",
    ast.IsNot: "`is not` is not allowed; use `!=`",
    ast.In: "`in` is not allowed",
    ast.NotIn: "`not in` is not allowed",
}
_REFUSED_NODES: dict[type, str] = {
    ast.Attribute: "attribute access (`{code}`) is not allowed",
    ast.Subscript: "indexing (`{code}`) is not allowed",
    ast.Slice: "slices are not allowed",
    ast.Lambda: "lambda functions are not allowed",
    ast.IfExp: "conditional expressions (`a if c else b`) are not allowed; use where(c, a, b)",
    ast.NamedExpr: "assignment expressions (`:=`) are not allowed",
    ast.List: "lists are not allowed",
    ast.Tuple: "tuples are not allowed (is there a stray comma?)",
    ast.Set: "sets are not allowed",
    ast.Dict: "dictionaries are not allowed",
    ast.ListComp: "comprehensions are not allowed",
    ast.SetComp: "comprehensions are not allowed",
    ast.DictComp: "comprehensions are not allowed",
    ast.GeneratorExp: "comprehensions are not allowed",
    ast.JoinedStr: "f-strings are not allowed",
    ast.FormattedValue: "f-strings are not allowed",
    ast.Starred: "`*` unpacking is not allowed",
    ast.Await: "`await` is not allowed",
    ast.Yield: "`yield` is not allowed",
    ast.YieldFrom: "`yield` is not allowed",
}
_FUNCTION_LIST = ", ".join(FUNCTIONS)


def parse(
    text: str,
    *,
    path: str,
    max_length: int = MAX_LENGTH,
    max_depth: int = MAX_DEPTH,
    max_nodes: int = MAX_NODES,
) -> Expression:
    """Parse and validate one expression.

    Parameters
    ----------
    text : str
        The expression as written in the document.
    path : str
        Document path reported in errors, e.g. ``model.define.c``.
    max_length, max_depth, max_nodes : int
        Limits in characters, tree levels and tree nodes (see the module's
        constants).  ``max_depth`` may not exceed `DEPTH_CEILING`.

    Raises
    ------
    InvalidDocument
        With ``path`` and a plain-words message, for anything outside the
        grammar, over a limit, or not parseable.
    """
    if max_depth > DEPTH_CEILING:
        raise ValueError(f"max_depth may be at most {DEPTH_CEILING}, got {max_depth}")
    if not isinstance(text, str):
        raise InvalidDocument.at(path, f"an expression must be a string, not {type(text).__name__}")
    if len(text) > max_length:
        raise InvalidDocument.at(
            path, f"the expression is {len(text)} characters long; at most {max_length} are allowed"
        )
    source = text.lstrip()
    if not source.strip():
        raise InvalidDocument.at(path, "the expression is empty")
    positions = _Positions(text, len(text) - len(source))
    _precheck(source, positions, path, max_depth)
    try:
        body = ast.parse(source, mode="eval").body
    except SyntaxError as exc:
        where = positions.of_line_column(exc.lineno or 1, (exc.offset or 1) - 1)
        message = exc.msg
        if "integer string conversion" in message:
            message = "a number has too many digits"
        raise InvalidDocument.at(path, f"syntax error at {where}: {message}") from None
    except (RecursionError, MemoryError):
        raise InvalidDocument.at(path, "the expression is nested too deeply to read") from None
    except ValueError as exc:
        raise InvalidDocument.at(path, f"the expression cannot be read: {exc}") from None
    builder = _Builder(source, positions, path, max_depth, max_nodes)
    try:
        tree = builder.build(body, 1)
    except RecursionError:
        raise InvalidDocument.at(path, "the expression is nested too deeply to read") from None
    if _nesting(_scalar(tree, dict.fromkeys(builder.names, "v"))) > _SOURCE_NESTING:
        raise InvalidDocument.at(path, "the expression is nested too deeply (too many arguments at too many levels)")
    return Expression(text, tree, frozenset(builder.names), frozenset(builder.functions))


_SOURCE_NESTING = 150
"""Deepest parenthesis nesting of generated source `parse` lets through:
Python refuses more than 200, and callers wrap the source further."""


def _nesting(source: str) -> int:
    depth = deepest = 0
    for char in source:
        if char in "([":
            depth += 1
            deepest = max(deepest, depth)
        elif char in ")]":
            depth -= 1
    return deepest


class _Positions:
    """Turns positions in the parsed (left-stripped) source into plain words
    about the original text."""

    def __init__(self, text: str, lead: int) -> None:
        self.text = text
        self.lead = lead
        self.source_lines = text[lead:].split("\n")

    def of_index(self, index: int) -> str:
        index += self.lead
        line = self.text.count("\n", 0, index) + 1
        column = index - (self.text.rfind("\n", 0, index) + 1) + 1
        return f"line {line}, column {column}" if "\n" in self.text else f"column {column}"

    def of_line_column(self, lineno: int, column: int) -> str:
        lines = self.source_lines
        lineno = min(max(lineno, 1), len(lines))
        before = sum(len(line) + 1 for line in lines[: lineno - 1])
        return self.of_index(before + max(column, 0))

    def of_node(self, node: ast.AST) -> str:
        lineno = getattr(node, "lineno", 1)
        line = self.source_lines[min(lineno, len(self.source_lines)) - 1]
        column = len(line.encode("utf-8")[: getattr(node, "col_offset", 0)].decode("utf-8", "replace"))
        return self.of_line_column(lineno, column)


def _precheck(source: str, positions: _Positions, path: str, max_depth: int) -> None:
    """Cheap character checks that must come before `ast.parse`."""
    depth = 0
    signs = 0
    for index, char in enumerate(source):
        if char in "+-":
            signs += 1
            if signs > max_depth + 1:
                raise InvalidDocument.at(
                    path, f"the expression is nested more than {max_depth} levels deep (signs at {positions.of_index(index)})"
                )
        elif not char.isspace():
            signs = 0
        if char in "([{":
            depth += 1
            if depth > max_depth:
                raise InvalidDocument.at(
                    path,
                    f"parentheses are nested more than {max_depth} deep (at {positions.of_index(index)})",
                )
        elif char in ")]}":
            depth -= 1
        elif char == "#":
            raise InvalidDocument.at(path, f"comments (`#`) are not allowed (at {positions.of_index(index)})")
        elif char == "\\":
            raise InvalidDocument.at(path, f"backslashes are not allowed (at {positions.of_index(index)})")


class _Builder:
    """The whitelist walk: checks an `ast` tree and builds our own nodes."""

    def __init__(self, source: str, positions: _Positions, path: str, max_depth: int, max_nodes: int) -> None:
        self.source = source
        self.positions = positions
        self.path = path
        self.max_depth = max_depth
        self.max_nodes = max_nodes
        self.count = 0
        self.names: set[str] = set()
        self.functions: set[str] = set()

    def fail(self, node: ast.AST, message: str) -> InvalidDocument:
        return InvalidDocument.at(self.path, f"{message} (at {self.positions.of_node(node)})")

    def code(self, node: ast.AST, limit: int = 40) -> str:
        segment = ast.get_source_segment(self.source, node) or type(node).__name__
        segment = " ".join(segment.split())
        return segment if len(segment) <= limit else segment[: limit - 1] + "…"

    def enter(self, node: ast.AST, depth: int) -> None:
        if depth > self.max_depth:
            raise self.fail(node, f"the expression is nested more than {self.max_depth} levels deep")
        self.count += 1
        if self.count > self.max_nodes:
            raise self.fail(
                node, f"the expression has more than {self.max_nodes} parts (numbers, names, operators, calls)"
            )

    def build(self, node: ast.AST, depth: int) -> Node:
        self.enter(node, depth)
        if isinstance(node, ast.Constant):
            return self.number(node)
        if isinstance(node, ast.Name):
            return self.name(node)
        if isinstance(node, ast.UnaryOp):
            return self.unary(node, depth)
        if isinstance(node, ast.BinOp):
            return self.binary(node, depth)
        if isinstance(node, ast.Compare):
            return self.compare(node, depth)
        if isinstance(node, ast.BoolOp):
            operands = tuple(self.build(value, depth + 1) for value in node.values)
            return _fold(Logic("and" if isinstance(node.op, ast.And) else "or", operands))
        if isinstance(node, ast.Call):
            return self.call(node, depth)
        message = _REFUSED_NODES.get(type(node), "`{code}` is not allowed in an expression")
        raise self.fail(node, message.format(code=self.code(node)))

    def number(self, node: ast.Constant) -> Number:
        value = node.value
        if isinstance(value, bool) or value is None:
            hint = f"; write {int(value)}" if isinstance(value, bool) else ""
            raise self.fail(node, f"`{value}` is not allowed{hint}")
        if isinstance(value, str):
            raise self.fail(node, "strings are not allowed")
        if isinstance(value, bytes):
            raise self.fail(node, "bytes literals are not allowed")
        if isinstance(value, complex):
            raise self.fail(node, f"complex numbers (`{self.code(node)}`) are not allowed")
        if not isinstance(value, (int, float)):
            raise self.fail(node, f"`{self.code(node)}` is not allowed")
        written = self.code(node)
        if written[:2].lower() in ("0x", "0o", "0b"):
            raise self.fail(node, f"only decimal numbers are allowed, not `{written}`")
        try:
            number = float(value)
        except OverflowError:
            number = math.inf
        if not math.isfinite(number):
            raise self.fail(node, f"the number `{written}` is too large for float64 (the largest is about 1.8e308)")
        return Number(number)

    def name(self, node: ast.Name) -> Name:
        written = ast.get_source_segment(self.source, node)
        if written != node.id:
            raise self.fail(node, f"the name `{written}` is not in normal form; write it as `{node.id}`")
        if node.id in FUNCTIONS:
            raise self.fail(node, f"`{node.id}` is a function; call it, as in `{node.id}(x)`")
        self.names.add(node.id)
        return Name(node.id)

    def unary(self, node: ast.UnaryOp, depth: int) -> Node:
        if isinstance(node.op, ast.Invert):
            raise self.fail(node, _REFUSED_OPERATORS[ast.Invert])
        operand = self.build(node.operand, depth + 1)
        if isinstance(node.op, ast.UAdd):
            return operand
        return _fold(Negate(operand) if isinstance(node.op, ast.USub) else Not(operand))

    def binary(self, node: ast.BinOp, depth: int) -> Node:
        if isinstance(node.op, ast.Pow):
            return _fold(Power(self.build(node.left, depth + 1), self.build(node.right, depth + 1)))
        symbol = self.arith_symbol(node)
        group = _ARITH_GROUP[symbol]
        # A left-nested run such as a - b + c is one level: flattening it
        # keeps deep sums legal and evaluates in the same order.
        links = [(symbol, node.right)]
        spine: ast.AST = node.left
        while isinstance(spine, ast.BinOp) and not isinstance(spine.op, ast.Pow):
            inner = self.arith_symbol(spine)
            if _ARITH_GROUP[inner] != group:
                break
            self.enter(spine, depth)
            links.append((inner, spine.right))
            spine = spine.left
        links.reverse()
        first = self.build(spine, depth + 1)
        rest = tuple((op, self.build(term, depth + 1)) for op, term in links)
        return _fold_arith(first, rest)

    def arith_symbol(self, node: ast.BinOp) -> str:
        symbol = _ARITH_SYMBOLS.get(type(node.op))
        if symbol is None:
            raise self.fail(node, _REFUSED_OPERATORS.get(type(node.op), "this operator is not allowed"))
        return symbol

    def compare(self, node: ast.Compare, depth: int) -> Node:
        ops = []
        for op in node.ops:
            symbol = _COMPARE_SYMBOLS.get(type(op))
            if symbol is None:
                raise self.fail(node, _REFUSED_OPERATORS.get(type(op), "this comparison is not allowed"))
            ops.append(symbol)
        operands = tuple(self.build(item, depth + 1) for item in [node.left, *node.comparators])
        return _fold(Compare(operands, tuple(ops)))

    def call(self, node: ast.Call, depth: int) -> Node:
        function = node.func.id if isinstance(node.func, ast.Name) else None
        if function not in FUNCTIONS:
            raise self.fail(
                node, f"calls are limited to {_FUNCTION_LIST}; `{self.code(node.func)}` is not one of them"
            )
        if node.keywords:
            keyword = node.keywords[0].arg
            shown = f"`{keyword}=`" if keyword else "`**`"
            raise self.fail(node, f"keyword arguments ({shown}) are not allowed in calls")
        for arg in node.args:
            if isinstance(arg, ast.Starred):
                raise self.fail(arg, _REFUSED_NODES[ast.Starred])
        fewest, most = FUNCTIONS[function]
        got = len(node.args)
        if got < fewest or (most is not None and got > most):
            if most is None:
                wanted = f"at least {fewest} arguments"
            else:
                wanted = f"exactly {fewest} argument" + ("s" if fewest > 1 else "")
            raise self.fail(node, f"`{function}` takes {wanted}; got {got}")
        self.functions.add(function)
        args = tuple(self.build(arg, depth + 1) for arg in node.args)
        return _fold(Call(function, args))


def _fold(node: Node) -> Node:
    """Replace a node whose operands are all numbers by its float64 value."""
    children = _children(node)
    if children and all(isinstance(child, Number) for child in children):
        with np.errstate(all="ignore"):
            value, _ = _eval(node, {})
        return Number(float(value))
    return node


def _fold_arith(first: Node, rest: tuple[tuple[str, Node], ...]) -> Node:
    """Build an `Arith` run, folding its leading all-number part."""
    while rest and isinstance(first, Number) and isinstance(rest[0][1], Number):
        first = _fold(Arith(first, rest[:1]))
        rest = rest[1:]
    return Arith(first, rest) if rest else first


def _children(node: Node) -> tuple[Node, ...]:
    if isinstance(node, (Negate, Not)):
        return (node.operand,)
    if isinstance(node, Arith):
        return (node.first, *(term for _, term in node.rest))
    if isinstance(node, Power):
        return (node.base, node.exponent)
    if isinstance(node, (Compare, Logic)):
        return node.operands
    if isinstance(node, Call):
        return node.args
    return ()


def check_names(expr: Expression, known: Iterable[str], *, path: str) -> None:
    """Raise `InvalidDocument` naming each name of ``expr`` not in ``known``.

    ``known`` is listed in the message in the order given, with a close match
    suggested when there is one.
    """
    known_list = list(dict.fromkeys(known))
    unknown = sorted(expr.names.difference(known_list), key=lambda name: (expr.text.find(name), name))
    if not unknown:
        return
    if known_list:
        shown = ", ".join(known_list[:30]) + (f", … ({len(known_list) - 30} more)" if len(known_list) > 30 else "")
        listing = f"known names are: {shown}"
    else:
        listing = "no names are defined here"
    errors = []
    for name in unknown:
        close = difflib.get_close_matches(name, known_list, n=1)
        hint = f" (did you mean `{close[0]}`?)" if close else ""
        errors.append({"path": path, "message": f"unknown name `{name}`{hint}; {listing}"})
    raise InvalidDocument(errors)


# Numpy evaluation ---------------------------------------------------------

_ARITH_UFUNCS = {"+": np.add, "-": np.subtract, "*": np.multiply, "/": np.divide}
_COMPARE_UFUNCS = {
    "<": np.less, "<=": np.less_equal, ">": np.greater, ">=": np.greater_equal,
    "==": np.equal, "!=": np.not_equal,
}
_UNARY_UFUNCS = {"log": np.log, "exp": np.exp, "sqrt": np.sqrt, "abs": np.abs}

_Value = Union[np.ndarray, float]
_T = TypeVar("_T")


def evaluate(expr: Expression, env: Mapping[str, float | np.ndarray]) -> np.ndarray:
    """Evaluate ``expr`` with numpy, broadcasting the values in ``env``.

    Parameters
    ----------
    expr : Expression
    env : mapping of name to float or array
        A value for every name in ``expr.names`` (extra names are ignored);
        arrays must broadcast together.

    Returns
    -------
    ndarray, float64
        Shaped as the broadcast of the values used (0-d when all are scalars).
        It is always a new array, never one of ``env``'s.
    """
    with np.errstate(all="ignore"):
        value, owned = _eval(expr.tree, env)
    if owned and isinstance(value, np.ndarray):
        return value
    return np.array(value, dtype=np.float64)


def _eval(node: Node, env: Mapping[str, float | np.ndarray]) -> tuple[_Value, bool]:
    """Value of ``node`` and whether it is a temporary we may overwrite."""
    if isinstance(node, Number):
        return node.value, False
    if isinstance(node, Name):
        try:
            value = env[node.id]
        except KeyError:
            raise KeyError(f"no value given for name `{node.id}`") from None
        return np.asarray(value, dtype=np.float64), False
    if isinstance(node, Negate):
        return _unary(np.negative, *_eval(node.operand, env))
    if isinstance(node, Not):
        return _unary(np.logical_not, *_eval(node.operand, env), to_float=True)
    if isinstance(node, Arith):
        value, owned = _eval(node.first, env)
        for op, term in node.rest:
            value, owned = _binary(_ARITH_UFUNCS[op], value, owned, *_eval(term, env))
        return value, owned
    if isinstance(node, Power):
        return _power(*_eval(node.base, env), *_eval(node.exponent, env))
    if isinstance(node, Compare):
        return _compare(node, [_eval(operand, env) for operand in node.operands])
    if isinstance(node, Logic):
        ufunc = np.logical_and if node.op == "and" else np.logical_or
        values = [_eval(operand, env) for operand in node.operands]
        value, owned = values[0]
        for other in values[1:]:
            value, owned = _binary(ufunc, value, owned, *other, to_float=True)
        return value, owned
    args = [_eval(arg, env) for arg in node.args]
    if node.function in _UNARY_UFUNCS:
        return _unary(_UNARY_UFUNCS[node.function], *args[0])
    if node.function == "min":
        return _pairwise(args, _minimum)
    if node.function == "max":
        return _pairwise(args, _maximum)
    if node.function == "clip":
        return _minimum(_maximum(args[0], args[1]), args[2])
    (condition, _), (if_true, _), (if_false, _) = args
    return np.where(np.not_equal(condition, 0.0), if_true, if_false), True


def _own(value: _Value) -> tuple[_Value, bool]:
    # A ufunc on 0-d inputs returns a numpy scalar, which cannot be reused.
    return value, isinstance(value, np.ndarray)


def _unary(ufunc: np.ufunc, value: _Value, owned: bool, *, to_float: bool = False) -> tuple[_Value, bool]:
    if owned:
        return ufunc(value, out=value), True
    if to_float:
        return ufunc(value, out=np.empty(np.shape(value))), True
    return _own(ufunc(value))


def _binary(
    ufunc: np.ufunc, a: _Value, a_owned: bool, b: _Value, b_owned: bool, *, to_float: bool = False
) -> tuple[_Value, bool]:
    """``ufunc(a, b)``, written into a temporary operand when one has the
    result's shape (``to_float``: the ufunc yields booleans, stored as 1.0/0.0)."""
    shape = np.broadcast_shapes(np.shape(a), np.shape(b))
    if a_owned and a.shape == shape:
        return ufunc(a, b, out=a), True
    if b_owned and b.shape == shape:
        return ufunc(a, b, out=b), True
    if to_float:
        return ufunc(a, b, out=np.empty(shape)), True
    return _own(ufunc(a, b))


def _power(base: _Value, base_owned: bool, exponent: _Value, exponent_owned: bool) -> tuple[_Value, bool]:
    half = np.equal(exponent, 0.5)
    if not np.any(half):
        return _binary(np.power, base, base_owned, exponent, exponent_owned)
    # numpy computes x**0.5 as sqrt(x) when the exponent is constant along a
    # loop, which differs from pow at -inf and -0.0; there pow(x, 0.5) == |x|.
    value = np.array(np.power(base, exponent), dtype=np.float64)
    fix = half & (np.equal(base, -np.inf) | np.equal(base, 0.0))
    np.copyto(value, np.abs(base), where=fix)
    return value, True


def _compare(node: Compare, values: list[tuple[_Value, bool]]) -> tuple[_Value, bool]:
    shape = np.broadcast_shapes(*(np.shape(value) for value, _ in values))
    result = np.empty(shape)
    for index, op in enumerate(node.ops):
        ufunc = _COMPARE_UFUNCS[op]
        (a, _), (b, _) = values[index], values[index + 1]
        if index == 0:
            ufunc(a, b, out=result)
        else:
            np.logical_and(result, ufunc(a, b), out=result)
    return result, True


def _minimum(a: tuple[_Value, bool], b: tuple[_Value, bool]) -> tuple[_Value, bool]:
    # Operands swapped on purpose: numpy returns its second operand on a tie
    # (0.0 against -0.0) and numba its first, so this keeps ±0 identical.
    return _binary(np.minimum, *b, *a)


def _maximum(a: tuple[_Value, bool], b: tuple[_Value, bool]) -> tuple[_Value, bool]:
    return _binary(np.maximum, *b, *a)


def _pairwise(items: list[_T], combine: Callable[[_T, _T], _T]) -> _T:
    """Combine ``items`` as a balanced tree: every evaluator uses the same
    shape, and generated source stays shallow for long argument lists."""
    if len(items) == 1:
        return items[0]
    middle = len(items) // 2
    return combine(_pairwise(items[:middle], combine), _pairwise(items[middle:], combine))


# Source for numba ---------------------------------------------------------

def _float_literal(value: float) -> str:
    """Python source for a float64 constant (negative ones parenthesised)."""
    if math.isnan(value):
        return "np.nan"
    if math.isinf(value):
        return "np.inf" if value > 0 else "(-np.inf)"
    text = repr(float(value))
    return f"({text})" if math.copysign(1.0, value) < 0 else text


def _variable_text(text: str) -> str:
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
        return _float_literal(node.value)
    if isinstance(node, Name):
        return _variable_text(name_of[node.id])
    if isinstance(node, Negate):
        return f"(-{of(node.operand)})"
    if isinstance(node, Not):
        return f"np.float64({of(node.operand)} == 0.0)"
    if isinstance(node, Arith):
        return "(" + of(node.first) + "".join(f" {op} {of(term)}" for op, term in node.rest) + ")"
    if isinstance(node, Power):
        base, exponent = of(node.base), of(node.exponent)
        if isinstance(node.exponent, Number) or not (base.isidentifier() and exponent.isidentifier()):
            return f"({base} ** {exponent})"
        # A runtime exponent (a param, say): the compiler cannot fold the common ones as it does
        # constants, and a call of pow costs several times a division (3x on a CRRA reward).
        return f"((1.0 / {base}) if {exponent} == -1.0 else (({base} * {base}) if {exponent} == 2.0 else ({base} ** {exponent})))"
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
    if node.function in _UNARY_UFUNCS:
        return f"np.{node.function}({args[0]})"
    if node.function in ("min", "max"):
        ufunc = "np.minimum" if node.function == "min" else "np.maximum"
        return _pairwise(args, lambda a, b: f"{ufunc}({a}, {b})")
    if node.function == "clip":
        return f"np.minimum(np.maximum({args[0]}, {args[1]}), {args[2]})"
    return f"({args[1]} if {args[0]} != 0.0 else {args[2]})"


def interval_source(
    expr: Expression, name_of_lo: Mapping[str, str], name_of_hi: Mapping[str, str], prefix: str
) -> tuple[list[str], str, str]:
    """Numba source lines bounding ``expr`` over a box of its names.

    When each name lies in ``[lo, hi]`` (the caller's float64 variables
    ``name_of_lo[name]`` and ``name_of_hi[name]``), the lines set two float64
    variables that bound the expression at every point of the box, as
    computed by either evaluator.  Where nan is possible the bounds are
    ``(-inf, inf)``; comparisons and logic give bounds within ``[0, 1]``.
    The rules are in the docstring of ``worker._intervals``.

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
        `interval_globals` (they call helpers jitted once per process).  They
        also run in plain CPython.
    lo, hi : str
        The names of the variables holding the bounds.
    """
    from worker import _intervals

    return _intervals.interval_source(expr, name_of_lo, name_of_hi, prefix)


def interval_globals() -> dict[str, object]:
    """The globals that the lines of `interval_source` use (``np`` and the
    helper module); merge them into the namespace of the generated function."""
    from worker import _intervals

    return {"np": np, _intervals.GLOBAL_NAME: _intervals}
