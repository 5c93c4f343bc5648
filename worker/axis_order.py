"""The order of a result's array axes: ``axis_order``, and ``model.axis_order`` applied at the output boundary.

The numerics keep one internal layout: the states in the order the document lists them, then the shocks
(a finite horizon's ``period`` before them).  A result states that order as ``axis_order``; a grid document
that gives ``model.axis_order`` (a permutation of its states and shocks) gets every array over the value's
axes transposed to it here, once the result is built, and arrays it sends in that layout
(``solver.initial.values``, ``report.cohort.distribution``) are transposed back into the internal layout by
:func:`to_internal` where they are read.  So nothing in the numerics depends on the order, and a client whose
JSON decoder does not keep key order still knows which axis is which.

Arrays that follow the order: ``value``, each ``policy`` and ``policy_index``, ``choice_probabilities`` (the
value's axes, then the choices), ``stationary.distribution``, ``cohort.distribution`` (period first), and the
shock columns of ``diagnostics.euler_errors.profile.log10_error`` (rows are points of the chosen state; the
columns run over the shocks' points in row-major order of the shocks as ``axis_order`` lists them).
"""

from __future__ import annotations

import math
from typing import Any, Sequence

import numpy as np

__all__ = ["PERIOD_AXIS", "apply_axis_order", "cohort_in_internal_layout", "model_axis_order", "to_internal"]

PERIOD_AXIS = "period"
"""The first axis of a finite-horizon result's value and policy (its values: the periods, from 0)."""


def model_axis_order(model: Any) -> list[str] | None:
    """``model.axis_order`` of a validated model, or None (tabular models, or not given)."""
    order = getattr(model, "axis_order", None)
    return None if order is None else list(order)


def apply_axis_order(result: dict[str, Any], order: Sequence[str] | None = None) -> dict[str, Any]:
    """The result with ``axis_order`` after ``axes``, its arrays transposed to ``order`` when given.

    Parameters
    ----------
    result : dict
        A result document whose ``axes`` list the axes in the current layout of its arrays (``period`` first
        under a horizon).
    order : sequence of str, optional
        The wanted order of the axes other than ``period`` (all of them, each once); None keeps the layout.

    Returns
    -------
    dict
        A new dict (the arrays not transposed are shared with ``result``).
    """
    axes = result.get("axes") or {}
    names = list(axes)
    lead = names[:1] if names[:1] == [PERIOD_AXIS] else []
    current = names[len(lead):]
    wanted = [name for name in (order or current) if name != PERIOD_AXIS]
    if sorted(wanted) != sorted(current):
        raise ValueError(f"axis order {wanted} is not a permutation of the result's axes {current}")
    out = dict(result)
    if wanted != current:
        _transpose_arrays(out, [current.index(name) for name in wanted], len(lead), current, wanted)
    reordered = {**{name: axes[name] for name in lead}, **{name: axes[name] for name in wanted}}
    done: dict[str, Any] = {}
    for key, value in out.items():
        if key == "axis_order":
            continue
        done[key] = reordered if key == "axes" else value
        if key == "axes":
            done["axis_order"] = list(reordered)
    return done


def to_internal(array: np.ndarray, order: Sequence[str] | None, sizes: dict[str, int]) -> np.ndarray:
    """An array sent in the layout of ``order`` (or flat, row-major over it) in the internal layout.

    ``sizes``: each axis's length in the internal order (``GridModel.axis_sizes``).  An array of any other
    shape comes back unchanged, for the caller's shape check to refuse.
    """
    internal = list(sizes)
    if order is None or list(order) == internal:
        return array
    shape = tuple(sizes[name] for name in order)
    back = [list(order).index(name) for name in internal]
    if array.shape == (math.prod(shape),):
        return np.ascontiguousarray(np.transpose(array.reshape(shape), back)).reshape(-1)
    if array.shape != shape:
        return array
    return np.ascontiguousarray(np.transpose(array, back))


def cohort_in_internal_layout(spec: Any, model: Any, problem: Any) -> Any:
    """``report.cohort`` with its ``distribution`` (sent in ``model.axis_order``'s layout) in the internal one."""
    order = model_axis_order(model)
    if spec is None or order is None or getattr(spec, "distribution", None) is None:
        return spec
    sizes = {name: len(values) for name, values in problem.axes.items()}
    distribution = to_internal(np.asarray(spec.distribution, dtype=np.float64), order, sizes)
    return spec.model_copy(update={"distribution": distribution})


def _transpose_arrays(out: dict[str, Any], perm: list[int], lead: int, current: list[str], wanted: list[str]) -> None:
    """Transpose every array over the value's axes in ``out`` by ``perm`` (after ``lead`` leading axes)."""
    full = list(range(lead)) + [lead + p for p in perm]
    rank = lead + len(perm)
    out["value"] = _moved(out.get("value"), full, rank)
    for key in ("policy", "policy_index"):
        if isinstance(out.get(key), dict):
            out[key] = {name: _moved(array, full, rank) for name, array in out[key].items()}
    if out.get("choice_probabilities") is not None:
        out["choice_probabilities"] = _moved(out["choice_probabilities"], full, rank, trailing=True)
    if isinstance(out.get("stationary"), dict) and "distribution" in out["stationary"]:
        out["stationary"] = {**out["stationary"],
                             "distribution": _moved(out["stationary"]["distribution"], perm, len(perm))}
    if isinstance(out.get("cohort"), dict) and "distribution" in out["cohort"]:
        out["cohort"] = {**out["cohort"], "distribution": _moved(out["cohort"]["distribution"], full, rank)}
    diagnostics = out.get("diagnostics")
    euler = diagnostics.get("euler_errors") if isinstance(diagnostics, dict) else None
    profile = euler.get("profile") if isinstance(euler, dict) else None
    if isinstance(profile, dict) and profile.get("log10_error") is not None and profile.get("state") in current:
        states = [profile["state"], *(profile.get("over") or [])]
        columns = _profile_columns(profile["log10_error"], states, current, wanted, out.get("axes") or {})
        out["diagnostics"] = {**diagnostics, "euler_errors": {**euler, "profile": {**profile, "log10_error": columns}}}


def _array(nested: Any) -> np.ndarray:
    array = np.asarray(nested)
    return array if array.dtype.kind in "fiub" else np.asarray(nested, dtype=object)


def _moved(nested: Any, perm: list[int], rank: int, *, trailing: bool = False) -> Any:
    """Nested lists transposed by ``perm`` over their first ``rank`` axes (and any ``trailing`` ones after)."""
    if nested is None:
        return None
    array = _array(nested)
    if array.ndim < rank or (array.ndim != rank and not trailing):
        return nested
    return np.transpose(array, [*perm, *range(rank, array.ndim)]).tolist()


def _profile_columns(rows: Any, states: list[str], current: list[str], wanted: list[str],
                     axes: dict[str, Any]) -> Any:
    """The Euler profile's shock columns (flat, row-major over the shocks) reordered as ``wanted`` lists them;
    ``states`` are the profile's state and the states it takes the worst over (not columns)."""
    shocks = [name for name in current if name not in states]
    ordered = [name for name in wanted if name not in states]
    if shocks == ordered:
        return rows
    array = _array(rows)
    sizes = [len(axes[name]) for name in shocks]
    blocks = array.reshape(array.shape[0], *sizes)
    moved = np.transpose(blocks, [0, *(1 + shocks.index(name) for name in ordered)])
    return moved.reshape(array.shape[0], -1).tolist()
