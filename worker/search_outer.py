"""One unknown: a root of a residual inside its bracket, found from the document's own value first.

:func:`find_root` is the outer method of a search with one unknown (:mod:`worker.search`).  A bracketing
method started from the bracket's ends spends its first trials on the ends, which are often the most
expensive solves (an interest rate at the top of its bracket) and the least informative (their residuals
only give signs), and then on interpolation steps between two far-apart values that a curved residual makes
poor (it falls back to bisection).  Calibrators usually give the unknown a sensible value in the document,
so the search starts there instead:

1. the residual at the document's value ``start`` (the bracket's midpoint when it lies outside), then at a
   probe ``PROBE_SHARE`` of the bracket's width away (towards the wider side), giving a slope;
2. secant steps from the last two trials, clipped to the bracket, while no sign change has been seen and
   each step at least halves the residual (at most ``SECANT_STEPS``); a residual that is convex or concave
   around the root is usually crossed by the first step, which gives a narrow bracket;
3. once two trials have residuals of opposite signs, scipy's ``brentq`` on the narrowest such pair, which
   never leaves it;
4. when the secant steps stall without a sign change, the bracket's ends are solved (those not solved yet)
   and ``brentq`` runs on the narrowest sign change among all trials; when there is none,
   :class:`NoRoot` carries the residuals at the two ends.

Every trial lies inside the bracket.  ``residual`` itself stops the search (by raising) once a trial meets
the tolerance; this module never decides that a point is an answer.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
from scipy.optimize import brentq

__all__ = ["PROBE_SHARE", "SECANT_STEPS", "NoRoot", "find_root"]

PROBE_SHARE = 0.01
"""The second trial's distance from the first, as a share of the bracket's width (common practice: a
difference large beside the residual's noise from the inner solves, small beside its curvature)."""
SECANT_STEPS = 6
"""Most secant steps before a sign change is seen (each must at least halve the residual)."""


class NoRoot(Exception):
    """The residual has the same sign at both ends of the bracket: ``low`` and ``high`` are its values there."""

    def __init__(self, low: float, high: float) -> None:
        super().__init__(low, high)
        self.low, self.high = low, high


def find_root(residual: Callable[[float], float], low: float, high: float, start: float, *, xtol: float,
              maxiter: int) -> None:
    """Search ``[low, high]`` for a root of ``residual`` (see the module docstring); returns when ``brentq``
    has narrowed its bracket to ``xtol`` (``residual`` raises to stop earlier).

    Raises
    ------
    NoRoot
        No sign change among the trials, the two ends included.
    RuntimeError
        ``brentq`` used up ``maxiter`` iterations.
    """
    seen: dict[float, float] = {}

    def at(x: float) -> float:
        if x not in seen:
            seen[x] = float(residual(x))
        return seen[x]

    x0 = start if low < start < high else 0.5 * (low + high)
    probe = PROBE_SHARE * (high - low)
    x1 = x0 + probe if high - x0 >= x0 - low else x0 - probe
    path = [(x0, at(x0)), (x1, at(x1))]
    for _ in range(SECANT_STEPS):
        if _sign_change(seen) is not None:
            break
        (xa, fa), (xb, fb) = path[-2], path[-1]
        if fb == fa:
            break
        x = xb - fb * (xb - xa) / (fb - fa)
        # A step that would leave the bracket goes half way to its end instead: a residual that is steep near
        # an end (a pole just outside) would otherwise drag the next steps there.
        x = 0.5 * (xb + high) if x > high else 0.5 * (xb + low) if x < low else x
        if x in seen:
            break
        path.append((x, at(x)))
        if _sign_change(seen) is None and abs(path[-1][1]) >= abs(fb):
            break  # moving away from zero: look at the ends
    pair = _sign_change(seen)
    if pair is None:
        at(low)
        at(high)
        pair = _sign_change(seen)
        if pair is None:
            raise NoRoot(seen[low], seen[high])
    brentq(at, pair[0], pair[1], xtol=xtol, maxiter=maxiter)


def _sign_change(seen: dict[float, float]) -> tuple[float, float] | None:
    """The narrowest pair of neighbouring trials whose residuals have opposite signs (None when none do)."""
    points = sorted(seen.items())
    pairs = [(a, b) for (a, fa), (b, fb) in zip(points, points[1:]) if np.sign(fa) * np.sign(fb) < 0]
    return min(pairs, key=lambda pair: pair[1] - pair[0]) if pairs else None
