"""The limits and fixed values of the problem document, each with its unit.

Every size a document may ask for is capped here, so that validation costs
the same whatever the document claims; the estimator in ``worker.estimate``
judges the work the accepted sizes imply.  The defaults of a solve live in
:mod:`worker.defaults`; the two below are used only by the document.
"""

from __future__ import annotations

from worker.expressions import MAX_LENGTH as _EXPRESSION_LENGTH

DOCUMENT_VERSION = 1
"""The only ``version`` this package reads."""

MAX_DEPTH = 64
"""Deepest nesting of lists and objects in a document (levels)."""

MAX_KEYS = 1_000
"""Most keys in any one object of a document (count; the largest are params and define)."""

MAX_POINTS = 10_000_000
"""Most points on one grid axis, chain, menu or tabular label list (count)."""

MAX_CHAIN_POINTS = 2_000
"""Most values of one shock drawn before the choice (count): its chain is a dense matrix of that many rows and
columns (32 MB at 2,000), built when a document is admitted (Rouwenhorst's in 0.5 s at 2,000 values, measured).
Before 2026-12-05 only ``MAX_POINTS`` applied: an iid shock of 20,000 values took the API 6.6 s and 3.2 GB of
memory to admit, and an AR(1) of 3,000 Rouwenhorst points 58 s (the chain built by a recursion whose cost grew
as the cube of the points)."""

MAX_ARRAY_ELEMENTS = 100_000_000
"""Most elements in one numeric array (count; 800 MB as float64)."""

MAX_EXPRESSION_CHARS = _EXPRESSION_LENGTH
"""Longest expression (characters)."""

MAX_AXES = 16
"""Most states, shocks or choices in a grid model (count of each)."""

MAX_ENTRIES = MAX_KEYS
"""Most params, defines or feasible expressions in a grid model (count of each)."""

MAX_EVALUATION_STEPS = 100_000
"""Most evaluation steps in one evaluation phase of Howard's method (count)."""

MAX_ITERATIONS = 10_000_000
"""Largest accepted ``max_iterations`` (count)."""

MAX_SIMULATION_PERIODS = 100_000
"""Most periods in one simulated path (count)."""

MAX_SIMULATION_PATHS = 100_000
"""Most simulated paths (count)."""

MAX_SIMULATION_DRAWS = 10_000_000
"""Most periods × paths in one simulation (count)."""

MAX_LABEL_CHARS = 200
"""Longest document label or tabular state/action label (characters)."""

MAX_NAME_CHARS = 64
"""Longest name of a parameter, state, shock, choice or define (characters)."""

MAX_TAGS = 32
"""Most tags on a document (count)."""

MAX_URL_CHARS = 2_048
"""Longest ``notify.url`` (characters)."""

MAX_SECRET_CHARS = 256
"""Longest ``notify.secret`` (characters)."""

MAX_REPORTED = 100
"""Most faults in one error (count); more are summed up in a last fault."""

MAX_LISTED = 10
"""Faults listed per vectorised check (count); the rest are summed up in one more fault."""

CANONICAL_INLINE_ELEMENTS = 4_096
"""Arrays up to this many elements appear as nested lists in the canonical
form and in dumps of a validated document, larger ones packed (count)."""

ROW_SUM_TOLERANCE = 1e-9
"""How far a probability row's sum may be from 1 (absolute, dimensionless)."""

DEFAULT_WIDTH = 3.0
"""Tauchen grid half-width (unconditional standard deviations; common practice)."""

CONTINUOUS_SCAN_POINTS = 101
"""Points of the scan that starts the search of a continuous choice given by min and max when no
hint applies (count; a next_of choice scans its state's grid)."""

DEFAULT_EXPONENT = 2.0
"""Exponent of ``power`` spacing (dimensionless)."""
