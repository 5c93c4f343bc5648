"""Results for column-major languages, over HTTP: ``?arrays=flat&order=...``, and the CSV rows in axis_order.

Each flat array must give back the nested array with one reshape: numpy's ``reshape(shape, order="F")``
for ``column_major`` (what R's ``array(data, dim = shape)`` and Julia's and MATLAB's ``reshape`` do) and
``order="C"`` for ``row_major``.  The CSV table's rows must run over ``axis_order`` with the last axis
fastest, its header naming the axes in that order.
"""

from __future__ import annotations

import csv
import io
from typing import Any

import httpx
import numpy as np

from tests.service._http import assert_problem, run_inline, submit


def workshop(**model: Any) -> dict[str, Any]:
    """An invented workshop: tools ``k`` and crew ``h`` (both chosen), demand ``z`` a chain."""
    return {
        "version": 1,
        "discount": 0.9,
        "model": {
            "kind": "grid",
            "params": {"alpha": 0.35, "wage": 0.2},
            "states": {"k": {"min": 0.5, "max": 4.0, "points": 6}, "h": {"values": [0.0, 1.0, 2.0]}},
            "shocks": {"z": {"markov": {"values": [0.8, 1.3], "matrix": [[0.7, 0.3], [0.4, 0.6]]}}},
            "choices": {"kn": {"next_of": "k"}, "hn": {"next_of": "h"}},
            "define": {"c": "z * (k ** alpha) * (1 + 0.3 * h) - wage * hn - kn + 0.85 * k"},
            "reward": "log(c)",
            "feasible": ["c > 0"],
            **model,
        },
        "report": {"stationary": True},
    }


def solved(client: httpx.Client, document: dict[str, Any]) -> str:
    record = submit(client, document)
    run_inline(record["id"])
    return record["id"]


def test_flat_arrays_reshape_to_the_nested_ones_in_either_order(client: httpx.Client) -> None:
    job = solved(client, workshop(axis_order=["z", "k", "h"]))
    nested = client.get(f"/v1/jobs/{job}/result").json()
    assert nested["axis_order"] == ["z", "k", "h"] and np.shape(nested["value"]) == (2, 6, 3)
    for order, numpy_order in (("column_major", "F"), ("row_major", "C")):
        response = client.get(f"/v1/jobs/{job}/result", params={"arrays": "flat", "order": order})
        assert response.status_code == 200, response.text
        flat = response.json()
        assert flat["axes"] == nested["axes"] and flat["axis_order"] == nested["axis_order"]
        pairs = [(flat["value"], nested["value"]), (flat["stationary"]["distribution"],
                                                    nested["stationary"]["distribution"])]
        pairs += [(flat[key][name], nested[key][name]) for key in ("policy", "policy_index") for name in ("kn", "hn")]
        for packed, array in pairs:
            assert packed["shape"] == [2, 6, 3] and packed["order"] == order
            np.testing.assert_array_equal(np.reshape(packed["data"], packed["shape"], order=numpy_order), array)
        # Column-major data runs with the first axis fastest: the first two entries differ in z only.
        if order == "column_major":
            assert flat["value"]["data"][:2] == [nested["value"][0][0][0], nested["value"][1][0][0]]
        assert flat["diagnostics"]["warnings"] == nested["diagnostics"]["warnings"]
    default = client.get(f"/v1/jobs/{job}/result", params={"arrays": "flat"}).json()
    assert default["value"]["order"] == "row_major"


def test_bad_result_queries_are_refused_naming_the_parameter(client: httpx.Client) -> None:
    job = solved(client, workshop())
    for params, name in (({"arrays": "flat", "order": "fortran"}, "query.order"),
                         ({"arrays": "packed"}, "query.arrays"),
                         ({"order": "column_major"}, "query.order"),
                         ({"arrays": "flat", "format": "csv"}, "query.arrays")):
        body = assert_problem(client.get(f"/v1/jobs/{job}/result", params=params), 400)
        assert [error["path"] for error in body["errors"]] == [name], body


def test_csv_rows_run_over_axis_order_last_axis_fastest(client: httpx.Client) -> None:
    job = solved(client, workshop(axis_order=["h", "z", "k"]))
    result = client.get(f"/v1/jobs/{job}/result").json()
    rows = list(csv.reader(io.StringIO(client.get(f"/v1/jobs/{job}/result", params={"format": "csv"}).text)))
    header, body = rows[0], rows[1:]
    assert header[:4] == ["h", "z", "k", "value"]
    shape = tuple(len(result["axes"][name]) for name in result["axis_order"])
    # numpy's C-order reshape of the value column is the nested value (the README's reshape for numpy).
    value = np.array([float(row[3]) for row in body]).reshape(shape)
    np.testing.assert_array_equal(value, result["value"])
    # ... and the axis columns count with the last axis fastest.
    assert [float(row[2]) for row in body[:6]] == result["axes"]["k"]
    assert {float(row[1]) for row in body[:6]} == {result["axes"]["z"][0]}


def test_pictures_of_a_result_with_a_shock_first(client: httpx.Client) -> None:
    job = solved(client, workshop(axis_order=["z", "h", "k"]))
    for picture in ("value", "policy"):
        response = client.get(f"/v1/jobs/{job}/plots/{picture}.svg")
        assert response.status_code == 200, response.text
    summary = client.get(f"/v1/jobs/{job}/plots").json()
    assert summary, summary
