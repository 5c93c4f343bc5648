"""Generated numba kernels for grid models, and the on-disk cache they load from.

A grid model's Bellman searches inline its expressions, so their source is
written per model *structure* (:class:`KernelLayout`): the number of states,
shocks and choices, which state each ``next_of`` choice sets, and the
expressions' source from :func:`worker.expressions.scalar_source` and
:func:`worker.expressions.intervals.interval_source`, with names replaced by
variables of ours.  Numbers of the document — params, grids, chains, and
the numbers written in its expressions (:mod:`worker._codegen.literals`,
but for a few exponents and bases that stay structural) — are runtime arrays
(:func:`context`), never part of the source, so a sweep over params, grid
sizes or a number in a formula reuses one compiled module.

The generated text contains only tokens written here plus what the
expression package returns (which contains no user text).  :func:`load`
imports it from the kernel cache (:mod:`worker._codegen.cache`), where
numba keeps the machine code beside it.

Two backends share one set of search templates, so both kinds of reward
storage run the same search code:

``expr`` (reward storage ``on_the_fly``)
    The model is evaluated pointwise: defines, feasibility, reward and
    ``next``, with every part that does not depend on the choices computed
    once per state (see :mod:`worker._codegen.hoist`).  Adds
    ``bellman_bnb``, the exact block search, and ``scan_pairs``.
``table`` (reward storage ``tables``)
    The reward and interpolation nodes are read from tables filled once
    (``R``, ``next_base``, ``node_lower``, ``node_weight``); the source does
    not depend on the expressions, so one module serves every model of a
    structure.

The modules of this package: :mod:`~worker._codegen.layout` (the structure
and ``ctx``), :mod:`~worker._codegen.literals` (the expressions' numbers
moved into ``ctx``), :mod:`~worker._codegen.folder` (the private kernel
folder), :mod:`~worker._codegen.cache` (loading from it, and the bounds on
the folder's size and on the modules a process loads:
:func:`trim`, :func:`loaded_structures`, :func:`recycle_due`),
:mod:`~worker._codegen.hoist` and :mod:`~worker._codegen.writer` (the
pieces every kernel shares), :mod:`~worker._codegen.loops` and
:mod:`~worker._codegen.block_search` (the kernels),
:mod:`~worker._codegen.source` (one module's text).

Kernels (``n`` value-function entries, ``i = x · n_shocks + z``; every
kernel takes ``ctx``, the tuple built by :func:`context`; all serial — on a
shared 2-core machine ``parallel=True`` measured 1.03–1.3× faster at several
seconds more compilation per kernel; a large solve instead runs the exact
searches in row blocks on threads, :mod:`worker.threadpool`, through their
trailing ``start, stop``: the flat states ``[start, stop)``, all by default):

* ``bellman_full(EVt, beta, ctx, out_v, out_policy, out_bad, out_bad_choice, start, stop)``
  — every choice; ties go to the lowest flat choice index.
* ``bellman_hinted(EVt, beta, ctx, monotone, concave, out_v, out_policy,
  out_reward)`` — one choice only, along lines of the hinted state axis
  (``out_reward``: the reward at the choice found): monotone starts at the
  previous state's choice (and searches below it only when nothing at or
  above it is allowed); concave stops once the objective has fallen below
  the best ``HINT_PATIENCE`` times in a row, after skipping a leading
  infeasible stretch, and at the first infeasible point after a feasible
  one; both together give one pass per line.
* ``bellman_bnb(EVt, beta, ctx, pyramid, levels, evmax, guess, has_guess,
  leaf, dpu, dpd, slope, out_v, out_policy, out_bad, out_bad_choice, start, stop)`` —
  exact.  The guess pass evaluates the guess and its two neighbours; then a
  depth-first walk over blocks ``[a, b]`` of the last choice (the rest of
  the guess's line on either side, or the whole line) evaluates blocks of at
  most ``leaf`` choices pointwise and splits the others in halves unless a
  bound proves the block cannot beat the incumbent under the lowest-index tie
  rule (:mod:`worker._codegen.block_search`).  Equal to ``bellman_full`` bit
  for bit.
* ``policy_nodes(policy, states, EVt, ctx, out_reward, out_index, out_weight,
  out_ok, out_clamped)`` — reward and interpolation nodes of a fixed policy
  at the flat states listed in ``states`` (rows of the outputs).
* ``scan_pairs(EVt, ctx, out_allowed, out_clamped, out_bad)`` (``expr``
  only) — counts per state over every choice, for diagnostics.
"""

from worker._codegen.block_search import BOUND_SLACK
from worker._codegen.cache import is_held, load, loaded_structures, module_name, recycle_due, trim, warming
from worker._codegen.folder import UnsafeFolder, kernel_cache_dir
from worker._codegen.layout import KernelLayout, ModelSource, context, layout_for
from worker._codegen.literals import kernel_params, lift_literals
from worker._codegen.source import module_source

__all__ = [
    "BOUND_SLACK",
    "KernelLayout",
    "ModelSource",
    "UnsafeFolder",
    "context",
    "kernel_params",
    "kernel_cache_dir",
    "layout_for",
    "lift_literals",
    "is_held",
    "load",
    "loaded_structures",
    "module_name",
    "module_source",
    "recycle_due",
    "trim",
    "warming",
]
