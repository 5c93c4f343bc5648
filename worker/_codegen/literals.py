"""Numbers written in a model's expressions, moved out of the generated source into the params vector.

A generated module is named by the hash of its text, so a number written
into the text would make every value of it a new module: ``reward + 1e-9``,
``+ 2e-9``, … would each be compiled and cached on their own.  `lift_literals`
replaces the numbers of a model's expressions by names that the writer maps
to extra entries of the params vector (after the document's params, in the
order the expressions are walked), so such documents share one module and
pass their numbers at run time, like params.

The results are the same bits as with the number in the source: numba
compiles ``+ - * /``, comparisons and the functions with the number as an
operand either way, and LLVM folds a constant operand only where the result
is exactly the same.  The exceptions are calls of ``pow``, which LLVM
rewrites for some constants into other functions that may differ from
``pow`` in the last bit (``x**0.5`` into ``sqrt``, ``2**x`` into ``exp2``).
Those numbers stay in the source, as part of the structure (a bounded set of
values, so a bounded number of modules):

* an exponent that is a multiple of 0.5 in ``[-8, 8]`` (``x**2``, ``x**-1``,
  ``x**0.5``, ``x**3``, …);
* a base that is a power of two or the reciprocal of one (``1``, ``2``,
  ``0.5``, …, and the numbers whose reciprocal rounds to one), ``10`` or
  ``e``;
* numbers that are not finite (``inf`` and ``nan`` from folded parts such as
  ``1/0``), whose interval bounds are written specially.

Every other exponent is computed by ``pow`` at run time, as it was in the
source (:func:`worker.expressions.scalar.scalar_source` writes no fast path
for a lifted name).
"""

from __future__ import annotations

import functools
import math

import numpy as np

from worker import expressions
from worker._codegen.layout import ModelSource
from worker.expressions import Expression
from worker.expressions.scalar import LITERAL_PREFIX

__all__ = ["EXPONENT_LIMIT", "kernel_params", "lift_literals", "structural"]

EXPONENT_LIMIT = 8.0
"""Exponents that are multiples of 0.5 within ``±EXPONENT_LIMIT`` stay in the source (see the module docstring)."""


def _power_of_two(value: float) -> bool:
    return value > 0.0 and math.frexp(value)[0] == 0.5


def structural(value: float, role: str = "") -> bool:
    """Whether a number stays written in the source: ``role`` is ``"exponent"`` or ``"base"`` of a
    power, or ``""`` for any other operand."""
    if not math.isfinite(value):
        return True
    if role == "exponent":
        return abs(value) <= EXPONENT_LIMIT and (2.0 * value).is_integer()
    if role == "base":
        if value <= 0.0:
            return False
        # Python's division rounds to nearest, as LLVM's folding of the reciprocal does.
        return _power_of_two(value) or _power_of_two(1.0 / value) or value in (10.0, math.e)
    return False


def lift_literals(model: ModelSource) -> tuple[ModelSource, tuple[float, ...]]:
    """The model with its non-structural numbers replaced by extra params, and their values.

    The numbers become names ``LITERAL_PREFIX + k`` appended to
    ``model.params`` in the order the walk meets them (defines, reward,
    feasibility, ``next``; each tree depth first), one per occurrence, so the
    returned model depends on where numbers are written, never on their
    values (except the `structural` ones).

    The answer for a model whose expressions were all parsed from text is kept (the last 64 such models):
    every solve lifts its model again, about 0.1 ms for a small one.  Such a model equals another only with
    the same texts, hence the same trees, so a kept answer is the one lifting would give (a tree built by code
    has no text, and its numbers compare by value: ``-0.0`` equals ``0.0``; those are lifted each time).
    """
    if all(expr.text for expr in (model.reward, *model.feasible, *(e for _, e in model.defines),
                                  *(e for _, e in model.next))):
        return _lift_parsed(model)
    return _lift(model)


@functools.lru_cache(maxsize=64)
def _lift_parsed(model: ModelSource) -> tuple[ModelSource, tuple[float, ...]]:
    return _lift(model)


def _lift(model: ModelSource) -> tuple[ModelSource, tuple[float, ...]]:
    values: list[float] = []

    def walk(node: expressions.Node, role: str = "") -> expressions.Node:
        E = expressions
        if isinstance(node, E.Number):
            if structural(node.value, role):
                return node
            values.append(node.value)
            return E.Name(f"{LITERAL_PREFIX}{len(values) - 1}")
        if isinstance(node, E.Name):
            return node
        if isinstance(node, E.Arith):
            return E.Arith(walk(node.first), tuple((op, walk(term)) for op, term in node.rest))
        if isinstance(node, E.Negate):
            return E.Negate(walk(node.operand))
        if isinstance(node, E.Not):
            return E.Not(walk(node.operand))
        if isinstance(node, E.Power):
            return E.Power(walk(node.base, "base"), walk(node.exponent, "exponent"))
        if isinstance(node, E.Compare):
            return E.Compare(tuple(walk(x) for x in node.operands), node.ops)
        if isinstance(node, E.Logic):
            return E.Logic(node.op, tuple(walk(x) for x in node.operands))
        return E.Call(node.function, tuple(walk(x) for x in node.args))

    def lifted(expr: Expression) -> Expression:
        return Expression.from_tree(walk(expr.tree))

    defines = tuple((name, lifted(expr)) for name, expr in model.defines)
    reward = lifted(model.reward)
    feasible = tuple(lifted(expr) for expr in model.feasible)
    nexts = tuple((t, lifted(expr)) for t, expr in model.next)
    names = tuple(f"{LITERAL_PREFIX}{k}" for k in range(len(values)))
    out = ModelSource(
        params=model.params + names,
        states=model.states,
        shocks=model.shocks,
        choices=model.choices,
        defines=defines,
        reward=reward,
        feasible=feasible,
        next=nexts,
    )
    return out, tuple(values)


def kernel_params(param_values: np.ndarray, literals: tuple[float, ...]) -> np.ndarray:
    """The params vector the kernels take: the document's params, then the lifted numbers."""
    return np.concatenate([np.asarray(param_values, dtype=np.float64), np.array(literals, dtype=np.float64)])
