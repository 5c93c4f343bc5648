"""The one exception tree of fixq.

::

    FixqError                      base of everything fixq raises on purpose
    ├── InvalidDocument            the problem document is wrong      → HTTP 422
    │   └── InfeasibleModel        some state has no allowed choice   → HTTP 422
    ├── TooLarge                   the document exceeds a size cap    → HTTP 413
    └── Canceled                   a stop flag ended a running solve  (job state ``canceled``)

Non-convergence (``max_iterations``, ``time_limit``) is *not* an exception: it is
a result with a ``status``.  Exceptions are for documents that are wrong and for
solves that were told to stop.

Every error carries ``errors``: a list of ``{"path": str, "message": str}``
dicts, the same list the HTTP API returns in its RFC 9457 body.  ``path`` is a
dotted path into the document with list indices in brackets, for example
``model.transition[2][1]`` or ``model.shocks.z.ar1.rho``; ``""`` means the
document as a whole.
"""

from __future__ import annotations

from typing import Any

__all__ = ["Canceled", "FixqError", "InfeasibleModel", "InvalidDocument", "TooLarge", "join_path"]


def join_path(*parts: str | int) -> str:
    """Join path parts: strings become ``.key``, integers ``[i]``.

    >>> join_path("model", "reward", 3, 1)
    'model.reward[3][1]'
    """
    out = ""
    for part in parts:
        if isinstance(part, int):
            out += f"[{part}]"
        elif part == "":
            continue
        elif out:
            out += f".{part}"
        else:
            out = str(part)
    return out


class FixqError(Exception):
    """Base class.  ``status`` is the HTTP status the service answers with."""

    status: int = 400
    title: str = "fixq error"

    def __init__(self, errors: list[dict[str, str]] | str, **context: Any) -> None:
        if isinstance(errors, str):
            errors = [{"path": "", "message": errors}]
        self.errors: list[dict[str, str]] = list(errors)
        self.context: dict[str, Any] = context
        super().__init__(self.detail)

    @property
    def detail(self) -> str:
        """One human sentence summarising ``errors``."""
        parts = [f"{e['path']}: {e['message']}" if e["path"] else e["message"] for e in self.errors[:5]]
        more = len(self.errors) - 5
        text = "; ".join(parts)
        return text + (f" (and {more} more)" if more > 0 else "")

    @classmethod
    def at(cls, path: str, message: str, **context: Any) -> "FixqError":
        """Shorthand for an error with a single ``{path, message}``."""
        return cls([{"path": path, "message": message}], **context)


class InvalidDocument(FixqError):
    """Raised when a problem document breaks the schema or the model's rules."""

    status = 422
    title = "invalid problem document"


class InfeasibleModel(InvalidDocument):
    """Raised when some state has no allowed choice (the message names it)."""

    title = "infeasible model"


class TooLarge(FixqError):
    """Raised when a document's estimated size exceeds a configured cap.

    ``context["estimate"]`` holds the estimate dict of ``worker.estimate``.
    """

    status = 413
    title = "problem too large"


class Canceled(FixqError):
    """Raised inside a solve when its stop flag is set.

    ``context["iteration"]`` is the last completed iteration and
    ``context["log"]`` the log entries up to it.
    """

    status = 409
    title = "solve canceled"
