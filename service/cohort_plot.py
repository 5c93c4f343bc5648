"""The life-cycle picture of a finite-horizon job: the cohort's mean of each state and choice by period.

It reads the result's ``cohort.means`` (``report.cohort``; see the README, "Finite horizons"):
one line per state variable and choice against the period, shocks left out (their means follow
their chain, not the decisions).  Drawn with the look of :mod:`service.plots`.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from service.plots import PALETTE, Format, _figure, _finish
from service.problems import Problem

__all__ = ["life_cycle_plot", "life_cycle_series"]


def life_cycle_series(result: dict[str, Any], document: dict[str, Any] | None) -> dict[str, list[float]]:
    """The cohort's means by period of the state variables and choices (shocks left out); empty without a cohort."""
    means = (result.get("cohort") or {}).get("means") or {}
    shocks = set(((document or {}).get("model") or {}).get("shocks") or {})
    return {name: values for name, values in means.items() if name not in shocks}


def life_cycle_plot(
    result: dict[str, Any], document: dict[str, Any] | None, *, title: str | None = None, fmt: Format = "svg"
) -> bytes:
    """Means by period of the cohort (``report.cohort``), one line per state variable and choice; 404 without one."""
    series = life_cycle_series(result, document)
    if not series:
        raise Problem(404, "not-found", "this result has no cohort to plot (report.cohort, with model.horizon)")
    fig, ax = _figure()
    periods = np.asarray((result.get("axes") or {}).get("period") or [], dtype=float)
    for j, (name, values) in enumerate(series.items()):
        y = np.asarray(values, dtype=float)
        ax.plot(periods[: y.size] if periods.size >= y.size else np.arange(y.size), y,
                color=PALETTE[j % len(PALETTE)], lw=1.8, label=name, gid=f"series-{name}")
    ax.legend(frameon=False, fontsize=8.5, loc="best")
    ax.set_xlabel("period")
    ax.set_ylabel("mean over the cohort")
    ax.xaxis.get_major_locator().set_params(integer=True)
    return _finish(fig, ax, title, fmt)
