"""How ``GET /v1/jobs/{id}/result`` is described: the result document's schema and the CSV table.

The OpenAPI description of the route names :class:`worker.result_document.ResultDocument` for
``application/json`` and describes the long table for ``text/csv`` (:data:`CSV_TABLE`); the README's
reference of the result document (``python -m service.docref``) says the same from the same sources.
This is documentation only: the route sends the stored result as it is, with no validation or
re-encoding through the models (a result can be hundreds of MB).
"""

from __future__ import annotations

from typing import Any

from service.tables import MAX_PROBABILITY_COLUMNS
from worker.result_document import ResultDocument

__all__ = ["CSV_TABLE", "RESULT_RESPONSES"]

CSV_TABLE = (
    "The long table (`?format=csv`, or `Accept: text/csv`): a header, then one row per point of value, in the "
    "order of value's nested lists (C order: the last axis varies fastest). The columns: one per axis, in the "
    "order of axes (tabular: state_label; finite horizon: period first), then value, then one per choice with "
    "its chosen value (tabular: action, with the action labels); a choice whose name repeats an earlier column "
    "gets _choice appended. With taste shocks and at most "
    f"{MAX_PROBABILITY_COLUMNS} combinations of the choices, a column per combination follows with its choice "
    "probability, headed P(action=run) or P(replace=1, oil=0.5). Text cells that begin with =, +, -, @, a tab or "
    "a carriage return get a leading ' so that spreadsheets do not run them as formulas."
)
"""What the CSV form of a result holds (``service.tables`` writes it)."""

RESULT_RESPONSES: dict[int | str, dict[str, Any]] = {
    200: {
        "model": ResultDocument,
        "description": "The result document (JSON), or the long table (CSV).",
        "content": {"text/csv": {"schema": {"type": "string", "description": CSV_TABLE}}},
    },
}
"""The ``responses`` of the result route: the JSON schema from the models, the CSV described (documentation
only; FastAPI neither validates nor re-encodes the Response the route returns)."""
