"""Finite-horizon documents the time estimate is measured on (``bench/bench_estimates.py --horizon``), each an
invented scenario solved by backward induction: a continuous choice with draws after it, a grid choice with
draws after it (each with and without params by period), a continuous choice with and without its hints, and
the glassblower example's hinted grid choice on a finer grid."""

from __future__ import annotations

import copy
from typing import Any

from tests._documents import aging_saver, grid_document
from tests._draw_models import van
from tests._estimate_set import example


def with_horizon(document: dict[str, Any], periods: int) -> dict[str, Any]:
    """``document`` (a copy) solved over ``periods`` periods, its terminal value 0 (the default), no reports."""
    document = copy.deepcopy(document)
    document["model"]["horizon"] = {"periods": periods}
    document.pop("report", None)
    return document


def retiree(points: int, periods: int = 20, by_period: bool = True) -> dict[str, Any]:
    """An invented retiree: spending chosen continuously from wealth, the return and a care bill drawn after the
    choice (the bill's odds fall with spending; with ``by_period`` they rise with age, and the pension and the
    survival chance discounting each year fall, params given per period).

    The structure of ``tests/worker/test_horizon_continuous_draws.py``'s retiree (its params in that order, its
    discount and terminal value expressions): the two compile one set of kernels (DEVELOPERS.md, the suite's time);
    only numbers and grid sizes differ, and whether a param is one number or one per period is a number too."""
    last = max(periods - 1, 1)
    if by_period:
        params = {"sick": [round(0.05 + 0.25 * t / last, 4) for t in range(periods)],
                  "pension": [0.4 if t < periods // 2 else 0.3 for t in range(periods)],
                  "survive": [round(0.99 - 0.09 * t / last, 4) for t in range(periods)], "care": 0.3}
    else:
        params = {"sick": 0.12, "pension": 0.4, "survive": 0.97, "care": 0.3}
    return {"version": 1, "discount": 0.96, "model": {
        "kind": "grid",
        "params": params,
        "states": {"wealth": {"min": 0.2, "max": 8.0, "points": points}},
        "shocks": {
            "ret": {"iid": {"values": [0.85, 1.03, 1.2], "probs": [0.25, 0.5, 0.25]}, "timing": "after_choice"},
            "bill": {"iid": {"values": [0.0, 0.6],
                             "probs": ["1 - sick * (1 - care * spend / wealth)", "sick * (1 - care * spend / wealth)"]},
                     "timing": "after_choice"},
        },
        "choices": {"spend": {"min": 0.05, "max": "wealth", "continuous": True, "points": 60}},
        "next": {"wealth": "min(max((wealth - spend) * ret + pension - bill, 0.2), 8.0)"},
        "reward": "log(spend)",
        "horizon": {"periods": periods, "discount": "discount * survive", "terminal_value": "3 * log(wealth + 0.5)"}}}


def aging_van(top: int, periods: int = 20) -> dict[str, Any]:
    """The invented van of ``tests._draw_models`` without taste shocks, its replacement price rising by period."""
    document = grid_document(van(scale=None, top=top), discount=0.95, tolerance=1e-6)
    model = document["model"]
    model["params"] = {"price": [round(7 + 0.1 * t, 3) for t in range(periods)]}
    model["reward"] = model["reward"].replace("replace * 7", "replace * price")
    return with_horizon(document, periods)


def horizon_shapes(small: bool = False) -> dict[str, dict[str, Any]]:
    """Name → document; ``small``: the quick sizes the test solves."""
    scale = 1 if not small else 4
    return {
        f"horizon_continuous_draws_{400 // scale}": retiree(400 // scale, by_period=False),
        f"horizon_grid_draws_{400 // scale}": with_horizon(
            grid_document(van(scale=None, top=400 // scale), discount=0.95, tolerance=1e-6), 20),
        f"horizon_continuous_draws_by_period_{400 // scale}": retiree(400 // scale),
        f"horizon_grid_draws_by_period_{400 // scale}": aging_van(400 // scale),
        f"horizon_continuous_unhinted_{1000 // scale}": household(1000 // scale, hinted=False),
        f"horizon_continuous_hinted_{1000 // scale}": household(1000 // scale),
        f"horizon_grid_hinted_by_period_{600 // scale}": glassblower(600 // scale),
    }


def household(points: int, hinted: bool = True) -> dict[str, Any]:
    """The invented household of ``tests._documents.aging_saver`` (savings chosen continuously over eight ages, an
    AR(1) income shock, the concave hint) on ``points`` savings points, with or without its hint, without reports:
    the kernels of tests/worker/test_horizon_egm.py and test_result_schema.py's continuous horizon."""
    document = aging_saver(None)
    document["model"]["states"]["a"]["points"] = points
    if not hinted:
        document["model"].pop("hints")
    document.pop("report")
    return document


def glassblower(points: int) -> dict[str, Any]:
    """The bundled glassblower example (a grid savings choice with both hints, params by period, 60 periods) on
    ``points`` savings points, without its cohort report."""
    document = example("glassblower_life_cycle")
    document["model"]["states"]["savings"]["points"] = points
    document.pop("report", None)
    return document
