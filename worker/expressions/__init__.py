"""The expression language of grid models: parse, check, evaluate, write as source.

The package's modules, each one concern:

* :mod:`~worker.expressions.parser` — `parse` (text to a validated tree, the
  grammar and its limits) and `check_names`;
* :mod:`~worker.expressions.nodes` — the node classes of the tree,
  `Expression`, and the walks every consumer shares (`children`, `names_in`);
* :mod:`~worker.expressions.evaluator` — `evaluate`, with numpy;
* :mod:`~worker.expressions.scalar` — `scalar_source`, Python source of an
  expression for numba kernels;
* :mod:`~worker.expressions.intervals` — `interval_source`, numba source of
  sound interval bounds of an expression over a box;
* :mod:`~worker.expressions.interval_kernels` — the jitted helpers those
  bounds call.  It is the only part that imports numba, and nothing here
  imports it: the document checks and the feasibility check parse and
  evaluate expressions without loading the compiler.

Semantics
---------
Every value is float64, and both evaluators (`evaluate` with numpy,
`scalar_source` for numba kernels) implement the same rules:

* arithmetic and ``log exp sqrt abs`` follow IEEE 754 as numpy does, never
  raising: ``log(-1)`` is nan, ``1/0`` is inf, ``0**-1`` is inf, ``0/0`` is nan;
* ``x**y`` is C99 ``pow``: a negative base with an integral exponent is fine
  (``(-2)**3 == -8``), with any other exponent it gives nan;
  ``(-inf)**0.5 == inf`` and ``(-0.0)**0.5 == +0.0`` (numpy's own shortcut
  through ``sqrt`` is corrected);
* comparisons give 1.0 or 0.0 (any comparison with nan is false, except
  ``!=``);
* ``and``, ``or``, ``not`` and the condition of ``where`` treat any nonzero
  value as true, nan included, and ``and``/``or``/``not`` give 1.0 or 0.0;
* ``min`` and ``max`` propagate nan; ``clip(x, lo, hi)`` is
  ``min(max(x, lo), hi)`` (so ``hi`` wins when ``lo > hi``);
* sub-expressions made of numbers only are folded at parse time in float64
  (``9**9**9**9`` becomes inf at once).

The two evaluators agree bit for bit on ``+ - * /``, comparisons, logic,
``where``, ``min``, ``max``, ``abs``, ``clip``, ``sqrt`` and on ``**`` with
a constant exponent of 0, 0.5, 1, 2 or -1 (the tests pin this, signed zeros
included).  Otherwise ``log``, ``exp`` and ``**`` may differ in the last bits,
because numpy uses vectorised implementations of them while numba calls the
C library; the interval bounds allow for that.
"""

from worker.expressions.evaluator import evaluate
from worker.expressions.nodes import (
    FUNCTIONS,
    Arith,
    Call,
    Compare,
    Expression,
    Logic,
    Name,
    Negate,
    Node,
    Not,
    Number,
    Power,
    children,
    names_in,
)
from worker.expressions.parser import DEPTH_CEILING, MAX_DEPTH, MAX_LENGTH, MAX_NODES, check_names, parse
from worker.expressions.scalar import scalar_source

__all__ = [
    "DEPTH_CEILING",
    "FUNCTIONS",
    "MAX_DEPTH",
    "MAX_LENGTH",
    "MAX_NODES",
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
    "check_names",
    "children",
    "evaluate",
    "names_in",
    "parse",
    "scalar_source",
]
