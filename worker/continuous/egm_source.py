"""The endogenous grid method's round as a generated kernel (the numpy round of :mod:`worker.continuous.egm`,
compiled).

The round needs a model's derivative trees (:func:`worker.euler.setup`): the
reward's slope in the state at a fixed choice, the define's slope in the
choice and in the state, the marginal reward and its slope.  They are written
into one kernel, ``egm_round(points, tomorrow, P, beta, p, ztab, power,
cstar, kout, scale)`` (``scale`` the largest ``|points|``), with the trees'
numbers lifted into the params vector as for every generated module
(:func:`worker._codegen.lift_literals`), so a calibration sweep reuses one
compiled module.  For each choice point ``points[j]`` and
shock row ``z``:

1. ``E = Σ_z' P[z, z'] ∂r/∂k(points[j], z', tomorrow[j, z'])``;
2. ``c*`` with ``∂r/∂c(c*) = −β E / (∂c/∂x)`` by Newton steps on logarithms
   from ``cstar[j, z]`` (written back), or in closed form for a marginal
   reward ``A·c**p`` (:func:`worker.continuous.egm_rounds.root`);
3. ``k*`` with ``c(k*, z, points[j]) = c*`` by Newton steps in ``k``
   (``kout[j, z]``): one step when the define is affine in the state (its
   slope in the state moves with nothing that moves with the state), which
   lands on ``k*`` to rounding.

It returns False when a marginal reward or a target is not positive or a
step is not a number; the caller then runs the numpy round, which falls back
to bisection.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from worker import _codegen, _slopes, expressions
from worker._codegen.source import generator_hash
from worker._codegen.writer import JIT, Lines
from worker.euler import EulerSetup
from worker.expressions import Expression, names_in
from worker.feasibility import ModelData

__all__ = ["egm_kernel", "power_law"]

_EPS4 = 4 * float(np.finfo(float).eps)


def egm_kernel(data: ModelData, found: EulerSetup, c_slope: tuple[Any, dict],
               power: tuple[float, float] | None) -> tuple[Any, np.ndarray]:
    """``(egm_round, params)``: the compiled round of ``data``'s model and the params vector it takes.

    With ``power = (A, p)`` (the marginal reward is ``A·c**p``, see :func:`power_law`) the kernel inverts it
    in closed form, ``c = (target/A)**(1/p)``, instead of by Newton steps; ``A`` and ``p`` are the last two
    params, so the module does not depend on them.
    """
    source = data.source
    defines = [name for name, _ in source.defines]
    trees: list[Any] = [expr.tree for _, expr in source.defines]
    groups: dict[str, list[tuple[str, int]]] = {}

    def add(label: str, items: list[tuple[str, Any]]) -> None:
        groups[label] = []
        for name, tree in items:
            groups[label].append((name, len(trees)))
            trees.append(tree)

    def slopes(pair: tuple[Any, dict]) -> list[tuple[str, Any]]:
        """A slope tree's define derivatives (named by their primes), in order, then the tree itself."""
        return [*((_slopes.prime(name), tree) for name, tree in pair[1].items()), ("@", pair[0])]

    add("state", slopes(found.state_slope))
    add("choice", slopes(found.define_slope))
    add("after", [item for name, (tree, derived) in found.after.items()
                  for item in ((name, tree), (_slopes.prime(name), derived))])
    add("marginal", [("@", found.marginal), ("@@", found.marginal_slope)])
    add("c_state", slopes(c_slope))
    bundle = _codegen.ModelSource(
        params=source.params, states=source.states, shocks=source.shocks, choices=source.choices,
        defines=tuple((f"t{i}", Expression.from_tree(tree)) for i, tree in enumerate(trees)),
        reward=Expression.from_tree(expressions.Number(1.0)), feasible=(), next=(),
    )
    lifted, literals = _codegen.lift_literals(bundle)
    lifted_trees = [expr.tree for _, expr in lifted.defines]
    names: dict[str, str] = {name: f"p_{k}" for k, name in enumerate(lifted.params)}
    names[found.state] = "s_0"
    names.update({name: f"z_{t}" for t, name in enumerate(source.shocks)})
    names[found.choice] = "c_0"
    names.update({name: f"d_{k}" for k, name in enumerate(defines)})
    names.update({_slopes.prime(name): f"q_{k}" for k, name in enumerate(defines)})
    carrier = names[found.define]
    # The define's slope in the state, once its define derivatives are known, not moving with the state:
    # the define is affine in the state and one Newton step finds today's state (to rounding).
    moving = set(c_slope[1]) | {found.state}
    affine = not any(names_in(lifted_trees[index]) & moving for _, index in groups["c_state"])

    def src(index: int) -> str:
        return expressions.scalar_source(Expression.from_tree(lifted_trees[index]), names)

    def block(out: Lines, label: str, result: str) -> None:
        """The group's derivative lines, then ``result = <its last tree>``."""
        for name, index in groups[label]:
            target = result if name == "@" else names[name]
            out.add(f"{target} = {src(index)}")

    def all_defines(out: Lines) -> None:
        for k in range(len(defines)):
            out.add(f"d_{k} = {src(k)}")

    out = Lines()
    out.add(JIT, "def egm_round(points, tomorrow, P, beta, p, ztab, power, cstar, kout, scale):")
    out.depth += 1
    out.extend([f"p_{k} = p[{k}]" for k in range(len(lifted.params))])
    out.add("nz = P.shape[0]", "slope = np.empty(nz)")
    with out.block("for j in range(points.shape[0]):"):
        with out.block("for zz in range(nz):"):
            out.add("s_0 = points[j]", "c_0 = tomorrow[j, zz]")
            out.extend([f"z_{t} = ztab[zz, {t}]" for t in range(len(source.shocks))])
            all_defines(out)
            block(out, "state", "slope[zz]")
        with out.block("for z in range(nz):"):
            out.add("e = 0.0")
            with out.block("for zz in range(nz):"):
                out.add("e += P[z, zz] * slope[zz]")
            out.add("s_0 = points[j]", "c_0 = points[j]")
            out.extend([f"z_{t} = ztab[z, {t}]" for t in range(len(source.shocks))])
            all_defines(out)
            block(out, "choice", "cx")
            out.add("target = -beta * e / cx", "cc = cstar[j, z]")
            with out.block("if not (cc > 0.0 and cc < np.inf):"):
                out.add(f"cc = {carrier} if {carrier} > 0.0 and {carrier} < np.inf else 1.0")
            with out.block("if not (target > 0.0 and target < np.inf):"):
                out.add("return False")
            with out.block("if power:"):
                out.add(f"cc = root(target / p[{len(lifted.params)}], 1.0 / p[{len(lifted.params) + 1}])")
            with out.block("for _step in range(0 if power else 60):"):
                out.add(f"{carrier} = cc")
                block(out, "after", "_unused")
                out.add(f"mm = {src(groups['marginal'][0][1])}", f"ms = {src(groups['marginal'][1][1])}")
                out.add("step = (np.log(mm) - np.log(target)) / (cc * ms / mm)")
                with out.block("if not (step == step) or abs(step) == np.inf:"):
                    out.add("return False")
                out.add("step = min(max(step, -50.0), 50.0)", "cc = cc * np.exp(-step)")
                with out.block(f"if abs(step) <= {_EPS4!r}:"):
                    out.add("break")
            out.add("cstar[j, z] = cc", "k = points[j]")
            with out.block(f"for _step in range({1 if affine else 60}):"):
                out.add("s_0 = k")
                all_defines(out)
                block(out, "c_state", "ck")
                out.add(f"step = ({carrier} - cc) / ck", "k = k - step")
                with out.block("if not (step == step):"):
                    out.add("return False")
                with out.block(f"if abs(step) <= {_EPS4!r} * (abs(k) + scale):"):
                    out.add("break")
            out.add("kout[j, z] = k")
    out.add("return True")
    header = [
        f"# fixq generated endogenous-grid round: {len(source.shocks)} shocks, {len(defines)} defines",
        f"# generators {generator_hash()}",
        "import numpy as np",
        "from numba import njit",
        "from worker.continuous.egm_rounds import root",
        "from worker.expressions.interval_kernels import interval_globals",
        "",
        "globals().update(interval_globals())",
    ]
    module = _codegen.load("\n".join(header) + "\n\n\n" + out.text() + "\n")
    params = _codegen.kernel_params(data.param_values, literals)
    return module.egm_round, np.concatenate([params, np.array(power or (1.0, 1.0), dtype=np.float64)])


def power_law(marginal: Any, scale: float) -> tuple[float, float] | None:
    """``(A, p)`` when ``marginal(c)`` (a numpy function of ``c`` alone) is ``A·c**p`` to rounding, else None.

    Checked at 33 points spread over ``scale·[1e-6, 1e6]`` on a log scale: the
    logarithm of the marginal must be affine in ``log c`` within 64 ulps of
    its size (CRRA and log rewards are; the check is exact for them).
    """
    c = scale * np.geomspace(1e-6, 1e6, 33)
    with np.errstate(all="ignore"):
        values = np.asarray(marginal(c), dtype=np.float64)
    if values.shape != c.shape or not (np.all(np.isfinite(values)) and np.all(values > 0)):
        return None
    x, y = np.log(c), np.log(values)
    slope = (y[-1] - y[0]) / (x[-1] - x[0])
    fitted = y[0] + slope * (x - x[0])
    if np.abs(fitted - y).max() > 64 * np.finfo(float).eps * max(1.0, np.abs(y).max()) or slope == 0.0:
        return None
    return float(np.exp(y[0] - slope * x[0])), float(slope)
