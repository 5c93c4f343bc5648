"""One unknown: a root of a residual inside its bracket, found from the document's own value first.

:func:`find_root` is the outer method of a search with one unknown (:mod:`worker.search`).  A bracketing
method started from the bracket's ends spends its first trials on the ends, which are often the most
expensive solves (an interest rate at the top of its bracket) and the least informative (their residuals
only give signs), and then on interpolation steps between two far-apart values that a curved residual makes
poor (it falls back to bisection).  Calibrators usually give the unknown a sensible value in the document,
so the search starts there instead:

1. the residual at the document's value ``start`` (the bracket's midpoint when it lies outside), then at a
   probe ``PROBE_SHARE`` of the bracket's width away (towards the wider side), giving a slope;
2. steps to the root of a model of the residual through the last trials (:func:`_model_root`): the
   rational function ``(a + b x) / (1 + c x)`` through the last three (the secant through the first two).
   It is exact for a residual with a pole outside the bracket (an excess supply of savings as the interest
   rate nears 1/β − 1) and takes a straight residual as the secant does; secant steps crawl up a residual
   steep towards an end (on the Aiyagari bench and on synthetic residuals it takes a quarter fewer
   trials).  Before a sign change, a step that would leave the bracket goes ``BEYOND`` of the way to its
   end, and the steps stop when one moves away from zero; after one, they stay inside the narrowest sign
   change and each must at least halve the residual (at most ``MODEL_STEPS`` steps in all);
3. then scipy's ``brentq`` on the narrowest sign change, which never leaves it;
4. when the steps stall without a sign change, the bracket's ends are solved (those not solved yet) and
   ``brentq`` runs on the narrowest sign change among all trials; when there is none, :class:`NoRoot`
   carries the residuals at the two ends.

Every trial lies inside the bracket.  ``residual`` itself stops the search (by raising) once a trial meets
the tolerance; this module never decides that a point is an answer.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
from scipy.optimize import brentq

__all__ = ["BEYOND", "MODEL_STEPS", "PROBE_SHARE", "SHRINK", "NoRoot", "estimate_root", "find_root"]

PROBE_SHARE = 0.01
"""The second trial's distance from the first, as a share of the bracket's width (common practice: a
difference large beside the residual's noise from the inner solves, small beside its curvature)."""
MODEL_STEPS = 8
"""Most steps of the model (:func:`_model_root`) before ``brentq`` takes over, whether or not a sign change
has been seen."""
BEYOND = 0.75
"""Before a sign change, a model step that would leave the bracket goes this share of the way from the last
trial to the end instead (measured: 0.75 took 29 trials on the four cells of the Aiyagari bench where 0.5
took 34 and the end itself 32; on 288 synthetic residuals of nine shapes 1,679 where 0.5 took 1,707)."""
SHRINK = 0.5
"""After a sign change, each model step must leave a residual at most this share of the last one's; else
``brentq`` takes over (common practice: bisection's rate)."""


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
    for _ in range(MODEL_STEPS):
        if path[-1][1] == 0.0 or path[-2][1] == 0.0:
            return  # an exact root (brentq would return it too)
        pair = _sign_change(seen)
        x = _model_root(path[-3:], high - low)
        if x is None or not np.isfinite(x):
            break
        fb = path[-1][1]
        if pair is None:
            # A step that would leave the bracket goes most of the way to its end instead (BEYOND): the end
            # itself is often the most expensive solve, and the least informative when a pole lies just outside.
            end = high if x > high else low if x < low else None
            x = x if end is None else BEYOND * end + (1 - BEYOND) * path[-1][0]
        elif not pair[0] < x < pair[1]:
            break  # the model left the sign change: brentq takes over
        if x in seen:
            break
        path.append((x, at(x)))
        if pair is None and _sign_change(seen) is None and abs(path[-1][1]) >= abs(fb):
            break  # moving away from zero: look at the ends
        if pair is not None and abs(path[-1][1]) > SHRINK * abs(fb):
            break  # not closing in on zero fast enough: brentq takes over
    if 0.0 in seen.values():
        return
    pair = _sign_change(seen)
    if pair is None:
        at(low)
        at(high)
        pair = _sign_change(seen)
        if pair is None:
            raise NoRoot(seen[low], seen[high])
    brentq(at, pair[0], pair[1], xtol=xtol, maxiter=maxiter)


def _model_root(points: list[tuple[float, float]], width: float) -> float | None:
    """Where the model through the last trials crosses zero: the rational function ``(a + b x) / (1 + c x)``
    through the last three when they and its root lie on one branch of it (no pole between them), else the
    secant through the last two; None when the last two residuals are equal."""
    (xa, fa), (xb, fb) = points[-2], points[-1]
    if len(points) == 3:
        # In units of the bracket's width and of the largest residual, from the last trial (u = 0 there).
        scale = max(abs(f) for _, f in points)
        u = np.array([(x - xb) / width for x, _ in points])
        f = np.array([f for _, f in points]) / scale
        try:
            a, b, c = np.linalg.solve(np.column_stack([np.ones(3), u, -u * f]), f)
        except np.linalg.LinAlgError:
            a = b = c = 0.0
        if b != 0.0:
            root = -a / b
            if np.isfinite(root) and min(1.0 + c * u.min(), 1.0 + c * root) > 0.0:
                return float(xb + root * width)
    if fb == fa:
        return None
    return xb - fb * (xb - xa) / (fb - fa)


def estimate_root(points: list[tuple[float, float]], low: float, high: float) -> tuple[float, float | None]:
    """The root's best estimate from trials ``(x, residual)`` of one kind, in the order made, and the slope
    there: the model's root (:func:`_model_root`) through the last three, when it lies within ``[low, high]``
    and within the narrowest sign change among them (if any); else the secant root of that sign change, or
    the trial nearest zero.  The slope is the secant's of the two trials nearest the estimate (None when
    they do not give one)."""
    seen = dict(points)
    pair = _sign_change(seen)
    lo, hi = (low, high) if pair is None else pair
    x = _model_root(points[-3:], high - low) if len(points) >= 2 else None
    if x is None or not lo <= x <= hi:
        if pair is None:
            x = min(seen, key=lambda z: abs(seen[z]))
        else:
            (a, fa), (b, fb) = (lo, seen[lo]), (hi, seen[hi])
            x = a - fa * (b - a) / (fb - fa)
    near = sorted(seen, key=lambda z: abs(z - x))[:2]
    if len(near) < 2 or seen[near[0]] == seen[near[1]]:
        return x, None
    return x, (seen[near[1]] - seen[near[0]]) / (near[1] - near[0])


def _sign_change(seen: dict[float, float]) -> tuple[float, float] | None:
    """The narrowest pair of neighbouring trials whose residuals have opposite signs (None when none do)."""
    points = sorted(seen.items())
    pairs = [(a, b) for (a, fa), (b, fb) in zip(points, points[1:]) if np.sign(fa) * np.sign(fb) < 0]
    return min(pairs, key=lambda pair: pair[1] - pair[0]) if pairs else None
