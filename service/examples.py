"""The bundled example problems: invented scenarios to start from.

Each example is one problem document in ``service/examples/NAME.json``;
``NAME`` is its file stem.  The documents are read from the installed package
on every call (they are a few kilobytes), so an edited file is seen at once
and callers may change what they get without touching anyone else's copy.

Used by ``GET /v1/examples`` and by the ``fixq examples`` command.
"""

from __future__ import annotations

import json
import re
from pathlib import Path
from typing import Any

__all__ = ["DESCRIPTIONS", "EXAMPLES_DIR", "UnknownExample", "example_names", "list_examples", "load_example"]

EXAMPLES_DIR = Path(__file__).with_name("examples")
"""Folder holding one ``NAME.json`` problem document per example."""

_NAME = re.compile(r"^[a-z][a-z0-9_]*$")

# The problem document has no free-text field beyond its label, so the longer
# description of each example lives here (tests check that the two lists match).
DESCRIPTIONS: dict[str, str] = {
    "beekeeper_savings": (
        "A beekeeper splits her savings and this season's honey income between spending and savings for next "
        "season; harvests swing with persistent weather and she cannot borrow. Next season's savings is a "
        "continuous choice (monotone cubic interpolation), with Euler-equation errors and the long-run distribution."
    ),
    "bike_shop_inventory": (
        "A bicycle repair shop orders inner tubes each week (a fixed delivery fee on any order) and sets their "
        "price before the week's demand is seen: demand is drawn after the choice, and a higher price makes low "
        "demand more likely. Unsold tubes are kept at a holding cost."
    ),
    "courier_van_replacement": (
        "A courier firm decides each month whether to replace a delivery van; upkeep grows with the odometer and "
        "the old van's resale value falls with it. Taste shocks (things the analyst does not see) make the decision "
        "random: the result carries the replacement probability at every odometer reading and route load."
    ),
    "fishery_harvest": (
        "A fishery sets this season's harvest; the stock left behind regrows logistically, "
        "scaled by this season's ocean conditions (a law of motion given in next)."
    ),
    "glassblower_life_cycle": (
        "A self-employed glassblower from age 25 to 84: earnings rise and ease with age and swing with orders, "
        "a pension replaces them from 65, the chance of surviving each year falls with age and discounts the "
        "future, and what is left behind counts as a bequest. A finite horizon solved by backward induction: "
        "value and savings by age."
    ),
    "household_saving": (
        "A household splits cash on hand between consumption and saving under persistent income risk; "
        "it cannot borrow more than 1 (the lowest asset level)."
    ),
    "machine_replacement": (
        "A machine shop runs a lathe that wears out at random; running costs rise with wear "
        "and a replacement costs 30 (a tabular model with sparse transitions)."
    ),
    "plant_capacity": (
        "A plant chooses next year's capacity under persistent demand shocks: it sells the smaller of "
        "capacity and demand, pays upkeep, cannot disinvest, and pays a convex cost of expanding (monotone hint)."
    ),
    "roastery_growth": (
        "A coffee roastery chooses its roasting capacity and its marketing; marketing grows a customer base "
        "that churns (two endogenous state variables, so its plots are heatmaps)."
    ),
    "translator_contracts": (
        "A freelance translator living on one-off jobs weighs the monthly contract offers that arrive "
        "in most months; a contract may end any month, and she may also quit one: a search model "
        "with a reservation fee."
    ),
}


class UnknownExample(LookupError):
    """Raised by :func:`load_example` for a name that is not a bundled example."""

    def __init__(self, name: str) -> None:
        self.name = name
        super().__init__(f"no example named {name!r}; the examples are: {', '.join(example_names())}")


def example_names() -> list[str]:
    """Names of the bundled examples, sorted."""
    return sorted(path.stem for path in EXAMPLES_DIR.glob("*.json") if _NAME.match(path.stem))


def load_example(name: str) -> dict[str, Any]:
    """The problem document of one example, as a fresh dict.

    Raises
    ------
    UnknownExample
        when ``name`` is not one of :func:`example_names`.
    """
    if not _NAME.match(name):
        raise UnknownExample(name)
    path = EXAMPLES_DIR / f"{name}.json"
    if not path.is_file():
        raise UnknownExample(name)
    return json.loads(path.read_text(encoding="utf-8"))


def list_examples() -> list[dict[str, Any]]:
    """One summary per example: ``name``, ``label``, ``tags``, ``kind``, ``points``, ``description``.

    ``points`` is the number of points of the value function (tabular: the
    number of states; grid: the product of the state and shock grid sizes),
    which says at a glance how big the example is.
    """
    return [_summary(name, load_example(name)) for name in example_names()]


def _summary(name: str, document: dict[str, Any]) -> dict[str, Any]:
    model = document.get("model") or {}
    return {
        "name": name,
        "label": document.get("label", name),
        "tags": list(document.get("tags") or []),
        "kind": model.get("kind"),
        "points": _point_count(model),
        "description": DESCRIPTIONS.get(name, ""),
    }


def _point_count(model: dict[str, Any]) -> int | None:
    if model.get("kind") == "tabular":
        states = model.get("states")
        return states if isinstance(states, int) else len(states or [])
    count = 1
    shocks = [shock for shock in (model.get("shocks") or {}).values() if shock.get("timing") != "after_choice"]
    for axis in (*(model.get("states") or {}).values(), *shocks):
        count *= _axis_size(axis)
    return count


def _axis_size(axis: dict[str, Any]) -> int:
    if "values" in axis:
        return len(axis["values"])
    if "points" in axis:
        return int(axis["points"])
    for family in ("ar1", "markov", "iid"):
        if family in axis:
            spec = axis[family]
            return int(spec["points"]) if "points" in spec else len(spec["values"])
    return 1
