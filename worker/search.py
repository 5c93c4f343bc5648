"""Searches: the unknowns at which conditions on the stationary distribution hold, in one job.

:func:`run_search` solves the model once per trial value of the unknowns, each solve started from the last
ones' values extrapolated to it (``_start``), computes the stationary distribution of the policy and the
conditions' aggregates (:mod:`worker.aggregates`), and lets the outer method choose the next trial: with one unknown
:func:`worker.search_outer.find_root` (from the document's own value, steps to the root of a rational model
of the residual, then ``scipy.optimize.brentq`` on the narrowest sign change; never outside the bracket),
with several :func:`worker.search_several.find_common_root` (a bounded Newton method).

Trials are *guiding* or *certifying* (:mod:`worker.search_trials`).  A guiding trial reuses one compiled
problem with its params swapped and trusts the hints (no verification step); its inner tolerance is
`LOOSE_FACTOR` times the document's ``solver.tolerance`` at first, each next one `TIGHTEN` times tighter, down
to the document's own.  A certifying trial compiles the document afresh at the trial values and solves it at
``solver.tolerance`` with the hints verified, exactly as a single job would.

With one unknown, the first guiding trial whose residual is within `CERTIFY_NEAR` times the tolerance is
followed by certifying trials (``settle``): the first at the root's estimate from the guiding trials
(:func:`worker.search_outer.estimate_root`), each next one a Newton step with the guiding trials' slope (a
guiding and a certifying residual at one point differ by the inner solves' noise: the slope is good, the
offset may not be), at most `SETTLE_STEPS`.  On the Aiyagari bench the offset was up to about 1e-5 against a
tolerance of 1e-6 while a certified solve ended with the unrestricted verification step's choices, found by
another search than the guiding trials' hinted one; since a certified solve whose hints held keeps its hinted
step (:meth:`worker.solvers.loop.Run.kept`) it is under about 1e-6 (measured), the noise of the maximiser's own
stopping rule where the objective is flat, and one certifying trial is usually enough.  With
several unknowns a guiding trial that puts every condition within ``search.tolerance`` is followed by a
certifying trial at the same point.  Once a trial's residuals are within `CERTIFY_NEAR` times the tolerance
every later trial is certifying.  A point is accepted only from a certifying trial, and the result is always
built from one; otherwise the search says how close it came (status ``not_met`` or ``max_trials``) and never
presents the point as a solution.  When no sign change turns up, even at the ends of the bracket,
:class:`~worker.errors.InvalidDocument` names the values found at the ends, and carries the trials.

The solves themselves are done by the caller's ``trial`` function (:mod:`worker.solve` passes its own),
so that this module does not import the front door that imports it.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from typing import Any

import numpy as np

from worker.aggregates import Condition, parse_condition, point_env
from worker.document.params import param_expressions
from worker.document.search import DISCOUNT
from worker.errors import InvalidDocument, join_path
from worker.expressions import evaluate
from worker.problem import CompiledProblem
from worker.search_aggregates import aggregate_values
from worker.search_outer import NoRoot, estimate_root, find_root
from worker.search_several import find_common_root
from worker.search_trials import TrialCheckpoint, TrialModels, trial_distribution

__all__ = ["CERTIFY_NEAR", "LOOSE_FACTOR", "TIGHTEN", "XTOL_SHARE", "point_env", "run_search"]

LOOSE_FACTOR = 1e4
"""The first trials' inner tolerance, as a multiple of ``solver.tolerance`` (common practice: early trials
only need the sign of the condition, not its digits).  Measured on the Aiyagari bench's four cells: 1e5 with
`TIGHTEN` 0.05 took 112 Howard iterations in 28 trials where these took 127 in 30 at ``solver.tolerance``
1e-8, but 196 in 43 where these took 95 in 27 at 1e-6 (the default): the factor multiplies whatever
``solver.tolerance`` a document gives, and the first trials' noise then spoils the probe's slope."""
TIGHTEN = 0.1
"""Each trial's inner tolerance is this times the previous one's, down to ``solver.tolerance``."""
CERTIFY_NEAR = 1e3
"""Once a trial's residuals are all within this many times ``search.tolerance``, every later trial is a
certifying one (:mod:`worker.search_trials`); before, trials are guiding."""
START_POINTS = 3
"""A trial starts from the polynomial through the last this many solves' values, extrapolated in the unknown
(see ``_start``)."""
SETTLE_STEPS = 3
"""Most certifying trials when one unknown's guiding trial comes close to the root (see ``settle`` in
:func:`run_search`) before the root finder goes on with certifying trials."""
XTOL_SHARE = 1e-12
"""The root finder stops when its bracket is narrower than this share of the search bracket."""

Trial = Callable[..., tuple[CompiledProblem, Any]]
"""``trial(doc, initial, tolerance, problem=None, trust_hints=False) -> (problem, outcome)``: one solve of a
validated document (compiled here unless ``problem`` is given: a compiled problem with its params swapped)."""


class _Met(Exception):
    """Raised inside the root finder's function when a point meets the tolerance at full accuracy."""


class _InnerStopped(Exception):
    """Raised inside the root finder's function when a solve ended without converging (time or iterations)."""


def run_search(
    document: dict[str, Any],
    doc: Any,
    trial: Trial,
    finish: Callable[..., dict[str, Any]],
    *,
    on_progress: Callable[[dict[str, Any]], None] | None = None,
    checkpoint: Any = None,
    fingerprint: str = "",
) -> dict[str, Any]:
    """Run the document's search; return the result at the point found, with its ``search`` object.

    Parameters
    ----------
    document : the raw document (its string params are resolved again for every trial).
    doc : the validated document, with ``doc.search`` set.
    trial : solves one validated document from given values (None: the document's own start).
    finish : ``finish(doc, problem, outcome, distribution=(π, info))`` builds the result document of a solve
        (``worker.solve``'s own), given the stationary distribution the last trial solved for the same policy.
    on_progress : called after every trial with ``{"iteration": trial number, "error_bound", "seconds",
        "search_trial": row}``.
    checkpoint : object with ``load() -> dict | None`` and ``save(state)``, optional
        Saved after the first trial that ends ``solver.checkpoint_s`` seconds or more after the last save (or
        the search's start), as a solve saves its own (``kind`` "search", ``fingerprint``, ``iteration`` =
        trials so far, ``log``, ``trials``, ``value`` = the last solve's value, at ``value_xs``;
        ``previous_value`` at ``previous_xs``, the one before, or None; ``earlier_values`` at ``earlier_xs``,
        those before it that the next start uses (see ``_start``); ``distribution``, the last solve's
        stationary distribution).  A matching saved state is resumed from: the root finder is deterministic,
        so it asks for the same trials again, and those already made are answered from the saved rows without
        solving; the next solve starts from the saved value.  Each trial's solve saves its own state within the
        search's too (:class:`worker.search_trials.TrialCheckpoint`), and the trial it was saved in goes on
        from it.  The result's ``diagnostics.resumed_from_iteration`` is the trials the checkpoint held, and
        ``diagnostics.resumed_trial_iteration`` the iteration the next trial's solve went on from, when the
        checkpoint was saved inside it.
    fingerprint : identifies the document for the checkpoint (``worker.solve``'s hash of it).

    Raises
    ------
    InvalidDocument
        An unknown given as an expression, a condition that cannot be evaluated, or no sign change across
        the bracket (``trials`` in the exception's context).
    """
    spec = doc.search
    names = list(spec.unknowns)
    for name in names:
        if name in param_expressions(document):
            raise InvalidDocument.at(join_path("search.unknowns", name),
                                     f"`{name}` is given as an expression; an unknown is a param given as a number")
    model = doc.model
    reserved = {*model.params, *model.states, *model.shocks, *model.choices, *model.define, DISCOUNT}
    conditions = [parse_condition(text, path=join_path("search.conditions", k), reserved=reserved)
                  for k, text in enumerate(spec.conditions)]
    final_tolerance = float(doc.solver.tolerance)
    models = TrialModels(document, names, trial)
    trials: list[dict[str, Any]] = []
    last: dict[str, Any] = {}
    begun = time.perf_counter()
    saved_at = {"seconds": begun}  # when the checkpoint was last saved (the search's start: never)
    log: list[dict[str, Any]] = []
    solved: list[tuple[tuple[float, ...], np.ndarray]] = []  # the last solves' unknowns and values (START_POINTS)
    saved = checkpoint.load() if checkpoint is not None else None
    replay: dict[tuple[tuple[float, ...], float, bool], dict[str, Any]] = {}
    resumed_from: int | None = None  # the checkpoint's trial count, when one is resumed from
    within: dict[str, int] = {}  # "iteration": where the trial under way at the save resumed its solve
    if saved is not None and saved.get("kind") == "search" and saved.get("fingerprint") == fingerprint:
        resumed_from = int(saved["iteration"])
        # Rows saved before guiding trials existed were all certified.
        replay = {(tuple(row["unknowns"][n] for n in names), row["inner_tolerance"], row.get("certified", True)): row
                  for row in saved["trials"]}
        log = list(saved.get("log") or [])
        if saved.get("value") is not None:  # None: saved during the first trial (its solver's state beside)
            last["value"] = np.asarray(saved["value"], dtype=np.float64)
        if saved.get("value_xs") is not None:
            solved.append((tuple(saved["value_xs"]), last["value"]))
        if saved.get("distribution") is not None:  # the pin of the next trial's distribution (trial_distribution)
            last["pi"] = np.asarray(saved["distribution"], dtype=np.float64)
        if saved.get("previous_xs") is not None and saved.get("previous_value") is not None:
            solved.insert(0, (tuple(saved["previous_xs"]), np.asarray(saved["previous_value"], dtype=np.float64)))
        earlier = saved.get("earlier_values")
        for xs_, value_ in reversed(list(zip(saved.get("earlier_xs") or [], [] if earlier is None else earlier))):
            solved.insert(0, (tuple(xs_), np.asarray(value_, dtype=np.float64)))

    factors: dict[str, Any] = {}  # the last sparse LU of a trial's stationary distribution (trial_distribution)
    # The loaded checkpoint, for the trial it was saved in the middle of (TrialCheckpoint.load).
    pending: dict[str, Any] = {"state": saved} if resumed_from is not None else {}

    def search_state() -> dict[str, Any]:
        """What the checkpoint keeps of the search after its trials so far."""
        return {"kind": "search", "fingerprint": fingerprint, "iteration": len(trials), "log": log,
                "trials": trials, "value": last.get("value"), "value_xs": list(solved[-1][0]) if solved else None,
                "distribution": last.get("pi"),
                # The solve before, from which the next start is extrapolated (see _start).
                "previous_xs": list(solved[-2][0]) if len(solved) > 1 else None,
                "previous_value": solved[-2][1] if len(solved) > 1 else None,
                "earlier_xs": [list(x) for x, _ in solved[:-2]],
                # One array (rows), which the service's store keeps as binary, as the others.
                "earlier_values": np.stack([v for _, v in solved[:-2]]) if len(solved) > 2 else None}

    def at(xs: tuple[float, ...], tolerance: float, certify: bool, iterations: int | None = None) -> list[float]:
        """The conditions at ``xs`` from a guiding trial, or a certifying one (see :mod:`worker.search_trials`);
        ``iterations``: at most so many, instead of ``solver.max_iterations``."""
        if (xs, tolerance, certify) in replay:
            row = replay.pop((xs, tolerance, certify))
            trials.append(row)
            # A replayed row counts as the trial it records (a certifying one ends the search as it did), but
            # has no solution in memory (doc None): the last one is solved again at the end, without a new row.
            last.update(xs=xs, tolerance=tolerance, residuals=row["residuals"], status=row["inner_status"], doc=None,
                        certified=row.get("certified", True))
            return row["residuals"]
        started = time.perf_counter()
        inner = None if checkpoint is None else TrialCheckpoint(
            checkpoint, search_state, f"{len(trials) + 1}:{xs!r}:{tolerance!r}:{certify}", pending)
        try:
            trial_doc, problem, outcome, certified = models.solve(xs, _start(solved, xs, last.get("value")),
                                                                  tolerance, certify, inner, iterations=iterations)
        except InvalidDocument as exc:
            # The document held at its own values; name the trial's, or the fault reads as the document's.
            raise _at_trial(exc, names, xs, spec) from None
        if outcome.resumed_from_iteration is not None:  # the trial's solve went on from its saved state
            within.setdefault("iteration", int(outcome.resumed_from_iteration))
        pi, info = trial_distribution(problem.policy_matrix(outcome.policy), last.get("pi"), factors)
        residuals = [_residual(c, trial_doc, problem, outcome.policy, pi, join_path("search.conditions", k),
                               _point(names, xs))
                     for k, c in enumerate(conditions)]
        solved.append((xs, np.asarray(outcome.value, dtype=np.float64)))
        del solved[:-START_POINTS]
        last.update(value=solved[-1][1], xs=xs, tolerance=tolerance, doc=trial_doc, certified=certified, pi=pi,
                    info=info, problem=problem, outcome=outcome, residuals=residuals, status=outcome.status)
        row = {"unknowns": dict(zip(names, xs)), "residuals": residuals, "inner_tolerance": tolerance,
               "inner_status": outcome.status, "iterations": int(outcome.iterations),
               "error_bound": float(outcome.error_bound), "stationary_residual": info["residual"],
               "certified": certified, "seconds": time.perf_counter() - started}
        trials.append(row)
        # Shaped like a solver's log entry, so that progress displays read it; the trial is under search_trial.
        entry = {"iteration": len(trials), "error_bound": row["error_bound"], "seconds": time.perf_counter() - begun,
                 "search_trial": row}
        log.append(entry)
        if on_progress is not None:
            on_progress(entry)
        if checkpoint is not None and time.perf_counter() - saved_at["seconds"] >= doc.solver.checkpoint_s:
            # Time-based, as a solve's: a save after every trial cost a search of 10 trials of 10 ms about a tenth
            # of its time over the service (measured), for a resume that saves little.
            saved_at["seconds"] = time.perf_counter()
            checkpoint.save(search_state())
        return residuals

    known: dict[tuple[float, ...], list[float]] = {}
    mode = {"certify": False}

    def residuals_at(xs: tuple[float, ...]) -> list[float]:
        """The conditions at ``xs``; raises ``_Met`` once they hold at full accuracy or the trials run out."""
        # brentq evaluates the ends again itself: their signs, already known, are all it needs.
        if xs in known:
            return known[xs]
        tolerance = max(final_tolerance, final_tolerance * LOOSE_FACTOR * TIGHTEN ** len(trials))
        # The last trial the budget allows is a certifying one: the result is built from one only, and a guiding
        # last trial would take a solve past search.max_trials to certify it.
        certify = mode["certify"] or len(trials) >= spec.max_trials - 1
        values = at(xs, final_tolerance if certify else tolerance, certify=certify)
        if last["status"] != "converged":
            raise _InnerStopped
        if not certify and len(names) == 1 and abs(values[0]) <= CERTIFY_NEAR * spec.tolerance:
            mode["certify"] = True
            settle()  # raises once a certifying trial meets the tolerance; returns when its steps stall
        elif not certify and all(abs(v) <= spec.tolerance for v in values):
            # A guiding trial within the tolerance: only a certifying trial may make it the answer.
            values = at(xs, final_tolerance, certify=True)
            mode["certify"] = True
        if last["certified"] and all(abs(v) <= spec.tolerance for v in values) and last["status"] == "converged":
            raise _Met
        if max(abs(v) for v in values) <= CERTIFY_NEAR * spec.tolerance:
            # Close to the answer: from here on every trial is certifying, so that the root finder compares
            # residuals of one kind (a guiding and a certifying trial differ by the inner solves' noise).
            mode["certify"] = True
        if len(trials) >= spec.max_trials:
            raise _Met
        known[xs] = values
        return values

    def settle() -> None:
        """One unknown, a guiding trial close to the root: certifying trials, the first at the root's estimate
        from the guiding trials (:func:`worker.search_outer.estimate_root`), each next one a Newton step from
        the last with the guiding trials' slope there, at most `SETTLE_STEPS`; raises ``_Met`` once one meets
        the tolerance, returns when a step would leave the bracket or not shrink the residual."""
        name, bracket = names[0], spec.unknowns[names[0]]
        guides = [(row["unknowns"][name], row["residuals"][0]) for row in trials if not row["certified"]]
        x, slope = estimate_root(guides, bracket.min, bracket.max)
        before = float("inf")
        for _ in range(SETTLE_STEPS):
            if len(trials) >= spec.max_trials:
                raise _Met
            value = at((x,), final_tolerance, certify=True)[0]
            if last["status"] != "converged":
                raise _InnerStopped
            if abs(value) <= spec.tolerance:
                raise _Met
            if slope is None or abs(value) >= before:
                return
            before, x = abs(value), x - value / slope
            if not bracket.min <= x <= bracket.max:
                return

    status, stalled, notes = "converged", "", []  # notes: what a search of several unknowns says (search_several)
    try:
        if len(names) == 1:
            _bracketed(residuals_at, names[0], doc, spec, trials)
        else:
            stalled, best = _several(residuals_at, doc, names, spec, notes)
            if best != last["xs"] and len(trials) < spec.max_trials:
                at(best, final_tolerance, certify=True)  # the result at the point the conditions were smallest
    except _Met:
        pass
    except _InnerStopped:
        # A solve ran out of time or iterations: the search stops there, and says so (with the status of the
        # solve the result is built from, below: a guiding trial's is solved again, and may stop otherwise).
        status = "stopped"
    except RuntimeError:
        status = "max_trials"
    if not last["certified"]:
        # A guiding last trial: the point is solved again by a certifying trial, from which alone the result
        # is built (one made before a resume is replayed).  A solve that stopped stops again, after one step:
        # from the stopped solve's value, with one iteration where it used up solver.max_iterations (it ran the
        # whole budget again: 24 s more at a discount of 0.998, where 1e-10 is below float64's reach), with the
        # time the search has left where it ran out of time.
        ran_out = status == "stopped" and last["status"] == "max_iterations"
        at(last["xs"], final_tolerance, certify=True, iterations=1 if ran_out else None)
    if status == "stopped":
        status = last["status"] if last["status"] != "converged" else "converged"
    if last["doc"] is None:
        # The last trial was answered from the checkpoint: its solution is made again (from the checkpoint's
        # value, so within the solver's bound of the first one) for the result, without a second row.
        xs = last["xs"]
        trial_doc, problem, outcome, _ = models.solve(xs, _start(solved, xs, last.get("value")), final_tolerance,
                                                      True)
        pi, info = trial_distribution(problem.policy_matrix(outcome.policy), last.get("pi"), factors)
        last.update(doc=trial_doc, problem=problem, outcome=outcome, pi=pi, info=info)
    met = (all(abs(r) <= spec.tolerance for r in last["residuals"]) and last["status"] == "converged"
           and last["certified"])
    if not met and status == "converged":
        status = "max_trials" if len(trials) >= spec.max_trials else "not_met"
    result = finish(last["doc"], last["problem"], last["outcome"], distribution=(last["pi"], last["info"]))
    result["search"] = {"status": status, "unknowns": dict(zip(names, last["xs"])), "residuals": last["residuals"],
                        "tolerance": spec.tolerance,
                        "sign_change": _sign_change(trials, names[0]) if len(names) == 1 else None, "trials": trials}
    if status != "converged":
        result["diagnostics"]["warnings"].append(_not_met_warning(status, names, last, spec, trials, stalled))
    result["diagnostics"]["warnings"].extend(notes)
    if resumed_from is not None:
        # The final solve is a fresh one; the search itself went on from the checkpoint's trials.
        result["diagnostics"]["resumed_from_iteration"] = resumed_from
        if within:  # saved inside trial resumed_from + 1, whose solve went on from there
            result["diagnostics"]["resumed_trial_iteration"] = within["iteration"]
    return result


def _start(solved: list[tuple[tuple[float, ...], np.ndarray]], xs: tuple[float, ...],
           value: np.ndarray | None) -> np.ndarray | None:
    """The next solve's starting value: with one unknown, the last solves' values (up to `START_POINTS`, one
    per distinct value of the unknown) extrapolated in the unknown to ``xs`` by the polynomial through them;
    else the last solve's value (``value``, which a resumed search reads from its checkpoint)."""
    if len(xs) != 1:
        return value
    points: dict[float, np.ndarray] = {}
    for (x,), v in solved:  # oldest first: a later solve at the same value replaces an earlier one
        points.pop(x, None)
        points[x] = v
    nodes = list(points.items())[-START_POINTS:]
    if len(nodes) < 2 or any(v.shape != nodes[-1][1].shape for _, v in nodes):
        return value
    start = np.zeros_like(nodes[-1][1])
    for i, (xi, vi) in enumerate(nodes):
        weight = 1.0
        for j, (xj, _) in enumerate(nodes):
            if j != i:
                weight *= (xs[0] - xj) / (xi - xj)
        start += weight * vi
    return start if np.isfinite(start).all() else value


def _bracketed(residuals_at: Callable[[tuple[float, ...]], list[float]], name: str, doc: Any, spec: Any,
               trials: list[dict[str, Any]]) -> None:
    """One unknown: :func:`worker.search_outer.find_root` inside its bracket, from the document's own value;
    no sign change even at the ends is refused naming the values there."""
    bracket = spec.unknowns[name]
    try:
        find_root(lambda x: residuals_at((x,))[0], bracket.min, bracket.max, _own(doc, name),
                  xtol=XTOL_SHARE * (bracket.max - bracket.min), maxiter=spec.max_trials)
    except NoRoot as ends:
        message = (f"no root in the bracket: {spec.conditions[0]} is {ends.low:.10g} at {name} = {bracket.min:.10g} "
                   f"and {ends.high:.10g} at {name} = {bracket.max:.10g}, the same sign at both ends; widen the "
                   "bracket or check the condition")
        nearest = min(trials, key=lambda row: abs(row["residuals"][0]))
        if abs(nearest["residuals"][0]) < min(abs(ends.low), abs(ends.high)):
            # No sign change is not no root: a square or an abs touches zero without crossing it (the steps
            # crept towards such a root, and the ends were then reported as if nothing lay between them).
            message = (f"no sign change in the bracket: {spec.conditions[0]} is {ends.low:.10g} at {name} = "
                       f"{bracket.min:.10g} and {ends.high:.10g} at {name} = {bracket.max:.10g}, and nearest zero "
                       f"{nearest['residuals'][0]:.10g} at {name} = {nearest['unknowns'][name]:.10g}, with the same "
                       "sign; a condition that touches zero without changing sign (a square, an abs) cannot be "
                       "found: give it a sign (a - b, not (a - b) ** 2), or widen the bracket")
        raise InvalidDocument([{"path": join_path("search.unknowns", name), "message": message}],
                              trials=trials) from None


def _own(doc: Any, name: str) -> float:
    """The document's own value of an unknown (a param given as a number, or the discount)."""
    return float(doc.discount) if name == DISCOUNT else float(doc.model.params[name])


def _several(residuals_at: Callable[[tuple[float, ...]], list[float]], doc: Any, names: list[str], spec: Any,
             notes: list[str]) -> tuple[str, tuple[float, ...]]:
    """Several unknowns: :func:`worker.search_several.find_common_root` within the brackets, from the document's
    own values (or the brackets' midpoints when those lie outside); returns why it stopped unmet, and where the
    conditions were smallest."""
    lows = np.array([spec.unknowns[n].min for n in names])
    highs = np.array([spec.unknowns[n].max for n in names])
    own = np.array([_own(doc, n) for n in names])
    start = np.where((own > lows) & (own < highs), own, 0.5 * (lows + highs))
    return find_common_root(residuals_at, lows, highs, start, spec.tolerance, names, spec.conditions, notes)


def _point(names: list[str], xs: tuple[float, ...]) -> str:
    """The unknowns' values of a trial, as messages give them."""
    return ", ".join(f"{name} = {x:.12g}" for name, x in zip(names, xs))


def _at_trial(exc: InvalidDocument, names: list[str], xs: tuple[float, ...], spec: Any) -> InvalidDocument:
    """``exc`` (raised by a trial's validation or solve) with the trial's values in its messages, after a fault
    at each unknown saying the model cannot be solved there (the same class: an infeasible model stays one)."""
    point = _point(names, xs)
    heads = [{"path": join_path("search.unknowns", name), "message": (
        f"the model cannot be solved at the search's trial {point}, inside the bracket [{spec.unknowns[name].min:.10g},"
        f" {spec.unknowns[name].max:.10g}] (the faults below are at that trial); narrow the bracket to values where "
        "it can")} for name in names]
    errors = heads + [{**e, "message": f"at the search's trial {point}: {e['message']}"} for e in exc.errors]
    return type(exc)(errors, **exc.context)


def _residual(condition: Condition, doc: Any, problem: CompiledProblem, policy: np.ndarray, pi: np.ndarray,
              where: str, point: str = "") -> float:
    env = point_env(doc, problem, policy)
    for aggregate in condition.aggregates.values():
        missing = sorted(aggregate.argument.names - env.keys())
        if missing:
            raise InvalidDocument.at(where, "cannot be evaluated over the stationary distribution: "
                                     + ", ".join(f"`{n}`" for n in missing) + " depends on a draw after the choice")
    values = aggregate_values(condition.aggregates, doc, problem, policy, pi, env)
    scalars = {name: value for name, value in env.items() if np.ndim(value) == 0}
    residual = float(evaluate(condition.outer, {**scalars, **values}))
    if not np.isfinite(residual):
        # Refused: no root finder can use it, and a NaN compares as neither sign (the steps went to NaN).
        bad = [f"{a.kind}({a.argument.text}{'' if a.q is None else f', {a.q:g}'}) is {float(values[key]):g}"
               for key, a in condition.aggregates.items() if not np.isfinite(values[key])]
        raise InvalidDocument.at(where, f"`{condition.text}` is {residual:g} at the search's trial {point}"
                                 + (f" ({'; '.join(bad)})" if bad else "") + ": a condition must be a finite number "
                                 "throughout the bracket; narrow the bracket or change the condition")
    return residual


def _sign_change(trials: list[dict[str, Any]], name: str) -> dict[str, Any] | None:
    """The two closest trials whose first residuals have opposite signs (None when there are none)."""
    # One point per value: the last trial there (a certifying trial follows the guiding one it checks).
    points = sorted({row["unknowns"][name]: row["residuals"][0] for row in trials}.items())
    pairs = [(a, b) for a, b in zip(points, points[1:]) if np.sign(a[1]) != np.sign(b[1]) and a[0] != b[0]]
    if not pairs:
        return None
    a, b = min(pairs, key=lambda pair: pair[1][0] - pair[0][0])
    return {"below": {name: a[0], "residual": a[1]}, "above": {name: b[0], "residual": b[1]}}


def _not_met_warning(status: str, names: list[str], last: dict[str, Any], spec: Any,
                     trials: list[dict[str, Any]], stalled: str = "") -> str:
    residual = max(last["residuals"], key=abs)
    if last["status"] != "converged":
        why = f"the last solve ended with status {last['status']}"
    elif status == "max_trials":
        why = f"search.max_trials ({spec.max_trials}) solves were used up"
        if len(names) > 1:  # how far it got says whether more trials would help
            sizes = [max(abs(v) for v in row["residuals"]) for row in trials]
            why += (f" (the largest residual was {sizes[0]:.3g} at the first trial and {min(sizes):.3g} at best; "
                    "falling: raise search.max_trials; not falling: the conditions may have no common root inside "
                    "the brackets, or be noisier than the tolerance)")
    elif len(names) > 1:
        why = stalled or "the conditions are not all met"
    else:
        why = ("the condition changes sign across the narrowest bracket without coming that close to zero: it "
               "jumps there (aggregates move in steps when a choice is restricted to a grid; a continuous choice "
               "or taste shocks make them move smoothly), or its noise from the inner solves exceeds the tolerance "
               "(tighten solver.tolerance, or loosen search.tolerance)")
    if status == "not_met" and any(a.kind == "quantile" for c in spec.conditions
                                   for a in parse_condition(c, path="search.conditions").aggregates.values()):
        # A continuous choice does not smooth these: the value at the quantile is one of x's values at the points.
        why += ("; quantile(x, q) is one of the values x takes at the grid's points, so it moves in steps even with a "
                "continuous choice: target the mass below a value instead (mass(x <= v) - q), which moves smoothly")
    point = _point(names, last["xs"])
    where = " search.sign_change gives the closest values on either side of zero." if len(names) == 1 else ""
    return (f"the search did NOT meet its tolerance {spec.tolerance:g}: at {point} the largest "
            f"residual is {residual:.6g} after {len(trials)} trials; {why}.{where}")
