"""The order a grid model's defines are evaluated in: the one their dependencies require.

A define may use other defines written anywhere in ``define``: documents
built from maps whose key order is not kept (a JSON object decoded into a
hash map, say) must mean the same thing.  The order keeps the document's
order wherever the dependencies allow (each define is placed as soon as
every define it uses is placed), so a document already in order is
unchanged; a cycle is refused, naming the defines on it.
"""

from __future__ import annotations

from worker import expressions
from worker.document._faults import Fault, fault
from worker.errors import InvalidDocument, join_path

__all__ = ["dependency_order"]


def dependency_order(define: dict[str, str]) -> tuple[dict[str, str], list[Fault]]:
    """``(define reordered, [])``, or ``(define, [the cycle's fault])`` (paths relative to the model)."""
    names = set(define)
    uses: dict[str, set[str]] = {}
    for name, text in define.items():
        try:
            used = expressions.parse(text, path=join_path("model", "define", name)).names
        except InvalidDocument:
            used = frozenset()  # its own fault is reported by the expression checks
        uses[name] = set(used) & names
    ordered: list[str] = []
    placed: set[str] = set()
    waiting = list(define)
    while waiting:
        ready = next((name for name in waiting if uses[name] <= placed), None)
        if ready is None:
            cycle = _cycle(waiting, uses)
            path = " → ".join(f"`{name}`" for name in [*cycle, cycle[0]])
            return define, [fault(join_path("define", cycle[0]), f"the defines {path} use each other in a circle; "
                                  "a define may not depend on itself, directly or through others")]
        ordered.append(ready)
        placed.add(ready)
        waiting.remove(ready)
    return {name: define[name] for name in ordered}, []


def _cycle(waiting: list[str], uses: dict[str, set[str]]) -> list[str]:
    """One cycle among the defines left: follow a use that is still waiting until a name repeats."""
    left = set(waiting)
    path = [waiting[0]]
    while True:
        following = sorted(uses[path[-1]] & left, key=waiting.index)[0]
        if following in path:
            return path[path.index(following):]
        path.append(following)
