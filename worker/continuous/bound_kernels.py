"""The compiled helper of :mod:`worker.continuous.bound_search`: the largest node value of a block of grid intervals.

The branch and bound of an unrestricted continuous search walks aligned dyadic blocks of grid
intervals of the chosen state: block ``q`` of level ``l`` holds intervals ``q·2**l … (q+1)·2**l − 1``,
whose nodes are ``q·2**l … (q+1)·2**l``.  Their largest value is one entry of the max-pyramid of
:func:`worker.kernels.build_pyramid` (block ``q`` of level ``l``: nodes ``q·2**l … (q+1)·2**l − 1``)
and the one node after it, so a block's bound costs two reads instead of a walk over the levels.
"""

from __future__ import annotations

import numpy as np
from numba import njit

__all__ = ["block_max"]


@njit(cache=True, nogil=True, error_model="numpy")
def block_max(pyramid: np.ndarray, level_starts: np.ndarray, EVt: np.ndarray, axis_size: int, axis_stride: int,
              n_outer: int, z: int, base: int, level: int, q: int) -> float:
    """``max EVt[z, base + t · axis_stride]`` over the nodes ``t`` of intervals ``q·2**level … (q+1)·2**level − 1``
    (those on the grid: a block past the grid's end is cut there).

    ``base`` is a flat grid-state index whose coordinate on the axis is 0; the layout of ``pyramid`` is
    :func:`worker.kernels.build_pyramid`'s.  Equal to :func:`worker.kernels.pyramid_max` over the nodes
    ``q·2**level … min((q+1)·2**level, axis_size − 1)``.
    """
    span = axis_size * axis_stride
    outer = base // span
    inner = base - outer * span
    line = (z * n_outer + outer) * level_starts[-1]
    best = pyramid[(line + level_starts[level] + q) * axis_stride + inner]
    after = (q + 1) << level
    if after < axis_size:
        value = EVt[z, base + after * axis_stride]
        if value > best:
            best = value
    return best
