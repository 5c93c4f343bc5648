"""A document that differs from a solved one only in its starting values (``solver.initial``) is answered
from that solved one: the fixed point does not depend on where the iteration starts.  The print shop is
the invented document of ``tests._documents``."""

from __future__ import annotations

import httpx

from service.resubmission import start_free_hash
from tests._documents import print_shop
from tests.service._http import run_inline, submit
from worker.document import parse_document


def _started(initial: dict, **overrides) -> dict:
    return print_shop(solver={"method": "value_iteration", "tolerance": 1e-8, "initial": initial}, **overrides)


def test_another_start_of_a_converged_document_is_answered_from_it(alice: httpx.Client) -> None:
    first = submit(alice)
    assert run_inline(first["id"])["outcome"] == "done"
    for initial in ({"values": [30.0, 10.0]}, {"job": first["id"]}):
        response = alice.post("/v1/jobs", json=_started(initial))
        assert response.status_code == 201, response.text
        assert response.json()["reused"] is True and response.json()["reused_from"] == first["id"]
    # ... and the other way round: a solved warm-started document answers the plain one.
    warm = submit(alice, _started({"values": [1.0, 2.0]}, discount=0.8))
    assert run_inline(warm["id"])["outcome"] == "done"
    plain = alice.post("/v1/jobs", json=print_shop(discount=0.8))
    assert plain.status_code == 201 and plain.json()["reused_from"] == warm["id"]
    # fresh=true opts out, as for identical documents.
    again = alice.post("/v1/jobs", json=_started({"values": [5.0, 5.0]}), params={"fresh": "true"})
    assert again.status_code == 202 and again.json()["reused"] is False


def test_a_start_that_changes_the_answer_is_not_reused(alice: httpx.Client) -> None:
    # Stopped by max_iterations, where the iteration got depends on its start: reused only when identical.
    capped = print_shop(solver={"method": "value_iteration", "tolerance": 1e-12, "max_iterations": 3})
    first = submit(alice, capped)
    assert run_inline(first["id"])["outcome"] == "done"
    assert alice.get(f"/v1/jobs/{first['id']}").json()["status"] == "max_iterations"
    assert alice.post("/v1/jobs", json=capped).status_code == 201
    capped_started = print_shop(solver={**capped["solver"], "initial": {"values": [30.0, 10.0]}})
    assert alice.post("/v1/jobs", json=capped_started).status_code == 202


def test_a_finite_horizon_has_no_start_free_hash() -> None:
    # There solver.initial is the value after the last period: part of the problem.
    document = print_shop()
    document["model"]["horizon"] = {"periods": 3}
    assert start_free_hash(parse_document(document)) is None
    assert start_free_hash(parse_document(print_shop())) == start_free_hash(
        parse_document(_started({"values": [1.0, 2.0]})))
