"""The solves of a search: guiding trials on one compiled problem, certifying trials compiled afresh.

A search solves the same model at many values of its unknowns.  Only the params (or the discount) change
from one trial to the next; the grids, the shock chains and the compiled kernels do not.  So a *guiding*
trial — one that only tells the root finder where to look next — reuses one compiled problem and swaps its
params vector (``use_params``, as a finite horizon's periods do), and trusts the model's hints: it skips the
unrestricted Bellman step that verifies them at the end of a hinted solve.

A *certifying* trial is the solve that may be returned: the document validated and compiled afresh at the
trial values, solved at ``solver.tolerance`` with the hints verified, exactly as a single job at those values
would be (started from the guiding trial's value at the same point).  When the hints hold, a certified solve
ends with its last hinted step (:meth:`worker.solvers.loop.Run.kept`), as a guiding trial does, so that the
two kinds of trial agree but for the inner solves' noise.  :mod:`worker.search` accepts a point
only from a certifying trial, and builds the result from one; the trial rows say which were certified.

Problems that cannot swap their params (reward tables, the endogenous grid method, draws after the choice)
are compiled afresh for every guiding trial.
"""

from __future__ import annotations

import copy
from collections.abc import Callable
from typing import Any

import numpy as np
import scipy.sparse as sp

from worker.document import parse_document
from worker.document.params import resolve_params
from worker.document.search import DISCOUNT
from worker.errors import InvalidDocument
from worker.problem import CompiledProblem

__all__ = ["TrialModels", "trial_distribution", "with_unknowns"]

SWAPPABLE_METHODS = ("howard", "value_iteration", "policy_iteration")
"""Methods whose guiding trials may run on a problem with swapped params (the endogenous grid method reads
its params when it is compiled)."""


REFINE_STEPS = 8
"""Most refinement steps of a trial's stationary distribution from the last trial's LU (count; see
``_refined``)."""
REFINE_RATE = 0.1
"""Each refinement step must shrink the residual at least this many times, else a fresh LU is cheaper
(measured: steps that converge shrink it 10-10,000 times)."""
REFINE_TOLERANCE = 1e-14
"""Refinement stops when the pinned system's residual (1-norm) is at most this share of the solution's
1-norm (the distribution's residual is then checked against ``worker.report.PINNED_TOLERANCE``)."""


def with_unknowns(document: dict[str, Any], values: dict[str, float]) -> dict[str, Any]:
    """The raw document with the unknowns set to ``values``, no search, and the stationary report on."""
    out = {key: value for key, value in document.items() if key != "search"}
    params = {name: x for name, x in values.items() if name != DISCOUNT}
    if DISCOUNT in values:
        out[DISCOUNT] = values[DISCOUNT]
    if params:
        model = copy.copy(document["model"])
        model["params"] = {**model["params"], **params}
        out["model"] = model
    out["report"] = {**(document.get("report") or {}), "stationary": True}
    return out


TRIAL_PREFIX = "trial:"
"""Prefix of the keys of a trial's solver state inside its search's checkpoint (:class:`TrialCheckpoint`)."""


class TrialCheckpoint:
    """The checkpoint of one trial's solve, kept inside its search's (``worker.search.run_search``).

    A save stores the search's state (``search_state()``: the trials before this one) with the solver's
    beside it, its keys prefixed `TRIAL_PREFIX` and the trial named by ``key`` (its number, values, inner
    tolerance and kind), so that a worker lost in the middle of a long trial loses at most ``checkpoint_s``
    of it, as a single job does.  ``load`` gives the solver's state back once, and only to the same trial
    (``pending["state"]``: the search's checkpoint as loaded, shared by the search's trials).  The solver is
    given ``key`` as its fingerprint (``fingerprint``), with the attempt's kind.
    """

    def __init__(self, search: Any, search_state: Callable[[], dict[str, Any]], key: str,
                 pending: dict[str, Any]) -> None:
        self.search = search
        self.search_state = search_state
        self.key = key
        self.pending = pending

    def fingerprint(self, guiding: bool) -> str:
        return f"{self.key}:{'guiding' if guiding else 'certifying'}"

    def load(self) -> dict[str, Any] | None:
        saved = self.pending.pop("state", None)
        if not saved or saved.get(TRIAL_PREFIX + "key") != self.key:
            return None
        return {name[len(TRIAL_PREFIX):]: value for name, value in saved.items() if name.startswith(TRIAL_PREFIX)}

    def save(self, state: dict[str, Any]) -> None:
        inner = {TRIAL_PREFIX + name: value for name, value in state.items()}
        self.search.save({**self.search_state(), **inner, TRIAL_PREFIX + "key": self.key})


class TrialModels:
    """Solves a search's trials: ``solve(xs, start, tolerance, certify) -> (doc, problem, outcome, certified)``.

    ``trial(doc, initial, tolerance, problem=None, trust_hints=False) -> (problem, outcome)`` is the caller's
    solve of a validated document (:mod:`worker.solve`'s): it compiles ``doc`` unless given ``problem``.
    """

    def __init__(self, document: dict[str, Any], names: list[str], trial: Callable[..., tuple[CompiledProblem, Any]]):
        self.document = document
        self.names = names
        self.trial = trial
        self.base_doc: Any = None
        self.problem: CompiledProblem | None = None  # the guiding trials' problem: never one returned

    def fresh_doc(self, xs: tuple[float, ...]) -> Any:
        """The document at ``xs``, validated in full."""
        return parse_document(with_unknowns(self.document, dict(zip(self.names, xs))))

    def solve(self, xs: tuple[float, ...], start: np.ndarray | None, tolerance: float,
              certify: bool, checkpoint: TrialCheckpoint | None = None,
              iterations: int | None = None) -> tuple[Any, CompiledProblem, Any, bool]:
        """One trial at ``xs``; the last item says whether it is a certifying trial (see the module docstring).
        ``checkpoint``: the trial's own, handed to the caller's ``trial`` (``checkpoint=``); ``iterations``: a
        certifying trial's most iterations, instead of the document's ``solver.max_iterations``."""
        if not certify:
            guided = self._guiding(xs, start, tolerance, checkpoint)
            if guided is not None:
                return guided
        doc = self.fresh_doc(xs)
        if iterations is not None:
            doc = doc.model_copy(update={"solver": doc.solver.model_copy(update={"max_iterations": iterations})})
        problem, outcome = self.trial(doc, start, tolerance, checkpoint=checkpoint)
        return doc, problem, outcome, True

    def _guiding(self, xs: tuple[float, ...], start: np.ndarray | None, tolerance: float,
                 checkpoint: TrialCheckpoint | None) -> tuple[Any, CompiledProblem, Any, bool] | None:
        """A guiding trial, on the shared problem when the model allows it; None when it failed (the
        certifying trial then gives the error, as a single job would)."""
        from worker._codegen import kernel_params
        from worker.feasibility import period_params

        shared = self.problem
        if shared is None:
            doc = self.fresh_doc(xs)
        else:
            doc = self._light_doc(xs)
            shared.use_params(kernel_params(period_params(doc.model, 0), shared.kernel_literals))
            shared.discount = float(doc.discount)
        try:
            problem, outcome = self.trial(doc, start, tolerance, problem=shared, trust_hints=True,
                                          checkpoint=checkpoint)
        except (InvalidDocument, ValueError, ArithmeticError):
            return None
        if shared is None and _swappable(doc, problem):
            self.base_doc, self.problem = doc, problem
        return doc, problem, outcome, False

    def _light_doc(self, xs: tuple[float, ...]) -> Any:
        """The first guiding trial's validated document with the params (resolved again) and discount at
        ``xs``: all a guiding trial and its conditions read."""
        raw = resolve_params(with_unknowns(self.document, dict(zip(self.names, xs))))
        base = self.base_doc
        params = {name: float(raw["model"]["params"][name]) for name in base.model.params}
        model = base.model.model_copy(update={"params": params})
        return base.model_copy(update={"model": model, "discount": float(raw.get(DISCOUNT, base.discount))})


def _swappable(doc: Any, problem: CompiledProblem) -> bool:
    """Whether ``problem`` can take other params by ``use_params`` and stay the same model otherwise."""
    return (callable(getattr(problem, "use_params", None))
            and getattr(problem, "reward_storage", "on_the_fly") == "on_the_fly"
            and getattr(problem, "taste_scale", None) is None
            and getattr(getattr(problem, "model_data", None), "draws", None) is None
            and doc.model.horizon is None
            and doc.solver.method in SWAPPABLE_METHODS)


def trial_distribution(matrix: sp.csr_matrix, previous: np.ndarray | None,
                       factors: dict[str, Any] | None = None) -> tuple[np.ndarray, dict[str, Any]]:
    """The stationary distribution of a trial's chain, pinned at the heaviest state of the last trial's
    distribution: by iterative refinement with the last trial's sparse LU (``factors``, kept by
    :func:`worker.stationary_lu.pinned_lu` when pinned at the same state; :func:`_refined`), else by a sparse LU of
    its own (kept in ``factors`` for the next trial), else (no last distribution)
    :func:`worker.report.long_run_distribution`.

    The answer is kept only when ``‖πP − π‖₁`` is at most the pinned solve's tolerance of :mod:`worker.report`
    and nothing is negative beyond rounding; otherwise (a pin outside the chain's closed class, several closed
    classes) the general solve gives it.
    """
    from worker.report import PINNED_TOLERANCE, long_run_distribution

    n = matrix.shape[0]
    if previous is None or previous.shape != (n,):
        # The first trial: pinned at the state with the most mass flowing in (a column sum of P; common
        # practice as a guess of a heavy state), checked below like any other pin.
        k = int(np.argmax(np.asarray(matrix.sum(axis=0)).ravel()))
    else:
        k = int(np.argmax(previous))
    steps = 0
    pi = None
    if factors and factors.get("pin") == k and factors.get("n") == n:
        pi, steps = _refined(matrix, k, factors["lu"])
    if pi is None:
        steps = 0
        pi = _factorised(matrix, k, factors)
    if pi is not None:
        pi /= pi.sum()
        residual = float(np.abs(matrix.T @ pi - pi).sum())
        if residual <= PINNED_TOLERANCE and pi.min() >= -PINNED_TOLERANCE:
            pi = np.maximum(pi, 0.0)
            return pi / pi.sum(), {"method": "refined" if steps else "direct", "residual": residual,
                                   "steps": steps, "warnings": []}
    return long_run_distribution(matrix)


def _factorised(matrix: sp.csr_matrix, k: int, factors: dict[str, Any] | None) -> np.ndarray | None:
    """:func:`worker.stationary_lu.pinned_lu` of the pinned chain, kept in ``factors``, with the column ordering
    chosen on the search's first factorisation by :func:`worker.stationary_lu.ordered_pinned_lu` (the states'
    own order when their band bounds the fill, as a single job's report chooses it) and kept for the rest;
    above :data:`worker.report.DIRECT_MAX_STATES` states only :func:`worker.stationary_lu.natural_pinned_lu`,
    as a single job's report.

    On the Aiyagari bench the states' order is banded (1,400 states, half-bandwidth about 160, 19,000 entries):
    a search's stationary distributions took 6.4 ms in all with it where they took 8.4 ms with SuperLU's
    default ordering at ρ = 0.9 (measured)."""
    from worker import report
    from worker.stationary_lu import natural_pinned_lu, ordered_pinned_lu, pinned_lu

    if matrix.shape[0] > report.DIRECT_MAX_STATES:
        # No LU whose fill nothing bounds but n² (see worker.report.DIRECT_MAX_STATES): the states' own order
        # within its bound, else the general solve (trial_distribution's fallback).
        return natural_pinned_lu(matrix, k, keep=factors)
    if factors is None:
        return pinned_lu(matrix, k)
    return ordered_pinned_lu(matrix, k, keep=factors)


def _refined(matrix: sp.csr_matrix, k: int, lu: Any) -> tuple[np.ndarray | None, int]:
    """The pinned system of ``matrix`` (:func:`worker.stationary_lu.pinned_system`) solved by iterative refinement
    with ``lu``, the factorisation of a nearby chain's pinned at the same state: ``(π, steps)``, or
    ``(None, steps)`` when a step does not shrink the residual at least `REFINE_RATE` times or
    `REFINE_STEPS` do not reach `REFINE_TOLERANCE` (the caller then factorises afresh).

    A refinement step costs one sparse product and one pair of triangular solves (a tenth of an LU at 1,400
    states, measured); from the trial before near the root of the Aiyagari bench, 3-6 steps reach 1e-14,
    while far from it the residual stalls at once and one or two steps are lost (measured)."""
    from worker.stationary_lu import pinned_system

    pinned = pinned_system(matrix, k)
    if pinned is None:
        return None, 0
    system, rhs = pinned
    pi = lu.solve(rhs)
    last = np.inf
    for step in range(1, REFINE_STEPS + 1):
        if not np.isfinite(pi).all():
            return None, step
        error = rhs - system @ pi
        size = float(np.abs(error).sum())
        if size <= REFINE_TOLERANCE * float(np.abs(pi).sum()):
            pi[k] = 1.0
            return pi, step
        if size > REFINE_RATE * last:
            return None, step
        last = size
        pi += lu.solve(error)
    return None, REFINE_STEPS
