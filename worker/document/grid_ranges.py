"""Faults of a grid given by its range (``min``, ``max``, ``points``, ``spacing``, ``exponent``), from closed forms."""

from __future__ import annotations

import math
from typing import Any

from worker.document._faults import Fault, fault, number

__all__ = ["grid_gap_fault", "range_faults"]


def grid_gap_fault(spacing: str, lo: float, hi: float, points: int, exponent: float) -> Fault | None:
    """A fault when the grid's closest neighbours would be indistinguishable in float64.

    Computed from the closed-form smallest gap, so no grid is built.
    """
    step = 1.0 / (points - 1)
    if spacing == "log":
        gap = lo * math.expm1(math.log(hi / lo) * step)
    elif spacing == "power" and exponent >= 1:
        gap = (hi - lo) * step**exponent
    elif spacing == "power":
        gap = (hi - lo) * -math.expm1(exponent * math.log1p(-step)) if points > 2 else hi - lo
    else:
        gap = (hi - lo) * step
    # Four ulps of the largest magnitude on the grid: below that, rounding can
    # merge or reorder neighbouring points.
    if not gap > 4 * math.ulp(max(abs(lo), abs(hi))):
        return fault(
            "points",
            f"{points:,} points between {number(lo)} and {number(hi)} would lie too close together to tell apart in "
            "float64",
        )
    return None


def range_faults(part: Any, *, other: str, default_exponent: float) -> list[Fault]:
    """Faults of a grid given by ``min``, ``max``, ``points``, ``spacing``, ``exponent``.

    Fills in the defaults (``spacing`` uniform; ``exponent`` for power) on ``part``.
    """
    faults = [
        fault(key, f"missing `{key}`: a grid needs min, max and points ({other})")
        for key in ("min", "max", "points")
        if getattr(part, key) is None
    ]
    spacing = part.spacing or "uniform"
    if part.exponent is not None and spacing != "power":
        faults.append(fault("exponent", f'exponent is used only with spacing "power", not "{spacing}"'))
    if faults:
        return faults
    if part.min >= part.max:
        faults.append(fault("max", f"max ({number(part.max)}) must be greater than min ({number(part.min)})"))
    elif spacing == "log" and part.min <= 0:
        faults.append(
            fault(
                "min",
                "log spacing needs min > 0 (there are no logarithms of zero or negative numbers), got "
                f"{number(part.min)}",
            )
        )
    else:
        exponent = part.exponent if part.exponent is not None else default_exponent
        gap = grid_gap_fault(spacing, part.min, part.max, part.points, exponent)
        faults += [gap] if gap else []
    part.spacing = spacing
    if spacing == "power" and part.exponent is None:
        part.exponent = default_exponent
    return faults
