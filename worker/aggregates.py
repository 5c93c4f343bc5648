"""Conditions of a search: expressions over params and aggregates of the stationary distribution.

A condition is an expression of the language of :mod:`worker.expressions` in which four calls are also
allowed, and only here:

* ``mean(x)`` and ``sd(x)``: the mean and standard deviation of ``x`` under the stationary distribution;
* ``quantile(x, q)``: the smallest value ``v`` of ``x`` with ``P(x <= v) >= q`` (``q`` a number in [0, 1]);
* ``mass(condition)``: the probability that ``condition`` holds (is nonzero).

``x`` and ``condition`` are expressions of params, states, shocks, choices and defines, evaluated at every
point of the grid with the chosen choice there.  With taste shocks the choice at a point is random: an argument
that uses a choice, or a define that depends on one, is evaluated at every (point, combination of the choices)
pair, weighted by π(x)·P(c|x) (:func:`worker.search_aggregates.aggregate_values`, over the pairs of the
stationary report's moments, :func:`worker.taste_moments.pair_env`); an argument of params, states and shocks
alone at the points, which is the same (the probabilities at a point sum to 1).

The calls are cut out of the text (Python's own ``ast``, then ``ast.unparse``) and replaced by names of their
own, so the rest of the condition, and each argument, goes through the unchanged
:func:`worker.expressions.parse`; no other expression of a document can use them.
"""

from __future__ import annotations

import ast
from dataclasses import dataclass
from typing import Any

import numpy as np

from worker.errors import InvalidDocument, join_path
from worker.expressions import Expression, evaluate, parse

__all__ = ["AGGREGATES", "DISCOUNT", "Aggregate", "Condition", "aggregate_value", "define_series", "defines_env",
           "parse_condition", "point_env", "point_values"]

DISCOUNT = "discount"
"""The name by which a search's unknown or condition means the document's discount factor."""
AGGREGATES = {"mean": 1, "sd": 1, "quantile": 2, "mass": 1}
"""The aggregate calls of a condition and how many arguments each takes."""


@dataclass(frozen=True)
class Aggregate:
    """One aggregate call: ``kind`` (a key of `AGGREGATES`), its argument, and ``q`` for a quantile."""

    kind: str
    argument: Expression
    q: float | None = None


@dataclass(frozen=True)
class Condition:
    """A parsed condition: ``outer`` uses params and the names in ``aggregates`` (placeholder → call)."""

    text: str
    outer: Expression
    aggregates: dict[str, Aggregate]

    def point_names(self) -> set[str]:
        """Names the aggregates' arguments use."""
        names: set[str] = set()
        for aggregate in self.aggregates.values():
            names |= set(aggregate.argument.names)
        return names


def parse_condition(text: str, *, path: str, reserved: set[str] = frozenset()) -> Condition:
    """Parse one condition; ``reserved`` are the document's names, which placeholders must avoid.

    Raises
    ------
    InvalidDocument
        With ``path``: a syntax error, an aggregate with the wrong arguments, an aggregate inside another,
        or anything the expression language refuses.
    """
    try:
        tree = ast.parse(text.strip(), mode="eval")
    except SyntaxError as exc:
        raise InvalidDocument.at(path, f"not a valid expression: {exc.msg}") from None
    found: dict[str, Aggregate] = {}

    class _Cut(ast.NodeTransformer):
        def visit_Call(self, node: ast.Call) -> Any:
            name = node.func.id if isinstance(node.func, ast.Name) else None
            if name not in AGGREGATES:
                return self.generic_visit(node)
            arity = AGGREGATES[name]
            if len(node.args) != arity or node.keywords:
                shape = "(x, q)" if name == "quantile" else "(condition)" if name == "mass" else "(x)"
                raise InvalidDocument.at(path, f"`{name}` takes {arity} argument{'s' * (arity > 1)}: {name}{shape}")
            for inner in ast.walk(node):
                if inner is not node and isinstance(inner, ast.Call) and getattr(inner.func, "id", None) in AGGREGATES:
                    raise InvalidDocument.at(path, f"`{inner.func.id}` inside `{name}`: aggregates do not nest")
            argument = parse(ast.unparse(node.args[0]), path=path)
            q = None
            if name == "quantile":
                q_expr = parse(ast.unparse(node.args[1]), path=path)
                if q_expr.names:
                    raise InvalidDocument.at(path, "the level q of quantile(x, q) must be a number")
                q = float(evaluate(q_expr, {}))
                if not 0.0 <= q <= 1.0:
                    raise InvalidDocument.at(path, f"the level q of quantile(x, q) must lie in [0, 1], got {q:g}")
            placeholder = _placeholder(len(found), reserved)
            found[placeholder] = Aggregate(name, argument, q)
            return ast.copy_location(ast.Name(id=placeholder, ctx=ast.Load()), node)

    cut = _Cut().visit(tree)
    outer = parse(ast.unparse(cut), path=path)
    return Condition(text, outer, found)


def _placeholder(k: int, reserved: set[str]) -> str:
    name = f"_aggregate{k}"
    while name in reserved:
        name += "_"
    return name


def point_values(expr: Expression, env: dict[str, Any], n: int) -> np.ndarray:
    """``expr`` at every point of the grid, shape ``(n,)`` (constants broadcast)."""
    return np.broadcast_to(np.asarray(evaluate(expr, env), dtype=np.float64), (n,))


def aggregate_value(aggregate: Aggregate, pi: np.ndarray, env: dict[str, Any]) -> float:
    """The aggregate under the distribution ``pi`` (n,), with ``env`` holding every name its argument uses."""
    values = point_values(aggregate.argument, env, pi.size)
    # Over the points with mass only, as the stationary report's means: an argument may be undefined where no
    # one is (log(a) at a borrowing limit nobody reaches), and 0 x inf made the whole aggregate NaN.
    held = pi > 0
    values, pi = values[held], pi[held]
    if aggregate.kind == "mass":
        return float(pi @ (values != 0.0))
    mean = float(pi @ values)
    if aggregate.kind == "mean":
        return mean
    if aggregate.kind == "sd":
        return float(np.sqrt(max(pi @ (values - mean) ** 2, 0.0)))
    order = np.argsort(values, kind="stable")
    cumulative = np.cumsum(pi[order])
    # Rounding may leave the total a hair under 1: q = 1 then still names the largest value.
    at = int(np.searchsorted(cumulative, aggregate.q * cumulative[-1], side="left"))
    return float(values[order][min(at, values.size - 1)])


def point_env(doc: Any, problem: Any, policy: np.ndarray) -> dict[str, Any]:
    """Every name an aggregate may use, at every point of the grid: params, discount, states, shocks,
    choices (chosen there) and the defines that can be evaluated from them (not those of a draw revealed
    after the choice)."""
    return defines_env(doc, {**problem.state_values(), **problem.choice_values(policy)})


def defines_env(doc: Any, values: dict[str, Any]) -> dict[str, Any]:
    """Params, discount, ``values`` (states, shocks and choices, arrays of one length) and the defines that can
    be evaluated from them (not those of a draw revealed after the choice)."""
    env: dict[str, Any] = {name: float(value) for name, value in doc.model.params.items()}
    env[DISCOUNT] = float(doc.discount)
    env.update(values)
    for name, text in doc.model.define.items():
        expr = parse(text, path=join_path("model.define", name))
        if expr.names <= env.keys():
            env[name] = evaluate(expr, env)
    return env


def define_series(doc: Any, problem: Any, policy: np.ndarray) -> dict[str, np.ndarray]:
    """Each define of a grid model that can be evaluated at every point under ``policy`` (see `point_env`),
    as an ``(n,)`` array; empty for models without defines."""
    defines = getattr(doc.model, "define", None)
    if not defines:
        return {}
    env = point_env(doc, problem, policy)
    n = int(np.prod(problem.shape))
    return {name: np.array(np.broadcast_to(np.asarray(env[name], dtype=np.float64), (n,)))
            for name in defines if name in env}
