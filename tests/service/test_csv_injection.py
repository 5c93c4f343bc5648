"""CSV outputs neutralise text cells a spreadsheet would run as formulas, and leave numbers alone.

A cell that begins with ``=``, ``+``, ``-``, ``@``, a tab or a carriage return
gets a leading ``'`` when it is text (state and choice labels, names, varied
string values); a number such as ``-0.5`` is written as the number it is.
"""

from __future__ import annotations

import csv
import io

import httpx

from service.store import JobStore
from service.tables import csv_text
from tests._documents import machine_shop
from tests.service._http import run_inline, submit

HOSTILE_STATES = ['=HYPERLINK("http://evil.example","open")', "-cmd", "@x"]
HOSTILE_ACTIONS = ["+run", "\trepair"]


def hostile_shop() -> dict:
    """The invented machine shop with labels a spreadsheet would take for formulas, and negative rewards."""
    document = machine_shop()
    document["model"]["states"] = HOSTILE_STATES
    document["model"]["actions"] = HOSTILE_ACTIONS
    document["model"]["reward"] = [[-3.0, -5.0], [-2.0, -5.0], [None, -8.0]]
    return document


def read_csv(text: str) -> list[list[str]]:
    return list(csv.reader(io.StringIO(text)))


def test_csv_text_prefixes_formula_starts_only() -> None:
    for text in ("=1+1", "+1", "-1", "@SUM(A1)", "\tx", "\rx"):
        assert csv_text(text) == "'" + text
    for value in ("plain", "", "'=already", -0.5, 1e3, -3, None):
        assert csv_text(value) == value


def test_result_csv_neutralises_labels_and_keeps_negative_numbers(client: httpx.Client) -> None:
    record = submit(client, hostile_shop())
    run_inline(record["id"])
    result = client.get(f"/v1/jobs/{record['id']}/result").json()
    table = read_csv(client.get(f"/v1/jobs/{record['id']}/result", params={"format": "csv"}).text)
    assert table[0] == ["state_label", "value", "action"]
    rows = table[1:]
    assert [row[0] for row in rows] == ["'" + label for label in HOSTILE_STATES]
    for row, value, action in zip(rows, result["value"], result["policy"]["action"]):
        assert value < 0 and row[1].startswith("-") and float(row[1]) == value
        assert row[2] == "'" + action


def test_sweep_csv_neutralises_text_values_and_keeps_negative_numbers(client: httpx.Client, store: JobStore) -> None:
    vary = {"model.actions[1]": ["=cmd|' /C calc'!A0", "@fix"], "model.reward[0][1]": [-1.5]}
    body = {"base": machine_shop(), "vary": vary}
    response = client.post("/v1/sweeps", json=body)
    assert response.status_code == 202, response.text
    table = read_csv(client.get(f"/v1/sweeps/{response.json()['id']}", params={"format": "csv"}).text)
    assert table[0][:3] == ["index", "model.actions[1]", "model.reward[0][1]"]
    assert [row[1] for row in table[1:]] == ["'=cmd|' /C calc'!A0", "'@fix"]
    assert [row[2] for row in table[1:]] == ["-1.5", "-1.5"]
