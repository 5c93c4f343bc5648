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
    The model is evaluated pointwise: defines, feasibility, reward and
    ``next``, with every part that does not depend on the choices computed
    once per state (see :class:`_Hoister`).  Adds ``bellman_bnb``, the exact
    block search, and ``scan_pairs``.
``table`` (the precomputed regime)
    The reward and interpolation nodes are read from tables filled once
    (``R``, ``next_base``, ``node_lower``, ``node_weight``); the source does
    not depend on the expressions, so one module serves every model of a
    structure.

The model is written inline at each evaluation site rather than called as a
helper: numba pays reference counting on every array a called function
holds, which costs many times a typical model's arithmetic per call.

Kernels (``n`` value-function entries, ``i = x · n_shocks + z``; every
kernel takes ``ctx``, the tuple built by :func:`context`; all serial — on a
shared 2-core machine ``parallel=True`` measured 1.03–1.3× faster at several
seconds more compilation per kernel):

* ``bellman_full(EVt, beta, ctx, out_v, out_policy, out_bad, out_bad_choice)``
  — every choice; ties go to the lowest flat choice index.
* ``bellman_hinted(EVt, beta, ctx, monotone, concave, out_v, out_policy,
  out_reward)`` — one choice only, along lines of the hinted state axis
  (``out_reward``: the reward at the choice found): monotone starts at the
  previous state's choice (and searches below it only when nothing at or
  above it is allowed); concave stops once the objective has fallen below
  the best ``HINT_PATIENCE`` times in a row, after skipping a leading
  infeasible stretch, and at the first infeasible point after a feasible
  one; both together give one sweep per line.
* ``bellman_bnb(EVt, beta, ctx, pyramid, levels, evmax, guess, has_guess,
  leaf, dpu, dpd, slope, out_v, out_policy, out_bad, out_bad_choice)`` —
  exact.  The guess pass evaluates the guess and its two neighbours; then a
  depth-first walk over blocks ``[a, b]`` of the last choice (the rest of
  the guess's line on either side, or the whole line) evaluates blocks of at
  most ``leaf`` choices pointwise and splits the others in halves unless a
  bound proves the block cannot beat the incumbent under the lowest-index tie
  rule.  Two bounds: the *slope* bound (:mod:`worker._slopes`; beside the
  guess, where the objective is flat) and the *interval* bound (the interval
  bound of the reward, from ``interval_source`` with the box narrowed by
  the constraints, plus ``β`` times the exact block maximum of ``EV`` from
  the dyadic ``pyramid``).  Equal to ``bellman_full`` bit for bit.
* ``policy_nodes(policy, states, EVt, ctx, out_reward, out_index, out_weight,
  out_ok, out_clamped)`` — reward and interpolation nodes of a fixed policy
  at the flat states listed in ``states`` (rows of the outputs).
* ``scan_pairs(EVt, ctx, out_allowed, out_clamped, out_bad)`` (``expr``
  only) — counts per state over every choice, for diagnostics.
"""

from __future__ import annotations

import hashlib
import importlib.util
import math
import os
import pathlib
import sys
import tempfile
from dataclasses import dataclass
from types import ModuleType
from typing import Sequence

import numpy as np

from worker import _slopes, expressions
from worker.environment import kernel_cache_setting

__all__ = [
    "BOUND_SLACK", "KernelLayout", "ModelSource", "context", "kernel_cache_dir", "layout_for", "load", "module_name",
    "module_source",
]

BOUND_SLACK = 2.0**-40
"""Relative widening of a block's upper bound (of ``|reward bound| + |β·EV bound|``):
covers interpolation weights that sum to one only up to rounding."""
HINT_PATIENCE = 3
"""Allowed points in a row below the best before a concave hinted search stops (count).  Value
functions between improvements, and the discretised optimum on fine grids, are concave only up to
wiggles of a grid step: stopping at the first fall (1) needed 30 improvements instead of 23 on the
1,000-point growth benchmark and broke the promise at 13 of 140,000 states at 20,000 points, where
2 and 3 did not; 3 was fastest at both sizes (measured)."""
SLOPE_SLACK = 2.0**-40
"""Relative widening of the slope bound's per-step bound, far above the rounding of its few operations."""

_TEMPLATE_HASH = hashlib.sha256(pathlib.Path(__file__).read_bytes()).hexdigest()[:16]


def _dependency_hash() -> str:
    """Hash of the modules whose jitted code is linked into generated kernels.

    numba's cache checks only the generated file itself, so a change in the
    helpers it calls must change that file's name.
    """
    digest = hashlib.sha256()
    for name in ("kernels.py", "_intervals.py", "expressions.py"):
        path = pathlib.Path(__file__).with_name(name)
        if path.exists():
            digest.update(path.read_bytes())
    return digest.hexdigest()[:16]


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


def _packed(grids: Sequence[np.ndarray]) -> tuple[np.ndarray, list[int], list[int], list[int]]:
    """Concatenated grids with their offsets, sizes and C-order strides."""
    sizes = [int(g.size) for g in grids]
    offsets = [sum(sizes[:t]) for t in range(len(sizes))]
    strides = [math.prod(sizes[t + 1 :]) for t in range(len(sizes))]
    flat = np.ascontiguousarray(np.concatenate(grids) if grids else np.zeros(0), dtype=np.float64)
    return flat, offsets, sizes, strides


def context(
    params: np.ndarray,
    state_grids: Sequence[np.ndarray],
    shock_table: np.ndarray,
    choice_grids: Sequence[np.ndarray],
    tables: tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray] | None = None,
) -> tuple[np.ndarray, ...]:
    """The ``ctx`` tuple every kernel takes.

    ``expr`` backend (``tables`` None): ``(params, state_grid, shock_table,
    choice_grid, meta)``; ``table`` backend: ``(R, next_base, node_lower,
    node_weight, meta)``.  Grids are concatenated; ``meta`` (int64) holds, in
    order, the state grids' offsets, sizes and C-order strides, then the
    choice grids' (see :class:`_Meta`).  Few entries keep numba's typing of
    every kernel cheap.
    """
    state_flat, state_offsets, state_sizes, state_strides = _packed(state_grids)
    choice_flat, choice_offsets, choice_sizes, choice_strides = _packed(choice_grids)
    meta = np.array(
        state_offsets + state_sizes + state_strides + choice_offsets + choice_sizes + choice_strides, dtype=np.int64
    )
    if tables is None:
        return (
            np.ascontiguousarray(params, dtype=np.float64),
            state_flat,
            np.ascontiguousarray(shock_table, dtype=np.float64),
            choice_flat,
            meta,
        )
    return (*tables, meta)


class _Meta:
    """Source text of the entries of ``meta`` for ``d`` states and ``q`` choices."""

    def __init__(self, d: int, q: int) -> None:
        self.d, self.q = d, q

    def soff(self, t: int) -> str:
        return f"meta[{t}]"

    def ssize(self, t: int) -> str:
        return f"meta[{self.d + t}]"

    def sstride(self, t: int) -> str:
        return f"meta[{2 * self.d + t}]"

    def coff(self, t: int) -> str:
        return f"meta[{3 * self.d + t}]"

    def csize(self, t: int) -> str:
        return f"meta[{3 * self.d + self.q + t}]"


def kernel_cache_dir() -> pathlib.Path:
    """``FIXQ_KERNEL_CACHE``, else ``~/.cache/fixq/kernels``; a temp folder when neither is writable."""
    configured = kernel_cache_setting()
    candidates = [configured] if configured else []
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


def module_name(source: str) -> str:
    """The module (and file) name generated ``source`` is imported under: a hash of it."""
    return f"fixq_kernels_{hashlib.sha256(source.encode()).hexdigest()[:24]}"


def load(source: str) -> ModuleType:
    """Import generated source from the kernel cache (writing it first if new)."""
    name = module_name(source)
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

    def block(self, header: str) -> "_Indent":
        """``with out.block("if x:"):`` writes the header and indents the body."""
        self.add(header)
        return _Indent(self)

    def text(self) -> str:
        return "\n".join(self.lines)


class _Indent:
    def __init__(self, lines: _Lines) -> None:
        self.lines = lines

    def __enter__(self) -> None:
        self.lines.depth += 1

    def __exit__(self, *exc: object) -> None:
        self.lines.depth -= 1


_JIT = '@njit(cache=True, nogil=True, error_model="numpy")'


def _names_in(node: expressions.Node) -> set[str]:
    if isinstance(node, expressions.Name):
        return {node.id}
    found: set[str] = set()
    for child in _children(node):
        found |= _names_in(child)
    return found


def _children(node: expressions.Node) -> tuple[expressions.Node, ...]:
    E = expressions
    if isinstance(node, (E.Negate, E.Not)):
        return (node.operand,)
    if isinstance(node, E.Arith):
        return (node.first, *(term for _, term in node.rest))
    if isinstance(node, E.Power):
        return (node.base, node.exponent)
    if isinstance(node, (E.Compare, E.Logic)):
        return tuple(node.operands)
    if isinstance(node, E.Call):
        return tuple(node.args)
    return ()


def _as_expression(node: expressions.Node) -> expressions.Expression:
    return expressions.Expression(text="", tree=node, names=frozenset(_names_in(node)), functions=frozenset())


class _Hoister:
    """Moves the parts of expressions that do not depend on ``varying`` names out, as named values.

    Each such part (a maximal sub-tree, or the leading part of a
    left-to-right run of ``+ -`` or ``* /``) becomes one assignment in
    ``lines``, computed by the same operations in the same order as the
    whole expression would, so the result is bit-for-bit unchanged.  Used
    twice: parts that do not depend on any choice are computed once per state
    instead of once per choice, and inside a block bound, parts that do not
    depend on the blocked choice are single points, whose bounds are exact.

    The tree gets ``Name`` nodes whose ids start with ``@`` (never a document
    name) and ``names`` maps them to the variables assigned in ``lines``.
    """

    def __init__(self, varying: set[str], names: dict[str, str], lines: list[str], prefix: str) -> None:
        self.varying = varying
        self.names = names
        self.lines = lines
        self.prefix = prefix
        self.count = 0

    def point(self, node: expressions.Node) -> expressions.Node:
        if isinstance(node, (expressions.Number, expressions.Name)):
            return node
        variable = f"{self.prefix}{self.count}"
        self.count += 1
        self.lines.append(f"{variable} = {expressions.scalar_source(_as_expression(node), self.names)}")
        self.names[f"@{variable}"] = variable
        return expressions.Name(f"@{variable}")

    def rewrite(self, node: expressions.Node) -> expressions.Node:
        E = expressions
        if not (_names_in(node) & self.varying):
            return self.point(node)
        if isinstance(node, E.Arith):
            terms = [node.first, *(term for _, term in node.rest)]
            lead = 0
            while lead < len(terms) and not (_names_in(terms[lead]) & self.varying):
                lead += 1
            if lead >= 2:
                first = self.point(E.Arith(node.first, node.rest[: lead - 1]))
                rest = node.rest[lead - 1 :]
            else:
                first = self.rewrite(node.first)
                rest = node.rest
            return E.Arith(first, tuple((op, self.rewrite(term)) for op, term in rest))
        if isinstance(node, E.Negate):
            return E.Negate(self.rewrite(node.operand))
        if isinstance(node, E.Not):
            return E.Not(self.rewrite(node.operand))
        if isinstance(node, E.Power):
            return E.Power(self.rewrite(node.base), self.rewrite(node.exponent))
        if isinstance(node, E.Compare):
            return E.Compare(tuple(self.rewrite(x) for x in node.operands), node.ops)
        if isinstance(node, E.Logic):
            return E.Logic(node.op, tuple(self.rewrite(x) for x in node.operands))
        if isinstance(node, E.Call):
            return E.Call(node.function, tuple(self.rewrite(x) for x in node.args))
        return node


def _dependents(model: ModelSource, roots: set[str]) -> set[str]:
    """``roots`` and every define that depends on them, directly or through earlier defines."""
    found = set(roots)
    for name, expr in model.defines:
        if expr.names & found:
            found.add(name)
    return found


@dataclass
class _SlopePlan:
    """What the slope bound's source needs: ``steps`` are ``(name, value tree, derivative tree)`` for
    the defines the reward needs that depend on the last choice, in order, then ``("", reward tree,
    its derivative)``; the trees are hoisted against the choice, their ``@hs_`` parts computed by
    ``lines`` into the variables ``names`` maps them to."""

    names: dict[str, str]
    lines: list[str]
    steps: list[tuple[str, expressions.Node, expressions.Node]]


class _Writer:
    """Writes one generated module for a layout (and, for ``expr``, a model)."""

    def __init__(self, layout: KernelLayout, model: ModelSource | None) -> None:
        self.layout = layout
        self.model = model
        self.d = layout.n_states
        self.m = layout.n_shocks
        self.q = layout.n_choices
        self.expr = layout.backend == "expr"
        self.meta = _Meta(self.d, self.q)
        self.names: dict[str, str] = {}
        self.state_lines: list[str] = []
        if model is not None:
            self._prepare(model)

    def _prepare(self, model: ModelSource) -> None:
        """Map document names to variables and hoist what does not depend on the choices."""
        names = self.names
        names.update({name: f"p_{k}" for k, name in enumerate(model.params)})
        names.update({name: f"s_{t}" for t, name in enumerate(model.states)})
        names.update({name: f"z_{t}" for t, name in enumerate(model.shocks)})
        names.update({name: f"c_{t}" for t, name in enumerate(model.choices)})
        names.update({name: f"d_{k}" for k, (name, _) in enumerate(model.defines)})
        dependent = _dependents(model, set(model.choices))
        hoist = _Hoister(dependent, names, self.state_lines, "h_")
        self.defines: list[tuple[int, expressions.Expression | None]] = []
        for k, (name, expr) in enumerate(model.defines):
            if name in dependent:
                self.defines.append((k, _as_expression(hoist.rewrite(expr.tree))))
            else:
                self.state_lines.append(f"d_{k} = {expressions.scalar_source(expr, names)}")
                self.defines.append((k, None))
        self.feasible = [_as_expression(hoist.rewrite(expr.tree)) for expr in model.feasible]
        self.reward = _as_expression(hoist.rewrite(model.reward.tree))
        self.next = [(t, _as_expression(hoist.rewrite(expr.tree))) for t, expr in model.next]

    # Pieces ------------------------------------------------------------------

    def unpack(self, out: _Lines) -> None:
        if self.expr:
            out.add("p = ctx[0]", "sgrid = ctx[1]", "ztab = ctx[2]", "cgrid = ctx[3]", "meta = ctx[4]")
        else:
            out.add("R = ctx[0]", "nbase = ctx[1]", "LO = ctx[2]", "WU = ctx[3]", "meta = ctx[4]")

    def params(self, out: _Lines) -> None:
        if self.model is not None:
            for k in range(len(self.model.params)):
                out.add(f"p_{k} = p[{k}]")

    def state_setup(self, out: _Lines, *, from_ix: bool = False) -> None:
        """Decode flat state ``i`` (or ``ix`` with ``iz`` known) and compute its per-state values."""
        if not from_ix:
            out.add("ix = i // NZ", "iz = i - ix * NZ")
        if not self.expr:
            return
        out.add("rem = ix")
        for t in range(self.d - 1, 0, -1):
            out.add(f"i_{t} = rem % {self.meta.ssize(t)}", f"rem = rem // {self.meta.ssize(t)}")
        out.add("i_0 = rem")
        for t in range(self.d):
            out.add(f"s_{t} = sgrid[{self.meta.soff(t)} + i_{t}]")
        for t in range(self.m):
            out.add(f"z_{t} = ztab[iz, {t}]")
        out.extend(self.state_lines)

    def n_choices(self, out: _Lines, name: str = "NC", upto: int | None = None) -> None:
        count = self.q if upto is None else upto
        sizes = [self.meta.csize(t) for t in range(count)]
        out.add(f"{name} = " + (" * ".join(sizes) if sizes else "1"))

    def choice_decode(self, out: _Lines) -> None:
        if self.q == 1:
            out.add("j_0 = c")
        else:
            out.add("rem = c")
            for t in range(self.q - 1, 0, -1):
                out.add(f"j_{t} = rem % {self.meta.csize(t)}", f"rem = rem // {self.meta.csize(t)}")
            out.add("j_0 = rem")
        if self.expr:
            for t in range(self.q):
                out.add(f"c_{t} = cgrid[{self.meta.coff(t)} + j_{t}]")

    def nodes(self, out: _Lines, detail: bool) -> None:
        """Interpolation corners: accumulate ``e``; with ``detail`` also write row ``i`` of ``out_index``/``out_weight``.

        Written by element, not through row views: a view costs numba reference counting per state.
        """
        interp = self.layout.interpolated
        if self.expr:
            terms = [f"{self.meta.sstride(t)} * j_{j}" for t, j in enumerate(self.layout.setter) if j is not None]
            out.add("base = " + (" + ".join(terms) if terms else "0"))
            for k, t in enumerate(interp):
                out.add(f"lo_{k}, w_{k}, cl_{k} = locate_one(sgrid, {self.meta.soff(t)}, {self.meta.ssize(t)}, n_{k})")
        else:
            out.add("base = nbase[c]")
            for k, t in enumerate(interp):
                out.add(f"lo_{k} = LO[i, c, {k}]", f"w_{k} = WU[i, c, {k}]")
        if not interp:
            out.add("e = EVt[iz, base]")
            if detail:
                out.add("out_index[i, 0] = base", "out_weight[i, 0] = 1.0")
            return
        out.add("e = 0.0")
        for corner in range(2 ** len(interp)):
            bits = [(corner >> k) & 1 for k in range(len(interp))]
            weight = " * ".join(f"w_{k}" if bit else f"(1.0 - w_{k})" for k, bit in enumerate(bits))
            index = "base" + "".join(
                f" + {self.meta.sstride(t)} * (lo_{k} + {bit})" for k, (t, bit) in enumerate(zip(interp, bits))
            )
            out.add(f"wk = {weight}", f"xk = {index}")
            if detail:
                out.add(f"out_index[i, {corner}] = xk", f"out_weight[i, {corner}] = wk")
            # Zero weights are skipped, here and in policy evaluation alike, so both give the same bits.
            with out.block("if wk != 0.0:"):
                out.add("e += wk * EVt[iz, xk]")

    def finish(self, out: _Lines) -> None:
        out.add("val = r + beta * e")
        if self.expr and self.layout.interpolated:
            out.add("clamped = " + " or ".join(f"cl_{k}" for k in range(len(self.layout.interpolated))))
        out.add("ok = True")

    def evaluate(self, out: _Lines, detail: bool = False) -> None:
        """The model at flat choice ``c``: sets ``ok``, ``bad``, ``clamped``, ``r``, ``val``.

        Written inline at every evaluation site: a call into a helper that
        holds arrays costs numba reference counting on each call, many times
        the arithmetic of a typical model.
        """
        self.choice_decode(out)
        out.add("ok = False", "bad = False", "clamped = False", "r = -np.inf", "val = -np.inf")
        if not self.expr:
            out.add("r = R[i, c]")
            with out.block("if r != -np.inf:"):
                self.nodes(out, detail)
                self.finish(out)
            return
        names = self.names
        for k, expr in self.defines:
            if expr is not None:
                out.add(f"d_{k} = {expressions.scalar_source(expr, names)}")
        depth = out.depth
        for k, expr in enumerate(self.feasible):
            out.add(f"f_{k} = {expressions.scalar_source(expr, names)}", f"if f_{k} != 0.0:")
            out.depth += 1
        out.add(f"r = {expressions.scalar_source(self.reward, names)}")
        with out.block("if r - r == 0.0:"):
            for k, (_, expr) in enumerate(self.next):
                out.add(f"n_{k} = {expressions.scalar_source(expr, names)}")
            if self.next:
                with out.block("if " + " and ".join(f"n_{k} == n_{k}" for k in range(len(self.next))) + ":"):
                    self.nodes(out, detail)
                    self.finish(out)
                with out.block("else:"):
                    out.add("bad = True")
            else:
                self.nodes(out, detail)
                self.finish(out)
        with out.block("elif r != -np.inf:"):
            out.add("bad = True")
        out.depth = depth

    def prologue(self, out: _Lines) -> None:
        self.unpack(out)
        self.params(out)
        out.add("NZ = EVt.shape[0]")

    # Kernels -----------------------------------------------------------------

    def kernel_full(self) -> str:
        out = _Lines()
        out.add(_JIT)
        with out.block("def bellman_full(EVt, beta, ctx, out_v, out_policy, out_bad, out_bad_choice):"):
            self.prologue(out)
            self.n_choices(out)
            with out.block("for i in range(out_v.shape[0]):"):
                self.state_setup(out)
                out.add("best = -np.inf", "chosen = -1", "nbad = 0", "first_bad = -1")
                with out.block("for c in range(NC):"):
                    self.evaluate(out)
                    with out.block("if ok:"):
                        with out.block("if val > best:"):
                            out.add("best = val", "chosen = c")
                    with out.block("elif bad:"):
                        out.add("nbad += 1")
                        with out.block("if first_bad < 0:"):
                            out.add("first_bad = c")
                out.add("out_v[i] = best", "out_policy[i] = chosen", "out_bad[i] = nbad", "out_bad_choice[i] = first_bad")
        return out.text()

    def kernel_hinted(self) -> str:
        axis = self.layout.hinted_axis
        out = _Lines()
        out.add(_JIT)
        with out.block("def bellman_hinted(EVt, beta, ctx, monotone, concave, out_v, out_policy, out_reward):"):
            self.prologue(out)
            out.add("NX = EVt.shape[1]", f"M = {self.meta.csize(0)}")
            out.add(f"NH = {self.meta.ssize(axis)}", f"INNER = {self.meta.sstride(axis)}", "NLINES = NX // NH")
            with out.block("for task in range(NLINES * NZ):"):
                out.add("iz = task % NZ", "line = task // NZ", "outer = line // INNER", "inner = line - outer * INNER")
                out.add("x0 = outer * NH * INNER + inner", "start = 0")
                with out.block("for t in range(NH):"):
                    out.add("ix = x0 + t * INNER", "i = ix * NZ + iz")
                    self.state_setup(out, from_ix=True)
                    # One evaluation site, three phases: 0 skips a leading infeasible stretch from the
                    # start, 1 climbs, 2 searches below a monotone start that had nothing allowed above it.
                    out.add("first = start if monotone else 0", "best = -np.inf", "chosen = -1", "best_r = -np.inf", "falls = 0")
                    out.add("c = first", "phase = 0", "stop = M")
                    with out.block("while True:"):
                        with out.block("if c >= stop:"):
                            with out.block("if phase < 2 and chosen < 0 and first > 0:"):
                                out.add("phase = 2", "c = 0", "stop = first", "continue")
                            out.add("break")
                        self.evaluate(out)
                        with out.block("if phase == 1 and not ok and concave:"):
                            out.add("break")
                        with out.block("if ok:"):
                            with out.block("if val > best:"):
                                out.add("best = val", "chosen = c", "best_r = r", "falls = 0")
                            with out.block("elif concave and phase == 1 and val < best:"):
                                out.add("falls += 1")
                                with out.block(f"if falls >= {HINT_PATIENCE}:"):
                                    out.add("break")
                            with out.block("if phase == 0:"):
                                out.add("phase = 1")
                        out.add("c += 1")
                    out.add("out_v[i] = best", "out_policy[i] = chosen", "out_reward[i] = best_r")
                    with out.block("if chosen >= 0:"):
                        out.add("start = chosen")
        return out.text()

    def block_bound(self, out: _Lines) -> None:
        """Sets ``dead`` (no allowed choice in inner block ``[a, b]``) or ``ub``, an upper bound of the objective."""
        model = self.model
        inner = self.q - 1
        inner_name = model.choices[inner]
        varying = _dependents(model, {inner_name})
        names = dict(self.names)
        point_lines: list[str] = []
        hoist = _Hoister(varying, names, point_lines, "hq_")
        lo_names, hi_names = dict(names), dict(names)
        lo_names[inner_name], hi_names[inner_name] = "c_lo", "c_hi"

        def bounds(expr: expressions.Expression, prefix: str) -> tuple[str, str]:
            tree = hoist.rewrite(expr.tree)
            out.extend(point_lines)
            point_lines.clear()
            if isinstance(tree, expressions.Name) and tree.id not in varying:
                return names[tree.id], names[tree.id]
            for key, value in names.items():
                lo_names.setdefault(key, value)
                hi_names.setdefault(key, value)
            lines, lo, hi = expressions.interval_source(_as_expression(tree), lo_names, hi_names, prefix)
            out.extend(lines)
            return lo, hi

        out.add("dead = True", "ub = -np.inf", "base = 0")
        out.add(f"c_lo = cgrid[{self.meta.coff(inner)} + a]", f"c_hi = cgrid[{self.meta.coff(inner)} + b]")
        for k, expr in self.defines:
            if expr is None:
                continue
            name = model.defines[k][0]
            if name in varying:
                lo_names[name], hi_names[name] = bounds(expr, f"bd{k}_")
            else:
                out.add(f"d_{k} = {expressions.scalar_source(expr, names)}")
        depth = out.depth
        for k, expr in enumerate(self.feasible):
            lo, hi = bounds(expr, f"bf{k}_")
            out.add(f"if not ({lo} == 0.0 and {hi} == 0.0):")
            out.depth += 1
            self.tighten(out, expr.tree, varying, names, lo_names, hi_names)
        _, r_hi = bounds(self.reward, "br_")
        out.add(f"r_hi = {r_hi}")
        with out.block("if r_hi != -np.inf:"):
            kind, axis = self.layout.bound_kind, self.layout.pyramid_axis
            fixed = [
                f"{self.meta.sstride(t)} * j_{j}" for t, j in enumerate(self.layout.setter) if j is not None and j != inner
            ]
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
                    n_lo, n_hi = bounds(dict(self.next)[axis], f"bn{k}_")
                    grid = f"sgrid, {self.meta.soff(axis)}, {self.meta.ssize(axis)}"
                    out.add(f"lo_i = locate_one({grid}, {n_lo})[0]", f"hi_i = locate_one({grid}, {n_hi})[0] + 1")
                size, stride = self.meta.ssize(axis), self.meta.sstride(axis)
                out.add(f"ev = pyramid_max(pyramid, levels, {size}, {stride}, n_outer, iz, base, lo_i, hi_i)")
            out.add("ub = r_hi + beta * ev", "dead = False")
            with out.block("if ub - ub == 0.0:"):
                out.add(f"ub += {BOUND_SLACK!r} * (abs(r_hi) + abs(beta * ev))")
        out.depth = depth

    _FLIPPED = {"<": ">", "<=": ">=", ">": "<", ">=": "<=", "==": "=="}

    def tighten(
        self, out: _Lines, tree: expressions.Node, varying: set[str], names: dict[str, str],
        lo_names: dict[str, str], hi_names: dict[str, str],
    ) -> None:
        """Narrows the bounds of a name that a constraint compares with a point, and nests on a non-empty box.

        Only allowed choices can be the maximum, so bounds may assume every
        constraint holds: from ``c > 0`` the reward is bounded over ``c`` in
        ``[max(c_lo, tiny), c_hi]``, not over the whole block, which keeps a
        pole just outside the allowed set (``1/c``, ``log c``) out of the bound.
        Handles comparisons (chained too, and inside ``and``) of a name that
        varies in the block with a side that does not.
        """
        E = expressions
        if isinstance(tree, E.Logic) and tree.op == "and":
            for operand in tree.operands:
                self.tighten(out, operand, varying, names, lo_names, hi_names)
            return
        if not isinstance(tree, E.Compare):
            return
        for left, op, right in zip(tree.operands, tree.ops, tree.operands[1:]):
            if op == "!=":
                continue
            if isinstance(right, E.Name) and right.id in varying and not (_names_in(left) & varying):
                left, op, right = right, self._FLIPPED[op], left
            if not (isinstance(left, E.Name) and left.id in varying) or (_names_in(right) & varying):
                continue
            lo, hi = lo_names[left.id], hi_names[left.id]
            if not (lo.isidentifier() and hi.isidentifier()):
                continue
            point = expressions.scalar_source(_as_expression(right), names)
            if op in (">", ">="):
                limit = f"np.nextafter({point}, np.inf)" if op == ">" else f"({point})"
                out.add(f"{lo} = max({lo}, {limit})")
            elif op in ("<", "<="):
                limit = f"np.nextafter({point}, -np.inf)" if op == "<" else f"({point})"
                out.add(f"{hi} = min({hi}, {limit})")
            else:
                out.add(f"{lo} = max({lo}, {point})", f"{hi} = min({hi}, {point})")
            out.add(f"if {lo} <= {hi}:")
            out.depth += 1

    def slope_plan(self) -> _SlopePlan | None:
        """What the slope bound needs, or None where it does not apply (see :mod:`worker._slopes`).

        It applies when the last choice is ``next_of`` the pyramid's axis and no
        state is interpolated (choice ``j`` then lands on grid point ``j``), and
        the reward is smooth in that choice.
        """
        layout, model = self.layout, self.model
        inner = self.q - 1
        if (
            not self.expr
            or layout.interpolated
            or layout.bound_kind != "pyramid"
            or layout.setter[layout.pyramid_axis] != inner
        ):
            return None
        choice = model.choices[inner]
        varying = _dependents(model, {choice})
        needed = set(model.reward.names)
        for name, expr in reversed(model.defines):
            if name in needed:
                needed |= set(expr.names)
        plan = _SlopePlan(names=dict(self.names), lines=[], steps=[])
        hoist = _Hoister(varying, plan.names, plan.lines, "hs_")
        moving = {name: True for name in varying if name != choice}
        try:
            for k, expr in self.defines:
                name = model.defines[k][0]
                if expr is None or name not in varying or name not in needed:
                    continue
                tree = hoist.rewrite(expr.tree)
                plan.steps.append((name, tree, _slopes.derivative(tree, choice, moving)))
            tree = hoist.rewrite(self.reward.tree)
            plan.steps.append(("", tree, _slopes.derivative(tree, choice, moving)))
        except _slopes.NotSmooth:
            return None
        return plan

    def slope_bound(self, out: _Lines, plan: _SlopePlan) -> None:
        """Clears ``descend`` when the slope bound proves block ``[a, b]`` below ``best``.

        The anchor is the guess's neighbour on the block's side (``g_j ± 1``,
        evaluated in the guess pass).  For a block to the right, every step
        ``f(i+1) − f(i)`` with ``i`` from the anchor ``p`` to ``b − 1`` is at
        most ``h · max r' + β · max ΔEV``, so ``f(j) ≤ f(p) + (j − p) · step``;
        to the left, symmetrically with the least step.  ``r'`` is bounded over
        the hull of the anchor and the block, ``ΔEV`` exactly by the pyramids
        ``dpu`` (of ``ΔEV`` rounded up) and ``dpd`` (of ``−ΔEV`` rounded up).
        """
        model = self.model
        inner = self.q - 1
        choice = model.choices[inner]
        names = plan.names
        lo_names, hi_names = dict(names), dict(names)
        lo_names[choice], hi_names[choice] = "s_lo", "s_hi"
        axis = self.layout.pyramid_axis
        size, stride = self.meta.ssize(axis), self.meta.sstride(axis)
        out.add("side = 0")
        with out.block("if o == g_o:"):
            with out.block("if left_ok and b < g_j - 1:"):
                out.add("side = -1", "p_a = g_j - 1", "i_lo = a", "i_hi = p_a", "anchor_v = left_v", "anchor_r = left_r")
            with out.block("elif right_ok and a > g_j + 1:"):
                out.add("side = 1", "p_a = g_j + 1", "i_lo = p_a", "i_hi = b", "anchor_v = right_v", "anchor_r = right_r")
        with out.block("if side != 0:"):
            offset = self.meta.coff(inner)
            out.add(f"s_lo = cgrid[{offset} + i_lo]", f"s_hi = cgrid[{offset} + i_hi]")
            fixed = [f"{self.meta.sstride(t)} * j_{j}" for t, j in enumerate(self.layout.setter) if j is not None and j != inner]
            out.add("base = " + (" + ".join(fixed) if fixed else "0"))
            out.extend(plan.lines)
            g_lo = g_hi = "0.0"
            for k, (name, tree, slope) in enumerate(plan.steps):
                for key, value in names.items():
                    lo_names.setdefault(key, value)
                    hi_names.setdefault(key, value)
                if name:
                    lines, lo, hi = expressions.interval_source(_as_expression(tree), lo_names, hi_names, f"sv{k}_")
                    out.extend(lines)
                    lo_names[name], hi_names[name] = lo, hi
                lines, lo, hi = expressions.interval_source(_as_expression(slope), lo_names, hi_names, f"sd{k}_")
                out.extend(lines)
                if name:
                    lo_names[_slopes.prime(name)], hi_names[_slopes.prime(name)] = lo, hi
                else:
                    g_lo, g_hi = lo, hi
            with out.block(f"if {g_lo} - {g_lo} == 0.0 and {g_hi} - {g_hi} == 0.0:"):
                query = f"levels, {size}, {stride}, n_outer, iz, base, i_lo, i_hi - 1)"
                with out.block("if side > 0:"):
                    out.add(f"dq = pyramid_max(dpu, {query}")
                    out.add(f"gh = {g_hi} * (h_max if {g_hi} >= 0.0 else h_min)", "step = gh + beta * dq")
                with out.block("else:"):
                    out.add(f"dq = pyramid_max(dpd, {query}")
                    out.add(f"gh = {g_lo} * (h_min if {g_lo} >= 0.0 else h_max)", "step = beta * dq - gh")
                out.add(f"step += {SLOPE_SLACK!r} * (abs(gh) + beta * abs(dq))")
                # The most the objective can rise over the anchor: at the far end when steps may go up.
                with out.block("if step > 0.0:"):
                    out.add("reach = (i_hi - p_a) if side > 0 else (p_a - i_lo)")
                with out.block("else:"):
                    out.add("reach = (a - p_a) if side > 0 else (p_a - b)")
                out.add("rise = reach * step")
                # Rounding of f(j) and f(p): |r(j)| is at most |r(p)| plus the hull's width times max |r'|.
                out.add(f"r_span = (s_hi - s_lo) * max(abs({g_lo}), abs({g_hi}))")
                out.add(
                    "sub = anchor_v + rise + "
                    f"{BOUND_SLACK!r} * (2.0 * abs(anchor_r) + r_span + 2.0 * beta * ev_abs + abs(rise))"
                )
                with out.block("if sub - sub == 0.0 and sub < best:"):
                    out.add("descend = False")

    def kernel_bnb(self, plan: _SlopePlan | None) -> str:
        inner = self.q - 1
        out = _Lines()
        out.add(_JIT)
        with out.block(
            "def bellman_bnb(EVt, beta, ctx, pyramid, levels, evmax, guess, has_guess, leaf, "
            "dpu, dpd, slope, out_v, out_policy, out_bad, out_bad_choice):"
        ):
            self.prologue(out)
            out.add(f"M = {self.meta.csize(inner)}")
            if plan is not None:
                out.add("h_min = slope[0]", "h_max = slope[1]", "ev_abs = slope[2]")
            self.n_choices(out, "NOUT", inner)
            axis = self.layout.pyramid_axis
            if axis is not None:
                out.add(f"n_outer = EVt.shape[1] // ({self.meta.ssize(axis)} * {self.meta.sstride(axis)})")
            # Blocks [a, b] of the last choice still to be searched, depth first (each split pushes
            # two halves, so the stack never holds more than about log2(M) + 2 blocks).
            out.add("stack = np.empty((130, 2), dtype=np.int64)")
            with out.block("for i in range(out_v.shape[0]):"):
                self.state_setup(out)
                out.add("best = -np.inf", "chosen = -1", "nbad = 0", "first_bad = -1", "g_o = -1", "g_j = -1")
                if plan is not None:
                    out.add("left_ok = False", "right_ok = False")
                    out.add("left_v = 0.0", "left_r = 0.0", "right_v = 0.0", "right_r = 0.0")
                with out.block("if has_guess and guess[i] >= 0:"):
                    out.add("g_o = guess[i] // M", "g_j = guess[i] - g_o * M")
                # The guess pass (o = -1) evaluates the guess (with its neighbours, the anchors of
                # the slope bound, when there is one) through the same evaluation site as every other
                # choice: a second inline copy of the model cost about a quarter more compile time.
                # The guess's own pass then searches the rest of its line on either side.
                spread = 1 if plan is not None else 0
                out.add(f"g_lo = max(g_j - {spread}, 0)", f"g_hi = min(g_j + {spread}, M - 1)")
                out.add("first_o = -1 if g_o >= 0 else 0")
                with out.block("for o in range(first_o, NOUT):"):
                    if inner:
                        out.add("rem = max(o, 0)")
                        for t in range(inner - 1, 0, -1):
                            out.add(f"j_{t} = rem % {self.meta.csize(t)}", f"rem = rem // {self.meta.csize(t)}")
                        out.add("j_0 = rem")
                        for t in range(inner):
                            out.add(f"c_{t} = cgrid[{self.meta.coff(t)} + j_{t}]")
                    out.add("top = 0")
                    with out.block("if o < 0:"):
                        out.add("cb = g_o * M", "stack[0, 0] = g_lo", "stack[0, 1] = g_hi", "top = 1")
                    with out.block("else:"):
                        out.add("cb = o * M")
                        with out.block("if o == g_o:"):
                            with out.block("if g_hi < M - 1:"):
                                out.add("stack[top, 0] = g_hi + 1", "stack[top, 1] = M - 1", "top += 1")
                            with out.block("if g_lo > 0:"):
                                out.add("stack[top, 0] = 0", "stack[top, 1] = g_lo - 1", "top += 1")
                        with out.block("else:"):
                            out.add("stack[0, 0] = 0", "stack[0, 1] = M - 1", "top = 1")
                    with out.block("while top > 0:"):
                        out.add("top -= 1", "a = stack[top, 0]", "b = stack[top, 1]", "descend = False")
                        with out.block("if o < 0 or b - a < leaf:"):
                            with out.block("for c in range(cb + a, cb + b + 1):"):
                                self.evaluate(out)
                                with out.block("if ok:"):
                                    with out.block("if val > best or (val == best and c < chosen):"):
                                        out.add("best = val", "chosen = c")
                                    if plan is not None:
                                        with out.block("if o < 0 and c != guess[i]:"):
                                            with out.block("if c < guess[i]:"):
                                                out.add("left_ok = True", "left_v = val", "left_r = r")
                                            with out.block("else:"):
                                                out.add("right_ok = True", "right_v = val", "right_r = r")
                                with out.block("elif bad:"):
                                    out.add("nbad += 1")
                                    with out.block("if first_bad < 0:"):
                                        out.add("first_bad = c")
                        with out.block("else:"):
                            # The slope bound first: beside the anchors, where it is meant to work, the
                            # interval bound cannot (the block holds choices nearly as good as the best).
                            out.add("descend = True")
                            if plan is not None:
                                self.slope_bound(out, plan)
                            with out.block("if descend:"):
                                self.block_bound(out)
                                with out.block("if dead or ub < best or (ub == best and cb + a > chosen):"):
                                    out.add("descend = False")
                        with out.block("if descend:"):
                            out.add("mid = (a + b) // 2")
                            out.add("stack[top, 0] = mid + 1", "stack[top, 1] = b")
                            out.add("stack[top + 1, 0] = a", "stack[top + 1, 1] = mid", "top += 2")
                out.add("out_v[i] = best", "out_policy[i] = chosen", "out_bad[i] = nbad", "out_bad_choice[i] = first_bad")
        return out.text()

    def kernel_policy_nodes(self) -> str:
        out = _Lines()
        out.add(_JIT)
        with out.block("def policy_nodes(policy, states, EVt, ctx, out_reward, out_index, out_weight, out_ok, out_clamped):"):
            self.prologue(out)
            out.add("beta = 0.0")
            with out.block("for t in range(states.shape[0]):"):
                out.add("i = states[t]")
                self.state_setup(out)
                out.add("c = policy[i]")
                self.evaluate(out, detail=True)
                out.add("out_reward[i] = r", "out_ok[t] = ok", "out_clamped[i] = clamped")
        return out.text()

    def kernel_scan(self) -> str:
        out = _Lines()
        out.add(_JIT)
        with out.block("def scan_pairs(EVt, ctx, out_allowed, out_clamped, out_bad):"):
            self.prologue(out)
            out.add("beta = 0.0")
            self.n_choices(out)
            with out.block("for i in range(out_allowed.shape[0]):"):
                self.state_setup(out)
                out.add("allowed = 0", "clamps = 0", "nbad = 0")
                with out.block("for c in range(NC):"):
                    self.evaluate(out)
                    with out.block("if ok:"):
                        out.add("allowed += 1")
                        with out.block("if clamped:"):
                            out.add("clamps += 1")
                    with out.block("elif bad:"):
                        out.add("nbad += 1")
                out.add("out_allowed[i] = allowed", "out_clamped[i] = clamps", "out_bad[i] = nbad")
        return out.text()

    def module(self) -> str:
        layout = self.layout
        header = [
            f"# fixq generated kernels: backend {layout.backend}, {self.d} states, {self.m} shocks, {self.q} choices",
            f"# setter {layout.setter}, hinted axis {layout.hinted_axis}, bound {layout.bound_kind} {layout.pyramid_axis}",
            f"# template {_TEMPLATE_HASH}, dependencies {_dependency_hash()}",
            "import numpy as np",
            "from numba import njit",
            "from worker.expressions import interval_globals",
            "from worker.kernels import locate_one, pyramid_max",
            "",
            "globals().update(interval_globals())",
        ]
        parts = ["\n".join(header), self.kernel_full(), self.kernel_policy_nodes()]
        if layout.hinted_axis is not None:
            parts.append(self.kernel_hinted())
        if self.expr:
            plan = self.slope_plan()
            parts[0] += f"\nSLOPE = {plan is not None}"
            parts += [self.kernel_bnb(plan), self.kernel_scan()]
        return "\n\n\n".join(parts) + "\n"


def module_source(layout: KernelLayout, model: ModelSource | None) -> str:
    """Source text of the generated module for ``layout`` (``model`` for the ``expr`` backend)."""
    if layout.backend == "expr" and model is None:
        raise ValueError("the expr backend needs the model's expressions")
    return _Writer(layout, model if layout.backend == "expr" else None).module()
