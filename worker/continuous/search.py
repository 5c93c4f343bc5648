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
  the model allows it): a bracket grown from the guess — steps of
  ``EXPAND_SHARE`` of the interval, doubling, uphill until the objective
  falls — and Brent's method inside it;
* ``concave`` without a guess: a coarse scan of ``COARSE_POINTS`` evenly
  spread points (ends included, so a corner is found), and Brent's method
  between the best one's neighbours;
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
that point (and, with ``monotone``, the one before it on its line) only, so
row blocks of whole lines give the same bits on any number of threads (a block
that starts inside a line is not narrowed at its first point: ``follows`` is
false there).
"""

from __future__ import annotations

__all__ = [
    "BRENT_MAX_STEPS", "COARSE_POINTS", "EXPAND_SHARE", "GRID_SCAN_MAX", "KINK_AXIS", "KINK_TEXT", "SEARCH_TEXT",
    "XTOL_SHARE",
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
BRENT_MAX_STEPS = 200
"""Most steps of one Brent search (count; a smooth objective needs 10 to 30)."""

SEARCH_TEXT = f"""
lo_b = low
hi_b = high
if follows:
    before = line_a[cc]
    if before == before and before > lo_b:
        lo_b = min(before, hi_b)
x = np.nan
fx = -np.inf
rx = -np.inf
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
    found = False
    g = guess[i] if has_guess else np.nan
    if g == g:
        g = min(max(g, lo_b), hi_b)
    if concave and g == g:
        fg, rg, _xk = f(g)
        if fg > -np.inf:
            found = True
            step = {EXPAND_SHARE!r} * width
            x1 = g
            f1 = fg
            r1 = rg
            xa = min(x1 + step, hi_b)
            fa, ra, _xk = f(xa)
            if fa > f1:
                a0 = x1
                x1 = xa
                f1 = fa
                r1 = ra
                a2 = hi_b
                while x1 < hi_b:
                    step *= 2.0
                    xb = min(x1 + step, hi_b)
                    fb, rb, _xk = f(xb)
                    if fb > f1:
                        a0 = x1
                        x1 = xb
                        f1 = fb
                        r1 = rb
                    else:
                        a2 = xb
                        break
            else:
                a2 = xa
                xb = max(x1 - step, lo_b)
                fb, rb, _xk = f(xb)
                if fb > f1:
                    a2 = x1
                    x1 = xb
                    f1 = fb
                    r1 = rb
                    a0 = lo_b
                    while x1 > lo_b:
                        step *= 2.0
                        xc = max(x1 - step, lo_b)
                        fc, rc, _xk = f(xc)
                        if fc > f1:
                            a2 = x1
                            x1 = xc
                            f1 = fc
                            r1 = rc
                        else:
                            a0 = xc
                            break
                else:
                    a0 = xb
    if not found:
        use_grid = grid_size > 0 and not concave
        count = {COARSE_POINTS} if concave else scan_n
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
        for _step in range({BRENT_MAX_STEPS}):
            mid = 0.5 * (a + b)
            tol1 = 1.4901161193847656e-08 * abs(x) + tol_abs
            tol2 = 2.0 * tol1
            if abs(x - mid) <= tol2 - 0.5 * (b - a):
                break
            golden = True
            if abs(ee) > tol1:
                rr = (x - w) * (gx - gv)
                qq = (x - v) * (gx - gw)
                pp = (x - v) * qq - (x - w) * rr
                qq = 2.0 * (qq - rr)
                if qq > 0.0:
                    pp = -pp
                else:
                    qq = -qq
                r0 = ee
                ee = dd
                if abs(pp) < abs(0.5 * qq * r0) and pp > qq * (a - x) and pp < qq * (b - x):
                    dd = pp / qq
                    u = x + dd
                    if u - a < tol2 or b - u < tol2:
                        dd = tol1 if x < mid else -tol1
                    golden = False
            if golden:
                ee = (b - x) if x < mid else (a - x)
                dd = 0.3819660112501051 * ee
            if abs(dd) >= tol1:
                u = x + dd
            elif dd > 0.0:
                u = x + tol1
            else:
                u = x - tol1
            u = min(max(u, lo_b), hi_b)
            fu, ru, _xk = f(u)
            gu = -fu
            if gu <= gx:
                if u < x:
                    b = x
                else:
                    a = x
                v = w
                gv = gw
                w = x
                gw = gx
                x = u
                gx = gu
                fx = fu
                rx = ru
            else:
                if u < x:
                    a = u
                else:
                    b = u
                if gu <= gw or w == x:
                    v = w
                    gv = gw
                    w = u
                    gw = gu
                elif gu <= gv or v == x or v == w:
                    v = u
                    gv = gu
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
