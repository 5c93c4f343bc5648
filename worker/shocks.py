"""Finite Markov chains for exogenous shocks.

A chain is a pair ``(values, P)``: ``values`` of shape ``(n,)`` and a
row-stochastic ``P`` of shape ``(n, n)`` with ``P[i, j]`` the probability of
moving from ``values[i]`` to ``values[j]``, both float64.

AR(1) processes ``y' = (1 - rho) * mean + rho * y + e``, ``e ~ N(0, sigma**2)``,
are discretised by Rouwenhorst (1995) or Tauchen (1986).  Builders take the
document ``path`` of what they build (``"model.shocks.z.ar1"``) and raise
:class:`worker.errors.InvalidDocument` at the offending field under it.
"""

from __future__ import annotations

import math
from functools import reduce
from typing import Any

import numpy as np
import scipy.sparse as sp
import scipy.sparse.csgraph as csgraph
import scipy.sparse.linalg as spla
from scipy.special import ndtr

from worker.arrays import decode_array
from worker.errors import InvalidDocument, join_path

__all__ = [
    "AR1_METHODS", "TRANSFORMS", "apply_transform", "ar1_chain", "iid_chain", "markov_chain", "product_chain",
    "rouwenhorst", "stationary_distribution", "tauchen",
]

AR1_METHODS = ("rouwenhorst", "tauchen")
TRANSFORMS = ("exp", "none")

STOCHASTIC_TOLERANCE = 1e-9
"""How far a probability row's sum may be from 1 (absolute, dimensionless)."""

DEFAULT_WIDTH = 3.0
"""Tauchen grid half-width, in unconditional standard deviations of the process."""

_MAX_FAULTS = 10
"""Faulty entries reported per check; any further ones are left out."""
_POWER_STEPS = 500
"""Lazy power steps tried on sparse chains before a direct solve (they also pick its pins)."""
_PIN_STEPS = 50
"""Lazy power steps that pick the pins of a dense chain's direct solve."""
_POWER_TOLERANCE = 1e-14
"""Relative l1 residual of ``pi P = pi`` at which power steps are good enough."""
_SOLVE_TOLERANCE = 1e-10
"""Relative l1 residual above which a direct solve is redone with better pins."""


def rouwenhorst(
    rho: float, sigma: float, points: int, mean: float = 0.0, *, path: str = ""
) -> tuple[np.ndarray, np.ndarray]:
    """Rouwenhorst (1995) chain for an AR(1).

    The grid is symmetric about ``mean`` with half-width
    ``sigma / sqrt(1 - rho**2) * sqrt(points - 1)``; the conditional mean and
    variance of the chain equal those of the AR(1) at every grid point
    (Kopecky and Suen, 2010), which makes it the method of choice for
    persistent processes.

    Returns
    -------
    values : (points,) float64
    P : (points, points) float64, row-stochastic
    """
    _raise_if(_ar1_errors(rho, sigma, points, mean, path))
    # Row i is the law of the number of "high" chains tomorrow among points - 1 independent symmetric two-state
    # chains of stay probability p, i of them high today: Bin(i, p) + Bin(points - 1 - i, 1 - p), a convolution
    # (the law Rouwenhorst's recursion builds; Kopecky and Suen 2010).  Each binomial law comes from the one before
    # by a two-point convolution (sums of positive terms, so every entry is accurate to a few ulps), and the rows
    # cost about points³/6 multiply-adds in numpy's convolution: 0.5 s at 2,000 points, where the recursion on
    # whole matrices took 15 s (its cost grows as points³ with a far larger constant; measured 2026-12-05).
    p = (1.0 + rho) / 2.0
    n = points
    stay, move = np.array([1.0 - p, p]), np.array([p, 1.0 - p])
    lows = [np.ones(1)]  # lows[m]: Bin(m, 1 - p), the high count among m chains low today
    for _ in range(n - 1):
        lows.append(np.convolve(lows[-1], move))
    matrix = np.empty((n, n))
    highs = np.ones(1)  # Bin(i, p): the high count among the i chains high today
    for i in range(n):
        matrix[i] = np.convolve(highs, lows[n - 1 - i])
        highs = np.convolve(highs, stay)
    half_width = sigma / math.sqrt(1.0 - rho * rho) * math.sqrt(points - 1)
    values = np.linspace(mean - half_width, mean + half_width, points)
    return values, matrix


def tauchen(
    rho: float, sigma: float, points: int, width: float = DEFAULT_WIDTH, mean: float = 0.0, *, path: str = ""
) -> tuple[np.ndarray, np.ndarray]:
    """Tauchen (1986) chain for an AR(1).

    Evenly spaced grid over ``mean +- width * sigma / sqrt(1 - rho**2)``; the
    probability of moving from ``y_i`` to ``y_j`` is the normal probability
    of the innovation landing ``y'`` between the midpoints around ``y_j``,
    the end points taking the tails.

    Returns
    -------
    values : (points,) float64
    P : (points, points) float64, row-stochastic
    """
    errors = _ar1_errors(rho, sigma, points, mean, path)
    if not _is_real(width) or not math.isfinite(width) or width <= 0:
        message = f"width (in unconditional standard deviations) must be a positive number, got {width!r}"
        errors.append(_fault(path, "width", message))
    _raise_if(errors)
    half_width = width * sigma / math.sqrt(1.0 - rho * rho)
    values = np.linspace(mean - half_width, mean + half_width, points)
    midpoints = (values[1:] + values[:-1]) / 2.0
    conditional_mean = (1.0 - rho) * mean + rho * values
    below = ndtr((midpoints[None, :] - conditional_mean[:, None]) / sigma)
    cumulative = np.hstack([np.zeros((points, 1)), below, np.ones((points, 1))])
    return values, np.diff(cumulative, axis=1)


def ar1_chain(
    method: str, rho: float, sigma: float, points: int, *, width: float = DEFAULT_WIDTH, mean: float = 0.0,
    path: str = "",
) -> tuple[np.ndarray, np.ndarray]:
    """Discretise an AR(1) by ``method`` (``rouwenhorst`` or ``tauchen``)."""
    if method == "rouwenhorst":
        return rouwenhorst(rho, sigma, points, mean, path=path)
    if method == "tauchen":
        return tauchen(rho, sigma, points, width, mean, path=path)
    message = f"unknown method {method!r}; use one of {', '.join(AR1_METHODS)}"
    raise InvalidDocument.at(join_path(path, "method"), message)


def markov_chain(values: Any, matrix: Any, *, path: str = "") -> tuple[np.ndarray, np.ndarray]:
    """Validate an explicit chain.

    ``matrix`` must be square, its size that of ``values``, finite,
    non-negative, and each row must sum to 1 within ``STOCHASTIC_TOLERANCE``;
    rows are then rescaled to sum to 1 to rounding.  Faults are named at
    ``path.values`` and ``path.matrix[i]`` (``[i][j]`` for single entries).
    """
    values = _check_values(values, join_path(path, "values"))
    where = join_path(path, "matrix")
    matrix = decode_array(matrix, path=where)
    if matrix.ndim != 2 or matrix.shape[0] != matrix.shape[1]:
        raise InvalidDocument.at(where, f"the transition matrix must be square, got shape {list(matrix.shape)}")
    if matrix.shape[0] != values.size:
        message = f"the transition matrix is {matrix.shape[0]}x{matrix.shape[0]} but there are {values.size} values"
        raise InvalidDocument.at(where, message)
    return values, _check_stochastic(matrix, where)


def iid_chain(values: Any, probs: Any, *, path: str = "") -> tuple[np.ndarray, np.ndarray]:
    """A chain drawn independently each period from ``probs``: every row of ``P`` equals ``probs``."""
    values = _check_values(values, join_path(path, "values"))
    where = join_path(path, "probs")
    probs = decode_array(probs, path=where)
    if probs.ndim != 1 or probs.size != values.size:
        message = f"probs must be a list of {values.size} numbers (one per value), got shape {list(probs.shape)}"
        raise InvalidDocument.at(where, message)
    probs = _check_stochastic(probs[None, :], where, single_row=True)[0]
    return values, np.tile(probs, (values.size, 1))


def product_chain(chains: list[tuple[np.ndarray, np.ndarray]]) -> tuple[np.ndarray, np.ndarray]:
    """Combine independent chains into one over the product of their states.

    States are ordered in C order, the first chain varying slowest.

    Returns
    -------
    value_table : (n_total, k) float64
        Row ``s`` holds the value of each of the ``k`` chains in joint state ``s``.
    P : (n_total, n_total) float64
        ``kron(P_1, P_2, ..., P_k)``.  With no chains, one state and ``P = [[1]]``.
    """
    if not chains:
        return np.zeros((1, 0)), np.ones((1, 1))
    grids = np.meshgrid(*[np.asarray(values, dtype=np.float64) for values, _ in chains], indexing="ij")
    value_table = np.stack([grid.reshape(-1) for grid in grids], axis=1)
    matrix = reduce(np.kron, [np.asarray(P, dtype=np.float64) for _, P in chains])
    return value_table, matrix


def apply_transform(values: np.ndarray, transform: str, *, path: str = "") -> np.ndarray:
    """Map chain values through ``transform`` (``exp`` or ``none``) into a new array; faults at ``path.transform``."""
    where = join_path(path, "transform")
    values = np.asarray(values, dtype=np.float64)
    if transform == "none":
        return values.copy()
    if transform == "exp":
        with np.errstate(over="ignore"):
            out = np.exp(values)
        if not np.all(np.isfinite(out)):
            message = f"exp overflows float64 at value {values.max()!r}: the shock values are too large to exponentiate"
            raise InvalidDocument.at(where, message)
        return out
    raise InvalidDocument.at(where, f"unknown transform {transform!r}; use one of {', '.join(TRANSFORMS)}")


def stationary_distribution(P: np.ndarray | sp.spmatrix | sp.sparray, start: np.ndarray | None = None) -> np.ndarray:
    """Long-run distribution of a finite chain started from ``start``.

    For a chain with one closed class this is its unique stationary
    distribution, whatever ``start``.  With several closed classes the answer
    depends on where the chain starts: mass reaches each closed class with the
    chain's absorption probabilities and is then spread by that class's own
    stationary distribution (the Cesaro limit of ``start @ P**t``).
    Periodic chains are fine.  Sparse chains that mix fast are settled by
    lazy power steps (accurate to about 1e-14 in total variation), the rest
    by a direct solve: sparse LU for sparse input, dense LU for dense input.

    Parameters
    ----------
    P : (n, n) row-stochastic, ndarray or scipy sparse
    start : (n,) probabilities, or None for uniform over the states

    Returns
    -------
    pi : (n,) float64, non-negative, summing to 1, ``pi @ P == pi`` to rounding.
    """
    dense = not sp.issparse(P)
    matrix = sp.csr_array(np.asarray(P, dtype=np.float64) if dense else P, dtype=np.float64)
    matrix.eliminate_zeros()
    n = matrix.shape[0]
    if matrix.ndim != 2 or matrix.shape[1] != n or n == 0:
        raise ValueError(f"a transition matrix must be square and non-empty, got shape {matrix.shape}")
    start = np.full(n, 1.0 / n) if start is None else np.asarray(start, dtype=np.float64)
    if start.shape != (n,):
        raise ValueError(f"start must have shape ({n},), got {start.shape}")

    # Closed classes are the strongly connected components with no edge leaving them.
    _, label = csgraph.connected_components(matrix, directed=True, connection="strong")
    rows, cols = matrix.nonzero()
    leaky = np.unique(label[rows[label[rows] != label[cols]]])
    closed = ~np.isin(label, leaky)

    # Mass that ends in each closed class: the start's own share plus what the
    # transient states send there, from expected visits x solving x (I - Q) = start_T.
    mass_in = start * closed
    transient = np.flatnonzero(~closed)
    if transient.size:
        to_transient = matrix[transient][:, transient]
        visits = _solve((sp.eye_array(transient.size) - to_transient).T, start[transient], dense)
        mass_in = mass_in + (matrix[transient].T @ visits) * closed
    class_mass = np.bincount(label, weights=mass_in, minlength=label.max() + 1)

    # Fast-mixing chains (whose sparse LU fills in badly) settle in a few lazy
    # power steps; the rest are solved directly.  Closed classes do not
    # interact, so one block-diagonal system gives all of them.
    keep = np.flatnonzero(closed)
    keep_label = label[keep]
    local_t = matrix[keep][:, keep].T.tocsr()
    relative = np.full(keep.size, 1.0 / keep.size)
    for step in range(1, (_PIN_STEPS if dense else _POWER_STEPS) + 1):
        relative = 0.5 * (relative + local_t @ relative)
        if not dense and step % 25 == 0 and _residual(local_t, relative) <= _POWER_TOLERANCE:
            break
    else:
        for _ in range(2):
            relative = _solve_pinned(local_t, keep_label, relative, dense)
            if _residual(local_t, relative) <= _SOLVE_TOLERANCE:
                break
    class_total = np.bincount(keep_label, weights=relative, minlength=class_mass.size)
    pi = np.zeros(n)
    pi[keep] = relative * (class_mass / np.where(class_total > 0, class_total, 1.0))[keep_label]
    return pi / pi.sum()


def _residual(transposed: sp.csr_array, pi: np.ndarray) -> float:
    return float(np.abs(transposed @ pi - pi).sum() / pi.sum())


def _solve_pinned(transposed: sp.csr_array, label: np.ndarray, guess: np.ndarray, dense: bool) -> np.ndarray:
    """Solve pi (I - P) = 0 on each closed class with one equation replaced by pi[pin] = 1.

    A unit row, unlike a row of ones, keeps the sparse LU sparse.  The pin is
    the class's most likely state under ``guess``: pinning a state of
    probability 1e-30 would leave the others to be found at scale 1e30.
    """
    by_class = np.lexsort((-guess, label))
    pins = by_class[np.flatnonzero(np.diff(label[by_class], prepend=-1))]
    is_pin = np.zeros(label.size, dtype=bool)
    is_pin[pins] = True
    system = (sp.eye_array(label.size) - transposed).tocoo()
    kept = ~is_pin[system.row]
    system = sp.coo_array(
        (
            np.append(system.data[kept], np.ones(pins.size)),
            (np.append(system.row[kept], pins), np.append(system.col[kept], pins)),
        ),
        shape=system.shape,
    )
    return np.clip(_solve(system, is_pin.astype(np.float64), dense), 0.0, None)


def _solve(A: sp.sparray, b: np.ndarray, dense: bool) -> np.ndarray:
    if dense:
        return np.linalg.solve(A.toarray(), b)
    return np.atleast_1d(spla.spsolve(A.tocsc(), b))


def _is_real(value: Any) -> bool:
    return isinstance(value, (int, float, np.integer, np.floating)) and not isinstance(value, (bool, np.bool_))


def _fault(path: str, field: str | int, message: str) -> dict[str, str]:
    return {"path": join_path(path, field), "message": message}


def _raise_if(errors: list[dict[str, str]]) -> None:
    if errors:
        raise InvalidDocument(errors)


def _ar1_errors(rho: Any, sigma: Any, points: Any, mean: Any, path: str) -> list[dict[str, str]]:
    errors = []
    if not _is_real(rho) or not math.isfinite(rho):
        errors.append(_fault(path, "rho", f"rho must be a finite number, got {rho!r}"))
    elif not -1.0 < rho < 1.0:
        message = (
            f"rho must lie strictly between -1 and 1, got {rho!r}: with |rho| >= 1 the process is not "
            "stationary (its variance grows without bound), so no finite chain can stand for it"
        )
        errors.append(_fault(path, "rho", message))
    if not _is_real(sigma) or not math.isfinite(sigma) or sigma <= 0:
        message = f"sigma (the innovation's standard deviation) must be a positive number, got {sigma!r}"
        errors.append(_fault(path, "sigma", message))
    if not isinstance(points, (int, np.integer)) or isinstance(points, (bool, np.bool_)):
        errors.append(_fault(path, "points", f"points must be a whole number, got {points!r}"))
    elif points < 2:
        errors.append(_fault(path, "points", f"an AR(1) chain needs at least 2 points, got {points}"))
    if not _is_real(mean) or not math.isfinite(mean):
        errors.append(_fault(path, "mean", f"mean must be a finite number, got {mean!r}"))
    return errors


def _check_values(values: Any, where: str) -> np.ndarray:
    values = decode_array(values, path=where)
    if values.ndim != 1 or values.size == 0:
        message = f"values must be a non-empty flat list of numbers, got shape {list(values.shape)}"
        raise InvalidDocument.at(where, message)
    return values


def _check_stochastic(matrix: np.ndarray, where: str, single_row: bool = False) -> np.ndarray:
    """Check (finite) rows for signs and sums, then rescale them to sum to 1."""

    def at(*index: int) -> str:
        return join_path(where, *(index[1:] if single_row else index))

    errors = [
        {"path": at(int(i), int(j)), "message": f"probabilities must be non-negative, got {matrix[i, j]!r}"}
        for i, j in np.argwhere(matrix < 0)[:_MAX_FAULTS]
    ]
    sums = matrix.sum(axis=1)
    for i in [] if errors else np.flatnonzero(np.abs(sums - 1.0) > STOCHASTIC_TOLERANCE)[:_MAX_FAULTS]:
        what = "the probabilities" if single_row else f"row {i}"
        message = f"{what} must sum to 1 (within {STOCHASTIC_TOLERANCE:g}), got {sums[i]!r}"
        errors.append({"path": at(int(i)), "message": message})
    _raise_if(errors)
    return matrix / sums[:, None]
