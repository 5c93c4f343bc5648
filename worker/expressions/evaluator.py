"""The numpy evaluator of expressions: `evaluate` broadcasts arrays of values.

It follows the semantics listed in the package docstring
(:mod:`worker.expressions`); the numba source of `worker.expressions.scalar`
follows the same rules, and the tests pin where the two agree bit for bit.
Temporaries are reused where a ufunc can write into an operand it owns, so a
long expression over large arrays allocates little.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Union

import numpy as np

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

__all__ = ["evaluate", "evaluate_tree"]

_ARITH_UFUNCS = {"+": np.add, "-": np.subtract, "*": np.multiply, "/": np.divide}
_COMPARE_UFUNCS = {
    "<": np.less, "<=": np.less_equal, ">": np.greater, ">=": np.greater_equal,
    "==": np.equal, "!=": np.not_equal,
}
_UNARY_UFUNCS = {"log": np.log, "exp": np.exp, "sqrt": np.sqrt, "abs": np.abs}

_Value = Union[np.ndarray, float]


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
    return evaluate_tree(expr.tree, env)


def evaluate_tree(tree: Node, env: Mapping[str, float | np.ndarray]) -> np.ndarray:
    """`evaluate` of a bare tree (the parser folds constant parts with it)."""
    with np.errstate(all="ignore"):
        value, owned = _eval(tree, env)
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
        return pairwise(args, _minimum)
    if node.function == "max":
        return pairwise(args, _maximum)
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
