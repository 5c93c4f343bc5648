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

Above :data:`worker.report.DIRECT_MAX_STATES` states, where no LU of unbounded fill is made,
:func:`natural_pinned_lu` makes one in the states' own order when the pinned system's envelope bounds it to
`NATURAL_ENVELOPE` times the system's entries (:func:`natural_lu_bound`).  The bound holds because the pinned
system is ``(I − P)ᵀ`` but for one column, which is diagonally dominant by columns (each column's diagonal
``1 − P_jj`` is the sum of its other entries' magnitudes; column ``k`` is ``e_k``): Gaussian elimination with
partial pivoting then makes no row interchanges (Golub and Van Loan, *Matrix Computations*, §3.4.10, from
memory; ties, which rounding may break, are kept on the diagonal by `NATURAL_PIVOT_THRESHOLD`), and an LU without row
interchanges fills only within the matrix's envelope (the entries between each row's first entry and the
diagonal, and between each column's first entry and the diagonal; common practice, the profile methods'
premise).  An LU that interchanged rows all the same (rounding) is dropped.  Measured on the Aiyagari bench's
household at 4,000 asset points (28,000 states, 395,000 entries, ρ = 0.9, r = 3.8 %): the envelope is 39 times
the entries and the LU 22 times (0.3 s; 0.6-0.7 s at ρ = 0 and 0.6, 27-32 times), with no row interchanges, where
the half-bandwidth bound is 664 times; SuperLU's default ordering took 0.8 s (28 times).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import scipy.sparse as sp

__all__ = ["NATURAL_BAND", "NATURAL_ENVELOPE", "NATURAL_FILL", "NATURAL_MAX_ENTRIES", "natural_lu_bound",
           "natural_lu_fits", "natural_order_fits", "natural_pinned_lu", "ordered_pinned_lu", "pinned_lu",
           "pinned_system"]

NATURAL_BAND = 64
"""An LU may keep the states' own order only when the pinned system's band bounds its entries to this many
times the system's (count; a bound on memory before that LU is tried)."""
NATURAL_FILL = 4.0
"""...and when that LU has at most this many times the system's entries (count; on the Aiyagari bench 2.1-2.4,
and 1.8-1.9 with SuperLU's default ordering)."""
NATURAL_ENVELOPE = 64
"""Above ``worker.report.DIRECT_MAX_STATES`` states an LU in the states' own order is made only when
:func:`natural_lu_bound` bounds its entries to this many times the pinned system's (count; a bound on memory
before that LU is tried: 39 on the 4,000-point Aiyagari household)."""
NATURAL_MAX_ENTRIES = 2**25
"""...and only when that bound is at most this many entries (count; about 400 MB of values and row indices):
a ceiling of our own choosing, so that the ratio alone never admits an LU of gigabytes on a chain of millions
of entries (the 4,000-point Aiyagari household's bound is 15 million, its LU 8.7 million)."""
NATURAL_PIVOT_THRESHOLD = 0.1
"""SuperLU's ``diag_pivot_thresh`` for that LU: the diagonal pivot is kept while it is at least this share of
its column's largest entry.  Diagonal dominance makes it the largest, but a column whose one other entry below
matches it ties, and rounding then interchanged rows (6 of 400 on a random banded chain, measured, at SuperLU's
default of 1); the multipliers stay at most 1/0.1 (common practice: threshold partial pivoting)."""


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


def natural_lu_fits(matrix: sp.csr_matrix) -> bool:
    """Whether :func:`natural_pinned_lu` may make an LU of this chain pinned anywhere: the envelope of
    ``(I − P)ᵀ``, the pattern of every pinned system, is at most `NATURAL_ENVELOPE` times its entries (a check
    before the closed class and the pin are found: 5-8 ms on a 60,000-state growth chain, whose envelope is 266
    times its entries, beside 0.2 s for its power steps; measured)."""
    n = matrix.shape[0]
    system = sp.csr_matrix(sp.identity(n, format="csr") - matrix)
    system.sort_indices()
    transposed = sp.csc_matrix((system.data, system.indices, system.indptr), shape=(n, n))
    return 0 < transposed.nnz and _within(natural_lu_bound(transposed), transposed.nnz)


def natural_pinned_lu(matrix: sp.csr_matrix, k: int, keep: dict[str, Any] | None = None) -> np.ndarray | None:
    """:func:`pinned_lu` in the states' own order when :func:`natural_lu_bound` bounds its LU to
    `NATURAL_ENVELOPE` times the pinned system's entries and the LU made no row interchanges; else None (also
    when it runs out of memory).  ``keep``, when given, receives the factorisation as :func:`pinned_lu`'s does
    (only when the answer is not None)."""
    pinned = pinned_system(matrix, k)
    if pinned is None or not pinned[0].nnz or not _within(natural_lu_bound(pinned[0]), pinned[0].nnz):
        return None
    made: dict[str, Any] = {}
    try:
        pi = _solved(pinned, k, "NATURAL", made, diag_pivot_thresh=NATURAL_PIVOT_THRESHOLD)
    except MemoryError:
        # Past a job's memory limit (worker.memory): the iterative solves, which need O(entries), instead.
        return None
    if pi is None or not _no_interchanges(made["lu"]):
        return None
    if keep is not None:
        keep.update(made)
    return pi


def _within(bound: int, entries: int) -> bool:
    """Whether an LU of at most ``bound`` entries may be made for a system of ``entries``: within
    `NATURAL_ENVELOPE` times them and `NATURAL_MAX_ENTRIES`."""
    return bound <= min(NATURAL_ENVELOPE * entries, NATURAL_MAX_ENTRIES)


def _no_interchanges(lu: Any) -> bool:
    """Whether an LU made in the states' own order kept every row in place (its fill then lies within the
    envelope, but for the zeros SuperLU stores to make its supernodes dense: 7 % more on a 200-state chain)."""
    return bool((lu.perm_r == np.arange(lu.shape[0])).all())


def natural_lu_bound(system: sp.csc_matrix) -> int:
    """Entries of an LU of a pinned system (CSC, each column's rows sorted, as :func:`pinned_system` makes it)
    in the states' own order without row interchanges, at most: its envelope, the diagonal counted once."""
    n = system.shape[0]
    diagonal = np.arange(n)
    lengths = np.diff(system.indptr)
    # U: each column from its first row (its rows are sorted) down to the diagonal.
    first_row = diagonal.copy()
    filled = lengths > 0
    first_row[filled] = np.minimum(system.indices[system.indptr[:-1][filled]], diagonal[filled])
    # L: each row from its first column across to the diagonal.
    first_column = diagonal.copy()
    np.minimum.at(first_column, system.indices, np.repeat(diagonal, lengths))
    return int((diagonal - first_row).sum() + (diagonal - first_column).sum() + n)


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


def _solved(pinned: tuple[sp.csc_matrix, np.ndarray], k: int, ordering: str, keep: dict[str, Any] | None,
            **options: Any) -> np.ndarray | None:
    """The pinned system solved by one LU made with ``ordering`` (kept in ``keep``: ``lu``, ``pin``, ``n``)."""
    from scipy.sparse import linalg as sla

    system, rhs = pinned
    try:
        lu = sla.splu(system, permc_spec=ordering, **options)
    except RuntimeError:  # exactly singular: several closed classes
        return None
    pi = lu.solve(rhs)
    if not np.isfinite(pi).all():
        return None
    pi[k] = 1.0
    if keep is not None:
        keep.update(lu=lu, pin=k, n=system.shape[0])
    return pi
