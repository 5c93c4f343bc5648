import base64
import json
import struct

import numpy as np
import pytest

from worker.arrays import _FAST_DECODE_CHARS, decode_array, encode_array, is_packed
from worker.errors import InvalidDocument, TooLarge


def _packed(dtype: str, shape: list, raw: bytes) -> dict:
    return {"dtype": dtype, "shape": shape, "base64": base64.b64encode(raw).decode("ascii")}


def _fault(call) -> tuple[str, str]:
    with pytest.raises(InvalidDocument) as excinfo:
        call()
    assert len(excinfo.value.errors) == 1
    return excinfo.value.errors[0]["path"], excinfo.value.errors[0]["message"]


def test_packed_float64_is_little_endian():
    # The wire format is little-endian C order: built here byte by byte with struct.
    obj = _packed("float64", [2, 2], struct.pack("<4d", 1.5, -2.0, 3.25, 1e300))
    array = decode_array(obj, path="model.reward")
    np.testing.assert_array_equal(array, [[1.5, -2.0], [3.25, 1e300]])
    assert array.dtype == np.float64 and array.flags.c_contiguous and array.flags.writeable
    # The same numbers packed big-endian decode to something else.
    big_endian = _packed("float64", [4], struct.pack(">4d", 1.5, -2.0, 3.25, 1.0))
    swapped = decode_array(big_endian, path="x", allow_nonfinite=True)
    assert not np.array_equal(swapped, [1.5, -2.0, 3.25, 1.0])


@pytest.mark.parametrize(
    ("dtype", "code", "values"),
    [("float32", "<3f", (0.5, -1.25, 8.0)), ("int64", "<3q", (1, -7, 2**40)), ("int32", "<3i", (3, -4, 2**30))],
)
def test_packed_other_dtypes(dtype, code, values):
    obj = _packed(dtype, [3], struct.pack(code, *values))
    np.testing.assert_array_equal(decode_array(obj, path="x"), np.array(values, dtype=np.float64))
    kept = decode_array(obj, path="x", dtype="keep")
    assert kept.dtype == np.dtype(dtype)
    np.testing.assert_array_equal(kept, values)


def test_encode_array_writes_little_endian_bytes():
    encoded = encode_array(np.array([[1.0, 2.5], [-3.0, 0.125]]))
    assert encoded["dtype"] == "float64" and encoded["shape"] == [2, 2]
    assert base64.b64decode(encoded["base64"]) == struct.pack("<4d", 1.0, 2.5, -3.0, 0.125)
    big_endian = np.array([7, -8], dtype=">i4")
    assert base64.b64decode(encode_array(big_endian)["base64"]) == struct.pack("<2i", 7, -8)


@pytest.mark.parametrize("dtype", ["float64", "float32", "int64", "int32"])
@pytest.mark.parametrize("shape", [(0,), (5,), (3, 4), (2, 0, 3), (2, 3, 4), ()])
def test_round_trip(dtype, shape):
    rng = np.random.default_rng(0)
    array = (rng.normal(size=shape) * 1000).astype(dtype)
    encoded = encode_array(array)
    assert is_packed(encoded) and json.loads(json.dumps(encoded)) == encoded
    np.testing.assert_array_equal(decode_array(encoded, path="x", dtype="keep"), array)
    np.testing.assert_array_equal(decode_array(encoded, path="x"), array.astype(np.float64))


@pytest.mark.parametrize(("dtype", "count"), [("float64", 600_000), ("int32", 1_000_001), ("int32", 1_000_002)])
def test_large_arrays_take_the_compiled_decoder(dtype, count):
    # 1_000_001 and 1_000_002 int32 values end in "==" and "=" padding.
    array = np.random.default_rng(1).integers(-(2**31), 2**31, count).astype(dtype)
    encoded = encode_array(array)
    assert len(encoded["base64"]) >= _FAST_DECODE_CHARS
    np.testing.assert_array_equal(decode_array(encoded, path="x", dtype="keep"), array)
    text = encoded["base64"]
    middle = len(text) // 2
    for broken in ("#" + text[1:], text[:middle] + "\n" + text[middle + 1 :], text[:-5] + "*" + text[-4:]):
        path, message = _fault(lambda: decode_array(dict(encoded, base64=broken), path="x"))
        assert path == "x.base64" and "not valid base64" in message


def test_non_contiguous_input_round_trips():
    array = np.arange(24.0).reshape(4, 6)[:, ::2]
    np.testing.assert_array_equal(decode_array(encode_array(array), path="x"), array)


@pytest.mark.parametrize(
    ("obj", "path", "words"),
    [
        ({"dtype": "float16", "shape": [1], "base64": "AAA="}, "m.dtype", "dtype must be one of"),
        ({"dtype": "float64", "shape": [2, -1], "base64": ""}, "m.shape[1]", "non-negative whole number"),
        ({"dtype": "float64", "shape": [2, 1.5], "base64": ""}, "m.shape[1]", "non-negative whole number"),
        ({"dtype": "float64", "shape": [True], "base64": ""}, "m.shape[0]", "non-negative whole number"),
        ({"dtype": "float64", "shape": "2", "base64": ""}, "m.shape", "list"),
        ({"dtype": "float64", "shape": [1], "base64": 5}, "m.base64", "must be a string"),
        ({"dtype": "float64", "shape": [1]}, "m.base64", "missing"),
        ({"dtype": "float64", "shape": [0], "base64": "", "layout": "C"}, "m.layout", "unknown key"),
        ({"dtype": "float64", "shape": [0], "base64": "", "order": "C"}, "m.order", 'or "column_major", got "C"'),
        ({"dtype": "float64", "shape": [1], "base64": "AAAAAAAAAA"}, "m.base64", "multiple of 4"),
        ({"dtype": "float64", "shape": [1], "base64": "AAAA!AAAAAA="}, "m.base64", "not valid base64"),
        ({"dtype": "float64", "shape": [1], "base64": "AAAAAAAAAA=="}, "m.base64", "decodes to 7 bytes"),
    ],
)
def test_packed_faults(obj, path, words):
    got_path, message = _fault(lambda: decode_array(obj, path="m"))
    assert got_path == path
    assert words in message


def test_packed_length_mismatch_says_expected_and_got():
    obj = _packed("float64", [3, 2], struct.pack("<4d", 1, 2, 3, 4))
    path, message = _fault(lambda: decode_array(obj, path="model.transition"))
    assert path == "model.transition.base64"
    assert "needs 48 bytes (6 values of 8 bytes)" in message and "decodes to 32 bytes (4 values)" in message


def test_element_cap_is_checked_from_the_shape_before_decoding():
    # A 10**12-element shape with a short text: refused on the shape alone.
    obj = {"dtype": "float64", "shape": [10**6, 10**6], "base64": "AAAA"}
    with pytest.raises(TooLarge) as excinfo:
        decode_array(obj, path="model.reward")
    assert excinfo.value.errors[0]["path"] == "model.reward"
    assert "1000000000000 elements" in excinfo.value.errors[0]["message"]


def test_element_cap_is_checked_from_the_text_length_before_decoding():
    obj = {"dtype": "float64", "shape": [2], "base64": "A" * 4000}
    with pytest.raises(TooLarge) as excinfo:
        decode_array(obj, path="model.reward", max_elements=100)
    assert excinfo.value.errors[0]["path"] == "model.reward.base64"
    with pytest.raises(TooLarge):
        decode_array([[0.0] * 20] * 20, path="model.reward", max_elements=399)
    assert decode_array([[0.0] * 20] * 20, path="model.reward", max_elements=400).shape == (20, 20)


def test_packed_nan_is_refused_or_kept_as_null():
    obj = _packed("float64", [2, 2], struct.pack("<4d", 1.0, float("nan"), 2.0, 3.0))
    path, message = _fault(lambda: decode_array(obj, path="model.reward"))
    assert (path, message) == ("model.reward[0][1]", "NaN is not allowed here: expected a finite number")
    assert np.isnan(decode_array(obj, path="model.reward", allow_null=True)[0, 1])
    inf = _packed("float64", [2], struct.pack("<2d", 1.0, float("-inf")))
    assert _fault(lambda: decode_array(inf, path="r", allow_null=True))[0] == "r[1]"
    assert np.isinf(decode_array(inf, path="r", allow_nonfinite=True)[1])


def test_nested_lists_convert():
    array = decode_array([[1, 2.5], [3, -4]], path="x")
    assert array.dtype == np.float64 and array.shape == (2, 2) and array.flags.writeable
    np.testing.assert_array_equal(array, [[1, 2.5], [3, -4]])
    assert decode_array([[1, 2], [3, 4]], path="x", dtype="keep").dtype == np.int64
    assert decode_array([], path="x").shape == (0,)
    assert decode_array([[], []], path="x").shape == (2, 0)


@pytest.mark.parametrize(
    ("obj", "path", "words"),
    [
        ([[1.0, 2.0], [3.0]], "model.reward[1]", "expected 2 entries, got 1"),
        ([[[1.0], [2.0]], [[3.0], [4.0, 5.0]]], "model.reward[1][1]", "expected 1 entries, got 2"),
        ([[1.0, 2.0], 3.0], "model.reward[1]", "expected a list of 2 entries"),
        ([[1.0, [2.0]], [3.0, 4.0]], "model.reward[0][1]", "expected a number, got a list"),
        ([[1.0, 2.0], [3.0, "4"]], "model.reward[1][1]", "got a string"),
        ([[1.0, 2.0], [True, 4.0]], "model.reward[1][0]", "got true"),
        ([[1.0, {}], [3.0, 4.0]], "model.reward[0][1]", "got an object"),
        ([[1.0, 2.0], [3.0, 4.0], [5.0, 6.0], [7.0, None]], "model.reward[3][1]", "null is not allowed"),
        ([1.0, 10**400], "model.reward[1]", "too large for float64"),
        ([[1.0, float("nan")]], "model.reward[0][1]", "NaN is not allowed"),
        ([[1.0], [float("inf")]], "model.reward[1][0]", "infinity is not allowed"),
        ("1,2", "model.reward", "expected an array"),
        (3.0, "model.reward", "expected an array"),
    ],
)
def test_nested_faults_name_the_index(obj, path, words):
    got_path, message = _fault(lambda: decode_array(obj, path="model.reward"))
    assert got_path == path
    assert words in message


def test_null_becomes_nan_when_allowed():
    array = decode_array([[1.0, None], [None, 2]], path="model.reward", allow_null=True)
    np.testing.assert_array_equal(np.isnan(array), [[False, True], [True, False]])
    assert _fault(lambda: decode_array([["x", None]], path="r", allow_null=True))[0] == "r[0][0]"


def test_nonfinite_allowed_on_request():
    array = decode_array(json.loads("[1.0, NaN, Infinity]"), path="x", allow_nonfinite=True)
    assert np.isnan(array[1]) and np.isinf(array[2])


def test_ndim_and_ndarray_input():
    path, message = _fault(lambda: decode_array([1.0, 2.0], path="m", ndim=2))
    assert (path, message) == ("m", "expected a 2-dimensional array, got shape [2]")
    source = np.arange(6, dtype=np.int32).reshape(2, 3)
    array = decode_array(source, path="m", ndim=2)
    assert array.dtype == np.float64 and array.base is None
    assert _fault(lambda: decode_array(np.array([True]), path="m"))[0] == "m"


def test_deep_nesting_is_refused():
    obj: list = [1.0]
    for _ in range(40):
        obj = [obj]
    assert "at most 32 dimensions" in _fault(lambda: decode_array(obj, path="m"))[1]
