"""The pinned sparse LU of a chain's stationary distribution, and the column ordering it is made with.

:func:`pinned_system` is ``π (I − P) = 0`` with ``π_k = 1`` as one nonsingular sparse system, and
:func:`pinned_lu` solves it by one sparse LU (SuperLU, ``scipy.sparse.linalg.splu``).  :func:`ordered_pinned_lu`
is the same solve with its column ordering (SuperLU's ``permc_spec``) chosen by one rule, shared by a single
job's stationary report (:func:`worker.report.long_run_distribution`) and a search's trials
(:mod:`worker.search_trials`): "NATURAL" (the states' own order) when the pinned system's band bounds the fill
of an LU with partial pivoting (``n (3b + 1)`` entries for half-bandwidth ``b``; Golub and Van Loan, *Matrix
Computations*, §4.3) to `NATURAL_BAND` times the system's entries, and the LU made with it has at most
`NATURAL_FILL` times the system's entries; else (that LU made again) SuperLU's default "COLAMD".  Chosen by
entry counts, not seconds, so that the choice is repeatable (a resumed search asks for the same trials).

On the Aiyagari bench's chains (``bench/bench_aiyagari.py``, 200 asset points, 1,400 states, half-bandwidth
about 160, 19,000 entries) "NATURAL" factorised in 0.54-0.7 ms with 42,000 entries where "COLAMD" took
1.0 ms with 35,000 (measured).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import scipy.sparse as sp

__all__ = ["NATURAL_BAND", "NATURAL_FILL", "natural_order_fits", "ordered_pinned_lu", "pinned_lu", "pinned_system"]

NATURAL_BAND = 64
"""An LU may keep the states' own order only when the pinned system's band bounds its entries to this many
times the system's (count; a bound on memory before that LU is tried)."""
NATURAL_FILL = 4.0
"""...and when that LU has at most this many times the system's entries (count; on the Aiyagari bench 2.1-2.4,
and 1.8-1.9 with SuperLU's default ordering)."""


def pinned_lu(matrix: sp.csr_matrix, k: int, keep: dict[str, Any] | None = None,
              ordering: str = "COLAMD") -> np.ndarray | None:
    """``π`` with ``π (I − P) = 0`` and ``π_k = 1`` by one sparse LU of :func:`pinned_system`, or None
    (singular, not finite, or no diagonal entry in row ``k``); not normalised, and unchecked (the callers
    check the residual).  ``keep``, when given, receives the factorisation (``lu``; ``pin`` = ``k``; ``n``)
    for later solves of nearby chains (:mod:`worker.search_trials`).  ``ordering``: SuperLU's ``permc_spec``
    (:func:`ordered_pinned_lu` chooses it)."""
    pinned = pinned_system(matrix, k)
    if pinned is None:
        return None
    return _solved(pinned, k, ordering, keep)


def ordered_pinned_lu(matrix: sp.csr_matrix, k: int, keep: dict[str, Any] | None = None) -> np.ndarray | None:
    """:func:`pinned_lu` with the column ordering of the module's rule.

    ``keep``, when given, receives the factorisation as :func:`pinned_lu`'s does, and the ordering chosen
    (``ordering``, for chains of ``ordering_n`` states with ``ordering_entries`` entries in their pinned
    system): a later call with the same ``keep`` and as many states uses it without choosing again (a
    search's trials: their chains share their pattern but for the policy's moves).
    """
    n = matrix.shape[0]
    if keep is not None and keep.get("ordering_n") == n:
        return pinned_lu(matrix, k, keep=keep, ordering=keep["ordering"])
    pinned = pinned_system(matrix, k)
    entries = 0 if pinned is None else pinned[0].nnz
    natural = pinned is not None and natural_order_fits(pinned[0])
    if keep is not None:
        keep.update(ordering="NATURAL" if natural else "COLAMD", ordering_n=n, ordering_entries=entries)
    if pinned is None:
        return None
    lu_kept: dict[str, Any] = {} if keep is None else keep
    if natural:
        pi = _solved(pinned, k, "NATURAL", lu_kept)
        if pi is not None and lu_kept["lu"].nnz <= NATURAL_FILL * entries:
            return pi
        if keep is not None:
            keep["ordering"] = "COLAMD"
    return _solved(pinned, k, "COLAMD", keep)


def natural_order_fits(system: sp.csc_matrix) -> bool:
    """Whether the band of a pinned system (CSC) bounds an LU in the states' own order to `NATURAL_BAND`
    times its entries (``n (3b + 1)`` for half-bandwidth ``b``)."""
    n = system.shape[0]
    if not system.nnz:
        return False
    columns = np.repeat(np.arange(n), np.diff(system.indptr))  # CSC: indptr runs over columns
    band = int(np.abs(system.indices - columns).max())
    return n * (3 * band + 1) <= NATURAL_BAND * system.nnz


def pinned_system(matrix: sp.csr_matrix, k: int) -> tuple[sp.csc_matrix, np.ndarray] | None:
    """The system of :func:`pinned_lu` and its right-hand side, or None (no diagonal entry in row ``k``).

    ``π_k`` is replaced by a slack that only equation ``k`` (the redundant one) sees, so the matrix is
    ``(I − P)ᵀ`` with column ``k`` set to ``e_k`` — row ``k`` of ``I − P`` in CSR, whose arrays read as CSC
    are that transpose, with no transpose or slicing (which cost more than the LU itself at 1,400 states).
    """
    n = matrix.shape[0]
    system = sp.csr_matrix(sp.identity(n, format="csr") - matrix)
    system.sort_indices()
    start, stop = int(system.indptr[k]), int(system.indptr[k + 1])
    columns = system.indices[start:stop]
    diagonal = start + int(np.searchsorted(columns, k))
    if diagonal >= stop or system.indices[diagonal] != k:
        return None
    rhs = np.zeros(n)
    rhs[columns] = -system.data[start:stop]
    data = system.data.copy()
    data[start:stop] = 0.0
    data[diagonal] = 1.0
    return sp.csc_matrix((data, system.indices, system.indptr), shape=(n, n)), rhs


def _solved(pinned: tuple[sp.csc_matrix, np.ndarray], k: int, ordering: str,
            keep: dict[str, Any] | None) -> np.ndarray | None:
    """The pinned system solved by one LU made with ``ordering`` (kept in ``keep``: ``lu``, ``pin``, ``n``)."""
    from scipy.sparse import linalg as sla

    system, rhs = pinned
    try:
        lu = sla.splu(system, permc_spec=ordering)
    except RuntimeError:  # exactly singular: several closed classes
        return None
    pi = lu.solve(rhs)
    if not np.isfinite(pi).all():
        return None
    pi[k] = 1.0
    if keep is not None:
        keep.update(lu=lu, pin=k, n=system.shape[0])
    return pi
