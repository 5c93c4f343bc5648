"""The text of one generated module: its header, then the kernels that apply to its layout."""

from __future__ import annotations

import functools
import hashlib
import pathlib

from worker._codegen.block_search import bellman_bnb, slope_plan
from worker._codegen.layout import KernelLayout, ModelSource
from worker._codegen.loops import bellman_full, bellman_hinted, policy_nodes, scan_pairs
from worker._codegen.writer import KernelWriter

__all__ = ["generator_hash", "module_source"]

_WORKER = pathlib.Path(__file__).resolve().parent.parent
_GENERATORS = ("_codegen/*.py", "continuous/*.py", "expressions/*.py", "_slopes.py", "kernels.py")
"""The files whose text decides a generated module's text or the jitted code it links to
(patterns under ``worker/``)."""


@functools.cache
def generator_hash() -> str:
    """Hash of every file in `_GENERATORS`, written into each module's header.

    The module's name is the hash of its text, and numba's cache checks only
    that file itself, so a change in any generator or linked helper must
    change the text.  Computed once per process, on first use (a few small
    files).
    """
    digest = hashlib.sha256()
    for pattern in _GENERATORS:
        for path in sorted(_WORKER.glob(pattern)):
            digest.update(path.relative_to(_WORKER).as_posix().encode())
            digest.update(path.read_bytes())
    return digest.hexdigest()[:16]


def module_source(layout: KernelLayout, model: ModelSource | None) -> str:
    """Source text of the generated module for ``layout`` (``model`` for the ``expr`` backend).

    The text is a function of the layout, the model (only with the ``expr`` backend) and the generators, which
    do not change in a process, so the last 64 texts are kept: writing one took about 0.2 ms, at every solve.
    (``model`` is lifted, :func:`~worker._codegen.literals.lift_literals`: its remaining numbers are structural,
    and the only distinct ones that compare equal, exponents ``0.0`` and ``-0.0``, compute the same powers.)
    """
    if layout.backend == "expr" and model is None:
        raise ValueError("the expr backend needs the model's expressions")
    return _module_text(layout, model if layout.backend == "expr" else None)


@functools.lru_cache(maxsize=64)
def _module_text(layout: KernelLayout, model: ModelSource | None) -> str:
    writer = KernelWriter(layout, model)
    header = [
        f"# fixq generated kernels: backend {layout.backend}, {writer.d} states, {writer.m} shocks, {writer.q} choices",
        f"# setter {layout.setter}, hinted axis {layout.hinted_axis}, bound {layout.bound_kind} {layout.pyramid_axis}"
        + (", draws after the choice" if layout.draws else ""),
        f"# generators {generator_hash()}",
        "import numpy as np",
        "from numba import njit",
        "from worker.expressions.interval_kernels import interval_globals",
        "from worker.kernels import locate_one, pyramid_max",
        "",
        "globals().update(interval_globals())",
    ]
    parts = ["\n".join(header), bellman_full(writer), policy_nodes(writer)]
    if layout.hinted_axis is not None:
        parts.append(bellman_hinted(writer))
    if writer.expr:
        plan = slope_plan(writer)
        parts[0] += f"\nSLOPE = {plan is not None}"
        parts += [bellman_bnb(writer, plan), scan_pairs(writer)]
    return "\n\n\n".join(parts) + "\n"
