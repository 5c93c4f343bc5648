"""The door every submission goes through, shared by ``POST /v1/jobs`` and ``POST /v1/sweeps``.

:func:`admit_submission` is ``service.admission.admit`` (validation, size cap,
feasibility, warm start visible to the caller) plus the one check that
concerns the submission rather than the problem: a ``notify.url`` must pass
``service.webhooks.check_target``.  :func:`create_submitted_job` stores an
admitted document as a job; :func:`submit` does both.  A sweep admits every
combination before it creates any job, so it calls the two halves itself,
keeping only :func:`admitted_summary` of each (not the parsed arrays), and
validates each combination *like* an earlier one: the top-level parts it
shares with that one (the same objects, as a sweep's combinations share every
part no varied path runs through) are handed to validation already validated,
so only the parts a combination changes are checked again.  That is sound
because the document's checks of one object read that object alone, and the
checks that span objects (the document's own) run again in full; the outcome
equals a full validation of the combination.

Nothing here imports FastAPI: workers create the later jobs of chained sweeps
through the same functions.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any, Protocol

from pydantic import BaseModel

from service.admission import Admitted, admit
from service.settings import Settings
from service.store import JobStore
from service.webhooks import check_target
from worker.document import document_hash

__all__ = ["Submitter", "admit_submission", "admitted_summary", "create_submitted_job", "submit"]


class Submitter(Protocol):
    """Who submits: ``service.deps.Caller`` or anything with the same two members."""

    @property
    def owner(self) -> str: ...

    def may_see(self, record: dict[str, Any]) -> bool: ...


def admit_submission(
    raw: dict[str, Any],
    settings: Settings,
    store: JobStore,
    *,
    may_see: Callable[[dict[str, Any]], bool],
    check_notify: bool = True,
    like: tuple[dict[str, Any], Admitted] | None = None,
) -> Admitted:
    """Admit ``raw`` as ``admit`` does, then check its webhook target unless ``check_notify`` is false.

    ``like``: an earlier raw document and its ``Admitted``, whose validated
    top-level parts stand for those ``raw`` shares with it (see the module
    docstring); the outcome is the same as without it.
    Raises ``InvalidDocument`` (the refused target at ``notify.url``) or ``TooLarge``.
    """
    if like is None:
        admitted = admit(raw, settings, store=store, may_see=may_see)
    else:
        earlier_raw, earlier = like
        admitted = admit(_reusing(raw, earlier_raw, earlier), settings, store=store, may_see=may_see, earlier=earlier)
    notify = admitted.document.notify
    if check_notify and notify is not None:
        check_target(notify.url, settings)
    return admitted


def _reusing(raw: dict[str, Any], earlier_raw: dict[str, Any], earlier: Admitted) -> dict[str, Any]:
    """``raw`` with each top-level object it shares with ``earlier_raw`` replaced by ``earlier``'s validated one."""
    out = dict(raw)
    for key, value in raw.items():
        validated = getattr(earlier.document, key, None)
        if isinstance(validated, BaseModel) and earlier_raw.get(key) is value:
            out[key] = validated
    return out


def create_submitted_job(
    raw: dict[str, Any],
    store: JobStore,
    *,
    owner: str,
    estimate: dict[str, Any],
    document_hash: str,
    idempotency_key: str | None = None,
    enqueue: bool = True,
) -> dict[str, Any]:
    """Store an admitted document as a new ``queued`` job and enqueue it; the job record.

    ``estimate`` and ``document_hash`` come from its ``Admitted`` (see :func:`admitted_summary`).
    With ``enqueue=False`` the caller enqueues it later (``JobStore.enqueue_created``).
    """
    return store.create_job(
        raw,
        owner=owner,
        estimate=estimate,
        document_hash=document_hash,
        idempotency_key=idempotency_key,
        enqueue=enqueue,
    )


def admitted_summary(admitted: Admitted) -> dict[str, Any]:
    """What creating the job needs of an admitted document: ``estimate`` and ``document_hash``."""
    return {"estimate": admitted.estimate, "document_hash": document_hash(admitted.document)}


def submit(
    raw: dict[str, Any],
    caller: Submitter,
    store: JobStore,
    settings: Settings,
    *,
    idempotency_key: str | None = None,
) -> dict[str, Any]:
    """Admit and create one job for ``caller``; the job record (what ``POST /v1/jobs`` answers)."""
    admitted = admit_submission(raw, settings, store, may_see=caller.may_see)
    return create_submitted_job(
        raw, store, owner=caller.owner, idempotency_key=idempotency_key, **admitted_summary(admitted)
    )
