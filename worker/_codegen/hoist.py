"""Moving the parts of an expression that do not vary out of a loop, unchanged to the bit."""

from __future__ import annotations

from worker import expressions
from worker._codegen.layout import ModelSource
from worker.expressions import Expression, names_in

__all__ = ["Hoister", "dependents"]


class Hoister:
    """Moves the parts of expressions that do not depend on ``varying`` names out, as named values.

    Each such part (a maximal sub-tree, or the leading part of a
    left-to-right run of ``+ -`` or ``* /``) becomes one assignment in
    ``lines``, computed by the same operations in the same order as the
    whole expression would, so the result is bit-for-bit unchanged.  Used
    twice: parts that do not depend on any choice are computed once per state
    instead of once per choice, and inside a block bound, parts that do not
    depend on the blocked choice are single points, whose bounds are exact.

    The tree gets ``Name`` nodes whose ids start with ``@`` (never a document
    name) and ``names`` maps them to the variables assigned in ``lines``.
    """

    def __init__(self, varying: set[str], names: dict[str, str], lines: list[str], prefix: str) -> None:
        self.varying = varying
        self.names = names
        self.lines = lines
        self.prefix = prefix
        self.count = 0

    def point(self, node: expressions.Node) -> expressions.Node:
        if isinstance(node, (expressions.Number, expressions.Name)):
            return node
        variable = f"{self.prefix}{self.count}"
        self.count += 1
        self.lines.append(f"{variable} = {expressions.scalar_source(Expression.from_tree(node), self.names)}")
        self.names[f"@{variable}"] = variable
        return expressions.Name(f"@{variable}")

    def rewrite(self, node: expressions.Node) -> expressions.Node:
        E = expressions
        if not (names_in(node) & self.varying):
            return self.point(node)
        if isinstance(node, E.Arith):
            terms = [node.first, *(term for _, term in node.rest)]
            lead = 0
            while lead < len(terms) and not (names_in(terms[lead]) & self.varying):
                lead += 1
            if lead >= 2:
                first = self.point(E.Arith(node.first, node.rest[: lead - 1]))
                rest = node.rest[lead - 1 :]
            else:
                first = self.rewrite(node.first)
                rest = node.rest
            return E.Arith(first, tuple((op, self.rewrite(term)) for op, term in rest))
        if isinstance(node, E.Negate):
            return E.Negate(self.rewrite(node.operand))
        if isinstance(node, E.Not):
            return E.Not(self.rewrite(node.operand))
        if isinstance(node, E.Power):
            return E.Power(self.rewrite(node.base), self.rewrite(node.exponent))
        if isinstance(node, E.Compare):
            return E.Compare(tuple(self.rewrite(x) for x in node.operands), node.ops)
        if isinstance(node, E.Logic):
            return E.Logic(node.op, tuple(self.rewrite(x) for x in node.operands))
        if isinstance(node, E.Call):
            return E.Call(node.function, tuple(self.rewrite(x) for x in node.args))
        return node


def dependents(model: ModelSource, roots: set[str]) -> set[str]:
    """``roots`` and every define that depends on them, directly or through earlier defines."""
    found = set(roots)
    for name, expr in model.defines:
        if expr.names & found:
            found.add(name)
    return found
