"""The source pieces every generated kernel shares, around one evaluation site.

`KernelWriter` maps a model's names to the kernels' variables, hoists what
does not depend on the choices (computed once per state), and writes the
pieces the kernels of :mod:`worker._codegen.loops` and
:mod:`worker._codegen.block_search` are assembled from: unpacking ``ctx``,
decoding a flat state or choice, the interpolation nodes, and
`KernelWriter.evaluate`, the model at one choice.

The model is written inline at each evaluation site rather than called as a
helper: numba pays reference counting on every array a called function
holds, which costs many times a typical model's arithmetic per call.
"""

from __future__ import annotations

from collections.abc import Sequence

from worker import expressions
from worker._codegen.hoist import Hoister, dependents
from worker._codegen.layout import KernelLayout, Meta, ModelSource
from worker.expressions import Expression

__all__ = ["JIT", "KernelWriter", "Lines"]


class Lines:
    """An indented block of source lines."""

    def __init__(self) -> None:
        self.lines: list[str] = []
        self.depth = 0

    def add(self, *lines: str) -> None:
        for line in lines:
            self.lines.append("    " * self.depth + line if line else "")

    def extend(self, lines: Sequence[str]) -> None:
        self.add(*lines)

    def block(self, header: str) -> _Indent:
        """``with out.block("if x:"):`` writes the header and indents the body."""
        self.add(header)
        return _Indent(self)

    def text(self) -> str:
        return "\n".join(self.lines)


class _Indent:
    def __init__(self, lines: Lines) -> None:
        self.lines = lines

    def __enter__(self) -> None:
        self.lines.depth += 1

    def __exit__(self, *exc: object) -> None:
        self.lines.depth -= 1


JIT = '@njit(cache=True, nogil=True, error_model="numpy")'


class KernelWriter:
    """The shared pieces of the kernels for a layout (and, for ``expr``, a model).

    ``d``, ``m`` and ``q`` count states, shocks and choices; ``names`` maps a
    document name (or a hoisted part) to its variable in the kernels.
    """

    def __init__(self, layout: KernelLayout, model: ModelSource | None) -> None:
        self.layout = layout
        self.model = model
        self.d = layout.n_states
        self.m = layout.n_shocks
        self.q = layout.n_choices
        self.expr = layout.backend == "expr"
        self.meta = Meta(self.d, self.q)
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
        dependent = dependents(model, set(model.choices))
        hoist = Hoister(dependent, names, self.state_lines, "h_")
        self.defines: list[tuple[int, expressions.Expression | None]] = []
        for k, (name, expr) in enumerate(model.defines):
            if name in dependent:
                self.defines.append((k, Expression.from_tree(hoist.rewrite(expr.tree))))
            else:
                self.state_lines.append(f"d_{k} = {expressions.scalar_source(expr, names)}")
                self.defines.append((k, None))
        self.feasible = [Expression.from_tree(hoist.rewrite(expr.tree)) for expr in model.feasible]
        self.reward = Expression.from_tree(hoist.rewrite(model.reward.tree))
        self.next = [(t, Expression.from_tree(hoist.rewrite(expr.tree))) for t, expr in model.next]

    def unpack(self, out: Lines) -> None:
        if self.expr:
            out.add("p = ctx[0]", "sgrid = ctx[1]", "ztab = ctx[2]", "cgrid = ctx[3]", "meta = ctx[4]")
        elif self.layout.draws:
            out.add("R = ctx[0]", "nbase = ctx[1]", "LO = ctx[2]", "WU = ctx[3]", "PD = ctx[4]", "meta = ctx[5]")
        else:
            out.add("R = ctx[0]", "nbase = ctx[1]", "LO = ctx[2]", "WU = ctx[3]", "meta = ctx[4]")

    def params(self, out: Lines) -> None:
        if self.model is not None:
            for k in range(len(self.model.params)):
                out.add(f"p_{k} = p[{k}]")

    def state_setup(self, out: Lines, *, from_ix: bool = False) -> None:
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

    def n_choices(self, out: Lines, name: str = "NC", upto: int | None = None) -> None:
        count = self.q if upto is None else upto
        sizes = [self.meta.csize(t) for t in range(count)]
        out.add(f"{name} = " + (" * ".join(sizes) if sizes else "1"))

    def choice_decode(self, out: Lines) -> None:
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

    def nodes(self, out: Lines, detail: bool) -> None:
        """Interpolation corners: accumulate ``e``; with ``detail`` also write row ``i`` of ``out_index`` and
        ``out_weight``.

        Written by element, not through row views: a view costs numba reference counting per state.
        """
        interp = self.layout.interpolated
        if self.layout.draws:
            self._draw_nodes(out, detail)
            return
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

    def _draw_nodes(self, out: Lines, detail: bool) -> None:
        """The nodes of every draw after the choice (``table`` backend), the draw's probability folded into
        their weights; node ``kd · 2^m + corner`` of row ``i`` is draw ``kd``'s corner."""
        interp = self.layout.interpolated
        corners = 2 ** len(interp)
        out.add("base = nbase[c]", "e = 0.0")
        with out.block("for kd in range(PD.shape[2]):"):
            out.add("pk = PD[i, c, kd]")
            for k in range(len(interp)):
                out.add(f"lo_{k} = LO[i, c, kd, {k}]", f"w_{k} = WU[i, c, kd, {k}]")
            for corner in range(corners):
                bits = [(corner >> k) & 1 for k in range(len(interp))]
                weight = " * ".join(["pk", *(f"w_{k}" if bit else f"(1.0 - w_{k})" for k, bit in enumerate(bits))])
                index = "base" + "".join(
                    f" + {self.meta.sstride(t)} * (lo_{k} + {bit})" for k, (t, bit) in enumerate(zip(interp, bits))
                )
                out.add(f"wk = {weight}", f"xk = {index}")
                if detail:
                    node = f"kd * {corners} + {corner}"
                    out.add(f"out_index[i, {node}] = xk", f"out_weight[i, {node}] = wk")
                with out.block("if wk != 0.0:"):
                    out.add("e += wk * EVt[iz, xk]")

    def outer_base(self, out: Lines) -> None:
        """``base``: the flat grid state set by the choices before the last one (their ``next_of`` states)."""
        inner = self.q - 1
        terms = [
            f"{self.meta.sstride(t)} * j_{j}" for t, j in enumerate(self.layout.setter) if j is not None and j != inner
        ]
        out.add("base = " + (" + ".join(terms) if terms else "0"))

    def finish(self, out: Lines) -> None:
        out.add("val = r + beta * e")
        if self.expr and self.layout.interpolated:
            out.add("clamped = " + " or ".join(f"cl_{k}" for k in range(len(self.layout.interpolated))))
        out.add("ok = True")

    def evaluate(self, out: Lines, detail: bool = False) -> None:
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

    def row_range(self, out: Lines) -> None:
        """The flat states ``[start, stop)`` a row-block kernel visits; ``stop < 0`` means through the last.

        A block's rows are computed exactly as in a call over every state, so
        blocks run on several threads give the bits of one call.
        """
        with out.block("if stop < 0:"):
            out.add("stop = out_v.shape[0]")

    def prologue(self, out: Lines) -> None:
        self.unpack(out)
        self.params(out)
        out.add("NZ = EVt.shape[0]")
