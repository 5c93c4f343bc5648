"""The progress line of ``fixq submit --wait`` on a search: each trial shows its unknowns and residuals (a
trial's log entry carries no distance; before, the line read "distance nan")."""

from __future__ import annotations

import io

from service import progress


def _trial_entry(number: int, residuals: list[float], certified: bool) -> dict:
    # Shaped as worker/search.py writes a trial's log entry.
    row = {"unknowns": {"r": 0.0329368, "tau": 0.15}, "residuals": residuals, "inner_tolerance": 1e-8,
           "inner_status": "converged", "iterations": 41, "error_bound": 3.2e-9, "stationary_residual": 1e-13,
           "certified": certified, "seconds": 0.2}
    return {"iteration": number, "error_bound": row["error_bound"], "seconds": 1.5, "search_trial": row}


def test_a_trial_line_shows_its_residuals_not_a_distance() -> None:
    stream = io.StringIO()
    bar = progress.ProgressBar(stream, tolerance=1e-8)
    bar.update(_trial_entry(3, [1.0154e-07, -0.0042], certified=True))
    bar.close()
    line = stream.getvalue()
    assert "nan" not in line and "distance" not in line
    assert "trial      3" in line
    assert "r = 0.0329368, tau = 0.15" in line
    assert "residuals 1.02e-07, -0.0042" in line
    assert "certifying" in line


def test_a_guiding_trial_says_so_and_a_plain_solve_keeps_its_distance() -> None:
    stream = io.StringIO()
    bar = progress.ProgressBar(stream, tolerance=1e-8)
    bar.update(_trial_entry(1, [float("nan")], certified=False))
    bar.close()
    assert "guiding" in stream.getvalue() and "residuals nan" in stream.getvalue()
    stream = io.StringIO()
    bar = progress.ProgressBar(stream, tolerance=1e-6)
    bar.update({"iteration": 4, "distance": 0.25, "error_bound": 2.5})
    bar.close()
    assert "distance 2.500e-01" in stream.getvalue()
