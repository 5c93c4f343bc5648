"""The long table of a result document (``GET /v1/jobs/{id}/result?format=csv``).

One header row, then one row per point of the value function, in row-major
order over its axes (the last axis varies fastest).  The header follows the
result's ``axis_order``: a column per axis (by default the state variables,
then the shocks, a finite horizon's ``period`` first; ``model.axis_order``
sets another order; a tabular result has the one axis ``state_label``),
then ``value``, then a column per choice with the chosen value (a tabular
result's one choice is named ``action`` and holds action labels).  A choice
whose name repeats an earlier column gets ``_choice`` appended.  With taste
shocks a column per alternative follows, ``P(action=run)`` or
``P(replace=1, oil=0.5)``, its choice probability, when there are at most
:data:`MAX_PROBABILITY_COLUMNS` alternatives (the result holds them all).

Text cells that begin with ``=``, ``+``, ``-``, ``@``, a tab or a carriage
return (labels, names) get a leading ``'`` (:func:`csv_text`), so a
spreadsheet shows them as text instead of running them as formulas; numbers
are written as they are, a negative one included.
"""

from __future__ import annotations

import csv
import io
import itertools
from collections.abc import Iterator
from typing import Any

import numpy as np

__all__ = ["FORMULA_STARTS", "MAX_PROBABILITY_COLUMNS", "ROWS_PER_CHUNK", "csv_chunks", "csv_text", "table_columns"]

ROWS_PER_CHUNK = 4096
"""Rows formatted per chunk of the streamed CSV (rows)."""
FORMULA_STARTS = ("=", "+", "-", "@", "\t", "\r")
"""First characters that make a spreadsheet read a CSV cell as a formula (CSV injection)."""
MAX_PROBABILITY_COLUMNS = 64
"""Most alternatives whose choice probabilities get a column each (count; a wider table is unreadable)."""


def csv_text(value: Any) -> Any:
    """``value`` as a CSV cell: text that begins with one of :data:`FORMULA_STARTS` gets a leading ``'``;
    anything that is not text (a number, too) is returned unchanged."""
    if isinstance(value, str) and value.startswith(FORMULA_STARTS):
        return "'" + value
    return value


def table_columns(result: dict[str, Any]) -> tuple[list[str], list[np.ndarray]]:
    """Column names and flat (n,) columns of the long table of ``result``."""
    axes: dict[str, list[Any]] = result["axes"]
    if isinstance(result.get("axis_order"), list) and sorted(result["axis_order"]) == sorted(axes):
        axes = {name: axes[name] for name in result["axis_order"]}  # the stated order, whatever the key order
    value = np.asarray(result["value"], dtype=float)
    shape = tuple(len(values) for values in axes.values())
    if value.shape != shape:
        raise ValueError(f"value has shape {value.shape}, the axes give {shape}")
    names = list(axes)
    columns: list[np.ndarray] = []
    if names:
        grids = np.meshgrid(*(np.asarray(values, dtype=object) for values in axes.values()), indexing="ij")
        columns = [grid.ravel() for grid in grids]
    names.append(_unique("value", names))
    columns.append(value.ravel())
    for choice, chosen in (result.get("policy") or {}).items():
        column = np.asarray(chosen, dtype=object)
        if column.shape != shape:
            raise ValueError(f"policy {choice!r} has shape {column.shape}, the axes give {shape}")
        names.append(_unique(choice, names))
        columns.append(column.ravel())
    _probability_columns(result, value.size, names, columns)
    return names, columns


def _probability_columns(result: dict[str, Any], n: int, names: list[str], columns: list[np.ndarray]) -> None:
    """Append a column per alternative of ``choice_probabilities`` (taste shocks), when there are few enough."""
    probabilities = result.get("choice_probabilities")
    choices = ((result.get("diagnostics") or {}).get("taste_shocks") or {}).get("choices") or {}
    alternatives = int(np.prod([len(values) for values in choices.values()], dtype=np.int64)) if choices else 0
    if probabilities is None or not 0 < alternatives <= MAX_PROBABILITY_COLUMNS:
        return
    flat = np.asarray(probabilities, dtype=float).reshape(n, alternatives)
    for k, combination in enumerate(itertools.product(*choices.values())):
        label = ", ".join(f"{name}={value}" for name, value in zip(choices, combination))
        names.append(_unique(f"P({label})", names))
        columns.append(flat[:, k])


def _unique(name: str, taken: list[str]) -> str:
    while name in taken:
        name += "_choice"
    return name


def csv_chunks(result: dict[str, Any]) -> Iterator[str]:
    """The CSV text of the long table, in chunks of ``ROWS_PER_CHUNK`` rows."""
    names, columns = table_columns(result)
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow([csv_text(name) for name in names])
    n = len(columns[0]) if columns else 0
    for start in range(0, n, ROWS_PER_CHUNK):
        chunks = [column[start : start + ROWS_PER_CHUNK] for column in columns]
        chunks = [[csv_text(v) for v in chunk] if chunk.dtype == object else chunk for chunk in chunks]
        writer.writerows(zip(*chunks))
        yield buffer.getvalue()
        buffer.seek(0)
        buffer.truncate()
    if buffer.tell():
        yield buffer.getvalue()
