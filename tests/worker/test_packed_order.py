"""Packed arrays in column-major order (``"order": "column_major"``), as R, Julia and MATLAB hold arrays.

The buffers are written the way those languages write an array's memory, element by element with the first
index fastest (built here with ``struct`` from an explicit loop, not numpy's Fortran reshape), and must
decode to the same array as the nested lists.
"""

from __future__ import annotations

import base64
import itertools
import struct

import numpy as np
import pytest

from tests._documents import machine_shop
from worker.arrays import decode_array
from worker.document import parse_document
from worker.errors import InvalidDocument
from worker.solve import solve


def column_major_buffer(nested: list, shape: tuple[int, ...], code: str = "<d") -> str:
    """Base64 of the elements of ``nested`` with the first index fastest (R's, Julia's, MATLAB's memory order)."""
    out = bytearray()
    for reversed_index in itertools.product(*(range(n) for n in reversed(shape))):
        element = nested
        for i in reversed(reversed_index):
            element = element[i]
        out += struct.pack(code, element)
    return base64.b64encode(bytes(out)).decode("ascii")


NESTED = [[[float(100 * i + 10 * j + k) for k in range(4)] for j in range(3)] for i in range(2)]


@pytest.mark.parametrize(("dtype", "code"), [("float64", "<d"), ("float32", "<f"), ("int32", "<i"), ("int64", "<q")])
def test_column_major_buffer_decodes_to_the_nested_array(dtype: str, code: str) -> None:
    values = NESTED if dtype.startswith("float") else [[[int(x) for x in row] for row in plane] for plane in NESTED]
    packed = {"dtype": dtype, "shape": [2, 3, 4], "base64": column_major_buffer(values, (2, 3, 4), code),
              "order": "column_major"}
    array = decode_array(packed, path="x", dtype="keep")
    np.testing.assert_array_equal(array, np.array(values))
    assert array.flags.c_contiguous
    # The same bytes read as row-major are another array: the order is not ignored.
    row_major = decode_array({**packed, "order": "row_major"}, path="x")
    assert not np.array_equal(row_major, np.array(values, dtype=float))
    np.testing.assert_array_equal(decode_array({k: v for k, v in packed.items() if k != "order"}, path="x"),
                                  row_major)


def test_a_bad_order_is_refused_naming_it() -> None:
    packed = {"dtype": "float64", "shape": [1], "base64": base64.b64encode(struct.pack("<d", 1.0)).decode(),
              "order": "fortran"}
    with pytest.raises(InvalidDocument) as caught:
        decode_array(packed, path="model.reward")
    message = 'order must be "row_major" (the default) or "column_major", got "fortran"'
    assert caught.value.errors == [{"path": "model.reward.order", "message": message}]


def test_a_column_major_reward_solves_like_the_nested_one() -> None:
    nested = machine_shop()
    reward = [[row[a] if row[a] is not None else float("nan") for a in range(2)] for row in nested["model"]["reward"]]
    packed = machine_shop()
    packed["model"]["reward"] = {"dtype": "float64", "shape": [len(reward), 2],
                                 "base64": column_major_buffer(reward, (len(reward), 2)), "order": "column_major"}
    parse_document(packed)
    assert solve(packed)["value"] == solve(nested)["value"]
