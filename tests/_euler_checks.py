"""Checks of Euler-equation errors shared by the tests of several choices."""

from __future__ import annotations

import math
from typing import Any

import pytest

from worker.euler import TEST_POINTS_PER_GRID_POINT


def assert_each_choice_off_by(errors: dict[str, Any], cases: tuple[tuple[str, int, int, float], ...],
                              shock_points: int, exact: bool) -> None:
    """Each choice's entry of ``errors["by_choice"]`` for a policy off the exact one by a known factor: ``cases``
    holds ``(choice, its grid's points, the other grid's points, |1 − c̃/c| at every point)``; with ``exact``
    (the exact policy itself) the errors are at rounding level instead.  Every test point measured, none
    constrained or undefined."""
    for choice, size, other, gap in cases:
        own = errors["by_choice"][choice]
        assert own["constrained"] == 0 and own["undefined"] == 0
        assert own["points"] >= TEST_POINTS_PER_GRID_POINT * size * other * shock_points
        if exact:  # rounding level
            assert own["max_log10"] < -13
        else:
            assert own["max_log10"] == pytest.approx(math.log10(gap), abs=1e-9)
            assert own["mean_log10"] == pytest.approx(math.log10(gap), abs=1e-9)
