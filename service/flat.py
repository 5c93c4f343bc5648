"""Flat arrays in a result document (``GET /v1/jobs/{id}/result?arrays=flat&order=...``).

Nested JSON lists are awkward in the column-major languages (R, Julia, MATLAB/Octave, Fortran): their
decoders build lists of lists, or arrays with the axes reversed.  In the flat form every numeric array of
the result — the arrays over the value's axes (``value``, each ``policy`` and ``policy_index``,
``choice_probabilities``, ``stationary.distribution``, ``cohort.distribution``) whatever their rank, and any
other numeric array of two or more dimensions (the Euler-error profile, ...) — becomes

    {"shape": [n_1, ..., n_d], "order": "row_major" | "column_major", "data": [flat numbers]}

with ``data`` the elements with the last index fastest (``row_major``, numpy's ``order="C"``) or the first
index fastest (``column_major``, numpy's ``order="F"``, and the memory order of R, Julia and MATLAB arrays),
so ``array(x$data, dim = x$shape)`` in R, ``reshape(x["data"], x["shape"]...)`` in Julia and
``reshape(x.data, x.shape)`` in MATLAB/Octave (after a ``[x.shape(:)', 1]`` for one axis) give the array with
the axes in ``axis_order``.  Null entries (missing values) stay null.  Everything else of the result,
``axes`` and ``axis_order`` included, is unchanged.
"""

from __future__ import annotations

from typing import Any

import numpy as np

__all__ = ["ORDERS", "flat_result", "flatten"]

ORDERS = {"row_major": "C", "column_major": "F"}
"""The ``order`` query values and numpy's names for them (the packed arrays of documents use the same words)."""

_VALUE_ARRAYS = ("value", "choice_probabilities")
_VALUE_ARRAY_MAPS = ("policy", "policy_index")
_DISTRIBUTIONS = ("stationary", "cohort")


def flat_result(result: dict[str, Any], order: str = "row_major") -> dict[str, Any]:
    """``result`` with every numeric array in the flat form (see the module docstring); a new dict."""
    if order not in ORDERS:
        raise ValueError(f"order must be one of {', '.join(ORDERS)}, not {order!r}")
    out: dict[str, Any] = {}
    for key, node in result.items():
        if key in _VALUE_ARRAYS:
            out[key] = flatten(node, order, any_rank=True)
        elif key in _VALUE_ARRAY_MAPS and isinstance(node, dict):
            out[key] = {name: flatten(array, order, any_rank=True) for name, array in node.items()}
        elif key in _DISTRIBUTIONS and isinstance(node, dict):
            out[key] = {name: flatten(part, order, any_rank=True) if name == "distribution" else _walk(part, order)
                        for name, part in node.items()}
        elif key in ("axes", "axis_order"):
            out[key] = node
        else:
            out[key] = _walk(node, order)
    return out


def flatten(node: Any, order: str, *, any_rank: bool = False) -> Any:
    """``node`` as ``{"shape", "order", "data"}`` when it is a rectangular numeric array (of two or more
    dimensions unless ``any_rank``); else ``node`` unchanged."""
    if not isinstance(node, list) or not (any_rank or (node and isinstance(node[0], list))):
        return node
    array = _numeric(node)
    if array is None:
        return node
    return {"shape": list(array.shape), "order": order, "data": array.ravel(order=ORDERS[order]).tolist()}


def _walk(node: Any, order: str) -> Any:
    if isinstance(node, dict):
        return {key: _walk(value, order) for key, value in node.items()}
    if isinstance(node, list):
        flat = flatten(node, order)
        if flat is not node:
            return flat
        return [_walk(item, order) for item in node]
    return node


def _numeric(nested: list) -> np.ndarray | None:
    """The nested lists as an array when rectangular with numbers (or nulls) at every leaf, else None."""
    try:
        array = np.asarray(nested)
    except ValueError:  # ragged
        return None
    if array.dtype.kind in "fiu":
        return array
    if array.dtype.kind != "O" or array.size == 0:
        return array if array.size == 0 and array.dtype.kind == "f" else None
    leaves = array.ravel()
    ok = all(leaf is None or (isinstance(leaf, (int, float)) and not isinstance(leaf, bool)) for leaf in leaves)
    return array if ok else None
