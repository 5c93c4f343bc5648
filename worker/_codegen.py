"""Generated numba kernels for grid models, and the on-disk cache they load from.

A grid model's Bellman searches inline its expressions, so their source is
written per model *structure*: the number of states, shocks and choices,
which state each ``next_of`` choice sets, and the expressions' source from
:func:`worker.expressions.scalar_source` / ``interval_source`` with names
replaced by variables of ours.  Numbers of the document — params, grids,
chains — are runtime arrays, never part of the source, so a sweep over params
or grid sizes reuses one compiled module.

The generated text contains only tokens written here plus what the
expression module returns (which contains no user text).  It is written to
``FIXQ_KERNEL_CACHE`` (default ``~/.cache/fixq/kernels``) under a name made
of its hash and imported from there, so numba's ``cache=True`` keeps the
machine code beside it: a second process, or a second solve of the same
structure, loads the kernels instead of compiling them.

Two backends share one set of search templates, so both regimes run the
same search code:

``expr`` (the on-the-fly regime)
    ``_choice_value`` evaluates defines, feasibility, reward and ``next``
    pointwise.  Adds ``bellman_bnb``, the exact block search.
``table`` (the precomputed regime)
    ``_choice_value`` reads the reward and interpolation nodes from tables
    filled once (``R``, ``next_base``, ``node_lower``, ``node_weight``).

Kernels (``n`` value-function entries, ``i = x · n_shocks + z``; every
kernel takes ``ctx``, the tuple built by :func:`context`):

* ``bellman_full(EVt, beta, ctx, out_v, out_policy, out_bad, out_bad_choice)``
  — every choice; ties go to the lowest flat choice index.
* ``bellman_hinted(EVt, beta, ctx, monotone, concave, out_v, out_policy)``
  — one choice only: monotone starts at the previous state's choice,
  concave stops when the objective falls (after skipping a leading
  infeasible stretch, and at the first infeasible point after a feasible
  one); both give one sweep per line of states.
* ``bellman_bnb(EVt, beta, ctx, pyramid, levels, evmax, guess, has_guess,
  leaf, depth, out_v, out_policy, out_bad, out_bad_choice)`` — exact:
  a binary tree over the last choice's alternatives; a node is skipped
  when its bound (interval reward bound plus the exact block maximum of
  ``β·EV``) cannot beat the incumbent, leaves are evaluated pointwise.
* ``policy_nodes(policy, ctx, out_reward, out_index, out_weight, out_ok,
  out_clamped)`` — reward and interpolation nodes of a fixed policy.
* ``scan_pairs(ctx, out_allowed, out_clamped, out_bad)`` (``expr`` only)
  — counts per state over every choice, for diagnostics.
"""

from __future__ import annotations

import hashlib
import importlib.util
import os
import pathlib
import sys
import tempfile
from dataclasses import dataclass
from types import ModuleType
from typing import Sequence

import numpy as np

from worker import expressions, kernels

__all__ = ["BOUND_SLACK", "KernelLayout", "ModelSource", "context", "kernel_cache_dir", "load", "module_source"]

BOUND_SLACK = 2.0**-40
"""Relative widening of a block's upper bound (of ``|reward bound| + |β·EV bound|``):
covers interpolation weights that sum to one only up to rounding."""

_TEMPLATE_HASH = hashlib.sha256(pathlib.Path(__file__).read_bytes()).hexdigest()[:16]


@dataclass(frozen=True)
class KernelLayout:
    """The structure a generated module depends on (no document numbers).

    Attributes
    ----------
    n_states, n_shocks, n_choices : int
        Counts of state axes, shock chains and choices.
    setter : tuple of (int or None)
        Per state, the choice that is ``next_of`` it, or None when it moves
        by a ``next`` expression (interpolated).
    backend : str
        ``expr`` or ``table``.
    hinted_axis : int or None
        The state axis hinted searches run along (the single choice's own
        state, or 0), or None when hints cannot be used.
    pyramid_axis : int or None
        The single state axis whose next index varies within a block of the
        last choice (the bound then uses exact block maxima along it), or
        None (a constant next index, or several varying: see ``bound_kind``).
    bound_kind : str
        ``fixed`` (tomorrow's grid state does not vary inside a block),
        ``pyramid`` or ``global`` (the shock's maximum over all grid states).
    """

    n_states: int
    n_shocks: int
    n_choices: int
    setter: tuple[int | None, ...]
    backend: str
    hinted_axis: int | None
    pyramid_axis: int | None
    bound_kind: str

    @property
    def interpolated(self) -> tuple[int, ...]:
        return tuple(t for t, j in enumerate(self.setter) if j is None)

    @property
    def nodes(self) -> int:
        return 2 ** len(self.interpolated)


@dataclass(frozen=True)
class ModelSource:
    """The parsed expressions of a model, with the names they may use.

    ``params``, ``states``, ``shocks``, ``choices`` are name lists in
    document order; ``defines`` is ``[(name, expression), ...]`` in order;
    ``next`` maps a state's position to its expression.
    """

    params: tuple[str, ...]
    states: tuple[str, ...]
    shocks: tuple[str, ...]
    choices: tuple[str, ...]
    defines: tuple[tuple[str, expressions.Expression], ...]
    reward: expressions.Expression
    feasible: tuple[expressions.Expression, ...]
    next: tuple[tuple[int, expressions.Expression], ...]


def layout_for(
    setter: Sequence[int | None], n_shocks: int, n_choices: int, backend: str, hints_usable: bool
) -> KernelLayout:
    """Work out the kernel layout of a model structure."""
    n_states = len(setter)
    inner = n_choices - 1
    varying = [t for t, j in enumerate(setter) if j is None or j == inner]
    if not varying:
        bound_kind, pyramid_axis = "fixed", None
    elif len(varying) == 1:
        bound_kind, pyramid_axis = "pyramid", varying[0]
    else:
        bound_kind, pyramid_axis = "global", None
    hinted_axis = None
    if hints_usable and n_choices == 1:
        own = [t for t, j in enumerate(setter) if j == 0]
        hinted_axis = own[0] if own else 0
    return KernelLayout(n_states, n_shocks, n_choices, tuple(setter), backend, hinted_axis, pyramid_axis, bound_kind)


def context(
    params: np.ndarray,
    state_grids: Sequence[np.ndarray],
    shock_table: np.ndarray,
    choice_grids: Sequence[np.ndarray],
    tables: tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray] | None = None,
) -> tuple[np.ndarray, ...]:
    """The ``ctx`` tuple every kernel takes.

    ``(params, state_grid, state_offset, state_size, state_stride, shock_table,
    choice_grid, choice_offset, choice_size, choice_stride, R, next_base,
    node_lower, node_weight)``: grids concatenated with offsets, C-order
    strides; the four tables (``table`` backend) or 1-element stand-ins.
    """

    def packed(grids: Sequence[np.ndarray]) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        sizes = np.array([g.size for g in grids], dtype=np.int64)
        offsets = np.concatenate([[0], np.cumsum(sizes)[:-1]]).astype(np.int64) if len(grids) else np.zeros(0, np.int64)
        strides = np.ones(len(grids), dtype=np.int64)
        for t in range(len(grids) - 2, -1, -1):
            strides[t] = strides[t + 1] * sizes[t + 1]
        flat = np.ascontiguousarray(np.concatenate(grids) if len(grids) else np.zeros(0), dtype=np.float64)
        return flat, offsets, sizes, strides

    if tables is None:
        tables = (np.full((1, 1), -np.inf), np.zeros(1, np.int64), np.zeros((1, 1, 1), np.int32), np.zeros((1, 1, 1)))
    return (
        np.ascontiguousarray(params, dtype=np.float64),
        *packed(state_grids),
        np.ascontiguousarray(shock_table, dtype=np.float64),
        *packed(choice_grids),
        *tables,
    )


def kernel_cache_dir() -> pathlib.Path:
    """``FIXQ_KERNEL_CACHE``, else ``~/.cache/fixq/kernels``; a temp folder when neither is writable."""
    configured = os.environ.get("FIXQ_KERNEL_CACHE", "").strip()
    candidates = [pathlib.Path(configured).expanduser()] if configured else []
    candidates.append(pathlib.Path.home() / ".cache" / "fixq" / "kernels")
    candidates.append(pathlib.Path(tempfile.gettempdir()) / f"fixq-kernels-{os.getuid()}")
    for directory in candidates:
        try:
            directory.mkdir(parents=True, exist_ok=True)
            if os.access(directory, os.W_OK):
                return directory
        except OSError:
            continue
    raise OSError("no writable folder for compiled kernels; set FIXQ_KERNEL_CACHE")


def load(source: str) -> ModuleType:
    """Import generated source from the kernel cache (writing it first if new)."""
    digest = hashlib.sha256(source.encode()).hexdigest()[:24]
    name = f"fixq_kernels_{digest}"
    if name in sys.modules:
        return sys.modules[name]
    directory = kernel_cache_dir()
    path = directory / f"{name}.py"
    if not path.exists():
        # Never rewrite an existing file: a new mtime would invalidate numba's cache of it.
        handle, scratch = tempfile.mkstemp(dir=directory, prefix=f".{name}.", suffix=".tmp")
        with os.fdopen(handle, "w") as out:
            out.write(source)
        try:
            os.link(scratch, path)
        except FileExistsError:
            pass
        finally:
            os.unlink(scratch)
    spec = importlib.util.spec_from_file_location(name, path)
    module = importlib.util.module_from_spec(spec)
    sys.modules[name] = module
    try:
        spec.loader.exec_module(module)
    except BaseException:
        del sys.modules[name]
        raise
    return module


class _Lines:
    """An indented block of source lines."""

    def __init__(self) -> None:
        self.lines: list[str] = []
        self.depth = 0

    def add(self, *lines: str) -> None:
        for line in lines:
            self.lines.append("    " * self.depth + line if line else "")

    def extend(self, lines: Sequence[str]) -> None:
        self.add(*lines)

    def indent(self) -> "_Indent":
        return _Indent(self)

    def text(self) -> str:
        return "\n".join(self.lines)


class _Indent:
    def __init__(self, block: _Lines) -> None:
        self.block = block

    def __enter__(self) -> None:
        self.block.depth += 1

    def __exit__(self, *exc: object) -> None:
        self.block.depth -= 1


_UNPACK = (
    "p = ctx[0]",
    "sgrid = ctx[1]",
    "soff = ctx[2]",
    "ssize = ctx[3]",
    "sstride = ctx[4]",
    "ztab = ctx[5]",
    "cgrid = ctx[6]",
    "coff = ctx[7]",
    "csize = ctx[8]",
    "cstride = ctx[9]",
    "R = ctx[10]",
    "nbase = ctx[11]",
    "LO = ctx[12]",
    "WU = ctx[13]",
)

_JIT = '@njit(cache=True, nogil=True, error_model="numpy")'
_PJIT = '@njit(cache=True, parallel=True, error_model="numpy")'


class _Writer:
    """Writes one generated module for a layout (and, for ``expr``, a model)."""

    def __init__(self, layout: KernelLayout, model: ModelSource | None) -> None:
        self.layout = layout
        self.model = model
        self.d = layout.n_states
        self.m = layout.n_shocks
        self.q = layout.n_choices
        self.expr = layout.backend == "expr"
        names: dict[str, str] = {}
        if model is not None:
            names.update({name: f"p_{k}" for k, name in enumerate(model.params)})
            names.update({name: f"s_{t}" for t, name in enumerate(model.states)})
            names.update({name: f"z_{t}" for t, name in enumerate(model.shocks)})
            names.update({name: f"c_{t}" for t, name in enumerate(model.choices)})
            names.update({name: f"d_{k}" for k, (name, _) in enumerate(model.defines)})
        self.names = names

    @property
    def state_args(self) -> str:
        """Per-state scalars passed to the helpers (values of states and shocks)."""
        if not self.expr:
            return ""
        return "".join(f", s_{t}" for t in range(self.d)) + "".join(f", z_{t}" for t in range(self.m))

    def state_setup(self, out: _Lines, *, from_ix: bool = False) -> None:
        """Decode flat state ``i`` (or ``ix`` with ``iz`` known) into indices and values."""
        if not from_ix:
            out.add("ix = i // NZ", "iz = i - ix * NZ")
        if not self.expr:
            return
        out.add("rem = ix")
        for t in range(self.d - 1, 0, -1):
            out.add(f"i_{t} = rem % ssize[{t}]", f"rem = rem // ssize[{t}]")
        if self.d:
            out.add("i_0 = rem")
        for t in range(self.d):
            out.add(f"s_{t} = sgrid[soff[{t}] + i_{t}]")
        for t in range(self.m):
            out.add(f"z_{t} = ztab[iz, {t}]")

    def choice_decode(self, out: _Lines) -> None:
        if self.q == 1:
            out.add("j_0 = c")
        else:
            out.add("rem = c")
            for t in range(self.q - 1, 0, -1):
                out.add(f"j_{t} = rem % csize[{t}]", f"rem = rem // csize[{t}]")
            out.add("j_0 = rem")
        if self.expr:
            for t in range(self.q):
                out.add(f"c_{t} = cgrid[coff[{t}] + j_{t}]")

    def params(self, out: _Lines) -> None:
        if self.model is not None:
            for k in range(len(self.model.params)):
                out.add(f"p_{k} = p[{k}]")

    def base_index(self) -> str:
        terms = [f"sstride[{t}] * j_{j}" for t, j in enumerate(self.layout.setter) if j is not None]
        return " + ".join(terms) if terms else "0"

    def nodes(self, out: _Lines, mode: str) -> None:
        """Interpolation corners: ``mode`` ``value`` accumulates ``e``; ``detail`` writes rows."""
        interp = self.layout.interpolated
        if self.expr:
            out.add(f"base = {self.base_index()}")
            for k, t in enumerate(interp):
                out.add(f"lo_{k}, w_{k}, cl_{k} = locate_one(sgrid, soff[{t}], ssize[{t}], n_{k})")
        else:
            out.add("base = nbase[c]")
            for k, t in enumerate(interp):
                out.add(f"lo_{k} = LO[i, c, {k}]", f"w_{k} = WU[i, c, {k}]")
        if mode == "value" and not interp:
            out.add("e = EVt[iz, base]")
            return
        if mode == "value":
            out.add("e = 0.0")
        for corner in range(2 ** len(interp)):
            bits = [(corner >> k) & 1 for k in range(len(interp))]
            factors = [f"w_{k}" if bit else f"(1.0 - w_{k})" for k, bit in enumerate(bits)]
            weight = " * ".join(factors) if factors else "1.0"
            index = "base" + "".join(
                f" + sstride[{t}] * (lo_{k} + 1)" if bit else f" + sstride[{t}] * lo_{k}"
                for k, (t, bit) in enumerate(zip(interp, bits))
            )
            out.add(f"wk = {weight}")
            if mode == "value":
                out.add("if wk != 0.0:")
                with out.indent():
                    out.add(f"e += wk * EVt[iz, {index}]")
            else:
                out.add(f"idx_row[{corner}] = {index}", f"w_row[{corner}] = wk")

    def model_body(self, out: _Lines, mode: str) -> None:
        """Sets ``ok``, ``bad``, ``r`` (and ``val`` or the node rows, ``clamped``)."""
        out.add("ok = False", "bad = False", "clamped = False", "r = -np.inf", "val = -np.inf")
        if not self.expr:
            out.add("r = R[i, c]", "if r != -np.inf:")
            with out.indent():
                self.nodes(out, mode)
                self.finish(out, mode)
            return
        model = self.model
        for k, (_, expr) in enumerate(model.defines):
            out.add(f"d_{k} = {expressions.scalar_source(expr, self.names)}")
        depth_before = out.depth
        for k, expr in enumerate(model.feasible):
            out.add(f"f_{k} = {expressions.scalar_source(expr, self.names)}", f"if f_{k} != 0.0:")
            out.depth += 1
        out.add(f"r = {expressions.scalar_source(model.reward, self.names)}")
        out.add("if r - r == 0.0:")
        with out.indent():
            for k, (_, expr) in enumerate(model.next):
                out.add(f"n_{k} = {expressions.scalar_source(expr, self.names)}")
            if model.next:
                out.add("if " + " and ".join(f"n_{k} == n_{k}" for k in range(len(model.next))) + ":")
                with out.indent():
                    self.nodes(out, mode)
                    self.finish(out, mode)
                out.add("else:")
                with out.indent():
                    out.add("bad = True")
            else:
                self.nodes(out, mode)
                self.finish(out, mode)
        out.add("elif r != -np.inf:")
        with out.indent():
            out.add("bad = True")
        out.depth = depth_before

    def finish(self, out: _Lines, mode: str) -> None:
        if mode == "value":
            out.add("val = r + beta * e")
        interp = self.layout.interpolated
        if interp:
            out.add("clamped = " + " or ".join(f"cl_{k}" for k in range(len(interp))) if self.expr else "clamped = False")
        out.add("ok = True")

    def helper_value(self) -> str:
        out = _Lines()
        out.add(_JIT, f"def _choice_value(c, i, iz{self.state_args}, EVt, beta, ctx):")
        with out.indent():
            out.extend(_UNPACK)
            self.params(out)
            self.choice_decode(out)
            self.model_body(out, "value")
            out.add("return ok, val, bad")
        return out.text()

    def helper_detail(self) -> str:
        out = _Lines()
        out.add(_JIT, f"def _choice_detail(c, i, iz{self.state_args}, ctx, idx_row, w_row):")
        with out.indent():
            out.extend(_UNPACK)
            self.params(out)
            self.choice_decode(out)
            self.model_body(out, "detail")
            out.add("return ok, r, bad, clamped")
        return out.text()

    def call_value(self, choice: str) -> str:
        return f"_choice_value({choice}, i, iz{self.state_args}, EVt, beta, ctx)"

    def kernel_full(self) -> str:
        out = _Lines()
        out.add(_PJIT, "def bellman_full(EVt, beta, ctx, out_v, out_policy, out_bad, out_bad_choice):")
        with out.indent():
            out.extend(_UNPACK)
            out.add("NZ = EVt.shape[0]", "NC = 1")
            out.add(f"for t in range({self.q}):")
            with out.indent():
                out.add("NC *= csize[t]")
            out.add("for i in prange(out_v.shape[0]):")
            with out.indent():
                self.state_setup(out)
                out.add("best = -np.inf", "chosen = -1", "nbad = 0", "first_bad = -1")
                out.add("for c in range(NC):")
                with out.indent():
                    out.add(f"ok, val, bad = {self.call_value('c')}")
                    out.add("if ok:")
                    with out.indent():
                        out.add("if val > best:")
                        with out.indent():
                            out.add("best = val", "chosen = c")
                    out.add("elif bad:")
                    with out.indent():
                        out.add("nbad += 1", "if first_bad < 0:")
                        with out.indent():
                            out.add("first_bad = c")
                out.add("out_v[i] = best", "out_policy[i] = chosen", "out_bad[i] = nbad", "out_bad_choice[i] = first_bad")
        return out.text()

    def kernel_hinted(self) -> str:
        axis = self.layout.hinted_axis
        out = _Lines()
        out.add(_PJIT, "def bellman_hinted(EVt, beta, ctx, monotone, concave, out_v, out_policy):")
        with out.indent():
            out.extend(_UNPACK)
            out.add("NZ = EVt.shape[0]", "NX = EVt.shape[1]", "M = csize[0]")
            out.add(f"NH = ssize[{axis}]", f"INNER = sstride[{axis}]", "NLINES = NX // NH")
            out.add("for task in prange(NLINES * NZ):")
            with out.indent():
                out.add("iz = task % NZ", "line = task // NZ", "outer = line // INNER", "inner = line - outer * INNER")
                out.add("x0 = outer * NH * INNER + inner", "start = 0")
                out.add("for t in range(NH):")
                with out.indent():
                    out.add("ix = x0 + t * INNER", "i = ix * NZ + iz")
                    self.state_setup(out, from_ix=True)
                    out.add("first = start if monotone else 0", "best = -np.inf", "chosen = -1", "c = first")
                    out.add("while c < M:")
                    with out.indent():
                        out.add(f"ok, val, bad = {self.call_value('c')}", "if ok:")
                        with out.indent():
                            out.add("best = val", "chosen = c", "break")
                        out.add("c += 1")
                    out.add("c += 1", "while chosen >= 0 and c < M:")
                    with out.indent():
                        out.add(f"ok, val, bad = {self.call_value('c')}")
                        out.add("if not ok:")
                        with out.indent():
                            out.add("if concave:")
                            with out.indent():
                                out.add("break")
                        out.add("elif val > best:")
                        with out.indent():
                            out.add("best = val", "chosen = c")
                        out.add("elif concave and val < best:")
                        with out.indent():
                            out.add("break")
                        out.add("c += 1")
                    # Nothing allowed at or above the monotone start: search below it, exhaustively.
                    out.add("if chosen < 0:")
                    with out.indent():
                        out.add("for c in range(first):")
                        with out.indent():
                            out.add(f"ok, val, bad = {self.call_value('c')}", "if ok and val > best:")
                            with out.indent():
                                out.add("best = val", "chosen = c")
                    out.add("out_v[i] = best", "out_policy[i] = chosen", "if chosen >= 0:")
                    with out.indent():
                        out.add("start = chosen")
        return out.text()

    def helper_bound(self) -> str:
        """``_block_bound``: upper bound of the objective over a block of the last choice."""
        model = self.model
        inner = self.q - 1
        lo_names = dict(self.names)
        hi_names = dict(self.names)
        lo_names[model.choices[inner]] = "c_lo"
        hi_names[model.choices[inner]] = "c_hi"
        outer_args = "".join(f", j_{t}" for t in range(inner))
        out = _Lines()
        out.add(_JIT, f"def _block_bound(a, b{outer_args}{self.state_args}, iz, beta, EVt, pyramid, levels, evmax, ctx):")
        with out.indent():
            out.extend(_UNPACK)
            self.params(out)
            for t in range(inner):
                out.add(f"c_{t} = cgrid[coff[{t}] + j_{t}]")
            out.add(f"c_lo = cgrid[coff[{inner}] + a]", f"c_hi = cgrid[coff[{inner}] + b]")
            for k, (name, expr) in enumerate(model.defines):
                lines, lo, hi = expressions.interval_source(expr, lo_names, hi_names, f"bd{k}_")
                out.extend(lines)
                lo_names[name], hi_names[name] = lo, hi
            for k, expr in enumerate(model.feasible):
                lines, lo, hi = expressions.interval_source(expr, lo_names, hi_names, f"bf{k}_")
                out.extend(lines)
                out.add(f"if {lo} == 0.0 and {hi} == 0.0:")
                with out.indent():
                    out.add("return -np.inf, True")
            lines, r_lo, r_hi = expressions.interval_source(model.reward, lo_names, hi_names, "br_")
            out.extend(lines)
            out.add(f"r_hi = {r_hi}", "if r_hi == -np.inf:")
            with out.indent():
                out.add("return -np.inf, True")
            kind = self.layout.bound_kind
            axis = self.layout.pyramid_axis
            fixed = [f"sstride[{t}] * j_{j}" for t, j in enumerate(self.layout.setter) if j is not None and j != inner]
            out.add("base = " + (" + ".join(fixed) if fixed else "0"))
            if kind == "fixed":
                out.add("ev = EVt[iz, base]")
            elif kind == "global":
                out.add("ev = evmax[iz]")
            else:
                if self.layout.setter[axis] == inner:
                    out.add("lo_i = a", "hi_i = b")
                else:
                    k = self.layout.interpolated.index(axis)
                    expr = dict(model.next)[axis]
                    lines, n_lo, n_hi = expressions.interval_source(expr, lo_names, hi_names, f"bn{k}_")
                    out.extend(lines)
                    out.add(
                        f"lo_i = locate_one(sgrid, soff[{axis}], ssize[{axis}], {n_lo})[0]",
                        f"hi_i = locate_one(sgrid, soff[{axis}], ssize[{axis}], {n_hi})[0] + 1",
                    )
                out.add(f"n_outer = EVt.shape[1] // (ssize[{axis}] * sstride[{axis}])")
                out.add(f"ev = pyramid_max(pyramid, levels, ssize[{axis}], sstride[{axis}], n_outer, iz, base, lo_i, hi_i)")
            out.add("ub = r_hi + beta * ev", "if ub - ub == 0.0:")
            with out.indent():
                out.add(f"ub += {BOUND_SLACK!r} * (abs(r_hi) + abs(beta * ev))")
            out.add("return ub, False")
        return out.text()

    def kernel_bnb(self) -> str:
        inner = self.q - 1
        outer_args = "".join(f", j_{t}" for t in range(inner))
        out = _Lines()
        out.add(
            _PJIT,
            "def bellman_bnb(EVt, beta, ctx, pyramid, levels, evmax, guess, has_guess, leaf, depth, "
            "out_v, out_policy, out_bad, out_bad_choice):",
        )
        with out.indent():
            out.extend(_UNPACK)
            out.add("NZ = EVt.shape[0]", f"M = csize[{inner}]", "NOUT = 1")
            out.add(f"for t in range({inner}):")
            with out.indent():
                out.add("NOUT *= csize[t]")
            out.add("for i in prange(out_v.shape[0]):")
            with out.indent():
                self.state_setup(out)
                out.add("best = -np.inf", "chosen = -1", "nbad = 0", "first_bad = -1")
                out.add("if has_guess:")
                with out.indent():
                    out.add("g = guess[i]", "if g >= 0:")
                    with out.indent():
                        out.add(f"ok, val, bad = {self.call_value('g')}", "if ok:")
                        with out.indent():
                            out.add("best = val", "chosen = g")
                out.add("for o in range(NOUT):")
                with out.indent():
                    if inner:
                        out.add("rem = o")
                        for t in range(inner - 1, 0, -1):
                            out.add(f"j_{t} = rem % csize[{t}]", f"rem = rem // csize[{t}]")
                        out.add("j_0 = rem")
                    out.add("cb = o * M", "h = 0", "k = 0")
                    out.add("while True:")
                    with out.indent():
                        out.add("size = leaf << (depth - h)", "a = k * size", "descend = False", "if a < M:")
                        with out.indent():
                            out.add("b = min(a + size, M) - 1", "if size <= leaf:")
                            with out.indent():
                                out.add("for jj in range(a, b + 1):")
                                with out.indent():
                                    out.add("c = cb + jj", f"ok, val, bad = {self.call_value('c')}", "if ok:")
                                    with out.indent():
                                        out.add("if val > best or (val == best and c < chosen):")
                                        with out.indent():
                                            out.add("best = val", "chosen = c")
                                    out.add("elif bad:")
                                    with out.indent():
                                        out.add("nbad += 1", "if first_bad < 0:")
                                        with out.indent():
                                            out.add("first_bad = c")
                            out.add("else:")
                            with out.indent():
                                out.add(
                                    f"ub, dead = _block_bound(a, b{outer_args}{self.state_args}, iz, beta, EVt, "
                                    "pyramid, levels, evmax, ctx)"
                                )
                                out.add("if not dead and not (ub < best or (ub == best and cb + a > chosen)):")
                                with out.indent():
                                    out.add("descend = True")
                        out.add("if descend:")
                        with out.indent():
                            out.add("h += 1", "k *= 2", "continue")
                        out.add("while h > 0 and (k & 1) == 1:")
                        with out.indent():
                            out.add("h -= 1", "k >>= 1")
                        out.add("if h == 0:")
                        with out.indent():
                            out.add("break")
                        out.add("k += 1")
                out.add("out_v[i] = best", "out_policy[i] = chosen", "out_bad[i] = nbad", "out_bad_choice[i] = first_bad")
        return out.text()

    def kernel_policy_nodes(self) -> str:
        out = _Lines()
        out.add(_PJIT, "def policy_nodes(policy, ctx, out_reward, out_index, out_weight, out_ok, out_clamped):")
        with out.indent():
            out.add("NZ = ctx[5].shape[0]")
            if self.expr:
                out.extend(_UNPACK)
            out.add("for i in prange(policy.shape[0]):")
            with out.indent():
                self.state_setup(out)
                out.add(
                    f"ok, r, bad, clamped = _choice_detail(policy[i], i, iz{self.state_args}, ctx, out_index[i], out_weight[i])",
                    "out_reward[i] = r",
                    "out_ok[i] = ok",
                    "out_clamped[i] = clamped",
                )
        return out.text()

    def kernel_scan(self) -> str:
        out = _Lines()
        out.add(_PJIT, "def scan_pairs(ctx, out_allowed, out_clamped, out_bad):")
        with out.indent():
            out.extend(_UNPACK)
            out.add("NZ = ztab.shape[0]", "NC = 1")
            out.add(f"for t in range({self.q}):")
            with out.indent():
                out.add("NC *= csize[t]")
            out.add("for i in prange(out_allowed.shape[0]):")
            with out.indent():
                self.state_setup(out)
                out.add(
                    f"idx_row = np.empty({self.layout.nodes}, dtype=np.int64)",
                    f"w_row = np.empty({self.layout.nodes})",
                    "allowed = 0",
                    "clamps = 0",
                    "nbad = 0",
                )
                out.add("for c in range(NC):")
                with out.indent():
                    out.add(f"ok, r, bad, clamped = _choice_detail(c, i, iz{self.state_args}, ctx, idx_row, w_row)")
                    out.add("if ok:")
                    with out.indent():
                        out.add("allowed += 1", "if clamped:")
                        with out.indent():
                            out.add("clamps += 1")
                    out.add("elif bad:")
                    with out.indent():
                        out.add("nbad += 1")
                out.add("out_allowed[i] = allowed", "out_clamped[i] = clamps", "out_bad[i] = nbad")
        return out.text()

    def module(self) -> str:
        layout = self.layout
        header = [
            f"# fixq generated kernels: backend {layout.backend}, {self.d} states, {self.m} shocks, {self.q} choices",
            f"# setter {layout.setter}, hinted axis {layout.hinted_axis}, bound {layout.bound_kind} {layout.pyramid_axis}",
            f"# template {_TEMPLATE_HASH}, kernels {kernels.SOURCE_HASH}",
            "import numpy as np",
            "from numba import njit, prange",
            "from worker.kernels import locate_one, pyramid_max",
        ]
        parts = ["\n".join(header), self.helper_value(), self.helper_detail(), self.kernel_full(), self.kernel_policy_nodes()]
        if layout.hinted_axis is not None:
            parts.append(self.kernel_hinted())
        if self.expr:
            parts += [self.helper_bound(), self.kernel_bnb(), self.kernel_scan()]
        return "\n\n\n".join(parts) + "\n"


def module_source(layout: KernelLayout, model: ModelSource | None) -> str:
    """Source text of the generated module for ``layout`` (``model`` for the ``expr`` backend)."""
    if layout.backend == "expr" and model is None:
        raise ValueError("the expr backend needs the model's expressions")
    return _Writer(layout, model if layout.backend == "expr" else None).module()
