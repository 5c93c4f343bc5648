"""Solve a fixq example from Python with httpx, and read the policy into numpy.

Tested: the fixq test suite runs this exact script against a live server.

    FIXQ_URL=http://127.0.0.1:8000 FIXQ_KEY=... python python_httpx.py

It fetches the bundled household-saving example (an invented scenario),
changes the interest rate, submits it, waits for the job, and prints the
saving rule as a table: one row per asset level, one column per income value.
FIXQ_KEY may be left unset when the server runs with auth off.
"""

from __future__ import annotations

import os
import sys
import time

import httpx
import numpy as np

FIXQ_URL = os.environ.get("FIXQ_URL", "http://127.0.0.1:8000")
FIXQ_KEY = os.environ.get("FIXQ_KEY")
POLL_S = 0.5
WAIT_LIMIT_S = 120.0


def checked(response: httpx.Response) -> dict:
    """The JSON body of a successful response; otherwise print fixq's problem details and stop."""
    if response.is_success:
        return response.json()
    try:
        problem = response.json()
    except ValueError:
        problem = {"detail": response.text}
    print(f"fixq answered {response.status_code}: {problem.get('detail')}", file=sys.stderr)
    for error in problem.get("errors") or []:
        print(f"  {error['path'] or '(document)'}: {error['message']}", file=sys.stderr)
    sys.exit(1)


def patient_get(client: httpx.Client, path: str, deadline: float) -> dict:
    """GET ``path``, waiting out a short outage until ``deadline`` (time.monotonic()): while Redis restarts fixq
    answers 503 (with Retry-After), while the API restarts the connection is refused or cut; a proxy may answer
    502 or 504. Any other error stops at once (see ``checked``)."""
    while True:
        try:
            response = client.get(path)
            if response.status_code not in (502, 503, 504):
                return checked(response)
            reason, pause = f"HTTP {response.status_code}", float(response.headers.get("Retry-After", POLL_S))
        except httpx.TransportError as exc:
            reason, pause = str(exc) or type(exc).__name__, POLL_S
        if time.monotonic() + pause > deadline:
            sys.exit(f"fixq still unreachable ({reason}) after waiting {WAIT_LIMIT_S:.0f} s")
        print(f"  fixq is unreachable for now ({reason}); trying again in {pause:g} s", file=sys.stderr)
        time.sleep(pause)


def main() -> None:
    headers = {"Authorization": f"Bearer {FIXQ_KEY}"} if FIXQ_KEY else {}
    with httpx.Client(base_url=FIXQ_URL, headers=headers, timeout=30.0) as client:
        document = checked(client.get("/v1/examples/household_saving"))
        document["label"] = "household saving at a 2% interest rate (invented scenario)"
        document["model"]["params"]["r"] = 0.02

        job = checked(client.post("/v1/jobs", json=document))
        print(f"submitted job {job['id']}")
        deadline = time.monotonic() + WAIT_LIMIT_S
        while job["state"] in ("queued", "running"):
            if time.monotonic() > deadline:
                sys.exit(f"job {job['id']} still {job['state']} after {WAIT_LIMIT_S:.0f} s")
            time.sleep(POLL_S)
            job = patient_get(client, f"/v1/jobs/{job['id']}", deadline)
        if job["state"] != "done":
            error = job.get("error")  # problem details: detail, and errors with each fault's path
            reason = error.get("detail") if isinstance(error, dict) else error
            sys.exit(f"job {job['id']} ended {job['state']}: {reason}")
        result = patient_get(client, f"/v1/jobs/{job['id']}/result", deadline)

    # The arrays' axes in order: axis_order when the server states it, else the keys of axes
    # (state variables, then shocks). Nested lists are row-major, as numpy is: no reshape needed.
    # moveaxis puts them as this script wants them, (assets, income), whatever that order.
    axis_names = result.get("axis_order") or list(result["axes"])
    policy = np.asarray(result["policy"]["assets_next"])
    assert policy.shape == tuple(len(result["axes"][name]) for name in axis_names)
    saving_rule = np.moveaxis(policy, [axis_names.index("assets"), axis_names.index("income")], [0, 1])
    assets = np.asarray(result["axes"]["assets"])
    income = np.asarray(result["axes"]["income"])
    print(f"{result['status']} after {result['iterations']} iterations, error bound {result['error_bound']:.2e}")
    print(f"policy array shape {saving_rule.shape} (assets x income)")

    print("assets".rjust(8) + "".join(f"y={y:.3f}".rjust(10) for y in income))
    for row in np.linspace(0, len(assets) - 1, 8).round().astype(int):
        print(f"{assets[row]:8.3f}" + "".join(f"{a:10.3f}" for a in saving_rule[row]))


if __name__ == "__main__":
    main()
