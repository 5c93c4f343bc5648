"""The search of a continuous choice at one point, as the text the generated kernel runs.

The interval is ``[low, high]`` (the grid's ends for a ``next_of`` choice,
else the bounds' expressions at the point).  ``monotone`` raises its lower
end to the choice of the point before on the same line of the chosen state
*in the same combination of the other choices* (``line_a[cc]``, kept by the
kernel for each combination, NaN where that combination had no allowed
choice; ``follows`` is true when that point was the one searched just
before): the hint promises, for fixed other choices, a choice that never
falls as the state rises, and the best combination's choice need not bound
another combination's.
Then:

* ``concave``, with a usable guess (the previous iteration's choice, where
  the model allows it): a bracket grown from the guess — doubling steps,
  uphill until the objective falls — and Brent's method inside it, started
  from the bracket's three points (its first step may then be parabolic).
  The first step is the choice's move from its guess at the point searched
  just before on the same line, in the same combination (``line_d[cc]``,
  NaN when unknown; ``near`` is true when that point was the one searched
  just before), times ``MOVE_STEP``, taken first in that move's direction
  and at least Brent's tolerance at the guess; else ``EXPAND_SHARE`` of the
  interval, upwards first.  Near convergence the choice moves far less than
  the interval between iterations and about as much at neighbouring points,
  so the bracket starts about as wide as the move, and a guess that has not
  moved is settled by three evaluations (a bracket of Brent's tolerance on
  both sides).  The step's size decides the cost only: with ``concave`` the
  objective is unimodal, so any three points whose middle one is the best
  bracket the maximum.  Where the hint is false (several peaks, as the
  monotone cubic interpolant of an early iterate can have) a short first
  step stays on the peak nearest the guess more often than a long one; the
  verification at the end of a solve compares every point with the
  unrestricted step, as before;
* ``concave`` without a guess: a coarse scan of ``COARSE_POINTS`` evenly
  spread points (ends included, so a corner is found), and Brent's method
  between the best one's neighbours; where none of them is allowed (a window
  of allowed choices narrower than the scan's spacing), the scan of a search
  without ``concave`` below follows;
* no ``concave`` hint: a scan — of the state's grid points inside the
  interval for a ``next_of`` choice (every one up to ``GRID_SCAN_MAX`` of
  them, so the answer is then never worse than the grid-restricted
  choice's; every k-th above), else of ``scan_n`` evenly spread points — and
  Brent's method between the best one's neighbours.  This finds a global
  maximum only if no other peak hides between two scanned points; it is a
  local refinement, not a guarantee.  For a ``next_of`` choice where its
  bound holds, the kernel runs the branch and bound of
  :mod:`worker.continuous.bound_search` instead.

Brent's method (Brent 1973, *Algorithms for Minimization without
Derivatives*, ch. 5: golden-section steps with parabolic interpolation) stops
when the bracket around the best point is within ``SQRT_EPS·|x| +
XTOL_SHARE·(high − low)``; near an interior maximum the value is then
within about ``f''·x²·ε`` of the maximum, far below any value tolerance.  A
point where the model is not allowed counts as ``−inf``, so the search stays
inside the allowed part of the interval.  Every point's answer depends on
that point and the one before it on its line only (its choice with
``monotone``, its move with a guess), so row blocks of whole lines give the
same bits on any number of threads (a block that starts inside a line is not
narrowed at its first point, nor is its first step sized there: ``follows``
and ``near`` are false there).
"""

from __future__ import annotations

__all__ = [
    "BRENT_LOOP", "BRENT_MAX_STEPS", "COARSE_POINTS", "EDGE_STEPS", "EDGE_TEXT", "EXPAND_SHARE", "GRID_SCAN_MAX",
    "KINK_AXIS",
    "KINK_DRAWS_AXIS", "KINK_DRAWS_MOST", "KINK_DRAWS_TEXT", "KINK_TEXT",
    "MOVE_STEP", "NARROW_TEXT", "SEARCH_TEXT", "SQRT_EPS", "XTOL_SHARE", "brent_loop",
]

COARSE_POINTS = 9
"""Points of the coarse scan that starts a concave search without a guess (count)."""
EXPAND_SHARE = 1e-3
"""First step of a bracket grown from a guess, as a share of the interval's width."""
XTOL_SHARE = 1e-10
"""Brent's absolute tolerance on the choice, as a share of the interval's width."""
GRID_SCAN_MAX = 512
"""Most grid points a scan without hints visits inside the interval (count; every k-th grid point above,
so an unhinted step costs O(points) per point, not O(points²))."""
MOVE_STEP = 1.0
"""First step of a bracket grown from a guess when the point searched just before on the same line (same
combination of the other choices) also had a guess: this many times that point's move from its guess, and at
least Brent's tolerance at the guess (so a guess within it is settled by three evaluations)."""
SQRT_EPS = 1.4901161193847656e-08
"""Brent's relative tolerance on the choice: the square root of float64's machine epsilon."""
BRENT_MAX_STEPS = 200
"""Most steps of one Brent search (count; a smooth objective needs 10 to 30)."""

BRENT_LOOP = """
for _step in range({steps}):
    {mid} = 0.5 * (a + b)
    tol1 = {sqrt_eps} * abs({x}) + tol_abs
    tol2 = 2.0 * tol1
    if abs({x} - {mid}) <= tol2 - 0.5 * (b - a):
        break
    golden = True
    if abs(ee) > tol1:
        rr = ({x} - {w}) * (gx - gv)
        qq = ({x} - {v}) * (gx - gw)
        pp = ({x} - {v}) * qq - ({x} - {w}) * rr
        qq = 2.0 * (qq - rr)
        if qq > 0.0:
            pp = -pp
        else:
            qq = -qq
        r0 = ee
        ee = dd
        if abs(pp) < abs(0.5 * qq * r0) and pp > qq * (a - {x}) and pp < qq * (b - {x}):
            dd = pp / qq
            u = {x} + dd
            if u - a < tol2 or b - u < tol2:
                dd = tol1 if {x} < {mid} else -tol1
            golden = False
    if golden:
        ee = (b - {x}) if {x} < {mid} else (a - {x})
        dd = 0.3819660112501051 * ee
    if abs(dd) >= tol1:
        u = {x} + dd
    elif dd > 0.0:
        u = {x} + tol1
    else:
        u = {x} - tol1
    u = min(max(u, lo_b), hi_b)
    fu, ru, _xk = f(u)
    gu = -fu
    if gu <= gx:
        if u < {x}:
            b = {x}
        else:
            a = {x}
        {v} = {w}
        gv = gw
        {w} = {x}
        gw = gx
        {x} = u
        gx = gu
        {fx} = fu
        {rx} = ru
    else:
        if u < {x}:
            a = u
        else:
            b = u
        if gu <= gw or {w} == {x}:
            {v} = {w}
            gv = gw
            {w} = u
            gw = gu
        elif gu <= gv or {v} == {x} or {v} == {w}:
            {v} = u
            gv = gu
"""
"""Brent's method (Brent 1973, ch. 5) as kernel text: the search for a maximum of ``f`` inside ``[a, b]`` from
its best point ``{x}`` (value ``{fx}``, reward ``{rx}``) and the two before it ``{w}``, ``{v}`` (``gx``, ``gw``,
``gv`` their negated values; ``dd``, ``ee`` the last two steps), never outside ``[lo_b, hi_b]``, stopping within
``tol1 = SQRT_EPS·|x| + tol_abs``; written once, used by :data:`SEARCH_TEXT` and the branch and bound's
intervals (:mod:`worker.continuous.bound_search`) under their own names (:func:`brent_loop`)."""


def brent_loop(indent: int, *, x: str = "x", w: str = "w", v: str = "v", fx: str = "fx", rx: str = "rx",
               mid: str = "mid") -> str:
    """:data:`BRENT_LOOP` with the given names, every line indented by ``indent`` spaces (ends with a newline)."""
    text = BRENT_LOOP.strip("\n").format(steps=BRENT_MAX_STEPS, sqrt_eps=repr(SQRT_EPS), x=x, w=w, v=v, fx=fx,
                                          rx=rx, mid=mid)
    return "".join(" " * indent + line + "\n" for line in text.split("\n"))


NARROW_TEXT = """
lo_b = low
hi_b = high
if follows:
    before = line_a[cc]
    if before == before and before > lo_b:
        lo_b = min(before, hi_b)
"""
"""The interval ``[lo_b, hi_b]`` of a point's search: ``[low, high]``, its lower end raised under ``monotone`` to
the choice at the point before on the same line in the same combination (``line_a[cc]``); written once, used
by :data:`SEARCH_TEXT` and the branch and bound's call (:mod:`worker.continuous.bound_search`)."""


SEARCH_TEXT = f"""{NARROW_TEXT}x = np.nan
fx = -np.inf
rx = -np.inf
moved = np.nan
width = hi_b - lo_b
if width == 0.0:
    fx, rx, _xk = f(lo_b)
    x = lo_b
elif width > 0.0:
    tol_abs = {XTOL_SHARE!r} * width
    a0 = lo_b
    a2 = hi_b
    x1 = np.nan
    f1 = -np.inf
    r1 = -np.inf
    f0 = -np.inf
    f2 = -np.inf
    found = False
    g = guess[i] if has_guess else np.nan
    if g == g:
        g = min(max(g, lo_b), hi_b)
    if concave and g == g:
        fg, rg, _xk = f(g)
        if fg > -np.inf:
            found = True
            x1 = g
            f1 = fg
            r1 = rg
            before_d = line_d[cc] if near else np.nan
            if before_d == before_d:
                step = max({MOVE_STEP!r} * abs(before_d), {SQRT_EPS!r} * abs(g) + tol_abs)
                sgn = -1.0 if before_d < 0.0 else 1.0
            else:
                step = {EXPAND_SHARE!r} * width
                sgn = 1.0
            xb = x1
            fb = f1
            xa = min(max(x1 + sgn * step, lo_b), hi_b)
            fa = f1
            ra = r1
            if xa != x1:
                fa, ra, _xk = f(xa)
            if not fa > f1:
                xb = xa
                fb = fa
                sgn = -sgn
                xa = min(max(x1 + sgn * step, lo_b), hi_b)
                fa = f1
                if xa != x1:
                    fa, ra, _xk = f(xa)
            while fa > f1:
                xb = x1
                fb = f1
                x1 = xa
                f1 = fa
                r1 = ra
                step *= 2.0
                xa = min(max(x1 + sgn * step, lo_b), hi_b)
                fa = f1
                if xa != x1:
                    fa, ra, _xk = f(xa)
            if xa < xb:
                a0 = xa
                f0 = fa
                a2 = xb
                f2 = fb
            else:
                a0 = xb
                f0 = fb
                a2 = xa
                f2 = fa
    if not found:
        # concave: the coarse scan, and where it found no allowed value (an allowed window narrower than its
        # spacing) the scan of an unhinted search; before, such a point counted as having no allowed choice.
        for scan_pass in range(2 if concave else 1):
            if scan_pass == 1 and f1 > -np.inf:
                break
            coarse = concave and scan_pass == 0
            use_grid = grid_size > 0 and not coarse
            count = {COARSE_POINTS} if coarse else scan_n
            k0 = 0
            stride = 1
            if use_grid:
                k0, w0, c0 = locate_one(sgrid, grid_off, grid_size, lo_b)
                k0 += 1
                k1, w1, c1 = locate_one(sgrid, grid_off, grid_size, hi_b)
                if sgrid[grid_off + k1] >= hi_b:
                    k1 -= 1
                inside = k1 - k0 + 1
                if inside < 0:
                    inside = 0
                stride = (inside + {GRID_SCAN_MAX} - 1) // {GRID_SCAN_MAX}
                if stride < 1:
                    stride = 1
                count = 2 + (inside + stride - 1) // stride
            last = lo_b
            wanted = False
            for k in range(count):
                if k == 0:
                    xk = lo_b
                elif k == count - 1:
                    xk = hi_b
                elif use_grid:
                    xk = sgrid[grid_off + k0 + (k - 1) * stride]
                else:
                    xk = lo_b + width * (k / (count - 1.0))
                if wanted:
                    a2 = xk
                    wanted = False
                fk, rk, _xk = f(xk)
                if fk > f1:
                    x1 = xk
                    f1 = fk
                    r1 = rk
                    a0 = last
                    a2 = xk
                    wanted = True
                last = xk
    if f1 > -np.inf:
        a = a0
        b = a2
        x = x1
        w = x1
        v = x1
        gx = -f1
        gw = gx
        gv = gx
        fx = f1
        rx = r1
        dd = 0.0
        ee = 0.0
        if f0 > -np.inf and f2 > -np.inf:
            ee = b - a
            if f0 >= f2:
                w = a
                gw = -f0
                v = b
                gv = -f2
            else:
                w = b
                gw = -f2
                v = a
                gv = -f0
{brent_loop(8)}    if found:
        moved = x - g
#KINK#
"""
"""The search's text, run inside the kernel's loop over points (and over combinations of the other choices),
leaving the best value, choice and reward in ``fx``, ``x``, ``rx``; with ``f``, ``low``, ``high``,
``grid_off``/``grid_size`` (−1/0 without a grid to scan), and the kernel's arguments in scope;
``#KINK#`` is where :data:`KINK_TEXT` goes with linear interpolation."""

KINK_TEXT = """
if fx > -np.inf:
    fy, ry, xs = f(x)
    h_k = 1e-7 * (abs(x) + width)
    x2 = x + h_k if x + h_k <= hi_b else x - h_k
    f2, r2, xs2 = f(x2)
    x_best = x
#AXES#
"""
KINK_AXIS = """    lo_k, w_k, c_k = locate_one(sgrid, off_{t}, size_{t}, xs[{t}])
    slope_k = {slope}
    for side in range(2):
        u = x_best + (sgrid[off_{t} + lo_k + side] - xs[{t}]) / slope_k
        if u >= lo_b and u <= hi_b:
            fu, ru, xu = f(u)
            if fu > fx:
                x = u
                fx = fu
                rx = ru"""
"""With linear interpolation the objective bends where tomorrow's state crosses a grid point of any
state's grid, and a maximum often sits on such a bend, where Brent's method stops a little past it:
along each state, the two grid points around tomorrow's value at the best choice are tried
(through a secant step of its law of motion, unless the choice is tomorrow's state itself), and
kept when better.  ``KINK_AXIS`` is written once per state, ``{t}`` its position."""

KINK_DRAWS_MOST = 32
"""Most draw combinations times states whose bends the kink polish tries with draws after the choice (count):
each costs up to four evaluations of the objective, itself a sum over the combinations; above it the polish is
not run (Brent's method alone, within its tolerance of a bend)."""
KINK_DRAWS_TEXT = """
if fx > -np.inf:
    xs = draw_states(x)
    h_k = 1e-7 * (abs(x) + width)
    x2 = x + h_k if x + h_k <= hi_b else x - h_k
    xs2 = draw_states(x2)
    x3 = x - h_k if x2 > x else x + h_k
    xs3 = draw_states(x3)
    x4 = x2 + (x2 - x)
    xs4 = draw_states(x4)
    x5 = x3 + (x3 - x)
    xs5 = draw_states(x5)
    x_best = x
#AXES#
"""
"""The kink polish with draws after the choice: ``draw_states`` gives tomorrow's states under every combination
of the draws (combination-major), and the two grid points around each are tried as in :data:`KINK_TEXT`.  Where
the state sits on a grid point while the choice does not sit on its bend (a law ``min(..., cap)`` past a cap on
the grid), the bend is sought from each side where the law moves (from ``x2`` by the secant through ``x4``, from ``x3``
through ``x5``)."""
KINK_DRAWS_AXIS = """    for k_d in range({k}):
        i_d = k_d * {d} + {t}
        lo_k, w_k, c_k = locate_one(sgrid, off_{t}, size_{t}, xs[i_d])
        slope_k = {slope}
        if slope_k == 0.0:
            slope_k = (xs3[i_d] - xs[i_d]) / (x3 - x_best)
        on_node = w_k == 0.0 or w_k == 1.0
        for side in range(4):
            if side < 2:
                u = x_best + (sgrid[off_{t} + lo_k + side] - xs[i_d]) / slope_k
            elif side == 2 and on_node and xs4[i_d] != xs2[i_d]:
                u = x2 + (xs[i_d] - xs2[i_d]) * (x4 - x2) / (xs4[i_d] - xs2[i_d])
            elif side == 3 and on_node and xs5[i_d] != xs3[i_d]:
                u = x3 + (xs[i_d] - xs3[i_d]) * (x5 - x3) / (xs5[i_d] - xs3[i_d])
            else:
                continue
            if u >= lo_b and u <= hi_b:
                fu, ru, xu = f(u)
                if fu > fx:
                    x = u
                    fx = fu
                    rx = ru"""
""":data:`KINK_AXIS` for the state ``{t}`` under each of the ``{k}`` combinations of the draws in turn (a loop,
not one copy of the block per combination: the objective ``f`` is inlined at every call, and unrolled copies made
the first compile of the retiree of tests/worker/test_horizon_continuous_draws.py take 70 s instead of 20 s,
measured), ``i_d`` its place in ``draw_states``'s tuple (``{d}`` states a combination); the slopes are taken from
``x_best``, the choice before the polish."""


EDGE_STEPS = 80
"""Most halvings of the bracket around an edge of the allowed choices (count; a float's 53 bits and the
bracket's start at ``1e-7`` of the interval end it sooner)."""
EDGE_TEXT = f"""
if fx > -np.inf and width > 0.0:
    h_e = 1e-7 * (abs(x) + width)
    x_e = x
    for side_e in range(2):
        y_e = min(x_e + h_e, hi_b) if side_e == 0 else max(x_e - h_e, lo_b)
        if y_e != x_e:
            fy_e, ry_e, xy_e = f(y_e)
            if fy_e == -np.inf:
                in_e = x_e
                out_e = y_e
                for _e in range({EDGE_STEPS}):
                    m_e = 0.5 * (in_e + out_e)
                    if m_e == in_e or m_e == out_e:
                        break
                    fm_e, rm_e, xm_e = f(m_e)
                    if fm_e > -np.inf:
                        in_e = m_e
                        if fm_e > fx:
                            x = m_e
                            fx = fm_e
                            rx = rm_e
                    else:
                        out_e = m_e
"""
"""A choice allowed on one side only (a ``feasible`` constraint that binds inside the interval, or a reward
that is −∞ past a point): Brent's method ends within its tolerance of the edge, on the allowed side.  Where the
objective is −∞ just past the best choice (``1e-7`` of the interval and the choice), the edge is found by halving
to a float's resolution, every allowed point on the way kept when better: a binding constraint then binds to
rounding, not to the search's tolerance (before, an invented growth model with a cap on tomorrow's capital lost
up to 1.1e-8 of value against an error bound of 5.9e-14)."""
