"""Continuous choices: a grid model one of whose choices takes any value of an interval.

The other choices, if any, take values of their grids or menus: at each point the continuous one is
searched for every combination of them, and the best combination is kept.

:func:`compile_continuous` turns such a document into a
:class:`~worker.continuous.problem.ContinuousProblem`, which the solvers of
:mod:`worker.solvers` run like any other compiled problem (its policy is a
vector of values instead of indices); ``solver.method: endogenous_grid``
has its own solver (:mod:`worker.continuous.egm`).  The modules: the search
(:mod:`~worker.continuous.search`), the generated kernels
(:mod:`~worker.continuous.source`), the document-free kernels
(:mod:`~worker.continuous.interp_kernels`), the problem
(:mod:`~worker.continuous.problem`), simulated paths
(:mod:`~worker.continuous.paths`), Euler-equation errors beside other
choices (:mod:`~worker.continuous.mixed_euler`).
"""

from __future__ import annotations

import time
from typing import Any

import numpy as np

from worker import _codegen
from worker.continuous.drawnodes import check_at_scan
from worker.continuous.egm import conditions
from worker.continuous.problem import ContinuousProblem
from worker.continuous.source import BOUND_HIGH, BOUND_LOW, module_text
from worker.document.continuous_faults import POLICY_ITERATION_CUBIC
from worker.errors import InvalidDocument, join_path
from worker.expressions import evaluate
from worker.feasibility import ModelData, feasibility_scan, model_data

__all__ = ["ContinuousProblem", "check_bounds", "compile_continuous", "kernel_order"]


def compile_continuous(doc: Any) -> ContinuousProblem:
    """Compile a validated grid document with a continuous choice.

    Raises
    ------
    InfeasibleModel
        Some point has no allowed choice among the scan's points of its interval.
    """
    started = time.perf_counter()
    cubic = doc.model.interpolation == "monotone_cubic"
    if cubic and doc.solver.method == "policy_iteration":
        raise InvalidDocument.at("solver.method", POLICY_ITERATION_CUBIC)  # refused at the door too
    data = model_data(doc)
    egm = None
    if doc.solver.method == "endogenous_grid":
        found, c_slope, reason = conditions(data)
        if reason is not None:
            raise InvalidDocument.at("solver.method", f"the endogenous grid method does not apply: {reason}")
        egm = (found, c_slope)
    if data.span is not None:
        check_bounds(data)
    feasibility_scan(data, None)
    check_at_scan(data)
    source = data.source
    order = kernel_order(data)
    bounds = () if data.span is None else ((BOUND_LOW, data.span[0]), (BOUND_HIGH, data.span[1]))
    source = _codegen.ModelSource(
        params=source.params,
        states=source.states,
        shocks=source.shocks,
        choices=tuple(data.choices[j] for j in order),
        defines=(*bounds, *source.defines),
        reward=source.reward,
        feasible=source.feasible,
        next=source.next,
    )
    kernel_model, literals = _codegen.lift_literals(source)
    setters = tuple(None if j is None else order.index(j) for j in data.setter)
    text = module_text(kernel_model, setters, cubic, data.draws)
    prepared = time.perf_counter()
    module = _codegen.load(text)
    params = _codegen.kernel_params(data.param_values, literals)
    problem = ContinuousProblem(doc, data, module, params)
    problem.kernel_literals = literals
    problem.egm_form = egm
    with _codegen.warming(module):  # another process compiling the same kernels: wait, then load them
        problem.warm_up()
    problem.timings = {"prepare_s": prepared - started, "compile_s": time.perf_counter() - prepared}
    return problem


def kernel_order(data: ModelData) -> list[int]:
    """The model's choices as the kernels see them: the continuous one first, then the others in order."""
    return [data.span_choice, *(j for j in range(len(data.choices)) if j != data.span_choice)]


def check_bounds(data: ModelData) -> None:
    """Refuse bounds that are not finite numbers, or a max below the min, at some point (named by its values)."""
    rows = np.arange(data.n, dtype=np.int64)
    env: dict[str, Any] = dict(zip(data.params, data.param_values.tolist()))
    env.update(data.state_env(rows))
    name = data.choices[data.span_choice]
    with np.errstate(all="ignore"):
        low, high = (np.broadcast_to(evaluate(bound, env), (data.n, 1))[:, 0] for bound in data.span)
    for key, values in (("min", low), ("max", high)):
        bad = np.flatnonzero(~np.isfinite(values))
        if bad.size:
            raise InvalidDocument.at(
                join_path("model", "choices", name, key),
                f"is {values[bad[0]]} at {data.describe_state(int(bad[0]))} ({bad.size:,} points in all): the "
                "bounds of a continuous choice must be finite numbers at every point",
            )
    below = np.flatnonzero(high < low)
    if below.size:
        i = int(below[0])
        raise InvalidDocument.at(
            join_path("model", "choices", name, "max"),
            f"is {high[i]:.6g}, below min ({low[i]:.6g}), at {data.describe_state(i)} ({below.size:,} points in all)",
        )
