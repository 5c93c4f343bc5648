"""The hand-written baseline for job search with separations: numpy value iteration on the model's structure.

What someone writes with numpy alone, independent of fixq.  A worker is
unemployed (status 0, benefit ``BENEFIT``) or employed at a wage; each
period an offer is seen (iid over the wage grid, probabilities ``offer_probs``).
The unemployed accept it or not; the employed choose an effort ``e`` that
costs ``EFFORT_COST·e²`` and lowers the chance of losing the job, drawn
after the choice, to ``SEPARATION·(1 − EFFORT_CUT·e)``; a separated worker
gets ``SEVERANCE`` and is unemployed tomorrow.  A new hire may lose the job
before starting, at the chance of zero effort.  The value has the axes
(status, wage, offer) — the wage of an unemployed worker is carried along
unchanged — and

    V(1, w, o) = max_e  w − c e² + S·s(e) + β [(1 − s(e)) EV(1, w) + s(e) EV(0, w)],
    V(0, w, o) = max(b + β EV(0, w),  b + β [(1 − s(0)) EV(1, o) + s(0) EV(0, o)]),
    EV(x, w) = Σ_o' q(o') V(x, w, o'),

iterated from ``V = 0`` until the certified bound ``β/(1−β)·‖TV − V‖∞ ≤
tolerance``.  Ties go to the lower index (reject before accept, less effort
before more), as fixq's do.

Model (an invented calibration): ``WAGE_POINTS`` wages evenly from 1 to 3,
offers more likely in the middle, five efforts from 0 to 1, ``β = 0.98``.

Run ``python bench/baseline_separation.py`` to time it alone.
"""

from __future__ import annotations

import time
from dataclasses import dataclass

import numpy as np

BETA = 0.98
BENEFIT = 1.2
SEVERANCE = 0.5
SEPARATION = 0.1
EFFORT_CUT = 0.8
EFFORT_COST = 0.5
WAGE_POINTS = 40
EFFORTS = (0.0, 0.25, 0.5, 0.75, 1.0)
TOLERANCE = 1e-6
"""Target of ``β/(1−β)·‖TV − V‖∞``, in the reward's units."""


def wages() -> np.ndarray:
    return np.linspace(1.0, 3.0, WAGE_POINTS)


def offer_probs() -> np.ndarray:
    """Offers more likely in the middle of the wage grid: weights ``(k + 1)(W − k)``, normalised; (W,)."""
    k = np.arange(WAGE_POINTS, dtype=float)
    weights = (k + 1.0) * (WAGE_POINTS - k)
    return weights / weights.sum()


@dataclass
class BaselineResult:
    """``value`` and the chosen indices have shape (2, wage points, offer points)."""

    value: np.ndarray
    accept_index: np.ndarray
    effort_index: np.ndarray
    iterations: int
    error_bound: float
    seconds: float


def solve(tolerance: float = TOLERANCE) -> BaselineResult:
    """Numpy value iteration from ``V = 0``; the timer covers everything after the imports."""
    started = time.perf_counter()
    wage = wages()
    q = offer_probs()
    effort = np.array(EFFORTS)
    sep = SEPARATION * (1.0 - EFFORT_CUT * effort)  # (E,)
    pay = wage[:, None] - EFFORT_COST * effort[None, :] ** 2 + SEVERANCE * sep[None, :]  # (W, E)
    value = np.zeros((2, WAGE_POINTS, WAGE_POINTS))
    factor = BETA / (1.0 - BETA)
    iterations = 0
    while True:
        expected = value @ q  # (2, W)
        employed = pay + BETA * ((1.0 - sep)[None, :] * expected[1][:, None] + sep[None, :] * expected[0][:, None])
        reject = BENEFIT + BETA * expected[0]  # (W,), by today's wage
        accept = BENEFIT + BETA * ((1.0 - sep[0]) * expected[1] + sep[0] * expected[0])  # (O,), by the offer
        updated = np.empty_like(value)
        updated[1] = employed.max(axis=1)[:, None]
        updated[0] = np.maximum(reject[:, None], accept[None, :])
        iterations += 1
        distance = float(np.abs(updated - value).max())
        value = updated
        if factor * distance <= tolerance:
            break
    expected = value @ q
    employed = pay + BETA * ((1.0 - sep)[None, :] * expected[1][:, None] + sep[None, :] * expected[0][:, None])
    reject = BENEFIT + BETA * expected[0]
    accept = BENEFIT + BETA * ((1.0 - sep[0]) * expected[1] + sep[0] * expected[0])
    accept_index = np.zeros((2, WAGE_POINTS, WAGE_POINTS), dtype=np.int64)
    accept_index[0] = accept[None, :] > reject[:, None]
    effort_index = np.zeros((2, WAGE_POINTS, WAGE_POINTS), dtype=np.int64)
    effort_index[1] = employed.argmax(axis=1)[:, None]
    return BaselineResult(value, accept_index, effort_index, iterations, factor * distance,
                          time.perf_counter() - started)


if __name__ == "__main__":
    result = solve()
    print(f"baseline: {result.iterations} iterations, bound {result.error_bound:.2e}, {result.seconds:.3f} s")
