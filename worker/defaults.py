"""Every default of a solve, in one place, each with its unit.

The problem document's schema shows these as its defaults and the solvers
fall back on them, so the two can never disagree.  Settings of a deployment
(``FIXQ_*`` environment variables) are not defaults of a document: the
service's live in :mod:`service.settings`, the worker's in
:mod:`worker.environment`.
"""

from __future__ import annotations

DEFAULT_TOLERANCE = 1e-6
"""Target certified sup-norm error of the value function (units of the value function)."""

DEFAULT_EVALUATION_STEPS = 50
"""Howard's method: the base number of policy-evaluation steps per evaluation phase (count;
common practice is tens).  The phase runs a fifth of it while the policy still changes and up
to twenty times it once an iteration changes nothing."""

DEFAULT_MAX_ITERATIONS = 100_000
"""Iterations before a solve stops with status ``max_iterations`` (count).

Plain value iteration at β = 0.999 needs about log(1e-6) / log(0.999) ≈ 14,000
iterations to shrink an error a millionfold, so this leaves room for that."""

DEFAULT_CHECKPOINT_S = 30.0
"""Seconds of solving between two checkpoint saves."""
