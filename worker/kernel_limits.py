"""How large a grid model's generated kernels may be, and what compiling them costs.

Every grid model compiles to kernels generated for its structure
(:mod:`worker._codegen`): each interpolation corner of tomorrow's state is
written out, each feasibility condition nests one block, and each evaluation
site repeats the model's expressions.  Compile time and memory grow with
all three, so :func:`check_structure` refuses structures over the limits
below at the door (``service.admission``) and before every solve
(``worker.solve``), and :func:`compile_bytes` sizes the memory of the first compile of a
structure for the estimate (its time: :mod:`worker.compile_seconds`).  The limits were measured on this machine
(2-core x86, cold kernel cache); each constant says how.  Nothing here builds
a grid or imports numba.
"""

from __future__ import annotations

import ast
import functools
from typing import Any

from worker.errors import TooLarge

__all__ = [
    "MAX_EXPRESSION_NODES",
    "MAX_FEASIBLE_CONDITIONS",
    "MAX_INTERPOLATION_CORNERS",
    "check_structure",
    "compile_bytes",
    "expression_nodes",
    "interpolation_corners",
]

MAX_INTERPOLATION_CORNERS = 64
"""Most interpolation corners (``2 ** state variables moved by a next expression``) a grid model may have (count).

Every kernel is generated with each corner written out, so compile time and memory grow with them; measured
on this machine (2-core x86, cold kernel cache, state variables of 2 points): 8 corners compile in 2 s with 40 MiB more
data, 64 in 10–14 s with 100 MiB, 128 in 27 s with 215 MiB more resident memory, 256 in more than 55 s with
more than 800 MiB, and 4,096 grew past 7 GB before failing.  Structures over the limit are refused."""
MAX_FEASIBLE_CONDITIONS = 32
"""Most feasibility conditions of a grid model (count): each nests one more block in the generated kernels, and
Python refuses source nested deeper than 100 levels (measured on this machine: a one-choice hinted model with 45
conditions compiled in 7 s, with 50 its kernels could not be read)."""
MAX_EXPRESSION_NODES = 1_000
"""Most parts (numbers, names, operators, calls) of all of a grid model's expressions together (count).

Each evaluation site of the generated kernels repeats them, and the exact search adds their interval form;
measured on this machine (cold kernel cache, hinted, one state variable): 135 parts compiled in 7 s, 500 in
15 s with 100 MiB more resident memory, 750 in 18 s with 140 MiB, 1,500 in 51 s with 310 MiB."""
COMPILE_NODE_BYTES = 200 * 2**10
"""Compile memory per part of the model's expressions (bytes, 200 KiB; measured on this machine)."""
COMPILE_BASE_BYTES = 32 * 2**20
COMPILE_CORNER_BYTES = 3 * 2**19
"""Memory a cold compile adds: ``COMPILE_BASE_BYTES`` (32 MiB) plus this (1.5 MiB) per interpolation corner
(bytes; measured on this machine, see ``MAX_INTERPOLATION_CORNERS``).  It is reported apart from ``bytes`` (the
solve's arrays) and covered by the margin of the per-job memory limit (:mod:`worker.memory`)."""


def interpolation_corners(model: Any) -> int:
    """Corners of the interpolation of tomorrow's state: ``2 ** state variables moved by a next expression``."""
    return 2 ** sum(1 for name in model.states if name in model.next)


def expression_nodes(model: Any) -> dict[str, int]:
    """Parts (numbers, names, operators, calls) of a grid model's expressions, by field of ``model``.

    Counted on Python's syntax tree of each expression (the grammar is a subset of Python's), which the
    kernels' generated source repeats at each evaluation site and in interval form.
    """
    sections = {
        "define": list(model.define.values()),
        "feasible": list(model.feasible),
        "reward": [model.reward],
        "next": list(model.next.values()),
    }
    return {section: sum(_parts(str(text)) for text in texts) for section, texts in sections.items()}


@functools.lru_cache(maxsize=4096)
def _parts(text: str) -> int:
    """Parts of one expression's syntax tree (0 when it cannot be read: validation has refused it already);
    kept by text, since a solve counts each expression more than once."""
    try:
        tree = ast.parse(text.strip(), mode="eval")
    except (SyntaxError, ValueError, RecursionError, MemoryError):
        return 0
    return sum(1 for node in ast.walk(tree) if isinstance(node, ast.expr))


def check_structure(doc: Any) -> None:
    """Refuse a grid model whose generated kernels would be too large to compile.

    Raises
    ------
    TooLarge
        At ``model.next`` over ``MAX_INTERPOLATION_CORNERS`` corners, at
        ``model.feasible`` over ``MAX_FEASIBLE_CONDITIONS`` conditions, and at
        the field with most parts over ``MAX_EXPRESSION_NODES`` parts in all.
    """
    model = doc.model
    if model.kind != "grid":
        return
    corners = interpolation_corners(model)
    if corners > MAX_INTERPOLATION_CORNERS:
        moved = sum(1 for name in model.states if name in model.next)
        most = MAX_INTERPOLATION_CORNERS.bit_length() - 1
        raise TooLarge.at(
            "model.next",
            f"{moved} state variables move by a next expression, so tomorrow's value is split over 2^{moved} = "
            f"{corners:,} grid points at every (point, choice point) pair; the compiled kernels allow at most "
            f"{MAX_INTERPOLATION_CORNERS} (at most {most} state variables with a next expression): move some by "
            "a choice with next_of instead, or merge state variables",
            corners=corners,
            max_corners=MAX_INTERPOLATION_CORNERS,
        )
    conditions = len(model.feasible)
    if conditions > MAX_FEASIBLE_CONDITIONS:
        raise TooLarge.at(
            "model.feasible",
            f"the model has {conditions} feasibility conditions; the compiled kernels allow at most "
            f"{MAX_FEASIBLE_CONDITIONS}: combine conditions with `and` into fewer expressions",
            conditions=conditions,
            max_conditions=MAX_FEASIBLE_CONDITIONS,
        )
    nodes = expression_nodes(model)
    total = sum(nodes.values())
    if total > MAX_EXPRESSION_NODES:
        largest = max(nodes, key=lambda section: nodes[section])
        raise TooLarge.at(
            f"model.{largest}",
            f"the model's expressions have {total:,} parts (numbers, names, operators, calls), {nodes[largest]:,} "
            f"of them in {largest}; the compiled kernels allow at most {MAX_EXPRESSION_NODES:,} in all: simplify "
            "the expressions, or compute a long chain of defines as params",
            nodes=total,
            max_nodes=MAX_EXPRESSION_NODES,
        )


def compile_bytes(model: Any) -> int:
    """Memory the first compile of a grid model's structure on a machine adds (bytes; then cached).  Its time is
    counted kernel by kernel in :mod:`worker.compile_seconds`."""
    corners = interpolation_corners(model)
    parts = sum(expression_nodes(model).values())
    return COMPILE_BASE_BYTES + COMPILE_CORNER_BYTES * corners + COMPILE_NODE_BYTES * parts
