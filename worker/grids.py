"""Grids for endogenous states and choices, and bracketing of points on them.

A grid is a float64 vector of shape ``(points,)``, strictly increasing, whose
first and last entries are exactly the requested ``min`` and ``max``.

Every builder takes ``path``, the document path of the grid being built (for
example ``"model.states.k"``); faults are raised as
:class:`worker.errors.InvalidDocument` at the offending field under it
(``model.states.k.points``), all faults of one grid in one exception.
"""

from __future__ import annotations

import math
import operator
from typing import Any

import numpy as np

from worker.arrays import decode_array
from worker.errors import InvalidDocument, join_path

__all__ = ["SPACINGS", "build_grid", "explicit_grid", "locate", "log_grid", "power_grid", "uniform_grid"]

SPACINGS = ("uniform", "log", "power")
"""Names accepted by :func:`build_grid`, as written in documents."""

DEFAULT_EXPONENT = 2.0
"""Exponent of ``power`` spacing when the document gives none (dimensionless)."""


def uniform_grid(lo: float, hi: float, points: int, *, path: str = "") -> np.ndarray:
    """Evenly spaced grid from ``lo`` to ``hi``; shape ``(points,)``."""
    lo, hi, points = _check_bounds(lo, hi, points, path)
    return _finish(np.linspace(lo, hi, points), lo, hi, path)


def log_grid(lo: float, hi: float, points: int, *, path: str = "") -> np.ndarray:
    """Geometrically spaced grid (constant ratio between neighbours); needs ``lo > 0``."""
    lo, hi, points = _check_bounds(lo, hi, points, path, positive=True)
    return _finish(np.geomspace(lo, hi, points), lo, hi, path)


def power_grid(
    lo: float, hi: float, points: int, exponent: float = DEFAULT_EXPONENT, *, path: str = ""
) -> np.ndarray:
    """Grid ``lo + (hi - lo) * u**exponent`` for ``u`` evenly spaced on [0, 1].

    ``exponent > 1`` packs points near ``lo`` (where value functions usually
    bend most), ``0 < exponent < 1`` near ``hi``, and ``1`` is uniform.
    """
    errors = _bound_errors(lo, hi, points, path)
    if not _is_real(exponent) or not math.isfinite(exponent) or exponent <= 0:
        message = f"the power-spacing exponent must be a positive number, got {exponent!r}"
        errors.append(_fault(path, "exponent", message))
    if errors:
        raise InvalidDocument(errors)
    lo, hi, points = float(lo), float(hi), operator.index(points)
    unit = np.linspace(0.0, 1.0, points) ** float(exponent)
    return _finish(lo + (hi - lo) * unit, lo, hi, path)


def build_grid(
    spacing: str, lo: float, hi: float, points: int, exponent: float = DEFAULT_EXPONENT, *, path: str = ""
) -> np.ndarray:
    """Build a grid by its spacing name (``uniform``, ``log`` or ``power``).

    Returns
    -------
    grid : (points,) float64, strictly increasing, ``grid[0] == lo``, ``grid[-1] == hi``.

    Raises
    ------
    InvalidDocument
        With every fault found, at ``path.min``, ``path.max``, ``path.points``,
        ``path.spacing`` or ``path.exponent``.
    """
    if spacing == "uniform":
        return uniform_grid(lo, hi, points, path=path)
    if spacing == "log":
        return log_grid(lo, hi, points, path=path)
    if spacing == "power":
        return power_grid(lo, hi, points, exponent, path=path)
    choices = ", ".join(SPACINGS)
    raise InvalidDocument.at(join_path(path, "spacing"), f"unknown spacing {spacing!r}; use one of {choices}")


def explicit_grid(values: Any, *, path: str = "", min_points: int = 2) -> np.ndarray:
    """Validate explicitly listed grid values: finite, strictly increasing, at least ``min_points``.

    Faults are reported at ``path.values`` (with the index of the first
    offending entry).  Returns a new float64 array of shape ``(len(values),)``.
    """
    where = join_path(path, "values")
    grid = decode_array(values, path=where)
    if grid.ndim != 1:
        raise InvalidDocument.at(where, f"grid values must be a flat list of numbers, got shape {list(grid.shape)}")
    if grid.size < min_points:
        raise InvalidDocument.at(where, f"a grid needs at least {min_points} values, got {grid.size}")
    bad = np.flatnonzero(np.diff(grid) <= 0)
    if bad.size:
        i = int(bad[0]) + 1
        raise InvalidDocument.at(
            join_path(where, i), f"grid values must be strictly increasing: {grid[i]!r} follows {grid[i - 1]!r}"
        )
    return grid


def locate(grid: np.ndarray, x: Any) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Bracket points on a grid for linear interpolation.

    Parameters
    ----------
    grid : (n,) float64, strictly increasing, ``n >= 2``.
    x : array_like of any shape
        Points to bracket.  Points outside ``[grid[0], grid[-1]]`` are clamped
        to the nearer end; NaN points give NaN weights.

    Returns
    -------
    lower : int64, shape of ``x``
        ``i`` in ``[0, n - 2]`` with ``grid[i] <= x <= grid[i + 1]`` (after clamping).
    weight : float64, shape of ``x``
        ``w`` in ``[0, 1]`` with ``x == (1 - w) * grid[i] + w * grid[i + 1]``.
    clamped : bool, shape of ``x``
        True where ``x`` lay outside the grid.

    Notes
    -----
    Besides the three outputs, peak extra memory is one float64 array of the
    size of ``x`` (the gathered interval widths).
    """
    grid = np.asarray(grid, dtype=np.float64)
    if grid.ndim != 1 or grid.size < 2:
        raise ValueError(f"locate needs a 1-d grid of at least 2 points, got shape {grid.shape}")
    if not np.all(grid[1:] > grid[:-1]):
        raise ValueError("locate needs a strictly increasing grid")
    points = np.asarray(x, dtype=np.float64)
    shape = points.shape
    flat = points.reshape(-1)

    # side="right" puts a point equal to grid[i] in interval i, so grid points get weight 0.
    lower = np.searchsorted(grid, flat, side="right")
    lower -= 1
    np.clip(lower, 0, grid.size - 2, out=lower)
    weight = np.take(grid, lower)
    np.subtract(flat, weight, out=weight)
    weight /= np.take(np.diff(grid), lower)
    np.clip(weight, 0.0, 1.0, out=weight)

    clamped = flat < grid[0]
    clamped |= flat > grid[-1]
    return lower.reshape(shape), weight.reshape(shape), clamped.reshape(shape)


def _is_real(value: Any) -> bool:
    return isinstance(value, (int, float, np.integer, np.floating)) and not isinstance(value, (bool, np.bool_))


def _is_count(value: Any) -> bool:
    return isinstance(value, (int, np.integer)) and not isinstance(value, (bool, np.bool_))


def _fault(path: str, field: str, message: str) -> dict[str, str]:
    return {"path": join_path(path, field), "message": message}


def _bound_errors(lo: Any, hi: Any, points: Any, path: str, positive: bool = False) -> list[dict[str, str]]:
    errors = []
    ends_ok = True
    for field, end in (("min", lo), ("max", hi)):
        if not _is_real(end) or not math.isfinite(end):
            errors.append(_fault(path, field, f"{field} must be a finite number, got {end!r}"))
            ends_ok = False
    if ends_ok and lo >= hi:
        errors.append(_fault(path, "max", f"max ({hi!r}) must be greater than min ({lo!r})"))
    if ends_ok and positive and lo <= 0:
        message = f"log spacing needs min > 0 (non-positive numbers have no logarithm), got {lo!r}"
        errors.append(_fault(path, "min", message))
    if not _is_count(points):
        errors.append(_fault(path, "points", f"points must be a whole number, got {points!r}"))
    elif points < 2:
        errors.append(_fault(path, "points", f"a grid needs at least 2 points, got {points}"))
    return errors


def _check_bounds(lo: Any, hi: Any, points: Any, path: str, positive: bool = False) -> tuple[float, float, int]:
    errors = _bound_errors(lo, hi, points, path, positive)
    if errors:
        raise InvalidDocument(errors)
    return float(lo), float(hi), operator.index(points)


def _finish(grid: np.ndarray, lo: float, hi: float, path: str) -> np.ndarray:
    # Rounding inside linspace/geomspace/power can miss the ends by an ulp; the contract is exact ends.
    grid[0], grid[-1] = lo, hi
    if not np.all(grid[1:] > grid[:-1]):
        raise InvalidDocument.at(
            join_path(path, "points"),
            f"{grid.size} points between {lo!r} and {hi!r} are too close together to tell apart in float64",
        )
    return grid
