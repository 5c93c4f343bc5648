"""The kernels that visit every state in turn: the plain Bellman searches and the diagnostics.

* ``bellman_full`` — every choice at every state;
* ``bellman_hinted`` — one choice only, along lines of the hinted state
  axis, with the monotone and concave shortcuts;
* ``policy_nodes`` — reward and interpolation nodes of a fixed policy;
* ``scan_pairs`` (``expr`` only) — per-state counts over every choice.

Each returns the source of one jitted function; their signatures are listed
in :mod:`worker._codegen`.
"""

from __future__ import annotations

from worker._codegen.writer import JIT, KernelWriter, Lines

__all__ = ["HINT_PATIENCE", "bellman_full", "bellman_hinted", "policy_nodes", "scan_pairs"]

HINT_PATIENCE = 3
"""Allowed points in a row below the best before a concave hinted search stops (count).  Value
functions between iterations, and the discretised optimum on fine grids, are concave only up to
wiggles of a grid step: stopping at the first fall (1) needed 30 iterations instead of 23 on the
1,000-point growth benchmark and broke the promise at 13 of 140,000 states at 20,000 points, where
2 and 3 did not; 3 was fastest at both sizes (measured)."""


def bellman_full(writer: KernelWriter) -> str:
    """Source of ``bellman_full``: every choice at every state."""
    out = Lines()
    out.add(JIT)
    with out.block("def bellman_full(EVt, beta, ctx, out_v, out_policy, out_bad, out_bad_choice, start=0, stop=-1):"):
        writer.prologue(out)
        writer.n_choices(out)
        writer.row_range(out)
        with out.block("for i in range(start, stop):"):
            writer.state_setup(out)
            out.add("best = -np.inf", "chosen = -1", "nbad = 0", "first_bad = -1")
            with out.block("for c in range(NC):"):
                writer.evaluate(out)
                with out.block("if ok:"):
                    with out.block("if val > best:"):
                        out.add("best = val", "chosen = c")
                with out.block("elif bad:"):
                    out.add("nbad += 1")
                    with out.block("if first_bad < 0:"):
                        out.add("first_bad = c")
            out.add("out_v[i] = best", "out_policy[i] = chosen", "out_bad[i] = nbad", "out_bad_choice[i] = first_bad")
    return out.text()


def bellman_hinted(writer: KernelWriter) -> str:
    """Source of ``bellman_hinted``: the hinted search along the last choice and the hinted axis.

    With one choice, one search per point; with several, one for every
    combination ``co`` of the others (all of them), and the best over the
    combinations wins, ties going to the lowest flat choice index as in
    ``bellman_full``.  ``monotone`` starts each search at the choice the same
    combination made at the previous point of the line (the promise read per
    combination); ``concave`` stops it past the peak.
    """
    axis = writer.layout.hinted_axis
    nested = writer.q > 1
    out = Lines()
    out.add(JIT)
    with out.block("def bellman_hinted(EVt, beta, ctx, monotone, concave, out_v, out_policy, out_reward):"):
        writer.prologue(out)
        writer.n_choices(out, "NOUT", upto=writer.q - 1)
        out.add("NX = EVt.shape[1]", f"M = {writer.meta.csize(writer.q - 1)}")
        out.add(f"NH = {writer.meta.ssize(axis)}", f"INNER = {writer.meta.sstride(axis)}", "NLINES = NX // NH")
        out.add("starts = np.zeros(NOUT, dtype=np.int64)")
        with out.block("for task in range(NLINES * NZ):"):
            out.add("iz = task % NZ", "line = task // NZ", "outer = line // INNER", "inner = line - outer * INNER")
            out.add("x0 = outer * NH * INNER + inner")
            with out.block("for co in range(NOUT):"):
                out.add("starts[co] = 0")
            with out.block("for t in range(NH):"):
                out.add("ix = x0 + t * INNER", "i = ix * NZ + iz")
                writer.state_setup(out, from_ix=True)
                out.add("top = -np.inf", "top_choice = -1", "top_r = -np.inf")
                with out.block("for co in range(NOUT):"):
                    _line_search(out, writer, "co * M + cl" if nested else "cl")
                    with out.block("if chosen >= 0:"):
                        out.add("starts[co] = chosen")
                        with out.block("if best > top:"):
                            out.add("top = best", "top_choice = co * M + chosen", "top_r = best_r")
                out.add("out_v[i] = top", "out_policy[i] = top_choice", "out_reward[i] = top_r")
    return out.text()


def _line_search(out: Lines, writer: KernelWriter, flat: str) -> None:
    """The hinted search along the last choice ``cl`` (flat choice ``flat``): sets ``best``, ``chosen``, ``best_r``.

    One evaluation site, three phases: 0 skips a leading infeasible stretch
    from the start, 1 climbs, 2 searches below a monotone start that had
    nothing allowed above it.
    """
    out.add(
        "first = starts[co] if monotone else 0", "best = -np.inf", "chosen = -1", "best_r = -np.inf", "falls = 0",
        "cl = first", "phase = 0", "stop = M",
    )
    with out.block("while True:"):
        with out.block("if cl >= stop:"):
            with out.block("if phase < 2 and chosen < 0 and first > 0:"):
                out.add("phase = 2", "cl = 0", "stop = first", "continue")
            out.add("break")
        out.add(f"c = {flat}")
        writer.evaluate(out)
        with out.block("if phase == 1 and not ok and concave:"):
            out.add("break")
        with out.block("if ok:"):
            with out.block("if val > best:"):
                out.add("best = val", "chosen = cl", "best_r = r", "falls = 0")
            with out.block("elif concave and phase == 1 and val < best:"):
                out.add("falls += 1")
                with out.block(f"if falls >= {HINT_PATIENCE}:"):
                    out.add("break")
            with out.block("if phase == 0:"):
                out.add("phase = 1")
        out.add("cl += 1")


def policy_nodes(writer: KernelWriter) -> str:
    """Source of ``policy_nodes``: the model at a fixed policy's choices."""
    out = Lines()
    out.add(JIT)
    with out.block(
        "def policy_nodes(policy, states, EVt, ctx, out_reward, out_index, out_weight, out_ok, out_clamped):"
    ):
        writer.prologue(out)
        out.add("beta = 0.0")
        with out.block("for t in range(states.shape[0]):"):
            out.add("i = states[t]")
            writer.state_setup(out)
            out.add("c = policy[i]")
            writer.evaluate(out, detail=True)
            out.add("out_reward[i] = r", "out_ok[t] = ok", "out_clamped[i] = clamped")
    return out.text()


def scan_pairs(writer: KernelWriter) -> str:
    """Source of ``scan_pairs``: allowed, clamped and failed choices counted per state."""
    out = Lines()
    out.add(JIT)
    with out.block("def scan_pairs(EVt, ctx, out_allowed, out_clamped, out_bad):"):
        writer.prologue(out)
        out.add("beta = 0.0")
        writer.n_choices(out)
        with out.block("for i in range(out_allowed.shape[0]):"):
            writer.state_setup(out)
            out.add("allowed = 0", "clamps = 0", "nbad = 0")
            with out.block("for c in range(NC):"):
                writer.evaluate(out)
                with out.block("if ok:"):
                    out.add("allowed += 1")
                    with out.block("if clamped:"):
                        out.add("clamps += 1")
                with out.block("elif bad:"):
                    out.add("nbad += 1")
            out.add("out_allowed[i] = allowed", "out_clamped[i] = clamps", "out_bad[i] = nbad")
    return out.text()
