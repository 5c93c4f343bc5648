"""The jitted helpers that the lines of `interval_source` call, one per operation.

Each takes and returns bounds as float64 ``(lo, hi)`` pairs; a full operand
is ``(-inf, inf)``.  The lines reach them through the global name
`worker.expressions.intervals.GLOBAL_NAME`, bound by `interval_globals`.
Numba compiles each helper the first time a kernel uses it (0.1-1 s each)
and caches it on disk (``cache=True``), so later processes load it instead
of compiling; each call site then costs a kernel some 20-50 ms of compile
time.

How soundness is kept
---------------------
* An interval ``[lo, hi]`` is a closed set of the extended reals; endpoints
  are never nan.  Whenever nan is possible the interval is ``[-inf, inf]``
  ("full"), and a full operand is treated as possibly nan: functions and
  ``min``/``max`` of it are full, comparisons of it are ``[0, 1]`` unless
  every outcome agrees.
* ``+ - * /`` need no slack.  Both evaluators round them correctly, and
  rounding to nearest is monotone, so the rounded value at any point of the
  box lies between the rounded corner values computed here.  Runs of ``+``
  chain left to right in the same order as the evaluators.  A possible
  ``inf - inf``, ``0 * inf`` or ``inf / inf``, or a divisor interval
  containing 0, gives full.
* ``log exp sqrt **`` are monotone in each argument on the domains used, but
  the C library and numpy's vectorised versions are each a few ulps off and
  not exactly monotone: their bounds are widened outward by `RELATIVE_SLACK`
  times their magnitude plus `ABSOLUTE_SLACK`.
* ``x**y``: with ``x >= 0`` the extremes are at the four corners (when ``x``
  may be 0, only if ``y >= 0``, because ``(-0.0)**-1`` is ``-inf``); with a
  possibly negative ``x`` only a single integral exponent is bounded (even
  powers through ``|x|``, odd ones are monotone, negative odd ones across 0
  are full); anything else is full.  ``x**0`` and ``1**y`` are exactly 1.
* Comparisons give ``[1, 1]`` when certainly true, ``[0, 0]`` when certainly
  false, else ``[0, 1]``; logic treats an interval excluding 0 as certainly
  true and ``[0, 0]`` as certainly false (nan counts as true, so a full
  interval is neither).
"""

from __future__ import annotations

import sys

import numpy as np
from numba import njit

from worker.expressions.intervals import GLOBAL_NAME

__all__ = ["ABSOLUTE_SLACK", "RELATIVE_SLACK", "interval_globals"]

RELATIVE_SLACK = 2.0**-46
"""Outward widening of ``log exp sqrt **`` bounds, relative to their
magnitude (about 64 ulps; the libraries are within a few ulps)."""
ABSOLUTE_SLACK = 1e-300
"""Outward widening of ``log exp sqrt **`` bounds, absolute: covers results
near underflow, where relative error means little."""

_LARGEST = 1.7976931348623157e308
_jit = njit(cache=True, error_model="numpy", fastmath=False)


def interval_globals() -> dict[str, object]:
    """The globals that the lines of `interval_source` use (``np`` and this
    module, for its helpers); merge them into the namespace of the generated
    function."""
    return {"np": np, GLOBAL_NAME: sys.modules[__name__]}


@njit(cache=True, error_model="numpy", fastmath=False, inline="always")
def scalar_power(x: float, e: float) -> float:
    """``x ** e`` for an exponent known only at run time (a param, or an expression of params).

    The exponents of everyday rewards are computed without ``pow``, which costs
    about ten times a division (17 ns against 2–4 ns here): ``-1`` as ``1/x``,
    ``2`` as ``x*x`` and ``1`` as ``x`` (exactly ``pow``'s value), ``-2`` as
    ``1/(x*x)`` (within 1.5 ulp of it: the marginal utility of CRRA with
    γ = 2), ``0.5`` as ``sqrt`` (exactly, but at ``-0.0`` and ``-inf``, where
    ``pow`` gives ``+0.0`` and ``+inf``, and so does this).  Any other exponent
    is ``pow``.
    """
    if e == -1.0:
        return 1.0 / x
    if e == 2.0:
        return x * x
    if e == -2.0:
        return 1.0 / (x * x)
    if e == 1.0:
        return x
    if e == 0.5 and x > 0.0:
        return np.sqrt(x)
    return x ** e


@_jit
def _widen(lo: float, hi: float) -> tuple[float, float]:
    lo = lo - (abs(lo) * RELATIVE_SLACK + ABSOLUTE_SLACK) if lo < np.inf else _LARGEST
    hi = hi + (abs(hi) * RELATIVE_SLACK + ABSOLUTE_SLACK) if hi > -np.inf else -_LARGEST
    return lo, hi


@_jit
def _is_full(lo: float, hi: float) -> bool:
    return lo == -np.inf and hi == np.inf


@_jit
def add(al: float, ah: float, bl: float, bh: float) -> tuple[float, float]:
    cross1 = al + bh
    cross2 = ah + bl
    if cross1 != cross1 or cross2 != cross2:
        return -np.inf, np.inf
    return al + bl, ah + bh


@_jit
def subtract(al: float, ah: float, bl: float, bh: float) -> tuple[float, float]:
    cross1 = al - bl
    cross2 = ah - bh
    if cross1 != cross1 or cross2 != cross2:
        return -np.inf, np.inf
    return al - bh, ah - bl


@_jit
def multiply(al: float, ah: float, bl: float, bh: float) -> tuple[float, float]:
    c1 = al * bl
    c2 = al * bh
    c3 = ah * bl
    c4 = ah * bh
    if c1 != c1 or c2 != c2 or c3 != c3 or c4 != c4:
        return -np.inf, np.inf
    if al <= 0.0 <= ah and (bl == -np.inf or bh == np.inf):
        return -np.inf, np.inf
    if bl <= 0.0 <= bh and (al == -np.inf or ah == np.inf):
        return -np.inf, np.inf
    return min(c1, c2, c3, c4), max(c1, c2, c3, c4)


@_jit
def divide(al: float, ah: float, bl: float, bh: float) -> tuple[float, float]:
    if bl <= 0.0 <= bh:
        return -np.inf, np.inf
    c1 = al / bl
    c2 = al / bh
    c3 = ah / bl
    c4 = ah / bh
    if c1 != c1 or c2 != c2 or c3 != c3 or c4 != c4:
        return -np.inf, np.inf
    return min(c1, c2, c3, c4), max(c1, c2, c3, c4)


@_jit
def power(al: float, ah: float, bl: float, bh: float) -> tuple[float, float]:
    if (bl == 0.0 and bh == 0.0) or (al == 1.0 and ah == 1.0):
        return 1.0, 1.0
    if _is_full(al, ah) or _is_full(bl, bh):
        return -np.inf, np.inf
    if (al > 0.0 or (al >= 0.0 and bl >= 0.0)) and bl == bh:
        # A fixed exponent (the usual case): monotone in the base, two corners.
        c1 = np.power(al, bl)
        c3 = np.power(ah, bl)
        return _widen(min(c1, c3), max(c1, c3))
    if al > 0.0 or (al >= 0.0 and bl >= 0.0):
        c1 = np.power(al, bl)
        c2 = np.power(al, bh)
        c3 = np.power(ah, bl)
        c4 = np.power(ah, bh)
        return _widen(min(c1, c2, c3, c4), max(c1, c2, c3, c4))
    if not (bl == bh and abs(bl) < np.inf and np.floor(bl) == bl):
        return -np.inf, np.inf
    n = bl
    small = 0.0 if al <= 0.0 <= ah else min(abs(al), abs(ah))
    big = max(abs(al), abs(ah))
    even = np.floor(n * 0.5) == n * 0.5
    if n > 0.0 and even:
        return _widen(np.power(small, n), np.power(big, n))
    if n > 0.0:
        return _widen(np.power(al, n), np.power(ah, n))
    if even:
        return _widen(np.power(big, n), np.power(small, n))
    if al <= 0.0 <= ah:
        return -np.inf, np.inf
    return _widen(np.power(ah, n), np.power(al, n))


@_jit
def log(al: float, ah: float) -> tuple[float, float]:
    if al < 0.0:
        return -np.inf, np.inf
    return _widen(np.log(al), np.log(ah))


@_jit
def sqrt(al: float, ah: float) -> tuple[float, float]:
    if al < 0.0:
        return -np.inf, np.inf
    return _widen(np.sqrt(al), np.sqrt(ah))


@_jit
def exp(al: float, ah: float) -> tuple[float, float]:
    if _is_full(al, ah):
        return -np.inf, np.inf
    return _widen(np.exp(al), np.exp(ah))


@_jit
def absolute(al: float, ah: float) -> tuple[float, float]:
    if _is_full(al, ah):
        return -np.inf, np.inf
    if al >= 0.0:
        return al, ah
    if ah <= 0.0:
        return -ah, -al
    return 0.0, max(-al, ah)


@_jit
def minimum(al: float, ah: float, bl: float, bh: float) -> tuple[float, float]:
    if _is_full(al, ah) or _is_full(bl, bh):
        return -np.inf, np.inf
    return min(al, bl), min(ah, bh)


@_jit
def maximum(al: float, ah: float, bl: float, bh: float) -> tuple[float, float]:
    if _is_full(al, ah) or _is_full(bl, bh):
        return -np.inf, np.inf
    return max(al, bl), max(ah, bh)


@_jit
def where(cl: float, ch: float, tl: float, th: float, fl: float, fh: float) -> tuple[float, float]:
    if cl > 0.0 or ch < 0.0:
        return tl, th
    if cl == 0.0 and ch == 0.0:
        return fl, fh
    return min(tl, fl), max(th, fh)


@_jit
def less(al: float, ah: float, bl: float, bh: float) -> tuple[float, float]:
    return (1.0 if ah < bl else 0.0), (0.0 if al >= bh else 1.0)


@_jit
def less_equal(al: float, ah: float, bl: float, bh: float) -> tuple[float, float]:
    return (1.0 if ah <= bl else 0.0), (0.0 if al > bh else 1.0)


@_jit
def greater(al: float, ah: float, bl: float, bh: float) -> tuple[float, float]:
    return less(bl, bh, al, ah)


@_jit
def greater_equal(al: float, ah: float, bl: float, bh: float) -> tuple[float, float]:
    return less_equal(bl, bh, al, ah)


@_jit
def equal(al: float, ah: float, bl: float, bh: float) -> tuple[float, float]:
    if al == ah and ah == bl and bl == bh:
        return 1.0, 1.0
    if ah < bl or bh < al:
        return 0.0, 0.0
    return 0.0, 1.0


@_jit
def not_equal(al: float, ah: float, bl: float, bh: float) -> tuple[float, float]:
    lo, hi = equal(al, ah, bl, bh)
    return 1.0 - hi, 1.0 - lo


@_jit
def _truth(al: float, ah: float) -> tuple[float, float]:
    """[1, 1] when certainly nonzero, [0, 0] when certainly 0 (nan is nonzero,
    so a full interval is neither)."""
    if al > 0.0 or ah < 0.0:
        return 1.0, 1.0
    if al == 0.0 and ah == 0.0:
        return 0.0, 0.0
    return 0.0, 1.0


@_jit
def logical_and(al: float, ah: float, bl: float, bh: float) -> tuple[float, float]:
    a_lo, a_hi = _truth(al, ah)
    b_lo, b_hi = _truth(bl, bh)
    return min(a_lo, b_lo), min(a_hi, b_hi)


@_jit
def logical_or(al: float, ah: float, bl: float, bh: float) -> tuple[float, float]:
    a_lo, a_hi = _truth(al, ah)
    b_lo, b_hi = _truth(bl, bh)
    return max(a_lo, b_lo), max(a_hi, b_hi)


@_jit
def logical_not(al: float, ah: float) -> tuple[float, float]:
    lo, hi = _truth(al, ah)
    return 1.0 - hi, 1.0 - lo
