"""``diagnostics.euler_errors`` of an infinite-horizon solve: which measurement applies, and its note.

:func:`euler_diagnostics` picks the measurement for the solved problem — one state (:mod:`worker.euler`),
several states (:mod:`worker.euler_states`), several ``next_of`` choices (:mod:`worker.euler_choices`), a
continuous choice beside discrete ones (:mod:`worker.continuous.mixed_euler`; beside discrete ones that set
states too, :mod:`worker.continuous.setters_euler`) — with the policy between grid
points read as the solve reads it (and the value, where the probabilities of draws after the choice or the laws
of motion move with the choice or the chosen state: :func:`worker.euler_states.solve_value`,
:func:`worker.euler_laws.solve_slope`), and appends a note to the diagnostics where the errors were not measured.
(A finite horizon's are :mod:`worker.horizon_euler`'s.)
"""

from __future__ import annotations

import time
from typing import Any

import numpy as np

__all__ = ["euler_diagnostics"]


def euler_diagnostics(
    doc: Any, problem: Any, outcome: Any, stationary: dict[str, Any] | None, problem_diagnostics: dict[str, Any],
) -> dict[str, Any]:
    """``{"euler_errors": ...}`` when ``report.euler_errors`` asks and the model has the form; else ``{}``
    (with a note why when it was asked for).  ``outcome`` is the :class:`~worker.solvers.SolveOutcome`."""
    if not doc.report.euler_errors:
        return {}
    from worker.euler import euler_report
    from worker.euler_setup import needs_value
    from worker.euler_within import within_note
    from worker.gridproblem import GridProblem

    def add_note(text: str) -> None:
        problem_diagnostics.setdefault("notes", []).append(text)

    continuous = getattr(problem, "choose_at", None) is not None
    if not isinstance(problem, GridProblem) and not continuous:
        add_note("Euler-equation errors were not measured: they apply to grid models")
        return {}
    data = problem.model_data
    started = time.perf_counter()
    choice = data.choices[0]
    distribution = None if stationary is None else np.asarray(stationary["distribution"], dtype=np.float64)
    mixed = bool(getattr(problem, "others", ()))
    from worker.euler_choices import choices_model, choices_report, choices_setup

    if not mixed and choices_model(data):  # the next_of choices each with its own equation
        founds = choices_setup(data)
        if isinstance(founds, list):
            chosen = problem.choice_values(outcome.policy)
            errors = choices_report(data, founds, doc.discount, chosen, distribution,
                                    _law_slopes(problem, founds, outcome.value, doc.discount),
                                    _chance_values(problem, founds, outcome.value, doc.discount))
            if within_note(data):
                add_note(f"Euler-equation errors of the choices that set states{within_note(data)}")
            if isinstance(problem_diagnostics.get("timings"), dict):
                problem_diagnostics["timings"]["euler_s"] = time.perf_counter() - started
            return {"euler_errors": errors}
        add_note(founds or "Euler-equation errors were not measured: they need choices that set tomorrow's value "
                 "of a state (next_of) on grids of two points or more")
        return {}
    if mixed:  # beside discrete choices that set states too: each choice's own equation
        from worker.continuous.setters_euler import setters_report, setters_setup

        founds = setters_setup(problem, data)
        if isinstance(founds, str):
            add_note(founds)
            return {}
        if founds is not None:
            errors, note = setters_report(problem, founds, outcome.value, outcome.policy, doc.discount, distribution,
                                          _law_slopes(problem, founds, outcome.value, doc.discount),
                                          _chance_values(problem, founds, outcome.value, doc.discount))
            add_note(note)
            if isinstance(problem_diagnostics.get("timings"), dict):
                problem_diagnostics["timings"]["euler_s"] = time.perf_counter() - started
            return {"euler_errors": errors}
    found = _setup(problem, data, mixed)
    values = None
    if not isinstance(found, str) and found is not None and needs_value(found):  # draws moving with k or x
        from worker.euler_states import solve_value

        read = solve_value(problem, data, outcome.value)
        values = (read, read, float(doc.discount))
    slopes = None
    if not isinstance(found, str) and found is not None and found.laws:  # laws moving with k or x: value slopes
        from worker.euler_laws import solve_slope

        slope = solve_slope(problem, data, outcome.value)
        slopes = (slope, slope, float(doc.discount))
    if mixed:  # a continuous choice beside others: at the chosen combination
        from worker.continuous.mixed_euler import mixed_euler_report

        errors, note = mixed_euler_report(problem, outcome.value, doc.discount, values, distribution, slopes)
    elif len(data.states) > 1:
        from worker.euler_states import search_rule, states_report

        errors, note = None, found if isinstance(found, str) else None
        if found is not None and not isinstance(found, str):
            rule = search_rule(problem, outcome.value, outcome.policy) if continuous else None
            errors = states_report(data, found, doc.discount, problem.choice_values(outcome.policy)[choice],
                                   distribution, rule=rule, values=values, slopes=slopes)
    else:
        rule = problem.policy_rule(outcome.value, outcome.policy) if continuous else None
        errors, note = euler_report(data, doc.discount, problem.choice_values(outcome.policy)[choice],
                                    distribution, rule=rule, values=values)
    if errors is None and note is None:
        note = ("Euler-equation errors were not measured: they need a choice that sets tomorrow's value of a state "
                "(next_of)")
    if note is not None:
        add_note(note)
    if errors is not None and isinstance(problem_diagnostics.get("timings"), dict):
        problem_diagnostics["timings"]["euler_s"] = time.perf_counter() - started
    return {} if errors is None else {"euler_errors": errors}


def _setup(problem: Any, data: Any, mixed: bool) -> Any:
    """The model's :class:`~worker.euler_setup.EulerSetup`, a note, or None (see :func:`worker.euler.setup`)."""
    if mixed:
        from worker.continuous.mixed_euler import mixed_setup

        return mixed_setup(problem, data)
    from worker.euler_setup import setup

    return setup(data)


def _law_slopes(problem: Any, founds: list[Any], value: np.ndarray, discount: float) -> Any:
    """The value's slopes as the solve reads the value (:func:`worker.euler_laws.solve_slope`), today's and
    tomorrow's the same, where a law of motion moves with one of several choices or its state; else None."""
    if not any(found.laws for found in founds):
        return None
    from worker.euler_laws import solve_slope

    slope = solve_slope(problem, problem.model_data, value)
    return (slope, slope, float(discount))


def _chance_values(problem: Any, founds: list[Any], value: np.ndarray, discount: float) -> Any:
    """The value as the solve reads it (:func:`worker.euler_states.solve_value`), today's and tomorrow's the same,
    where a draw's probability moves with one of several choices or its state; else None."""
    from worker.euler_setup import needs_value

    if not any(needs_value(found) for found in founds):
        return None
    from worker.euler_states import solve_value

    read = solve_value(problem, problem.model_data, value)
    return (read, read, float(discount))
