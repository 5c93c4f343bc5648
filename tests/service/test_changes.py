"""The drift between two solves: ``GET /v1/jobs/{id}/changes?since=OTHER`` on a real store, each job solved by a
real execution (``run_inline``), and :func:`service.changes.compare` on results built by hand.

Every difference below is constructed by hand, and its size is checked against something computed outside
``service.changes``: an exact shift of the value function, or the two result arrays compared in numpy.
"""

from __future__ import annotations

import copy
import xml.etree.ElementTree as ET
from typing import Any

import httpx
import numpy as np
import pytest

from service.changes import NotComparable, compare
from tests._documents import log_growth, machine_shop
from tests.service._http import assert_problem, run_inline, submit

DISCOUNT = 0.95


def growth(points: int = 20, **model: Any) -> dict[str, Any]:
    """Invented growth with log utility (tests/_documents.py), with a stationary report and a simulation."""
    return {
        "version": 1,
        "label": "orchard replanting (invented)",
        "discount": DISCOUNT,
        "model": log_growth(points=points, **model),
        "solver": {"tolerance": 1e-9},
        "report": {"stationary": True, "simulate": {"periods": 200, "paths": 20, "seed": 3}},
    }


def solved(client: httpx.Client, document: dict[str, Any]) -> str:
    job = submit(client, document, fresh="true")
    assert run_inline(job["id"])["outcome"] == "done"
    return job["id"]


def changes(client: httpx.Client, job_id: str, since: str) -> dict[str, Any]:
    response = client.get(f"/v1/jobs/{job_id}/changes", params={"since": since})
    assert response.status_code == 200, response.text
    return response.json()


def arrays(client: httpx.Client, job_id: str) -> dict[str, Any]:
    return client.get(f"/v1/jobs/{job_id}/result").json()


def test_an_added_constant_shifts_the_value_by_its_present_value_and_leaves_the_policy(client: httpx.Client) -> None:
    base = growth()
    base["model"]["params"]["bonus"] = 0.0
    base["model"]["reward"] = "log(c) + bonus"
    raised = copy.deepcopy(base)
    raised["model"]["params"]["bonus"] = 0.25
    older, newer = solved(client, base), solved(client, raised)
    answer = changes(client, newer, older)

    # Adding a constant b to every reward adds b / (1 - beta) to the fixed point and keeps every argmax: the
    # Bellman operator T satisfies T(V + c) = TV + beta c (Blackwell's sufficient conditions, Stokey and Lucas
    # 1989, Theorem 3.3). Each solve is within its error bound of its fixed point, so the change is within both.
    exact = 0.25 / (1 - DISCOUNT)
    bounds = answer["error_bounds"]
    assert bounds["sum"] == pytest.approx(bounds["now"] + bounds["since"]) and bounds["sum"] < 1e-6
    assert abs(answer["value"]["sup_norm"] - exact) <= bounds["sum"]
    assert abs(answer["value"]["mean_change"] - exact) <= bounds["sum"]
    assert answer["within_error_bounds"] is False and "solutions differ" in answer["notes"][0]
    assert answer["policy"]["k_next"]["changed_points"] == 0 and answer["policy"]["k_next"]["changed_share"] == 0.0
    assert answer["same_structure"] is True and answer["interpolated"] is False
    assert answer["document_changes"]["paths"] == [{"path": "model.params.bonus", "now": 0.25, "since": 0.0}]
    for name, change in answer["stationary_means"].items():
        assert change["change"] == pytest.approx(0.0, abs=1e-12), name
    assert answer["id"] == newer and answer["since"] == older and answer["compared_on"] == newer


def test_a_changed_param_is_measured_as_numpy_measures_the_two_results(client: httpx.Client) -> None:
    older = solved(client, growth())
    newer = solved(client, growth(alpha=0.36))
    answer = changes(client, newer, older)
    old, new = arrays(client, older), arrays(client, newer)

    # Independent: the two results' arrays compared in numpy, on the same grid.
    difference = np.array(new["value"]) - np.array(old["value"])
    where = np.unravel_index(np.argmax(np.abs(difference)), difference.shape)
    assert answer["value"]["sup_norm"] == pytest.approx(np.abs(difference).max(), rel=1e-12)
    assert answer["value"]["largest_change"] == pytest.approx(difference[where], rel=1e-12)
    assert answer["value"]["at"] == {"k": new["axes"]["k"][where[0]], "z": new["axes"]["z"][where[1]]}
    assert answer["value"]["mean_change"] == pytest.approx(difference.mean(), rel=1e-12)
    moved = np.array(new["policy"]["k_next"]) != np.array(old["policy"]["k_next"])
    block = answer["policy"]["k_next"]
    assert moved.sum() > 0 and block["changed_points"] == moved.sum() and block["points"] == moved.size
    assert block["changed_share"] == pytest.approx(moved.mean())
    rows = np.flatnonzero(moved.any(axis=1))
    assert block["ranges"]["k"] == [new["axes"]["k"][rows[0]], new["axes"]["k"][rows[-1]]]
    assert 0 < len(block["largest"]) <= 5
    for point in block["largest"]:
        i, j = new["axes"]["k"].index(point["at"]["k"]), new["axes"]["z"].index(point["at"]["z"])
        assert (point["since"], point["now"]) == (old["policy"]["k_next"][i][j], new["policy"]["k_next"][i][j])
    for source, key in (("stationary", "stationary_means"), ("simulation", "simulated_means")):
        for name, change in answer[key].items():
            before = old[source]["means"][name] if source == "stationary" else old[source]["summary"][name]["mean"]
            after = new[source]["means"][name] if source == "stationary" else new[source]["summary"][name]["mean"]
            assert change == pytest.approx({"since": before, "now": after, "change": after - before}), name
    assert answer["same_structure"] is True
    assert answer["document_changes"]["paths"] == [{"path": "model.params.alpha", "now": 0.36, "since": 0.3}]

    backwards = changes(client, older, newer)
    assert backwards["value"]["largest_change"] == -answer["value"]["largest_change"]
    assert any(f"Job {newer} was submitted after job {older}" in note for note in backwards["notes"])
    assert not any("submitted after" in note for note in answer["notes"])

    picture = client.get(f"/v1/jobs/{newer}/plots/changes.svg", params={"since": older})
    assert picture.status_code == 200 and picture.headers["content-type"] == "image/svg+xml"
    assert ET.fromstring(picture.content).tag == "{http://www.w3.org/2000/svg}svg"
    png = client.get(f"/v1/jobs/{newer}/plots/changes.png", params={"since": older})
    assert png.status_code == 200 and png.content[:8] == b"\x89PNG\r\n\x1a\n"


def test_two_solves_of_one_document_show_no_change(client: httpx.Client) -> None:
    first, second = solved(client, growth()), solved(client, growth())
    answer = changes(client, second, first)
    assert answer["value"]["sup_norm"] == 0.0 and answer["value"]["largest_change"] == 0.0
    assert answer["within_error_bounds"] is True and "noise" in answer["notes"][0]
    assert answer["policy"]["k_next"]["changed_points"] == 0 and answer["policy"]["k_next"]["largest"] == []
    assert answer["same_structure"] is True and answer["structure_changes"] == []
    assert answer["document_changes"] == {"paths": [], "more": 0}
    assert all(change["change"] == 0.0 for change in answer["stationary_means"].values())
    assert changes(client, first, first)["value"]["sup_norm"] == 0.0


def test_a_refined_grid_is_compared_on_the_newer_grid_by_interpolation(client: httpx.Client) -> None:
    older = solved(client, growth(points=20))
    newer = solved(client, growth(points=39))  # every old grid point is also a new one
    answer = changes(client, newer, older)
    old, new = arrays(client, older), arrays(client, newer)

    # Independent: numpy's own linear interpolation of the older value, one shock column at a time.
    carried = np.column_stack([
        np.interp(new["axes"]["k"], old["axes"]["k"], np.array(old["value"])[:, j]) for j in range(2)
    ])  # fmt: skip
    difference = np.array(new["value"]) - carried
    assert answer["interpolated"] is True and answer["same_structure"] is False
    assert answer["value"]["sup_norm"] == pytest.approx(np.abs(difference).max(), rel=1e-10)
    assert answer["points"] == answer["points_compared"] == 78 and answer["outside_older_grid"] == 0
    [change] = answer["structure_changes"]
    assert change["part"] == "states" and change["name"] == "k"
    assert change["now"]["points"] == 39 and change["since"]["points"] == 20
    assert any("interpolated" in note for note in answer["notes"])
    # On the old grid points the newer solve's value differs from the older one only by the finer choice set.
    on_old = np.array(new["value"])[::2] - np.array(old["value"])
    assert np.all(on_old >= -1e-7)  # a finer choice grid can only do better (common practice: a superset of choices)


def test_a_narrower_older_grid_leaves_the_outer_points_uncompared() -> None:
    k_old, k_new, z = np.linspace(1.0, 2.0, 5), np.linspace(0.5, 2.5, 9), [0.9, 1.1]
    old = {"axes": {"k": k_old.tolist(), "z": z}, "value": np.outer(k_old, [1, 2]).tolist(), "error_bound": 0.0}
    new = {"axes": {"k": k_new.tolist(), "z": z}, "value": np.outer(k_new, [1, 2]).tolist(), "error_bound": 0.0}
    answer = compare(new, old).answer
    # A linear value is reproduced exactly by linear interpolation (inside the old range).
    assert answer["value"]["sup_norm"] == pytest.approx(0.0, abs=1e-12)
    assert answer["outside_older_grid"] == 8 and answer["points_compared"] == 10


def test_axes_are_matched_by_name_whatever_their_order() -> None:
    k, z = np.linspace(1.0, 2.0, 4), np.array([0.9, 1.0, 1.1])
    value = np.log(k)[:, None] + z[None, :]
    policy = k[:, None] * z[None, :]
    ordered = {"axes": {"k": k.tolist(), "z": z.tolist()}, "value": value.tolist(),
               "policy": {"k_next": policy.tolist()}, "error_bound": 1e-9}  # fmt: skip
    swapped = {"axes": {"z": z.tolist(), "k": k.tolist()}, "value": value.T.tolist(),
               "policy": {"k_next": policy.T.tolist()}, "error_bound": 1e-9}  # fmt: skip
    stated = {**ordered, "axes": {"z": z.tolist(), "k": k.tolist()}, "axis_order": ["k", "z"]}
    for one, other in ((ordered, swapped), (swapped, ordered), (stated, swapped), (ordered, stated)):
        answer = compare(one, other).answer
        assert answer["value"]["sup_norm"] == 0.0 and answer["policy"]["k_next"]["changed_points"] == 0
    bumped = copy.deepcopy(swapped)
    bumped["value"][2][1] += 0.5  # z = 1.1, k = k[1]
    answer = compare(ordered, bumped).answer
    assert answer["value"]["at"] == {"k": k[1], "z": 1.1} and answer["value"]["largest_change"] == -0.5
    assert answer["axis_order"] == ["k", "z"]


def test_other_state_variables_shocks_or_kinds_are_refused_naming_them(client: httpx.Client) -> None:
    older = solved(client, growth())
    renamed = growth()
    model = renamed["model"]
    model["states"] = {"capital": model["states"].pop("k")}
    model["choices"] = {"k_next": {"next_of": "capital"}}
    model["define"] = {"c": "z * capital**alpha - k_next"}
    other = solved(client, renamed)
    body = assert_problem(client.get(f"/v1/jobs/{other}/changes", params={"since": older}), 422)
    paths = {error["path"] for error in body["errors"]}
    assert paths == {"model.states.capital", "model.states.k"} and "capital" in body["detail"]
    assert body["type"] == "urn:fixq:problem:not-comparable"

    shop = solved(client, machine_shop())
    body = assert_problem(client.get(f"/v1/jobs/{shop}/changes", params={"since": older}), 422)
    assert body["errors"][0]["path"] == "model.kind" and "tabular" in body["detail"]
    assert_problem(client.get(f"/v1/jobs/{shop}/plots/changes.png", params={"since": older}), 422)

    with pytest.raises(NotComparable) as refused:
        horizon = {"axes": {"period": [0, 1], "k": [1.0, 2.0]}, "value": [[0.0, 0.0]] * 2}
        compare(horizon, {"axes": {"period": [0, 1, 2], "k": [1.0, 2.0]}, "value": [[0.0, 0.0]] * 3})
    assert refused.value.errors[0]["path"] == "model.horizon.periods"


def test_tabular_jobs_compare_by_state_label(client: httpx.Client) -> None:
    older = solved(client, machine_shop())
    newer = solved(client, machine_shop(discount=0.8))
    answer = changes(client, newer, older)
    old, new = arrays(client, older), arrays(client, newer)
    difference = np.array(new["value"]) - np.array(old["value"])
    assert answer["value"]["sup_norm"] == pytest.approx(np.abs(difference).max(), rel=1e-12)
    moved = [a != b for a, b in zip(new["policy"]["action"], old["policy"]["action"], strict=True)]
    assert answer["policy"]["action"]["changed_points"] == sum(moved)
    assert answer["document_changes"]["paths"] == [{"path": "discount", "now": 0.8, "since": 0.9}]
    picture = client.get(f"/v1/jobs/{newer}/plots/changes.svg", params={"since": older})
    assert picture.status_code == 200


def test_tabular_states_listed_in_another_order_are_matched_by_label() -> None:
    first = {"axes": {"state_label": ["new", "worn", "broken"]}, "value": [3.0, 2.0, 1.0],
             "policy": {"action": ["run", "run", "repair"]}, "error_bound": 0.0}  # fmt: skip
    reordered = {"axes": {"state_label": ["broken", "new", "worn"]}, "value": [1.0, 3.0, 2.5],
                 "policy": {"action": ["repair", "run", "repair"]}, "error_bound": 0.0}  # fmt: skip
    answer = compare(reordered, first).answer
    assert answer["interpolated"] is False and answer["value"]["at"] == {"state_label": "worn"}
    assert answer["value"]["largest_change"] == 0.5
    assert answer["policy"]["action"]["largest"] == [{"at": {"state_label": "worn"}, "since": "run", "now": "repair"}]
    assert answer["structure_changes"][0]["what"].startswith("the same states in another order")
    with pytest.raises(NotComparable) as refused:
        compare({**first, "axes": {"state_label": ["new", "worn", "gone"]}}, first)
    assert refused.value.errors[0]["path"] == "model.states" and "gone" in refused.value.errors[0]["message"]


def test_a_job_that_is_not_done_is_409_naming_its_state(client: httpx.Client) -> None:
    done = solved(client, growth())
    queued = submit(client, growth(), fresh="true")["id"]
    for job_id, since in ((queued, done), (done, queued)):
        body = assert_problem(client.get(f"/v1/jobs/{job_id}/changes", params={"since": since}), 409)
        assert body["state"] == "queued" and queued in body["detail"]
    assert_problem(client.get(f"/v1/jobs/{done}/changes"), 400)
    assert_problem(client.get(f"/v1/jobs/{done}/changes", params={"since": "0123456789abcdef"}), 404)


def test_another_owners_job_is_404_on_either_side_and_an_admin_sees_both(
    alice: httpx.Client, bob: httpx.Client, admin: httpx.Client
) -> None:
    hers, his = solved(alice, growth()), solved(bob, growth(alpha=0.33))
    for job_id, since in ((his, hers), (hers, his)):
        for path in (f"/v1/jobs/{job_id}/changes", f"/v1/jobs/{job_id}/plots/changes.png"):
            body = assert_problem(bob.get(path, params={"since": since}), 404)
            assert hers in body["detail"]
    assert changes(admin, his, hers)["value"]["sup_norm"] > 0
