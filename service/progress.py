"""The terminal progress line of ``fixq submit --wait``: iteration, distance, error bound and a bar
(a finite horizon: the period and how many periods are done; a search: each trial's unknowns and residuals)."""

from __future__ import annotations

import math
import time
from typing import Any, TextIO

from service.job_text import trial_line

__all__ = ["PROGRESS_EVERY_S", "ProgressBar"]

PROGRESS_EVERY_S = 2.0
"""Seconds between two progress lines when stderr is not a terminal."""


class ProgressBar:
    """Convergence progress on a terminal line: iteration, distance, error bound.

    The bar fills as the error bound falls from its first value to the
    tolerance, on a log scale (each iteration shrinks it by about β).
    """

    WIDTH = 24

    def __init__(self, stream: TextIO, tolerance: float) -> None:
        self.stream = stream
        self.tolerance = tolerance
        self.first_bound: float | None = None
        self.live = stream.isatty()
        self.last_print = 0.0
        self.printed = False
        self.pending: str | None = None

    def fraction(self, bound: float) -> float:
        """Share of the way from the first error bound to the tolerance, in [0, 1]."""
        if self.first_bound is None or bound <= self.tolerance:
            return 1.0 if bound <= self.tolerance else 0.0
        span = math.log(self.first_bound / self.tolerance)
        if span <= 0:
            return 1.0
        return min(1.0, max(0.0, math.log(self.first_bound / bound) / span))

    def update(self, entry: dict[str, Any]) -> None:
        """Show one convergence-log entry."""
        bound = entry.get("error_bound")
        if bound is None or not math.isfinite(bound):
            bound = math.inf
        elif self.first_bound is None and bound > 0:
            self.first_bound = bound
        periods = entry.get("periods")
        trial = entry.get("search_trial")
        if isinstance(trial, dict):
            # A search's trial: a whole solve with no distance; its residuals say how near it came.
            line = trial_line(entry.get("iteration", "?"), trial)
        elif isinstance(periods, int) and periods > 0:
            # A finite horizon: the bar fills by periods done, from the last period back to period 0.
            done = int(entry.get("iteration", 0))
            filled = round(min(1.0, done / periods) * self.WIDTH)
            line = (
                f"period {entry.get('period', '?'):>6}  ({done} of {periods} done)  "
                f"error bound {bound:9.3e}  [{'#' * filled}{'.' * (self.WIDTH - filled)}]"
            )
        else:
            filled = round(self.fraction(bound) * self.WIDTH)
            line = (
                f"iteration {entry.get('iteration', '?'):>6}  distance {entry.get('distance', math.nan):9.3e}  "
                f"error bound {bound:9.3e}  [{'#' * filled}{'.' * (self.WIDTH - filled)}]"
            )
        now = time.monotonic()
        if self.live:
            self.stream.write("\r" + line)
            self.stream.flush()
            self.printed = True
        elif now - self.last_print >= PROGRESS_EVERY_S:
            self.stream.write(line + "\n")
            self.stream.flush()
            self.last_print = now
            self.pending = None
        else:
            self.pending = line

    def close(self) -> None:
        """End the progress line (or print the last entry not yet shown)."""
        if self.live and self.printed:
            self.stream.write("\n")
        elif self.pending is not None:
            self.stream.write(self.pending + "\n")
        self.stream.flush()
