"""Syntax errors point at the slip and say what was expected (worker/expressions/slips.py).

Before, Python's own error positions came through: a trailing operator was reported at column 1 with
"invalid syntax", a stray comma or `1,5` as "tuples are not allowed" at column 1, `k ^ 2` at column 1.
Each case below failed before the fix (the columns, the words, or both).
"""

from __future__ import annotations

import pytest

from worker.errors import InvalidDocument
from worker.expressions import parse

PATH = "model.define.c"


def refuse(text: str) -> str:
    with pytest.raises(InvalidDocument) as info:
        parse(text, path=PATH)
    assert [error["path"] for error in info.value.errors] == [PATH]  # the path is kept as given
    return info.value.errors[0]["message"]


@pytest.mark.parametrize(
    ("text", "expected"),
    [
        # A trailing operator: at the operator, at the end (before: column 1).
        ("(1 + r) * assets + income - assets_next +",
         "syntax error at column 41: the expression ends with `+`; a number, a name or `(` was expected after it"),
        ("k **", "syntax error at column 3: the expression ends with `**`"),
        # A doubled operator: at the second one.
        ("k + * z", "syntax error at column 5: `*` cannot stand after `+`; a number, a name or `(` was expected"),
        ("k * * 2", "syntax error at column 5: `* *` is not an operator: for a power write `**` with no space"),
        ("* k", "syntax error at column 1: `*` cannot stand at the start"),
        # Unclosed and unopened parentheses.
        ("(k + z", "syntax error at column 1: `(` was never closed; a `)` was expected by the end of the expression"),
        ("k * log(z + 1", "syntax error at column 8: the call's `(` was never closed"),
        ("(k + z))", "syntax error at column 8: `)` closes a parenthesis that was never opened"),
        ("k * (z +)", "syntax error at column 9: `)` cannot stand after `+`"),
        # Stray commas, and a decimal comma (before: "tuples are not allowed" at column 1).
        ("k + z,", "syntax error at column 6: a comma outside a function call's parentheses"),
        ("2 * k, z", "syntax error at column 6: a comma outside a function call's parentheses"),
        ("1,5 * k", "syntax error at column 2: `1,5`: a decimal number is written with a point, `1.5`"),
        ("k * 0,25", "syntax error at column 6: `0,25`: a decimal number is written with a point, `0.25`"),
        ("max(k,, z)", "syntax error at column 7: an argument was expected before this comma"),
        ("max(k, z,)", "syntax error at column 9: a comma with no argument after it"),
        ("log((k, z))", "syntax error at column 7: a comma outside a function call's parentheses"),
        # Power written `^` (before: column 1): at the operator, saying what to write.
        ("k ^ 2", "the operator `^` is not allowed; for powers write `**` (at column 3)"),
        ("log(k) + z^0.5", "the operator `^` is not allowed; for powers write `**` (at column 11)"),
        # Two values in a row, `=` for `==`, a number run into a name.
        ("k z", "syntax error at column 3: an operator was expected between `k` and `z` (for a product write `*`)"),
        ("2k + 1", "syntax error at column 1: a number runs into a name (`2k`): for a product write `2 * k`"),
        ("where(k = 0, 1, z)", "syntax error at column 9: `=` is not allowed: to compare, write `==`"),
        # An unknown function: named, with what is allowed and a close match.
        ("k + ln(z)", "`ln` is not one of them (did you mean `log`?) (at column 5)"),
        ("k + sqr(z)", "`sqr` is not one of them (did you mean `sqrt`?) (at column 5)"),
        # `is`, `in` at the operator.
        ("k + 1 is z", "`is` is not allowed; use `==` (at column 7)"),
    ],
)
def test_a_slip_is_named_at_its_column(text: str, expected: str) -> None:
    assert expected in refuse(text)


def test_columns_count_leading_spaces_lines_and_wide_characters() -> None:
    assert refuse("  k +").startswith("syntax error at column 5:")
    assert refuse("(k +\n z +").startswith("syntax error at line 2, column 4:")
    assert "(at column 7)" in refuse("κ + λ ^ 2")  # Greek names: columns in characters, not UTF-8 bytes


def test_what_python_reads_still_parses() -> None:
    # The scanner only explains refusals: these are accepted as before.
    for text in ["k ++ z", "max(k, z, 1.5)", "-(k) * (z)", "not (k < 1) or z >= 2", "1e-3 * k", ".5 * k", "log(1_000)"]:
        parse(text, path=PATH)


def test_a_power_function_is_told_to_write_the_operator() -> None:
    assert "`pow` is not one of them (for a power write `a ** b`) (at column 1)" in refuse("pow(k, 2)")
