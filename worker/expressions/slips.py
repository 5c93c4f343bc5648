"""Where an expression that does not read goes wrong, and what was expected there.

Python's own syntax errors point at odd places for the slips a modeller makes (a trailing ``+`` is reported
at column 1) and say only "invalid syntax".  :func:`diagnose` reads the text again with a small scanner of
our own and names the first slip at its column: an operator with nothing after it, two operators in a row,
two values with no operator between them, a parenthesis never closed or closed twice, a comma outside a
call's arguments (``1,5`` for ``1.5``), an empty argument, ``=`` for ``==``.  It only explains: whether an
expression is accepted is decided by :mod:`worker.expressions.parser`, which calls it when the text does not
read (or reads as a tuple).  :func:`comma_before_close` finds ``f(a, b,)``, which Python reads but which
usually means an argument was left out.
"""

from __future__ import annotations

import difflib
import re
from collections.abc import Iterable

__all__ = ["comma_before_close", "diagnose", "function_hint", "operator_index"]

_TOKEN = re.compile(
    r"(?P<number>(?:\d[\d_]*(?:\.[\d_]*)?|\.\d[\d_]*)(?:[eE][+-]?\d[\d_]*)?)"
    r"|(?P<name>[^\W\d]\w*)"
    r"|(?P<op>\*\*|//|<<|>>|<=|>=|==|!=|[-+*/%@&|^~<>=])"
    r"|(?P<open>[(\[{])|(?P<close>[)\]}])|(?P<comma>,)|(?P<space>\s+)|(?P<other>.)"
)
_KEYWORDS = {"and": "binary", "or": "binary", "not": "prefix", "is": "binary", "in": "binary"}
_SIGNS = {"+", "-"}
_OPERAND = "a number, a name or `(`"


def _tokens(source: str) -> list[tuple[str, str, int]]:
    """(kind, text, index) of each token but spaces; ``kind`` is number, name, binary, sign, prefix, open,
    close, comma or other."""
    out = []
    for match in _TOKEN.finditer(source):
        kind, text = match.lastgroup or "other", match.group()
        if kind == "space":
            continue
        if kind == "name" and text in _KEYWORDS:
            kind = _KEYWORDS[text]
        elif kind == "op":
            kind = "sign" if text in _SIGNS else "prefix" if text == "~" else "binary"
        out.append((kind, text, match.start()))
    return out


def diagnose(source: str) -> tuple[int, str] | None:
    """The first slip in ``source`` as (index in ``source``, message), or None when none is recognised."""
    tokens = _tokens(source)
    opened: list[tuple[int, bool]] = []  # (index of the opening parenthesis, whether it opens a call)
    previous: tuple[str, str, int] | None = None
    want_operand = True
    for token in tokens:
        kind, text, index = token
        if kind == "other":
            return index, f"`{text}` cannot appear in an expression"
        if kind == "binary" and text == "=":
            if want_operand:
                return index, f"`=` cannot stand here; {_OPERAND} was expected"
            return index, "`=` is not allowed: to compare, write `==`"
        if want_operand and kind == "close" and previous is not None and previous[0] == "open" and opened[-1][1]:
            opened.pop()  # f(): the parser names the arguments the function takes
            want_operand = False
        elif want_operand:
            slip = _where_operand_wanted(token, previous, opened)
            if slip is not None:
                return slip
            if kind in ("number", "name"):
                want_operand = False
            elif kind == "open":
                opened.append((index, False))
            elif kind == "comma":  # f(a, b,) and f(,) are refused above; this is not reached
                return index, "an argument was expected before this comma"
        else:
            if kind in ("number", "name"):
                adjacent = previous is not None and previous[0] == "number" and previous[2] + len(previous[1]) == index
                if adjacent and kind == "number":
                    return previous[2], f"`{previous[1]}{text}` is not a number"
                if adjacent:
                    return previous[2], (
                        f"a number runs into a name (`{previous[1]}{text}`): for a product write "
                        f"`{previous[1]} * {text}`"
                    )
                return index, (
                    f"an operator was expected between `{previous[1] if previous else ''}` and `{text}`"
                    " (for a product write `*`)"
                )
            if kind == "open":
                if previous is not None and previous[0] == "name" and text == "(":
                    opened.append((index, True))
                    want_operand = True
                    previous = ("open", text, index)
                    continue
                if text == "(":
                    return index, "an operator was expected before `(` (for a product write `*`)"
                return index, f"`{text}` cannot appear in an expression: only parentheses `( )` group"
            if kind == "close":
                if not opened:
                    return index, f"`{text}` closes a parenthesis that was never opened"
                opened.pop()
            elif kind == "comma":
                if not opened or not opened[-1][1]:
                    return index, _stray_comma(tokens, token, previous)
                want_operand = True
            elif kind in ("binary", "sign"):
                want_operand = True
            elif kind == "prefix":
                return index, f"`{text}` cannot follow a value; an operator such as `+` or `and` was expected"
        previous = token
    if want_operand and previous is not None:
        return previous[2], f"the expression ends with `{previous[1]}`; {_OPERAND} was expected after it"
    if opened:
        index, is_call = opened[-1]
        what = "the call's `(`" if is_call else "`(`"
        return index, f"{what} was never closed; a `)` was expected by the end of the expression"
    return None


def _where_operand_wanted(
    token: tuple[str, str, int], previous: tuple[str, str, int] | None, opened: list[tuple[int, bool]]
) -> tuple[int, str] | None:
    """The slip at ``token`` when a value was expected there, or None when it may start a value."""
    kind, text, index = token
    after = f"after `{previous[1]}`" if previous is not None else "at the start"
    if kind == "binary":
        if text == "*" and previous is not None and previous[1] == "*":
            return index, "`* *` is not an operator: for a power write `**` with no space"
        return index, f"`{text}` cannot stand {after}; {_OPERAND} was expected"
    if kind == "close":
        if previous is not None and previous[0] == "comma":
            return previous[2], "a comma with no argument after it; remove it or add the argument"
        if previous is not None and previous[0] == "open":
            return index, "empty parentheses: something was expected between `(` and `)`"
        return index, f"`{text}` cannot stand {after}; {_OPERAND} was expected"
    if kind == "comma":
        if previous is not None and previous[0] in ("comma", "open"):
            return index, f"an argument was expected before this comma ({after})"
        return index, f"a comma cannot stand {after}; {_OPERAND} was expected"
    return None


def _stray_comma(
    tokens: list[tuple[str, str, int]], comma: tuple[str, str, int], previous: tuple[str, str, int] | None
) -> str:
    position = tokens.index(comma)
    following = tokens[position + 1] if position + 1 < len(tokens) else None
    if (
        previous is not None and previous[0] == "number" and following is not None and following[0] == "number"
        and previous[2] + len(previous[1]) == comma[2] and following[2] == comma[2] + 1
        and following[1][:1].isdigit()
    ):
        return (
            f"`{previous[1]},{following[1]}`: a decimal number is written with a point, `{previous[1]}."
            f"{following[1]}`; commas only separate a function's arguments"
        )
    return "a comma outside a function call's parentheses; commas only separate a function's arguments"


def comma_before_close(source: str) -> tuple[int, str] | None:
    """The first ``,`` followed by ``)`` (``max(a, b,)``) as (index, message), or None."""
    tokens = _tokens(source)
    for (kind, _, index), following in zip(tokens, tokens[1:]):
        if kind == "comma" and following[0] == "close":
            return index, "a comma with no argument after it; remove it or add the argument"
    return None


_WRITTEN_ELSEWHERE = {"ln": "log", "fabs": "abs", "minimum": "min", "maximum": "max", "if": "where",
                      "ifelse": "where", "clamp": "clip"}
"""Function names other languages use, and ours (``pow`` and ``power`` are written ``a ** b``)."""


def function_hint(name: str, functions: Iterable[str]) -> str:
    """`` (did you mean `log`?)`` for a function name that is not one of ``functions``, or ``""``."""
    if name.lower() in ("pow", "power"):
        return " (for a power write `a ** b`)"
    close = _WRITTEN_ELSEWHERE.get(name.lower()) or next(
        iter(difflib.get_close_matches(name, list(functions), n=1, cutoff=0.5)), None
    )
    return f" (did you mean `{close}`?)" if close else ""


def operator_index(source: str, start: int) -> int:
    """Index of the first character at or after ``start`` that is neither a space nor a closing parenthesis:
    where an operator begins after its left operand ends at ``start``."""
    index = start
    while index < len(source) and (source[index].isspace() or source[index] == ")"):
        index += 1
    return index if index < len(source) else start
