"""The drift report of ``fixq changes`` in words: a few aligned lines a person (or a cron mail) reads."""

from __future__ import annotations

from typing import Any

__all__ = ["describe_changes"]

PATHS_SHOWN = 6
"""Most differing document paths named in the summary (``--json`` lists them all)."""


def describe_changes(answer: dict[str, Any]) -> str:
    """The answer of ``GET /v1/jobs/{id}/changes`` as lines of text (ending in a newline)."""
    rows: list[tuple[str, str]] = [("jobs", f"{answer['id']} compared with the older {answer['since']}")]
    rows.append(("structure", _structure(answer)))
    value = answer["value"]
    if value["sup_norm"] is None:
        rows.append(("value", "no point could be compared"))
    else:
        rows.append((
            "value",
            f"largest change {_num(value['largest_change'])} at {_at(value['at'])} "
            f"({_num(value['since'])} -> {_num(value['now'])}); mean change {_num(value['mean_change'])}",
        ))  # fmt: skip
    bounds = answer["error_bounds"]
    if bounds["sum"] is not None:
        verdict = {True: "within them: noise", False: "the change is larger: real", None: ""}
        rows.append((
            "error bounds",
            f"{bounds['now']:.3g} + {bounds['since']:.3g} = {bounds['sum']:.3g}; "
            f"{verdict[answer['within_error_bounds']]}",
        ))  # fmt: skip
    for choice, block in (answer.get("policy") or {}).items():
        rows.append((f"policy {choice}", _policy(block)))
    for key, name in (("stationary_means", "stationary mean"), ("simulated_means", "simulated mean")):
        for variable, change in (answer.get(key) or {}).items():
            rows.append((
                f"{name} {variable}",
                f"{_num(change['since'])} -> {_num(change['now'])} ({_signed(change['change'])})",
            ))  # fmt: skip
    width = max(len(name) for name, _ in rows)
    lines = [f"{name:<{width}}  {text}" for name, text in rows]
    lines += [f"note: {note}" for note in answer.get("notes") or []]
    return "\n".join(lines) + "\n"


def _structure(answer: dict[str, Any]) -> str:
    if answer["same_structure"]:
        text = "the same (grids, shocks, choices)"
    else:
        text = "differs: " + "; ".join(f"{c['part']} {c['name']}: {c['what']}" for c in answer["structure_changes"])
    changes = answer.get("document_changes") or {}
    paths = changes.get("paths") or []
    if paths:
        shown = ", ".join(f"{p['path']} {_short(p['since'])} -> {_short(p['now'])}" for p in paths[:PATHS_SHOWN])
        more = len(paths) - PATHS_SHOWN + changes.get("more", 0)
        text += f"; numbers that differ: {shown}" + (f" and {more} more" if more > 0 else "")
    elif answer["same_structure"]:
        text += "; no number of the documents differs"
    return text


def _policy(block: dict[str, Any]) -> str:
    if block["changed_share"] is None:
        return "no point compared"
    text = f"{block['changed_share']:.1%} of points changed ({block['changed_points']} of {block['points']})"
    ranges = block.get("ranges") or {}
    if ranges:
        text += ", where " + ", ".join(_range(name, span) for name, span in ranges.items())
    return text


def _range(name: str, span: list[Any]) -> str:
    if len(span) == 2 and all(isinstance(v, (int, float)) for v in span):
        return f"{name} {_num(span[0])} to {_num(span[1])}"
    return f"{name} in {', '.join(map(str, span))}"


def _at(point: dict[str, Any]) -> str:
    return ", ".join(f"{name}={_num(value)}" for name, value in point.items())


def _short(value: Any) -> str:
    text = value if isinstance(value, str) else repr(value)
    return text if len(text) <= 40 else text[:37] + "..."


def _num(value: Any) -> str:
    if isinstance(value, float):
        return f"{value:.6g}"
    return str(value)


def _signed(value: Any) -> str:
    return f"{value:+.4g}" if isinstance(value, (int, float)) else str(value)
