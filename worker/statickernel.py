"""The tables of the best static reward, filled in compiled code.

With static choices (:mod:`worker.staticchoices`) the kernels scan a table
``R[point, dynamic choice]`` of the largest reward over the static choices'
values.  :func:`static_tables` fills it by evaluating the model pointwise in
a generated numba kernel (the model's expressions, inlined, through the
pieces of :class:`worker._codegen.writer.KernelWriter`), never holding a
(point, every choice) table.  On the elastic-labour benchmark
(``bench/bench_elastic_labour.py``: 3,500 points × 500 × 91 choices, one
thread) numpy's evaluation of every pair (:mod:`worker.gridtables`) took
1.2 s, this kernel 0.75 s over every pair and 0.05 s climbing with the
verification below (CPU time, measured on a shared machine).

Two searches over the static values, per (point, dynamic choice) -- a line:

* exhaustive (no hint, or several static choices): every value; the
  counts of allowed, excluded and clamped pairs then cover every pair;
* climbing (the ``concave`` hint, one static choice): from the best static
  value of the previous dynamic choice at the same point, up while the reward
  rises, else down while it does not fall (ties go to the lower value, as in
  the exhaustive search); an infeasible start falls back to the exhaustive
  search.  The hint is not trusted: on every line, the values beyond the
  climb's peak on either side are proven lower by bounds of the reward's
  slope (:mod:`worker._codegen.static_proof`), or evaluated where no proof
  holds, so the tables are those of the exhaustive search, bit for bit,
  whether the hint holds or not.  Lines where the verification found a
  better value than the climb are counted, and ``counts["static_note"]``
  says the hint did not hold.  The counts then cover the evaluated pairs.
  Where no slope bound can be written (a reward that may jump along the
  static choice) or its values are not increasing, the exhaustive search is
  used and the note says why.  A line whose climb cannot start (the start is
  not allowed) is searched over every value, unless a bound over the whole
  line shows that nothing on it is allowed.

The generated module is loaded like the search kernels (:func:`worker._codegen.load`);
its header carries the hash of this file and of the generators.
"""

from __future__ import annotations

import functools
import hashlib
import math
import pathlib
import re
from typing import Any

import numpy as np

from worker import _codegen, threadpool
from worker._codegen import static_proof
from worker._codegen.hoist import Hoister
from worker._codegen.source import generator_hash
from worker._codegen.writer import JIT, KernelWriter, Lines
from worker.expressions import Expression
from worker.feasibility import ModelData, evaluate_pairs
from worker.gridtables import RewardTables, reduce_static

__all__ = ["StaticWriter", "static_source", "static_tables"]

@functools.cache
def _own_hash() -> str:
    return hashlib.sha256(pathlib.Path(__file__).read_bytes()).hexdigest()[:16]


_IDENTIFIER = re.compile(r"[A-Za-z_][A-Za-z_0-9]*")


class StaticWriter(KernelWriter):
    """A :class:`KernelWriter` for the static search: choices decoded from ``(d, s)``, static-only parts tabulated.

    ``d`` indexes the dynamic choices and ``s`` the static ones (each in C
    order).  The parts of the expressions that depend on nothing but the
    params and the static choices (``h**(1 − α)``, a disutility of hours) are
    computed once per static value, before the loop over the points, into
    arrays ``T<k>[s]``, by the same operations in the same order (same bits,
    see :class:`worker._codegen.hoist.Hoister`); the dynamic choices are
    decoded once per ``d``.
    """

    def __init__(self, layout: Any, model: Any, static_axes: list[int]) -> None:
        super().__init__(layout, model)
        self.static_axes = static_axes
        self.dynamic_axes = [j for j in range(self.q) if j not in static_axes]
        constant = {f"p_{k}" for k in range(len(model.params))}
        self.constant_lines: list[str] = []
        for line in self.state_lines:
            target, text = line.split(" = ", 1)
            used = set(_IDENTIFIER.findall(re.sub(r"np\.\w+", "", text)))
            if target.startswith("h_") and used <= constant:
                constant.add(target)
                self.constant_lines.append(line)
        # The proofs of the climb read the trees before the static-only parts become tables.
        self.proof = static_proof.proof_plan(self, static_axes[0], constant) if len(static_axes) == 1 else None
        varying = set(model.states) | set(model.shocks) | {name for name, _ in model.defines}
        varying |= {model.choices[j] for j in self.dynamic_axes}
        varying |= {key for key, value in self.names.items() if key.startswith("@") and value not in constant}
        self.table_lines: list[str] = []
        hoist = Hoister(varying, self.names, self.table_lines, "t_")
        self.defines = [
            (k, None if e is None else Expression.from_tree(hoist.rewrite(e.tree))) for k, e in self.defines
        ]
        self.feasible = [Expression.from_tree(hoist.rewrite(e.tree)) for e in self.feasible]
        self.reward = Expression.from_tree(hoist.rewrite(self.reward.tree))
        self.next = [(t, Expression.from_tree(hoist.rewrite(e.tree))) for t, e in self.next]
        self.tables = hoist.count
        for k in range(self.tables):
            self.names[f"@t_{k}"] = f"T{k}[s]"

    def choice_decode(self, out: Lines) -> None:
        """Nothing: :meth:`decode` writes the choices once per ``d`` and per ``s``."""

    def decode(self, out: Lines, axes: list[int], index: str) -> None:
        """Grid indices ``j_<axis>`` and values ``c_<axis>`` of ``axes`` from their C-order flat ``index``."""
        if not axes:
            return
        out.add(f"rem = {index}")
        for j in reversed(axes[1:]):
            out.add(f"j_{j} = rem % {self.meta.csize(j)}", f"rem = rem // {self.meta.csize(j)}")
        out.add(f"j_{axes[0]} = rem")
        for j in axes:
            out.add(f"c_{j} = cgrid[{self.meta.coff(j)} + j_{j}]")


def static_source(writer: StaticWriter) -> str:
    """Source of the module with ``static_best`` for the ``expr`` layout and model of ``writer``."""
    interp = writer.layout.interpolated
    plan = writer.proof
    out = Lines()
    out.add(
        f"# fixq generated static-choice kernel: {writer.d} states, {writer.m} shocks, {writer.q} choices",
        f"# setter {writer.layout.setter}, static {writer.static_axes}",
        f"# generators {generator_hash()} {_own_hash()}",
        "import numpy as np",
        "from numba import njit",
        "from worker.expressions.interval_kernels import interval_globals",
        "from worker.kernels import locate_one, pyramid_max",
        "",
        "globals().update(interval_globals())",
        "",
        "",
    )
    out.add(JIT)
    with out.block(
        "def static_best(EVt, ctx, dyn_base, stat_off, climb, out_R, out_pick, out_lo, out_w, out_counts, start, stop):"
    ):
        writer.prologue(out)
        out.add("beta = 0.0", "ND = dyn_base.shape[0]", "NS = stat_off.shape[0]", "rs = np.empty(NS)")
        out.extend(writer.constant_lines)
        for k in range(writer.tables):
            out.add(f"T{k} = np.empty(NS)")
        with out.block("for s in range(NS):"):
            writer.decode(out, writer.static_axes, "s")
            out.extend(writer.table_lines)
            for k in range(writer.tables):
                out.add(f"T{k}[s] = t_{k}")
        if plan is not None:
            with out.block("if climb:"):
                static_proof.table_source(plan, out)
        with out.block("for i in range(start, stop):"):
            writer.state_setup(out)
            out.add("allowed = 0", "nbad = 0", "first_bad = -1", "clamps = 0", "warm = 0", "broken = 0")
            for k in range(len(interp)):
                out.add(f"lo_{k} = 0", f"w_{k} = 0.0")
            with out.block("for d in range(ND):"):
                writer.decode(out, writer.dynamic_axes, "d")
                out.add("best = -np.inf", "pick = -1", "pick0 = -1", "vlo = NS", "vhi = -1", "s = -1", "skip = -1")
                # Phases: 0 the warm start, 1 up from it, 2 down from it, 3 every value from the lowest (the
                # search without the hint), 4 the verification on both sides of the climb's peak, 6 done.
                with out.block("if climb:"):
                    out.add("todo = warm", "phase = 0")
                    if plan is not None:
                        out.extend(plan.line_lines)
                with out.block("else:"):
                    out.add("todo = 0", "phase = 3")
                with out.block("while True:"):
                    with out.block("if todo >= 0:"):
                        out.add("s = todo", "todo = -1", "c = dyn_base[d] + stat_off[s]")
                        writer.decode(out, writer.static_axes, "s")
                        writer.evaluate(out)
                        out.add("better = False")
                        with out.block("if ok:"):
                            out.add("allowed += 1", "rs[s] = r")
                            with out.block("if clamped:"):
                                out.add("clamps += 1")
                            with out.block("if r > best or (r == best and s < pick):"):
                                out.add("best = r", "pick = s", "better = True")
                                for k in range(len(interp)):
                                    out.add(f"out_lo[i, d, {k}] = lo_{k}", f"out_w[i, d, {k}] = w_{k}")
                        with out.block("else:"):
                            out.add("rs[s] = -np.inf")
                            with out.block("if bad:"):
                                out.add("nbad += 1")
                                with out.block("if first_bad < 0:"):
                                    out.add("first_bad = c")
                        out.add("vlo = min(vlo, s)", "vhi = max(vhi, s)")
                    _climb_step(out, plan)
                    with out.block("while todo < 0 and phase == 4:"):
                        _verify_step(out, plan)
                    with out.block("if todo < 0:"):
                        out.add("break")
                out.add("out_R[i, d] = best")
                with out.block("if phase == 6 and pick != pick0:"):
                    out.add("broken += 1")
                with out.block("if pick >= 0:"):
                    out.add("out_pick[i, d] = pick", "warm = pick")
                with out.block("else:"):
                    out.add("out_pick[i, d] = 0")
            out.add(
                "out_counts[i, 0] = allowed", "out_counts[i, 1] = nbad", "out_counts[i, 2] = first_bad",
                "out_counts[i, 3] = clamps", "out_counts[i, 4] = broken",
            )
    return out.text() + "\n"


def _climb_step(out: Lines, plan: static_proof.ProofPlan | None) -> None:
    """After an evaluation in phases 0-3, the next value to evaluate (``todo``), or the verification's start."""
    with out.block("if phase == 3:"):
        out.add("nxt = s + 1")
        with out.block("if nxt == skip:"):
            out.add("nxt += 1")
        with out.block("if nxt < NS:"):
            out.add("todo = nxt")
    with out.block("elif phase == 0:"):
        with out.block("if not ok:"):
            out.add("phase = 3", "skip = warm", "todo = 0 if warm != 0 else 1")
            with out.block("if todo >= NS:"):
                out.add("todo = -1")
            if plan is not None:
                static_proof.none_allowed_source(plan, out)
                with out.block("if none_allowed:"):
                    out.add("todo = -1")
        with out.block("else:"):
            out.add("phase = 1", "s = warm")
    with out.block("if phase == 1 or phase == 2:"):
        # Up while the reward rises, then (only if it never rose) down while it does not fall.
        out.add("nxt = -1")
        with out.block("if phase == 1 and (better or s == warm):"):
            out.add("nxt = s + 1")
        with out.block("elif phase == 2 and better:"):
            out.add("nxt = s - 1")
        with out.block("if phase == 1 and (nxt < 0 or nxt >= NS) and pick == warm:"):
            out.add("phase = 2", "nxt = warm - 1")
        with out.block("if 0 <= nxt < NS:"):
            out.add("todo = nxt")
        with out.block("else:"):
            out.add("phase = 4", "pick0 = pick", "ar = pick + 1", "al = pick - 1", "tries_r = 0", "tries_l = 0",
                    "done_r = False", "done_l = False")


def _verify_step(out: Lines, plan: static_proof.ProofPlan | None) -> None:
    """One pass of the verification on both sides of the climb's peak: evaluate an anchor that is not yet, or
    try both sides' proofs beyond their anchors (``ar`` right, ``al`` left) and move on where one fails."""
    with out.block("if not done_r:"):
        with out.block("if ar > vhi and ar < NS:"):
            out.add("todo = ar")
        with out.block("elif ar >= NS - 1:"):
            out.add("done_r = True")  # nothing (more) to the right
    with out.block("if todo < 0 and not done_l:"):
        with out.block("if al < vlo and al >= 0:"):
            out.add("todo = al")
        with out.block("elif al <= 0:"):
            out.add("done_l = True")
    with out.block("if todo < 0:"):
        with out.block("if done_r and done_l:"):
            out.add("phase = 6")
        with out.block("else:"):
            tries = static_proof.PROOF_TRIES
            out.add(f"try_r = not done_r and rs[ar] > -np.inf and tries_r < {tries}",
                    f"try_l = not done_l and rs[al] > -np.inf and tries_l < {tries}",
                    "proven_r = False", "proven_l = False")
            if plan is not None:
                with out.block("if try_r:"):
                    static_proof.proof_source(plan, out, 1)
                with out.block("if try_l:"):
                    static_proof.proof_source(plan, out, -1)
            for tag, step in (("r", "+= 1"), ("l", "-= 1")):
                with out.block(f"if try_{tag}:"):
                    out.add(f"tries_{tag} += 1")
                with out.block(f"if proven_{tag}:"):
                    out.add(f"done_{tag} = True")
                with out.block(f"elif not done_{tag}:"):
                    out.add(f"a{tag} {step}")


def static_tables(
    data: ModelData, static: tuple[str, ...], *, climb: bool = False
) -> tuple[RewardTables, dict[str, Any]]:
    """The tables of :func:`worker.gridtables.precompute_tables` with ``static`` choices, filled in compiled code.

    ``climb`` (one static choice only) uses the concave hint along it (see
    the module docstring); the counts then cover the evaluated pairs.
    Returns the same tables and counts as ``precompute_tables(data, static)``.
    """
    kept = reduce_static(data, static)
    layout = _codegen.layout_for(data.setter, len(data.shocks), len(data.choices), "expr", False)
    kernel_model, literals = _codegen.lift_literals(data.source)
    static_axes = [j for j, name in enumerate(data.choices) if name in static]
    writer = StaticWriter(layout, kernel_model, static_axes)
    module = _codegen.load(static_source(writer))
    params = _codegen.kernel_params(data.param_values, literals)
    ctx = _codegen.context(params, data.state_grids, data.shock_table, data.choice_grids, None)

    sizes = list(data.choice_sizes)
    full_strides = [math.prod(sizes[j + 1 :]) for j in range(len(sizes))]
    dynamic = [j for j, name in enumerate(data.choices) if name not in static]

    def offsets(axes: list[int]) -> np.ndarray:
        """Flat full-choice offsets of every combination of ``axes`` (C order over them)."""
        if not axes:
            return np.zeros(1, dtype=np.int64)
        grids = np.meshgrid(*[np.arange(sizes[j], dtype=np.int64) for j in axes], indexing="ij")
        return sum(g.reshape(-1) * full_strides[j] for g, j in zip(grids, axes)).astype(np.int64)

    dyn_base, stat_off = offsets(dynamic), offsets(static_axes)
    n, n_dyn = data.n, kept.n_choices
    interpolated = [t for t, j in enumerate(data.setter) if j is None]
    m = max(len(interpolated), 1)
    R = np.empty((n, n_dyn))
    pick = np.empty((n, n_dyn), dtype=np.int64)
    lower = np.zeros((n, n_dyn, m) if interpolated else (1, 1, 1), dtype=np.int32)
    weight = np.zeros((n, n_dyn, m) if interpolated else (1, 1, 1))
    counts_per = np.empty((n, 5), dtype=np.int64)
    EVt = np.zeros((data.n_shocks, data.n_grid))
    threads = threadpool.threads_for(n, data.n_choices)
    blocks = threadpool.row_blocks(n, threads * threadpool.BLOCKS_PER_THREAD if threads > 1 else 1)
    note = None
    climbing = bool(climb and len(static_axes) == 1)
    if climbing:
        name = static[0]
        grid = data.choice_grids[static_axes[0]]
        why = None
        if writer.proof is None:
            why = f"the reward may jump along `{name}` (a comparison, logic or where() that depends on it)"
        elif grid.size > 1 and not bool(np.all(np.diff(grid) > 0)):
            why = f"the values of `{name}` are not in increasing order"
        if why is not None:
            climbing = False
            note = (
                f"the concave hint was not used along `{name}`: {why}, so a climb along it could not be verified "
                f"by bounds of the reward's slope; `{name}` was maximised over all its values"
            )
    threadpool.run_blocks(
        lambda start, stop: module.static_best(
            EVt, ctx, dyn_base, stat_off, climbing, R, pick, lower, weight, counts_per, start, stop
        ),
        blocks,
        threads,
    )
    broken = int(counts_per[:, 4].sum()) if climbing else 0
    if broken:
        name = static[0]
        note = (
            f"the concave hint did not hold along `{name}`: on {broken:,} of the {n * n_dyn:,} (point, "
            f"{', '.join(f'`{c}`' for c in kept.choices)}) lines the verification of the climb along `{name}` found "
            f"a better value away from the peak the climb stopped at; every line's best value of `{name}` is exact "
            "all the same (the verification searched on wherever it could not prove the rest lower)"
        )

    strides = [math.prod(data.state_sizes[t + 1 :]) for t in range(len(data.states))]
    choice_index = np.unravel_index(np.arange(n_dyn), kept.choice_sizes)
    next_base = np.zeros(n_dyn, dtype=np.int64)
    for t, j in enumerate(kept.setter):
        if j is not None:
            next_base += strides[t] * choice_index[j]
    any_allowed = (R > -np.inf).any(axis=1)
    any_feasible = np.ones(n, dtype=bool)
    stuck = np.flatnonzero(~any_allowed)
    if stuck.size:
        # Only for the error message (feasible but no finite reward, or not feasible at all).
        columns = np.arange(data.n_choices, dtype=np.int64)
        any_feasible[stuck] = evaluate_pairs(data, stuck.astype(np.int64), columns).feasible.any(axis=1)
    bad_rows = np.flatnonzero(counts_per[:, 1])
    counts = {
        "allowed": int(counts_per[:, 0].sum()),
        "bad": int(counts_per[:, 1].sum()),
        "bad_example": (int(bad_rows[0]), int(counts_per[bad_rows[0], 2])) if bad_rows.size else None,
        "clamped": int(counts_per[:, 3].sum()) if interpolated else None,
        "any_feasible": any_feasible,
        "any_allowed": any_allowed,
        "static_pick": pick,
        "static_note": note,
        "climbed": climbing,
    }
    return (R, next_base, lower, weight), counts
