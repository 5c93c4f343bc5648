"""Searches with several unknowns: a bounded Newton method on the conditions, within the brackets.

:func:`find_common_root` looks for a point where every condition is zero, each trial inside the brackets.  The
method is Newton's for a system of equations, globalised as in Dennis & Schnabel, *Numerical Methods for
Unconstrained Optimization and Nonlinear Equations* (1983; SIAM reprint 1996), ch. 6 and 8, and Nocedal &
Wright, *Numerical Optimization* (2nd ed., 2006), ch. 11:

* **Jacobian.** Forward differences (n trials for n unknowns) with a step of `DIFF_SHARE` of each unknown's
  bracket, well above the conditions' noise from the inner solves (about 1e-7 of a mean here, measured) and
  small beside their curvature; a step that would leave the bracket is taken backwards.  Between refreshes the
  Jacobian follows Broyden's ("good") rank-one update from each accepted step (Dennis & Schnabel §8.1), one trial
  per step; it is computed afresh by differences when a step fails or makes little progress.
* **Scaling.** Conditions are compared by their own sensitivities: condition ``i`` is divided by the largest
  change the first Jacobian gives it across a bracket, ``max_j |J_ij| (max_j - min_j)``, so that a mass of
  order 1e-2 and a mean of order 5 weigh alike in the residual norm the line search reduces (their raw sizes
  differ by orders of magnitude, and least squares on the raw values chases the larger one).
* **Step.** The Newton step ``J d = -F`` (numpy's least squares: the least change when the Jacobian is
  singular); when it would move an unknown more than `MAX_MOVE` of its bracket, the Levenberg–Marquardt step of
  that length instead (a trust-region step: Dennis & Schnabel §6.4, Nocedal & Wright §10.3), which far from the
  root follows the directions the Jacobian determines where the shortened Newton step kept an ill-determined
  one (from r, tau = 0.02, 0.1 to the test's root near 0.045, 0.12: met in 22 trials, where shortening
  stalled).  The step is projected onto the brackets (clipped), with a backtracking line search halving it up
  to `LINE_STEPS` times until the scaled residual norm falls (Armijo's test, Dennis & Schnabel §6.3).
* **Trust-region fallback.** When even a fresh Jacobian's Newton step fails, Levenberg–Marquardt steps
  ``(AᵀA + μI) d = -AᵀF`` in the scaled unknowns (Nocedal & Wright §10.3), μ growing tenfold, each shorter and
  nearer steepest descent.  When none lowers the norm, or `STALLED` steps in a row from fresh Jacobians each
  leave more than `SLOW` of it, the search stops and says why.

Every condition being met is decided by the caller's function (it raises once a certifying trial meets the
tolerance); this module only chooses the trials, deterministically from the residuals it is given, so that a
resumed search asks for the same trials again.  It returns why it stopped, and appends to ``notes`` what the
result should say even when the search succeeds (conditions that do not identify the unknowns).
"""

from __future__ import annotations

from collections.abc import Callable, Sequence

import numpy as np

__all__ = ["DIFF_SHARE", "LINE_STEPS", "find_common_root"]

DIFF_SHARE = 1e-4
"""Forward-difference step, as a share of each unknown's bracket: the changes it makes are about 1e3 times the
conditions' noise from the inner solves (about 1e-7 of a mean of 5, measured), and it is small beside their
curvature.  On the r and tau search of tests/worker/test_search_several.py 1e-3 and 1e-5 met the tolerance from
the same five of seven starts as 1e-4 (in 9-26 and 10-21 trials against 12-22, measured); 1e-4 keeps the changes
further above the noise of the first trials, whose inner tolerance is the loosest."""
MAX_MOVE = 0.25
"""The longest step, as a share of any unknown's bracket (Dennis & Schnabel's maximum step, §6.4): far from the
root the linear model is poor, and a long step lands where it is poorer (near a pole of the conditions).  On the
r and tau search of tests/worker/test_search_several.py, from seven starts, 0.25 met the tolerance from five,
0.1 from five others, 0.15 from four, 0.5 from three; an adaptive radius (doubled after a long step that paid,
cut to a shortened one) from the same five (measured)."""
LINE_STEPS = 4
"""Most trials of one backtracking line search (the full step, then halves)."""
ARMIJO = 1e-4
"""The scaled residual norm must fall by at least this share of the step's length (Dennis & Schnabel §6.3)."""
SLOW = 0.5
"""An accepted step that leaves the scaled norm above this share of what it was refreshes the Jacobian."""
STALLED = 4
"""Slow steps in a row (each from a fresh Jacobian, the last ones trust-region steps) after which the search
stops, saying the conditions may have no common root."""
MARQUARDT = (1e-2, 1e-1, 1.0)
"""The Levenberg–Marquardt damping tried, as multiples of the largest eigenvalue of AᵀA."""
SINGULAR = 1e-8
"""A scaled Jacobian whose smallest singular value is below this share of its largest does not identify the
unknowns."""

Residuals = Callable[[tuple[float, ...]], list[float]]


def find_common_root(residuals_at: Residuals, lows: np.ndarray, highs: np.ndarray, start: np.ndarray,
                     tolerance: float, names: Sequence[str], conditions: Sequence[str],
                     notes: list[str]) -> tuple[str, tuple[float, ...]]:
    """Trials of ``residuals_at`` (which raises to end the search once its conditions are met, or the trials run
    out) from ``start`` within ``[lows, highs]``; returns, when it stops on its own, why the conditions were not
    met and the point where they were smallest (scaled).  ``notes`` gets what the result should say even when
    they are met."""
    widths = highs - lows

    def at(x: np.ndarray) -> np.ndarray:
        return np.asarray(residuals_at(tuple(float(v) for v in x)), dtype=np.float64)

    def jacobian(x: np.ndarray, f: np.ndarray) -> np.ndarray:
        columns = []
        for j in range(x.size):
            h = DIFF_SHARE * widths[j]
            if x[j] + h > highs[j]:
                h = -h  # backwards: every trial stays inside the brackets
            y = x.copy()
            y[j] += h
            columns.append((at(y) - f) / h)
        return np.stack(columns, axis=1)

    x = np.clip(start, lows, highs)
    f = at(x)
    jac = jacobian(x, f)
    spread = np.max(np.abs(jac) * widths, axis=1)  # each condition's change across the brackets (linearised)
    for i in np.flatnonzero(spread == 0):
        notes.append(f"condition {conditions[i]!r} does not move with any unknown near "
                     f"{_point(names, x)}: the unknowns are not identified by it")
    scale = 1.0 / np.where(spread > 0, spread, tolerance)
    _identified(jac, scale, widths, conditions, notes)
    fresh = True

    def norm(values: np.ndarray) -> float:
        return float(np.linalg.norm(scale * values))

    slow = 0  # steps in a row from a fresh Jacobian that left the norm above SLOW of what it was
    while True:
        size = norm(f)
        newton = np.linalg.lstsq(jac, -f, rcond=None)[0]
        step = _within(jac * widths * scale[:, None], scale * f, newton / widths) * widths
        accepted = _line_search(at, norm, x, f, size, step, lows, highs)
        if accepted is None and not fresh:
            jac, fresh = jacobian(x, f), True
            continue
        if accepted is None:
            accepted = _marquardt(at, norm, x, f, size, jac * widths * scale[:, None], scale, widths, lows, highs)
        if accepted is None:
            return _why_stalled(f, tolerance, x, lows, highs, newton, names), tuple(float(v) for v in x)
        y, g = accepted
        s = y - x
        slow = slow + 1 if fresh and norm(g) > SLOW * size else 0
        jac = jac + np.outer(g - f - jac @ s, s) / float(s @ s)  # Broyden's good update
        fresh = False
        x, f = y, g
        if slow >= STALLED:
            target = x + newton
            edges = [f"{name} (to {target[j]:.6g})" for j, name in enumerate(names)
                     if not lows[j] <= target[j] <= highs[j]]
            return (f"the conditions (scaled by their sensitivities) fell by less than half in each of the last "
                    f"{STALLED} steps, each from a fresh Jacobian, to {_point(names, x)}: they bend too much there "
                    "for Newton's steps, or have no common root inside the brackets"
                    + ("; their linear model puts it outside the bracket of " + ", ".join(edges) if edges else "")
                    + "; give starting values nearer the root"), tuple(float(v) for v in x)
        if norm(g) > SLOW * size:
            jac, fresh = jacobian(x, f), True
            _identified(jac, scale, widths, conditions, notes)


def _within(scaled: np.ndarray, f: np.ndarray, newton: np.ndarray) -> np.ndarray:
    """The Newton step (in shares of the brackets) when it moves no unknown more than `MAX_MOVE`; else the
    Levenberg–Marquardt step of that length (the damping found by bisection on its logarithm): the trust-region
    step, which turns from the directions a nearly singular Jacobian leaves ill-determined towards those it
    determines (Nocedal & Wright §10.3), where merely shortening the Newton step keeps its direction."""
    if np.max(np.abs(newton)) <= MAX_MOVE:
        return newton
    gram, gradient = scaled.T @ scaled, scaled.T @ f
    top = float(np.linalg.eigvalsh(gram)[-1]) or 1.0
    low, high = -12.0, 6.0  # log10 of the damping over the top eigenvalue: long steps below, short above
    step = newton * MAX_MOVE / np.max(np.abs(newton))
    for _ in range(40):
        middle = 0.5 * (low + high)
        d = np.linalg.solve(gram + 10.0 ** middle * top * np.eye(gram.shape[0]), -gradient)
        if np.max(np.abs(d)) > MAX_MOVE:
            low = middle
        else:
            high, step = middle, d
    return step


def _line_search(at: Callable[[np.ndarray], np.ndarray], norm: Callable[[np.ndarray], float], x: np.ndarray,
                 f: np.ndarray, size: float, step: np.ndarray, lows: np.ndarray,
                 highs: np.ndarray) -> tuple[np.ndarray, np.ndarray] | None:
    """The first of the step and its halves (clipped to the brackets) that lowers the scaled norm enough."""
    t = 1.0
    for _ in range(LINE_STEPS):
        y = np.clip(x + t * step, lows, highs)
        if np.array_equal(y, x):
            return None
        g = at(y)
        if norm(g) <= (1.0 - ARMIJO * t) * size:
            return y, g
        t *= 0.5
    return None


def _marquardt(at: Callable[[np.ndarray], np.ndarray], norm: Callable[[np.ndarray], float], x: np.ndarray,
               f: np.ndarray, size: float, scaled: np.ndarray, scale: np.ndarray, widths: np.ndarray,
               lows: np.ndarray, highs: np.ndarray) -> tuple[np.ndarray, np.ndarray] | None:
    """Levenberg–Marquardt steps in the scaled unknowns (x / width), damping growing; the first that lowers
    the scaled norm."""
    gram = scaled.T @ scaled
    top = float(np.linalg.eigvalsh(gram)[-1]) or 1.0
    for share in MARQUARDT:
        d = np.linalg.solve(gram + share * top * np.eye(x.size), -scaled.T @ (scale * f))
        y = np.clip(x + d * widths, lows, highs)
        if np.array_equal(y, x):
            continue
        g = at(y)
        if norm(g) < size:
            return y, g
    return None


def _identified(jac: np.ndarray, scale: np.ndarray, widths: np.ndarray, conditions: Sequence[str],
                notes: list[str]) -> None:
    """Say (once) when the scaled Jacobian is singular: conditions that move together (a repeated condition, or
    one a multiple of another) do not pin the unknowns down."""
    scaled = jac * widths * scale[:, None]
    values = np.linalg.svd(scaled, compute_uv=False)
    if values[0] == 0 or values[-1] > SINGULAR * values[0] or any("not identified" in n for n in notes):
        return
    rows = scaled / np.maximum(np.linalg.norm(scaled, axis=1, keepdims=True), 1e-300)
    pairs = [(i, k) for i in range(len(rows)) for k in range(i + 1, len(rows))]
    i, k = max(pairs, key=lambda p: abs(float(rows[p[0]] @ rows[p[1]])))
    notes.append(f"the conditions {conditions[i]!r} and {conditions[k]!r} move together (their sensitivities to "
                 "the unknowns are proportional): the unknowns are not identified (is a condition repeated, or one "
                 "a multiple of another?); a point found is one of many")


def _why_stalled(f: np.ndarray, tolerance: float, x: np.ndarray, lows: np.ndarray, highs: np.ndarray,
                 step: np.ndarray, names: Sequence[str]) -> str:
    """Why no step lowered the scaled residual norm at ``x``."""
    target = x + step
    edges = [f"{name} (to {target[j]:.6g})" for j, name in enumerate(names) if not lows[j] <= target[j] <= highs[j]]
    if edges:
        return ("no step inside the brackets lowers the conditions further: their linear model here puts their "
                "common root outside the bracket of " + ", ".join(edges) + "; they may have their common root "
                "outside the brackets, or none, or bend too much between here and it for Newton's steps: widen the "
                "brackets, or give starting values nearer the root")
    if np.max(np.abs(f)) <= 10 * tolerance:
        return ("no step lowers the conditions near the point: their noise from the inner solves is about the "
                "tolerance (tighten solver.tolerance, or loosen search.tolerance)")
    return (f"the conditions (scaled by their sensitivities) stopped falling near {_point(names, x)}: the point "
            "is near a local minimum of their size, so they may have no common root inside the brackets; try other "
            "starting values")


def _point(names: Sequence[str], x: np.ndarray) -> str:
    return ", ".join(f"{name} = {v:.12g}" for name, v in zip(names, x))
