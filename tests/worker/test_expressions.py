"""Tests of the expression parser: the grammar and its refusals, limits, names.

The values, numba source and interval bounds are tested in
``test_expression_values.py``.
"""

from __future__ import annotations

import dataclasses
import math
import time

import pytest

from worker.errors import InvalidDocument
from worker.expressions import (
    DEPTH_CEILING,
    MAX_DEPTH,
    MAX_LENGTH,
    MAX_NODES,
    Expression,
    Number,
    check_names,
    evaluate,
    parse,
    scalar_source,
)
from worker.expressions.intervals import interval_source

PATH = "model.define.c"


def refuse(text: str, **limits: int) -> str:
    """Parse ``text`` expecting a refusal at PATH; return its message."""
    with pytest.raises(InvalidDocument) as info:
        parse(text, path=PATH, **limits)
    [error] = info.value.errors
    assert error["path"] == PATH
    assert str(info.value).startswith(PATH)
    return error["message"]


def value(text: str, **env: float) -> float:
    return float(evaluate(parse(text, path=PATH), env))


ENV = {"k": 2.0, "z": -1.0, "a": 0.5}


@pytest.mark.parametrize(
    ("text", "expected"),
    [
        ("1 + 2 * 3", 7.0),
        ("2 ** 3 ** 2", 512.0),
        ("-2 ** 2", -4.0),
        ("(-2) ** 2", 4.0),
        ("+k", 2.0),
        ("k / 4 - 1 + a", 0.0),
        ("10 - k - 3", 5.0),
        ("12 / k / 3", 2.0),
        ("1 < k <= 2", 1.0),
        ("3 < k < 4", 0.0),
        ("k == 2 != 3", 1.0),
        ("k > 1 and z < 0", 1.0),
        ("k > 1 and not z < 0", 0.0),
        ("z or 0", 1.0),
        ("0 or 0 or a", 1.0),
        ("not 0", 1.0),
        ("log(exp(k))", 2.0),
        ("sqrt(4) + abs(z)", 3.0),
        ("min(k, z, a)", -1.0),
        ("max(k, z, a, 3)", 3.0),
        ("where(k > 1, 10, 20)", 10.0),
        ("where(0, 10, 20)", 20.0),
        ("clip(k, 0, 1) + clip(z, 0, 1)", 1.0),
        ("1e-3 * 1_000 + .5 + 1.", 2.5),
        ("  (k\n   + 1)", 3.0),
        ("2 * (1 - a) ** 2", 0.5),
    ],
)
def test_accepted_expressions_evaluate_as_written(text: str, expected: float) -> None:
    assert value(text, **ENV) == expected


def test_expression_records_names_and_functions() -> None:
    expr = parse("log(k) + min(z, alpha) * log(2)", path=PATH)
    assert isinstance(expr, Expression)
    assert expr.text == "log(k) + min(z, alpha) * log(2)"
    assert expr.names == frozenset({"k", "z", "alpha"})
    assert expr.functions == frozenset({"log", "min"})
    with pytest.raises(dataclasses.FrozenInstanceError):
        expr.text = "1"  # type: ignore[misc]


def test_constant_parts_are_folded_in_float64() -> None:
    assert parse("9**9**9**9", path=PATH).tree == Number(math.inf)
    assert parse("-(2 * 3)", path=PATH).tree == Number(-6.0)
    tree = parse("2 * 3 + k + 1", path=PATH).tree
    assert tree.first == Number(6.0)  # type: ignore[union-attr]
    assert value("1 / 0 - 1 / 0") != value("1 / 0 - 1 / 0")  # nan, folded


@pytest.mark.parametrize(
    ("text", "fragment"),
    [
        ("k.real", "attribute access (`k.real`) is not allowed"),
        ("k[0]", "indexing (`k[0]`) is not allowed"),
        ("open(k)", "calls are limited to log, exp, sqrt, abs, min, max, where, clip; `open` is not one of them"),
        ("np.log(k)", "`np.log` is not one of them"),
        ("log(k, 2)", "`log` takes exactly 1 argument; got 2"),
        ("where(k, 1)", "`where` takes exactly 3 arguments; got 2"),
        ("min(k)", "`min` takes at least 2 arguments; got 1"),
        ("max(k, key=abs)", "keyword arguments (`key=`) are not allowed"),
        ("max(*k)", "`*` unpacking is not allowed"),
        ("lambda: 1", "lambda functions are not allowed"),
        ("[1, 2]", "lists are not allowed"),
        ("(1, 2)", "a comma outside a function call's parentheses"),
        ("{1}", "sets are not allowed"),
        ("{1: 2}", "dictionaries are not allowed"),
        ("[k for k in z]", "comprehensions are not allowed"),
        ("'a'", "strings are not allowed"),
        ("b'x'", "bytes literals are not allowed"),
        ("f'{k}'", "f-strings are not allowed"),
        ("(k := 1)", "assignment expressions (`:=`) are not allowed"),
        ("1 if k else 2", "use where(c, a, b)"),
        ("1j", "complex numbers (`1j`) are not allowed"),
        ("True", "`True` is not allowed; write 1"),
        ("None", "`None` is not allowed"),
        ("...", "`...` is not allowed"),
        ("0x1f", "only decimal numbers are allowed"),
        ("1e999", "too large for float64"),
        ("k // 2", "floor division (`//`) is not allowed"),
        ("k % 2 + 1", "the remainder operator (`%`) is not allowed"),
        ("k & z", "use `and`"),
        ("k ^ 2", "for powers write `**`"),
        ("~k", "the operator `~` is not allowed"),
        ("k is z", "`is` is not allowed"),
        ("k in z", "`in` is not allowed"),
        ("log + 1", "`log` is a function; call it"),
        ("k # note", "comments (`#`) are not allowed"),
        ("\uff4b + 1", "not in normal form; write it as `k`"),
        ("", "the expression is empty"),
        ("   ", "the expression is empty"),
    ],
)
def test_refusals_name_what_was_found(text: str, fragment: str) -> None:
    assert fragment in refuse(text)


def test_refusals_say_where() -> None:
    assert refuse("k + z.real").endswith("(at column 5)")
    assert "syntax error at column 4" in refuse("k +* 2")
    assert "syntax error at column 5: `(` was never closed" in refuse("k + (1")
    assert "(at line 2, column 2)" in refuse("(k +\n k.x)")


def test_refusals_of_non_strings() -> None:
    assert "must be a string" in refuse(3)  # type: ignore[arg-type]


HOSTILE = [
    "__import__('os').system('x')",
    "().__class__.__bases__",
    "k.real",
    "lambda: 1",
    "[1,2][0]",
    '"a"',
    'b"x"',
    'f"{k}"',
    "(x:=1)",
    "1 if k else 2",
    "(" * 10_000 + "1" + ")" * 10_000,
    "-" * 100_000 + "1",
    "1+" * 5000,
    "k(1)",
    "log(k, 2)",
    "min(k)",
    "1j",
    "True",
    'exec("x")',
    "k" * 1_000_000,
]
NESTING_BOMBS = [
    "(" * 10_000 + "1" + ")" * 10_000, "-" * 100_000 + "1", "- " * 50_000 + "1", "1+" * 5000, "not " * 10_000 + "1"
]


@pytest.mark.parametrize(
    ("text", "limits"),
    [(text, {}) for text in HOSTILE] + [(text, {"max_length": 10**6}) for text in NESTING_BOMBS],
    ids=[text[:24] for text in HOSTILE] + [f"long allowed: {text[:16]}" for text in NESTING_BOMBS],
)
def test_hostile_input_is_refused_quickly(text: str, limits: dict[str, int]) -> None:
    started = time.perf_counter()
    with pytest.raises(InvalidDocument) as info:
        parse(text, path=PATH, **limits)
    assert time.perf_counter() - started < 0.1
    assert [error["path"] for error in info.value.errors] == [PATH]
    assert str(info.value).startswith(f"{PATH}: ")


def test_tower_of_powers_is_accepted_and_is_inf_at_once() -> None:
    started = time.perf_counter()
    expr = parse("9**9**9**9", path=PATH)
    assert float(evaluate(expr, {})) == math.inf
    assert scalar_source(expr, {}) == "np.inf"
    assert time.perf_counter() - started < 0.1


def test_limits() -> None:
    assert (MAX_LENGTH, MAX_DEPTH, MAX_NODES) == (2000, 40, 500)
    assert "2001 characters long; at most 2000" in refuse("k" * 2001)
    assert "at most 10 are allowed" in refuse("k+k+k+k+k+k", max_length=10)
    parse("-" * 39 + "k", path=PATH)
    assert "nested more than 40 levels deep" in refuse("-" * 40 + "k")
    assert "nested more than 40 levels deep" in refuse("k**" * 45 + "k")
    assert "parentheses are nested more than 40 deep (at column 41)" in refuse("(" * 41 + "k" + ")" * 41)
    assert "nested more than 3 levels" in refuse("log(log(log(k)))", max_depth=3)
    # A long run of + or * is one level deep.
    assert value(" + ".join(["k"] * 200), k=1.0) == 200.0
    assert "more than 500 parts" in refuse(" + ".join(["k"] * 300))
    parse("k + k + k", path=PATH, max_nodes=5)
    assert "more than 5 parts" in refuse("k + k + k + k", max_nodes=5)
    with pytest.raises(ValueError):
        parse("k", path=PATH, max_depth=DEPTH_CEILING + 1)


def test_check_names() -> None:
    known = ["k", "z", "k_next", "alpha"]
    check_names(parse("k * z + alpha - k_next", path=PATH), known, path=PATH)
    with pytest.raises(InvalidDocument) as info:
        check_names(parse("kk + alpa + zz", path=PATH), known, path=PATH)
    assert info.value.errors == [
        {"path": PATH, "message": "unknown name `kk` (did you mean `k`?); known names are: k, z, k_next, alpha"},
        {"path": PATH, "message": "unknown name `alpa` (did you mean `alpha`?); known names are: k, z, k_next, alpha"},
        {"path": PATH, "message": "unknown name `zz` (did you mean `z`?); known names are: k, z, k_next, alpha"},
    ]
    with pytest.raises(InvalidDocument) as info:
        check_names(parse("capital", path=PATH), known, path=PATH)
    assert "did you mean" not in info.value.errors[0]["message"]
    with pytest.raises(InvalidDocument) as info:
        check_names(parse("k", path=PATH), [], path=PATH)
    assert info.value.errors[0]["message"] == "unknown name `k`; no names are defined here"


def test_generated_source_stays_within_pythons_nesting_limit() -> None:
    deep = "k"
    for _ in range(DEPTH_CEILING // 2 - 1):
        deep = f"min(1, 2, 3, {deep}) and 1"
    expr = parse(deep, path=PATH, max_depth=DEPTH_CEILING)
    compile(scalar_source(expr, {"k": "s0"}), "<scalar>", "eval")
    lines, _, _ = interval_source(expr, {"k": "lo"}, {"k": "hi"}, "b_")
    compile("\n".join(lines), "<interval>", "exec")
    wide = "k"
    for _ in range(MAX_DEPTH - 1):
        wide = f"min({', '.join(['1'] * 15)}, {wide})"
    assert "nested too deeply" in refuse(wide, max_length=10**5, max_nodes=1000)
