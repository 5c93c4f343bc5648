"""A job record in words, for the ``fixq`` command: how it ended, a search's answer, why it failed.

A finished search's answer is on the job record (``search``: status, unknowns, residuals, trials), so
``fixq status`` and ``fixq submit --wait`` show it without downloading the result. A failed job's
``error`` is problem details (``detail`` and, for a fault in the document, ``errors`` with each
fault's path), shown as sentences rather than as the raw object.
"""

from __future__ import annotations

from typing import Any

__all__ = ["fault_lines", "outcome", "search_answer", "trial_line"]


def outcome(record: dict[str, Any]) -> str:
    """One line: ``done: converged after 14 iterations, error bound 4.19e-07``, ``failed: REASON``, ``canceled``.

    A search's line leads with the search's own status: the record's ``status`` is the last solve's, and alone
    (``done: converged``) it read as success for a search that did not meet its tolerance (``not_met``)."""
    state = record.get("state")
    if state == "done":
        search = record.get("search") if isinstance(record.get("search"), dict) else {}
        point = f"search {search['status']}; its solution at the point returned " if search.get("status") else ""
        text = f"done: {point}{record.get('status') or 'finished'}"
        if record.get("iterations") is not None:
            text += f" after {record['iterations']} iterations"
        if record.get("error_bound") is not None:
            text += f", error bound {record['error_bound']:.3g}"
        return text
    if state == "failed":
        return f"failed: {failure_reason(record.get('error'))}"
    return str(state)


def failure_reason(error: Any) -> str:
    """A failed job's ``error`` as a sentence: the problem's ``detail`` (else its ``title``), or the text."""
    if isinstance(error, dict):
        return str(error.get("detail") or error.get("title") or "no reason recorded")
    return str(error) if error else "no reason recorded"


def fault_lines(record: dict[str, Any]) -> list[str]:
    """``  PATH: MESSAGE`` for each fault a failed job's error names (none for other records)."""
    error = record.get("error")
    faults = error.get("errors") if isinstance(error, dict) else None
    return [f"  {fault.get('path') or '(document)'}: {fault.get('message')}" for fault in faults or []]


def search_answer(search: dict[str, Any] | None) -> str | None:
    """``converged: r = 0.0329368 (residuals 1.02e-07) after 7 trials``; None for a job without a search."""
    if not search:
        return None
    unknowns = ", ".join(f"{name} = {_number(value, '.6g')}" for name, value in (search.get("unknowns") or {}).items())
    residuals = ", ".join(_number(value, ".3g") for value in search.get("residuals") or [])
    text = f"{search.get('status')}: {unknowns}"
    if residuals:
        text += f" (residuals {residuals})"
    if search.get("trials") is not None:
        text += f" after {search['trials']} trials"
    return text


def trial_line(number: Any, trial: dict[str, Any]) -> str:
    """A search trial's progress line: ``trial      3  r = 0.0329368  residuals 1.02e-07  (certifying)``.

    ``trial`` is the row a search's log entry carries under ``search_trial``; it has no distance (each trial is
    a whole solve), so its residuals (the conditions' values, zero at the point sought) say how near it came.
    """
    unknowns = ", ".join(f"{name} = {_number(value, '.6g')}" for name, value in (trial.get("unknowns") or {}).items())
    residuals = ", ".join(_number(value, ".3g") for value in trial.get("residuals") or []) or "none"
    kind = "certifying" if trial.get("certified") else "guiding"
    return f"trial {number:>6}  {unknowns}  residuals {residuals}  ({kind})"


def _number(value: Any, spec: str) -> str:
    return format(value, spec) if isinstance(value, (int, float)) else str(value)
