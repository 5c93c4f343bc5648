"""The tree of a parsed expression, and the walks every consumer shares.

`Expression.tree` is made of the frozen node classes below, which the
evaluators and the code generators walk: `Number` (``value``), `Name`
(``id``), `Negate` and `Not` (``operand``), `Arith` (``first`` and ``rest``,
a tuple of ``(op, term)`` applied left to right, ops all from ``+ -`` or all
from ``* /``), `Power` (``base``, ``exponent``), `Compare` (``operands``,
``ops``), `Logic` (``op`` ``"and"``/``"or"``, ``operands``) and `Call`
(``function``, ``args``).  Unary ``+`` leaves no node; parts made of numbers
only are folded into one `Number` by the parser.

`children` and `names_in` are the one place that knows which fields of a
node hold sub-trees; every walk over a tree goes through them.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import TypeVar, Union

__all__ = [
    "FUNCTIONS",
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
    "children",
    "names_in",
    "pairwise",
]

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

    @classmethod
    def from_tree(cls, tree: Node) -> Expression:
        """An expression for a tree built by code rather than parsed (no text, no functions recorded)."""
        return cls(text="", tree=tree, names=frozenset(names_in(tree)), functions=frozenset())


def children(node: Node) -> tuple[Node, ...]:
    """The direct sub-trees of ``node``, in evaluation order (none for `Number` and `Name`)."""
    if isinstance(node, (Negate, Not)):
        return (node.operand,)
    if isinstance(node, Arith):
        return (node.first, *(term for _, term in node.rest))
    if isinstance(node, Power):
        return (node.base, node.exponent)
    if isinstance(node, (Compare, Logic)):
        return tuple(node.operands)
    if isinstance(node, Call):
        return tuple(node.args)
    return ()


def names_in(node: Node) -> set[str]:
    """Every name the tree ``node`` uses."""
    if isinstance(node, Name):
        return {node.id}
    found: set[str] = set()
    for child in children(node):
        found |= names_in(child)
    return found


_T = TypeVar("_T")


def pairwise(items: list[_T], combine: Callable[[_T, _T], _T]) -> _T:
    """Combine ``items`` as a balanced tree: every evaluator uses the same
    shape, and generated source stays shallow for long argument lists."""
    if len(items) == 1:
        return items[0]
    middle = len(items) // 2
    return combine(pairwise(items[:middle], combine), pairwise(items[middle:], combine))
