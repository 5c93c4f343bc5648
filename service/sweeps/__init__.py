"""Parameter sweeps: one base document × values of some of its fields → many jobs, one table.

The request (``POST /v1/sweeps``)
---------------------------------
::

    {"base": DOCUMENT,
     "vary": {"discount": [0.94, 0.95, 0.96], "model.params.gamma": [1.5, 2, 3]},
     "mode": "product" | "zip",          default product
     "chain": false | true,              default false
     "label": TEXT, "tags": [TAG, ...], "priority": "high" | "normal" | "low"}

*Paths* are dotted keys with list indices in brackets, as in error paths:
``discount``, ``model.params.gamma``, ``model.states.k.points``,
``model.feasible[0]``, ``solver.tolerance``.  A missing key is created (with
the objects on its way); a list index must exist in the base.  Keys that
contain ``.``, ``[`` or ``]`` cannot be named.  ``label``, ``tags``,
``priority`` and ``notify`` belong to the whole sweep and cannot vary; with
``chain``, neither can ``solver.initial``.  No path may lie inside another.
A value may be any JSON value (a number, a string, a whole object).

*Combinations*: ``product`` takes every combination of the lists, numbered in
C order of the ``vary`` keys (the last key varies fastest); ``zip`` takes the
i-th value of every list, which must all have the same length.  At most
``sweep_max_combinations`` combinations, and combinations × the base's JSON
size at most ``sweep_max_documents_mb`` (else 413, naming the setting).

*Admission*: the first jobs take their slots of the caller's active-job
caps (429 if they do not fit) before any combination is validated; then every
combination's document passes the same door as a single job
(``service.submission.admit_submission``, each validated like the first one
admitted, reusing the parts it shares with it) before any job is created; if
any is refused, none is, and the 422 lists each fault once, at
``vary.<path>[i]`` when the fault lies at or under a varied path (its message
starting with the inner path), else at ``base.<inner path>``, with the
combinations it hit.  A ``base.notify.url`` is checked once.

Each job is the base with the combination's values, ``priority`` the sweep's
(else the base's), ``tags`` the base's plus the sweep's plus
``sweep:{sweep id}`` (so ``GET /v1/jobs?tag=sweep:{id}`` lists them), and a
label naming the combination.

Chains
------
With ``chain: true`` each combination except the first warm-starts from a
neighbour one step back along one axis: its predecessor is the combination
with its *last non-zero* axis index decreased by one (``zip``: the previous
combination).  For the vary above, (0.95, 3) starts from (0.95, 2), (0.95,
1.5) from (0.94, 1.5), and (0.94, 1.5) from its base's ``solver.initial``:
a tree rooted at combination 0 whose branches run in parallel.

A job that must wait for its predecessor is not created until the
predecessor has finished: rows then show ``state: "waiting"`` and no job.
Like any job, a chain's later job takes a slot of its owner's active-job
caps (``max_active_jobs``, ``max_active_high_jobs``) when it is created;
while they are full its row keeps waiting, and it is created when one of the
owner's jobs finishes (or by the reaper's next pass) — never refused.
When a sweep job finishes, the worker (``service.lifecycle``) creates the
combinations that start from it, with ``solver.initial: {"job": ID}`` when it
is ``done`` and its result still stored, else with the base's
``solver.initial`` (a failed or canceled predecessor does not fail the rest
of the chain).  Each row has one creator at a time: the claim on it
(``SET NX PX``) is held until its job id is recorded, and the job is
enqueued only then.  If the process that was to create a row died (or a job
was canceled in its queue, so no worker saw it end), the reaper
(``service.reaper``) creates it on its next pass; reading a sweep never
creates jobs.  fixq's own reaper also re-enqueues any ``queued`` job that
sits in no RQ queue, which rules out RQ's ``depends_on`` (deferred jobs sit
in no queue).

The sweep's own ``state`` is ``active`` while a row is waiting, queued or
running, ``done`` once every row is done, failed or canceled, and
``canceled`` after ``DELETE``.

With ``base.notify``, each job sends its ``job.finished`` and the sweep one
``sweep.finished`` once every row ended (``notify``).

Modules: ``request`` (the pydantic request and its combinations),
``records`` (stored sweeps and their listing), ``creation`` (the only place
jobs are created), ``view`` (what a read shows) and ``notify`` (the
``sweep.finished`` webhook).  This package is the
public entry: import from ``service.sweeps``.

Keys (prefix ``fixq``)
----------------------
================================  ======  ===========================================
``fixq:sweep:{id}``               hash    ``record`` (JSON), ``owner``, ``stationary``
                                          ("1" when some combination reports it),
                                          ``canceled_at``, ``notified_at``
``fixq:sweep:{id}:base``          string  the base document, zlib-compressed JSON
``fixq:sweep:{id}:jobs``          hash    combination index → job id
``fixq:sweep:{id}:means``         hash    combination index → stationary means (JSON)
``fixq:sweep:{id}:errors``        hash    combination index → why its job was not created
``fixq:sweep:{id}:claim:{i}``     string  the claim on creating row ``i``'s job, held until it is recorded
``fixq:sweep:{id}:door``          string  present while ``POST`` is still creating the first jobs
``fixq:sweep:{id}:ended``         set     indices of the rows whose job ended (``notify``)
``fixq:sweep:{id}:rescan``        string  present for ``notify.RESCAN_S`` after a reaper read its rows
``fixq:sweepjob:{job id}``        string  ``{sweep id}:{index}`` of a sweep's job
``fixq:sweeps``                   zset    sweep ids by submission time (ms)
``fixq:sweeps:owner:{owner}``     zset    the same per owner
``fixq:sweeps:pending``           set     sweeps the reaper checks for rows nobody created
``fixq:sweeps:notify``            set     sweeps with a ``notify`` whose ``sweep.finished`` is not queued
``fixq:sweepidem:{owner}:{h}``    string  sweep id of an Idempotency-Key
================================  ======  ===========================================

A sweep lives as long as its last job: once every row has a job or an error
and every one of its jobs has expired (``job_ttl_s`` after its end),
``forget_expired_sweeps`` (called by the reaper) deletes its keys and its
listing entries.
"""

from service.sweeps.creation import cancel_sweep, create_sweep, ensure_job, job_finished, rescue_pending
from service.sweeps.notify import member_finished
from service.sweeps.records import CLAIM_MS, Sweep, forget_expired_sweeps, list_sweeps, load_sweep
from service.sweeps.request import MODES, SweepRequest, parse_path, parse_request, sweep_tag
from service.sweeps.view import ROW_STATES, SWEEP_STATES, sweep_view

__all__ = [
    "CLAIM_MS",
    "MODES",
    "ROW_STATES",
    "SWEEP_STATES",
    "Sweep",
    "SweepRequest",
    "cancel_sweep",
    "create_sweep",
    "ensure_job",
    "forget_expired_sweeps",
    "job_finished",
    "list_sweeps",
    "load_sweep",
    "member_finished",
    "parse_path",
    "parse_request",
    "rescue_pending",
    "sweep_tag",
    "sweep_view",
]
