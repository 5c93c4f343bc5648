"""The parser of the expression language: text to a validated tree.

Grammar
-------
Nothing outside this list is accepted:

* decimal number literals (``2``, ``0.33``, ``1e-6``), converted to float64;
* names (``k``, ``alpha``): which names exist is checked by `check_names`;
* unary ``-`` and ``+``; binary ``+ - * / **``;
* comparisons ``< <= > >= == !=``, chained as in ``0 < k <= 1``
  (``0 < k and k <= 1``, with ``k`` evaluated once);
* ``and``, ``or``, ``not``; parentheses;
* calls to ``log exp sqrt abs`` (one argument), ``min max`` (two or more, no comma before ``)``),
  ``where(condition, if_true, if_false)`` and ``clip(x, lo, hi)``.

The text goes through ``ast.parse(text, mode="eval")`` and then a whitelist
walk that refuses anything else, naming what it found and where.  Every
refusal is a `worker.errors.InvalidDocument` carrying the caller's ``path``.
The result is a tree of :mod:`worker.expressions.nodes`, with parts made of
numbers only folded in float64 by the numpy evaluator (``9**9**9**9``
becomes inf at once).

Limits
------
`MAX_LENGTH`, `MAX_DEPTH` and `MAX_NODES` are the defaults of `parse`.
"""

from __future__ import annotations

import ast
import difflib
import math
from collections.abc import Iterable

from worker.errors import InvalidDocument
from worker.expressions.evaluator import evaluate_tree
from worker.expressions.nodes import (
    FUNCTIONS,
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
    children,
)
from worker.expressions.scalar import scalar_source, source_nesting
from worker.expressions.slips import comma_before_close, diagnose, function_hint, operator_index

__all__ = ["DEPTH_CEILING", "MAX_DEPTH", "MAX_LENGTH", "MAX_NODES", "check_names", "parse"]

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


_PARSED: dict[tuple[str, int, int, int], Expression] = {}
"""Expressions parsed already, by text and limits (a solve parses each of a document's several times: the
checks, the model's numbers, the draws, the diagnostics).  An :class:`Expression` is immutable and does not
depend on ``path``, which only errors name; errors are not kept.  Cleared when it reaches `_PARSED_MAX`."""
_PARSED_MAX = 4096


def parse(
    text: str,
    *,
    path: str,
    max_length: int = MAX_LENGTH,
    max_depth: int = MAX_DEPTH,
    max_nodes: int = MAX_NODES,
) -> Expression:
    """Parse and validate one expression (the same text and limits give the same object, from `_PARSED`).

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
    key = (text, max_length, max_depth, max_nodes) if type(text) is str else None
    known = _PARSED.get(key) if key is not None else None
    if known is not None:
        return known
    expression = _parse(text, path, max_length, max_depth, max_nodes)
    if key is not None:
        if len(_PARSED) >= _PARSED_MAX:
            _PARSED.clear()
        _PARSED[key] = expression
    return expression


def _parse(text: str, path: str, max_length: int, max_depth: int, max_nodes: int) -> Expression:
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
        slip = diagnose(source)
        if slip is not None:  # Python points a trailing `+` at column 1 and says only "invalid syntax"
            where, message = positions.of_index(slip[0]), slip[1]
        else:
            where = positions.of_line_column(exc.lineno or 1, (exc.offset or 1) - 1)
            message = exc.msg
        if "integer string conversion" in message:
            message = "a number has too many digits"
        raise InvalidDocument.at(path, f"syntax error at {where}: {message}") from None
    except (RecursionError, MemoryError):
        raise InvalidDocument.at(path, "the expression is nested too deeply to read") from None
    except ValueError as exc:
        raise InvalidDocument.at(path, f"the expression cannot be read: {exc}") from None
    if (slip := comma_before_close(source)) is not None:  # max(a, b,): an argument left out
        raise InvalidDocument.at(path, f"syntax error at {positions.of_index(slip[0])}: {slip[1]}")
    builder = _Builder(source, positions, path, max_depth, max_nodes)
    try:
        tree = builder.build(body, 1)
    except RecursionError:
        raise InvalidDocument.at(path, "the expression is nested too deeply to read") from None
    expression = Expression(text, tree, frozenset(builder.names), frozenset(builder.functions))
    if source_nesting(scalar_source(expression, dict.fromkeys(builder.names, "v"))) > _SOURCE_NESTING:
        raise InvalidDocument.at(path, "the expression is nested too deeply (too many arguments at too many levels)")
    return expression


_SOURCE_NESTING = 150
"""Deepest parenthesis nesting of generated source `parse` lets through:
Python refuses more than 200, and callers wrap the source further."""


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
        return self.of_index(self.index_of(getattr(node, "lineno", 1), getattr(node, "col_offset", 0)))

    def index_of(self, lineno: int, byte_offset: int) -> int:
        """Index in the source of ``ast``'s (line, UTF-8 byte offset)."""
        lineno = min(max(lineno, 1), len(self.source_lines))
        line = self.source_lines[lineno - 1]
        column = len(line.encode("utf-8")[:byte_offset].decode("utf-8", "replace"))
        return sum(len(text) + 1 for text in self.source_lines[: lineno - 1]) + column


def _precheck(source: str, positions: _Positions, path: str, max_depth: int) -> None:
    """Cheap character checks that must come before `ast.parse`."""
    depth = 0
    signs = 0
    for index, char in enumerate(source):
        if char in "+-":
            signs += 1
            if signs > max_depth + 1:
                raise InvalidDocument.at(
                    path,
                    f"the expression is nested more than {max_depth} levels deep"
                    f" (signs at {positions.of_index(index)})",
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

    def fail_after(self, operand: ast.AST, message: str) -> InvalidDocument:
        """A refusal of the operator that follows ``operand`` (``k ^ 2``), pointing at the operator."""
        end = self.positions.index_of(getattr(operand, "end_lineno", 1), getattr(operand, "end_col_offset", 0))
        where = self.positions.of_index(operator_index(self.source, end))
        return InvalidDocument.at(self.path, f"{message} (at {where})")

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
        if isinstance(node, ast.Tuple) and (slip := diagnose(self.source)) is not None:  # `1,5`, a stray comma
            raise InvalidDocument.at(self.path, f"syntax error at {self.positions.of_index(slip[0])}: {slip[1]}")
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
            raise self.fail_after(node.left, _REFUSED_OPERATORS.get(type(node.op), "this operator is not allowed"))
        return symbol

    def compare(self, node: ast.Compare, depth: int) -> Node:
        ops = []
        for op, left in zip(node.ops, [node.left, *node.comparators]):
            symbol = _COMPARE_SYMBOLS.get(type(op))
            if symbol is None:
                raise self.fail_after(left, _REFUSED_OPERATORS.get(type(op), "this comparison is not allowed"))
            ops.append(symbol)
        operands = tuple(self.build(item, depth + 1) for item in [node.left, *node.comparators])
        return _fold(Compare(operands, tuple(ops)))

    def call(self, node: ast.Call, depth: int) -> Node:
        function = node.func.id if isinstance(node.func, ast.Name) else None
        if function not in FUNCTIONS:
            hint = function_hint(function, FUNCTIONS) if function else ""
            raise self.fail(
                node, f"calls are limited to {_FUNCTION_LIST}; `{self.code(node.func)}` is not one of them{hint}"
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
    parts = children(node)
    if parts and all(isinstance(part, Number) for part in parts):
        return Number(float(evaluate_tree(node, {})))
    return node


def _fold_arith(first: Node, rest: tuple[tuple[str, Node], ...]) -> Node:
    """Build an `Arith` run, folding its leading all-number part."""
    while rest and isinstance(first, Number) and isinstance(rest[0][1], Number):
        first = _fold(Arith(first, rest[:1]))
        rest = rest[1:]
    return Arith(first, rest) if rest else first


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
