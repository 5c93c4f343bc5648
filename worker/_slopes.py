"""Derivatives of model expressions with respect to one choice, as expression trees.

The exact block search (``bellman_bnb`` in :mod:`worker._codegen.block_search`) proves
that a block of choices cannot beat the best one found.  Its first proof, an
interval bound of the reward plus the block maximum of the continuation,
cannot prune choices close to the optimum: there the objective is flat, and
the two parts are bounded separately.  Its second proof is a *slope* bound.
Along the last choice ``c`` (a ``next_of`` choice, so that choice ``j``
lands on grid point ``j``) the objective is ``f(j) = r(c_j) + β EV(j)``,
and for ``j`` to the right of an evaluated anchor ``p``

    f(j) − f(p) = Σ_{i=p}^{j−1} [r(c_{i+1}) − r(c_i)] + β [EV(i+1) − EV(i)],

where by the mean value theorem each reward difference lies in
``(c_{i+1} − c_i) · r'(ξ)`` for some ``ξ`` between the two grid values.  An
interval bound of the derivative ``r'`` over the block's hull and the exact
block maximum of the continuation's differences bound every step, and a
negative bound on every step proves the whole block below ``f(p)``.

This module writes ``r'`` as an expression tree (the node classes of
:mod:`worker.expressions.nodes`), to be bounded by ``interval_source`` like any
other expression.  Defines that depend on the choice get their own
derivative names, ``name + "'"`` (a prime never occurs in a document name).

Soundness
---------
The mean value theorem needs ``r`` continuous on the hull and differentiable
inside it, with the derivative the tree describes.  The rules guarantee it
wherever the interval bound of the tree is finite:

* ``log u`` gives ``u'/u`` and ``sqrt u`` gives ``u'/(2 sqrt u)``: a hull on
  which ``u`` reaches 0 makes the bound infinite, and since the anchor
  itself is finite, ``u`` cannot leave the domain without reaching 0;
* ``u**w`` with a constant ``w`` gives ``w u**(w−1) u'``, whose bound is
  infinite (or nan, hence full) wherever the power is not smooth; with a
  varying ``w`` it gives ``u**w (w' log u + w u'/u)``;
* ``abs``, ``min``, ``max`` and ``clip`` are Lipschitz and the rules give
  ``where(test, a', b')``, whose interval bound is the hull of both branches
  wherever the test is undecided, which contains the generalised gradient, so
  the (Lebourg) mean value inequality still holds;
* comparisons, logic and ``where`` whose test depends on the choice jump:
  :class:`NotSmooth` is raised and the caller writes no slope bound.

The bound of the tree encloses the computed derivative to within the
intervals' own slack; the kernel widens the final step bounds by a relative
``2**-40`` more, far above the rounding of these few operations.
"""

from __future__ import annotations

from collections.abc import Mapping

from worker.expressions import Arith, Call, Compare, Name, Negate, Node, Number, Power, names_in

__all__ = ["NotSmooth", "derivative", "prime"]

_ZERO = Number(0.0)
_ONE = Number(1.0)


class NotSmooth(Exception):
    """The expression may jump as the choice moves (a comparison, logic, or a varying ``where`` test)."""


def prime(name: str) -> str:
    """The tree name of the derivative of define ``name``."""
    return name + "'"


def _zero(node: Node) -> bool:
    return isinstance(node, Number) and node.value == 0.0


def _one(node: Node) -> bool:
    return isinstance(node, Number) and node.value == 1.0


def _neg(node: Node) -> Node:
    if isinstance(node, Number):
        return Number(-node.value)
    if isinstance(node, Negate):
        return node.operand
    return Negate(node)


def _sum(terms: list[tuple[str, Node]]) -> Node:
    """``± t1 ± t2 ...`` with zero terms left out."""
    kept = [(sign, term) for sign, term in terms if not _zero(term)]
    if not kept:
        return _ZERO
    sign, first = kept[0]
    head = first if sign == "+" else _neg(first)
    if len(kept) == 1:
        return head
    return Arith(head, tuple(kept[1:]))


def _product(*factors: Node) -> Node:
    """``f1 * f2 * ...`` with ones left out, zero when any factor is zero."""
    if any(_zero(f) for f in factors):
        return _ZERO
    kept = [f for f in factors if not _one(f)]
    if not kept:
        return _ONE
    if len(kept) == 1:
        return kept[0]
    return Arith(kept[0], tuple(("*", f) for f in kept[1:]))


def _quotient(top: Node, bottom: Node) -> Node:
    if _zero(top):
        return _ZERO
    if _one(bottom):
        return top
    return Arith(top, (("/", bottom),))


def derivative(node: Node, choice: str, varying: Mapping[str, bool]) -> Node:
    """The derivative of ``node`` with respect to the name ``choice``.

    ``varying`` names the defines that depend on the choice (their
    derivatives are the names :func:`prime` gives); every other name is
    constant.  Raises :class:`NotSmooth` for parts that may jump.
    """
    return _Deriver(choice, varying).of(node)


class _Deriver:
    def __init__(self, choice: str, varying: Mapping[str, bool]) -> None:
        self.choice = choice
        self.varying = varying

    def moves(self, node: Node) -> bool:
        return any(name == self.choice or name in self.varying for name in names_in(node))

    def of(self, node: Node) -> Node:
        if not self.moves(node):
            return _ZERO
        if isinstance(node, Name):
            return _ONE if node.id == self.choice else Name(prime(node.id))
        if isinstance(node, Negate):
            return _neg(self.of(node.operand))
        if isinstance(node, Arith):
            return self.arith(node)
        if isinstance(node, Power):
            return self.power(node)
        if isinstance(node, Call):
            return self.call(node)
        raise NotSmooth("a comparison or logic that depends on the choice")

    def arith(self, node: Arith) -> Node:
        if node.rest[0][0] in "+-":
            return _sum([("+", self.of(node.first))] + [(op, self.of(term)) for op, term in node.rest])
        # Products and quotients left to right: d(P*t) = dP*t + P*dt, d(P/t) = (dP - (P/t)*dt)/t.
        value: Node = node.first
        slope = self.of(node.first)
        for op, term in node.rest:
            d_term = self.of(term)
            if op == "*":
                slope = _sum([("+", _product(slope, term)), ("+", _product(value, d_term))])
            else:
                ratio = Arith(value, (("/", term),))
                slope = _quotient(_sum([("+", slope), ("-", _product(ratio, d_term))]), term)
            value = Arith(value, ((op, term),))
        return slope

    def power(self, node: Power) -> Node:
        base, exponent = node.base, node.exponent
        d_base = self.of(base)
        if not self.moves(exponent):
            if isinstance(exponent, Number):
                lowered: Node = Number(exponent.value - 1.0)
                if _one(lowered):
                    reduced = base
                elif _zero(lowered):
                    reduced = _ONE
                else:
                    reduced = Power(base, lowered)
            else:
                reduced = Power(base, Arith(exponent, (("-", _ONE),)))
            return _product(exponent, reduced, d_base)
        d_exponent = self.of(exponent)
        inner = _sum(
            [("+", _product(d_exponent, Call("log", (base,)))), ("+", _quotient(_product(exponent, d_base), base))]
        )
        return _product(node, inner)

    def call(self, node: Call) -> Node:
        name, args = node.function, node.args
        if name == "log":
            return _quotient(self.of(args[0]), args[0])
        if name == "exp":
            return _product(node, self.of(args[0]))
        if name == "sqrt":
            return _quotient(self.of(args[0]), _product(Number(2.0), node))
        if name == "abs":
            sign = Call("where", (Compare((args[0], _ZERO), (">",)), _ONE, Number(-1.0)))
            return _product(sign, self.of(args[0]))
        if name in ("min", "max"):
            return self.extreme(name, list(args))
        if name == "clip":
            low = Call("max", (args[0], args[1]))
            return self.extreme("min", [low, args[2]])
        if name == "where":
            if self.moves(args[0]):
                raise NotSmooth("a where() whose test depends on the choice")
            return Call("where", (args[0], self.of(args[1]), self.of(args[2])))
        raise NotSmooth(f"no derivative rule for {name}()")

    def extreme(self, name: str, args: list[Node]) -> Node:
        """``min``/``max`` folded pairwise: the derivative of the winner, the hull of both at a tie."""
        value, slope = args[0], self.of(args[0])
        test = "<" if name == "min" else ">"
        for arg in args[1:]:
            d_arg = self.of(arg)
            if _zero(slope) and _zero(d_arg):
                slope = _ZERO
            else:
                slope = Call("where", (Compare((value, arg), (test,)), slope, d_arg))
            value = Call(name, (value, arg))
        return slope
