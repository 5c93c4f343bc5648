"""What happens once a job has finished: its webhook is queued, its sweep moves on (and is notified once
every row ended), waiting workers look again.

:func:`job_finished` is called where a job reaches a terminal state (done,
failed, canceled): by ``service.task.run_job`` after an execution, and by the
reaper (``service.reaper``) when it gives up on an abandoned job.  It runs in
the worker's work-horse, so it imports no FastAPI and never raises: a Redis
error here is logged, and the reaper's next pass creates the chain's next
jobs instead (``service.sweeps.rescue_pending``).

Layering: this module sits above ``service.sweeps`` and ``service.webhooks``,
which never import it (nor ``service.reaper``) back.
"""

from __future__ import annotations

import logging

from service import dispatch, sweeps, webhooks
from service.store import TERMINAL_STATES, JobStore

__all__ = ["job_finished"]

logger = logging.getLogger("fixq.lifecycle")


def job_finished(store: JobStore, job_id: str, outcome: str) -> None:
    """After an execution whose ``outcome`` is a terminal state: notify and advance the sweep.

    Any other ``outcome`` (``busy``, ``terminal``, ``lease_lost``, ...) means
    this execution did not finish the job, and nothing is done.
    """
    if outcome not in TERMINAL_STATES:
        return
    dispatch.wake(store)
    # The sweep's own notification last: its check sees the chain's successors created (or refused).
    for step in (webhooks.schedule, sweeps.job_finished, sweeps.member_finished):
        try:
            step(store, job_id)
        except Exception:
            logger.exception("job %s: %s after it finished failed", job_id, step.__module__ + "." + step.__name__)
