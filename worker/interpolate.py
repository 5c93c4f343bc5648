"""Carrying a value function from one product grid onto another.

Warm starts (``solver.initial: {"job": ID}``) hand the solver the value
function of an earlier job, whose grids may differ from today's: a nightly
re-solve with a finer capital grid or a re-calibrated shock.  Any start is
valid for a contraction, so the aim is a good one, cheaply: multilinear
interpolation, flat outside the old range.

The rules on which axes may meet (names, labels) are :func:`check_axes`, the
one source for :func:`regrid` at run time and for the door
(``service.admission``), which checks a document against a finished job's
:func:`axes_summary` (kept in its record) without compiling either.
"""

from __future__ import annotations

import math
from typing import Any, Mapping, Sequence

import numpy as np

from worker.arrays import decode_array
from worker.axis_order import PERIOD_AXIS
from worker.errors import InvalidDocument
from worker.grids import locate
from worker.tabular import STATE_AXIS

__all__ = ["axes_summary", "check_axes", "check_start", "document_axes", "regrid"]


def axes_summary(axes: Mapping[str, Sequence[Any]]) -> dict[str, list[Any] | None]:
    """A result's ``axes`` without numeric grids: name -> its labels for an axis of labels, else None.

    Small enough for a job record, and all :func:`check_axes` needs of the earlier side.
    """
    return {name: None if _all_numbers(list(values)) else list(values) for name, values in axes.items()}


def document_axes(document: Any) -> dict[str, list[Any] | None]:
    """The axes of a validated document's value function, as :func:`axes_summary` gives them, without compiling.

    A grid model: its states, then its shocks drawn before the choice (``worker.feasibility.model_data``'s
    order, which the compiled problem's ``axes`` follow); a tabular one: ``state_label`` with its labels.
    """
    model = document.model
    if model.kind == "tabular":
        return axes_summary({STATE_AXIS: model.state_labels()})
    names = [*model.states, *(name for name, shock in model.shocks.items() if not shock.after_choice)]
    return dict.fromkeys(names)


def check_start(earlier: Mapping[str, list[Any] | None], document: Any, *, path: str) -> None:
    """Refuse, at ``path``, a warm start of ``document`` from a job whose result has the axes ``earlier``
    (its :func:`axes_summary`) when :func:`regrid` would refuse it at run time.

    Under a horizon the earlier job's ``period`` axis is left out, as the solve leaves it out (it starts from
    the earlier job's first period).
    """
    if getattr(document.model, "horizon", None) is not None:
        earlier = {name: labels for name, labels in earlier.items() if name != PERIOD_AXIS}
    check_axes(earlier, document_axes(document), path=path)


def check_axes(
    old_axes: Mapping[str, Sequence[Any] | None],
    new_axes: Mapping[str, Sequence[Any] | None],
    *,
    path: str = "solver.initial",
) -> None:
    """Refuse, at ``path``, a starting value function on ``old_axes`` for a problem on ``new_axes``.

    The axis names must match (in any order); along an axis whose values are labels on either side, each new
    label must appear once among the old ones.  Either side may give None for an axis of numbers whose values
    are not at hand (:func:`axes_summary`): numbers on both sides are interpolated, never refused here.
    """
    _check_names(list(old_axes), list(new_axes), path)
    for name, new_values in new_axes.items():
        if new_values is None:
            continue  # numbers not at hand: only their values decide, at run time
        new, old_values = list(new_values), old_axes[name]
        if old_values is None:
            if not _all_numbers(new):
                raise InvalidDocument.at(path, _no_entry(name, new))  # labels are never found among numbers
            continue
        old = list(old_values)
        if _same(old, new) or (_all_numbers(old) and _all_numbers(new)):
            continue
        _label_positions(old, new, name, path)


def _check_names(old_names: list[str], new_names: list[str], path: str) -> None:
    missing = [name for name in new_names if name not in old_names]
    extra = [name for name in old_names if name not in new_names]
    if missing or extra:
        parts = [f"lacks axes {missing} of this problem"] if missing else []
        parts += [f"has axes {extra} this problem does not"] if extra else []
        raise InvalidDocument.at(path, f"the starting value function {' and '.join(parts)}; axes must match by name")


def regrid(
    old_axes: Mapping[str, Sequence[Any]],
    old_value: Any,
    new_axes: Mapping[str, Sequence[Any]],
    *,
    path: str = "solver.initial",
) -> np.ndarray:
    """Interpolate ``old_value``, given on ``old_axes``, onto ``new_axes``.

    Axes are matched by name, so their order may differ.  Along an axis
    whose values are unchanged nothing happens; along a numeric axis whose
    values changed (an endogenous state or a shock alike) the value is
    interpolated linearly and held at the end values outside the old range;
    along an axis of labels (tabular states) values are matched by label.
    Interpolating one axis after another is exactly multilinear
    interpolation on the product grid.

    Parameters
    ----------
    old_axes : name -> values (length ``m_k``), in the axis order of ``old_value``.
    old_value : array of shape ``(m_1, ..., m_d)``, or flat ``(m_1 * ... * m_d,)``.
    new_axes : name -> values (length ``n_k``), in the axis order wanted.

    Returns
    -------
    value : (n_1, ..., n_d) float64, C-contiguous, in the order of ``new_axes``.

    Raises
    ------
    InvalidDocument
        At ``path`` when the axis names differ, the value does not fit the
        old axes, or it holds non-finite numbers.
    """
    old_names, new_names = list(old_axes), list(new_axes)
    _check_names(old_names, new_names, path)
    shape = tuple(len(old_axes[name]) for name in old_names)
    value = decode_array(old_value, path=path, allow_nonfinite=True)
    if value.shape != shape:
        if value.ndim != 1 or value.size != math.prod(shape):
            message = f"the starting value function has shape {list(value.shape)}, but its axes give {list(shape)}"
            raise InvalidDocument.at(path, message)
        value = value.reshape(shape)
    if not np.all(np.isfinite(value)):
        raise InvalidDocument.at(path, "the starting value function holds NaN or infinite values")

    value = np.transpose(value, [old_names.index(name) for name in new_names])
    for axis, name in enumerate(new_names):
        value = _regrid_axis(value, axis, list(old_axes[name]), list(new_axes[name]), name, path)
    return np.ascontiguousarray(value, dtype=np.float64)


def _regrid_axis(value: np.ndarray, axis: int, old: list, new: list, name: str, path: str) -> np.ndarray:
    if _same(old, new):
        return value
    if not (_all_numbers(old) and _all_numbers(new)):
        return _match_labels(value, axis, old, new, name, path)

    old_grid, new_grid = np.asarray(old, dtype=np.float64), np.asarray(new, dtype=np.float64)
    if not (np.all(np.isfinite(old_grid)) and np.all(np.isfinite(new_grid))):
        raise InvalidDocument.at(path, f"axis {name!r} holds non-finite values")
    if old_grid.size == 1:
        return np.repeat(value, new_grid.size, axis=axis)
    # Shock values need not be sorted (an explicit chain may list them in any order).
    order = np.argsort(old_grid, kind="stable")
    old_grid = old_grid[order]
    if not np.all(old_grid[1:] > old_grid[:-1]):
        message = f"axis {name!r} of the starting value function repeats a value, so it cannot be interpolated along"
        raise InvalidDocument.at(path, message)
    if np.any(order != np.arange(order.size)):
        value = np.take(value, order, axis=axis)

    lower, weight, _ = locate(old_grid, new_grid)
    along = [1] * value.ndim
    along[axis] = -1
    weight = weight.reshape(along)
    return np.take(value, lower, axis=axis) * (1.0 - weight) + np.take(value, lower + 1, axis=axis) * weight


def _match_labels(value: np.ndarray, axis: int, old: list, new: list, name: str, path: str) -> np.ndarray:
    return np.take(value, _label_positions(old, new, name, path), axis=axis)


def _label_positions(old: list, new: list, name: str, path: str) -> list[int]:
    """Where each label of ``new`` stands in ``old``; refused when ``old`` repeats one or lacks one."""
    position = {label: i for i, label in enumerate(old)}
    if len(position) != len(old):
        raise InvalidDocument.at(path, f"axis {name!r} of the starting value function repeats a label")
    unknown = [label for label in new if label not in position]
    if unknown:
        raise InvalidDocument.at(path, _no_entry(name, unknown))
    return [position[label] for label in new]


def _no_entry(name: str, unknown: list) -> str:
    return f"axis {name!r} of the starting value function has no entry for {unknown[:5]}"


def _same(old: list, new: list) -> bool:
    return len(old) == len(new) and all(a == b for a, b in zip(old, new))


def _all_numbers(values: list) -> bool:
    numbers, bools = (int, float, np.integer, np.floating), (bool, np.bool_)
    return all(isinstance(v, numbers) and not isinstance(v, bools) for v in values)
