"""``python -m worker._compile_later``: the background compile a cold-start bridge starts.

Reads ``{"document", "module", "reward_storage", "limits", "lock"}`` as JSON
on stdin (see :func:`worker.bridge.compile_later`), compiles the document's
kernels, then drops the lock.
"""

from __future__ import annotations

import json
import os
import sys

from worker import bridge
from worker.document import parse_document
from worker.gridmodel import compile_grid
from worker.memory import release_inherited_limit
from worker.solve import solve


def main() -> int:
    """Compile a document's kernels (JSON on stdin), then drop the lock.

    Runs a solve of at most three iterations from zeros, with no reports and
    the caller's limits (they decide the reward storage, hence the kernels),
    so that every kernel a real solve calls is compiled, diagnostics included
    (compiling alone would leave those to the first real solve).  Should that
    solve have compiled another module than the one the caller named, that
    one is compiled too, with the reward storage the caller chose.
    """
    payload = json.loads(sys.stdin.read())
    release_inherited_limit()  # a job's memory limit bounds that job, not this compile
    try:
        os.nice(10)  # behind the solves of the machine it shares
    except (AttributeError, OSError):
        pass
    try:
        document = dict(payload["document"])
        document.pop("report", None)
        document["solver"] = {**document.get("solver", {}), "initial": "zeros", "max_iterations": 3}
        document["solver"].pop("time_limit_s", None)
        solve(document, limits=payload.get("limits"))
        if not bridge.is_warm(payload["module"]):
            compile_grid(
                parse_document(document), limits=payload.get("limits"), reward_storage=payload["reward_storage"]
            )
    finally:
        bridge.release(payload["lock"])
    return 0


if __name__ == "__main__":
    sys.exit(main())
