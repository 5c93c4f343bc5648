"""Numeric arrays in documents: nested JSON lists, or packed base64 objects.

A packed array is ``{"dtype": D, "shape": [...], "base64": TEXT}`` with ``D``
one of ``float64``, ``float32``, ``int64``, ``int32``; ``TEXT`` is standard
base64 (RFC 4648 section 4, padded) of the elements, each little-endian, in
row-major (C) order, or in column-major (Fortran) order with ``"order":
"column_major"`` (R, Julia, MATLAB and Fortran hold arrays that way, so their
clients send their buffer as it is).  Numpy, Julia and R clients send large
arrays this way.

:func:`decode_array` turns either form into an ndarray, refusing bad input
with an :class:`~worker.errors.InvalidDocument` that names the exact place
(``model.reward[3][1]``, ``model.transition.shape[2]``), and refusing
arrays over the element cap with :class:`~worker.errors.TooLarge` before
anything of their size is allocated.
"""

from __future__ import annotations

import base64
import binascii
import functools
import math
import operator
from itertools import chain, repeat
from typing import Any

import numpy as np

from worker.errors import InvalidDocument, TooLarge, join_path

__all__ = ["DTYPES", "MAX_ELEMENTS", "decode_array", "encode_array", "is_packed"]

DTYPES = {"float64": "<f8", "float32": "<f4", "int64": "<i8", "int32": "<i4"}
"""Packed dtypes and their little-endian numpy codes."""

MAX_ELEMENTS = 2**26
"""Default cap on the elements of one array (count; 512 MiB as float64)."""

MAX_DEPTH = 32
"""Deepest nesting (number of dimensions) accepted."""

_PACKED_KEYS = ("dtype", "shape", "base64")
_OPTIONAL_KEYS = ("order",)
ORDERS = {"row_major": "C", "column_major": "F"}
"""Element orders of a packed array (its optional ``order``; default ``row_major``) and numpy's names for them."""
_NUMBER_TYPES = (int, float, np.integer, np.floating)
_BOOL_TYPES = (bool, np.bool_)
_FAST_DECODE_CHARS = 1 << 22
"""Base64 texts at least this long (characters, 3 MiB decoded) go through the
compiled decoder; below, binascii is as quick as loading the compiled code."""


def is_packed(obj: Any) -> bool:
    """True when ``obj`` looks like a packed array (a dict with a ``base64`` key)."""
    return isinstance(obj, dict) and "base64" in obj


def decode_array(
    obj: Any,
    *,
    path: str,
    max_elements: int = MAX_ELEMENTS,
    allow_null: bool = False,
    allow_nonfinite: bool = False,
    dtype: str = "float64",
    ndim: int | None = None,
) -> np.ndarray:
    """Read a document array: nested lists, a packed object, or an ndarray.

    Parameters
    ----------
    obj : nested lists of numbers, packed ``{"dtype", "shape", "base64"}`` (optionally ``"order"``), or ndarray
    path : document path of ``obj``, used in every error.
    max_elements : refuse (``TooLarge``) arrays with more elements than this.
    allow_null : JSON ``null`` becomes NaN (in packed arrays and ndarrays NaN stands for null;
        a NaN number inside nested lists is refused: there only ``null`` does).
    allow_nonfinite : accept NaN and +-inf.
    dtype : ``"float64"`` (the default) or ``"keep"`` for the sent integer or float type.
    ndim : required number of dimensions, or None for any.

    Returns
    -------
    array : C-contiguous, writable; float64 unless ``dtype="keep"``.
    """
    if isinstance(obj, np.ndarray):
        if obj.dtype.kind not in "iuf":
            raise InvalidDocument.at(path, f"expected an array of numbers, got dtype {obj.dtype}")
        _check_size(obj.shape, path, max_elements, ndim)
        array = obj
    elif isinstance(obj, dict):
        array = _decode_packed(obj, path, max_elements, ndim)
    elif isinstance(obj, list):
        array = _decode_nested(obj, path, max_elements, allow_null, ndim, keep_ints=dtype == "keep")
    else:
        message = f"expected an array (nested lists, or a packed {{dtype, shape, base64}} object), got {_describe(obj)}"
        raise InvalidDocument.at(path, message)

    if dtype == "float64":
        array = array.astype(np.float64, copy=False)
    elif dtype == "keep":
        array = array.astype(array.dtype.newbyteorder("="), copy=False)
    else:
        raise ValueError(f"dtype must be 'float64' or 'keep', not {dtype!r}")
    if array.dtype.kind == "f" and not allow_nonfinite:
        _check_finite(array, path, allow_null)
    if not array.flags.writeable or not array.flags.c_contiguous or array is obj:
        array = np.array(array, order="C")
    return array


def encode_array(array: Any) -> dict[str, Any]:
    """Pack an array: the inverse of :func:`decode_array`.

    float32/int32/int64 stay as they are; other integer and boolean types
    become int64, every other real type float64.
    """
    array = np.asarray(array)
    kind, size = array.dtype.kind, array.dtype.itemsize
    if kind == "f":
        name = "float32" if size == 4 else "float64"
    elif kind in "iub":
        name = "int32" if kind == "i" and size == 4 else "int64"
        if kind == "u" and size == 8 and array.size and array.max() > np.iinfo(np.int64).max:
            raise ValueError("uint64 values above the int64 range cannot be packed")
    else:
        raise TypeError(f"cannot pack an array of dtype {array.dtype}")
    data = np.ascontiguousarray(array, dtype=DTYPES[name]).tobytes()
    return {"dtype": name, "shape": list(array.shape), "base64": base64.b64encode(data).decode("ascii")}


def _decode_packed(obj: dict, path: str, max_elements: int, ndim: int | None) -> np.ndarray:
    errors: list[dict[str, str]] = []

    def fault(where: str | int, message: str, *more: str | int) -> None:
        errors.append({"path": join_path(path, where, *more), "message": message})

    for key in obj:
        if key not in _PACKED_KEYS and key not in _OPTIONAL_KEYS:
            fault(str(key), "unknown key: a packed array has only dtype, shape, base64 and order")
    for key in _PACKED_KEYS:
        if key not in obj:
            fault(key, "missing: a packed array needs dtype, shape and base64")
    dtype, shape, text = obj.get("dtype"), obj.get("shape"), obj.get("base64")
    if "dtype" in obj and dtype not in DTYPES:
        fault("dtype", f"dtype must be one of {', '.join(DTYPES)}, got {dtype!r}")
    if "shape" in obj and (not isinstance(shape, list) or len(shape) > MAX_DEPTH):
        fault("shape", f"shape must be a list of at most {MAX_DEPTH} whole numbers")
    elif "shape" in obj:
        for i, size in enumerate(shape):
            if not isinstance(size, int) or isinstance(size, bool) or size < 0:
                fault("shape", f"each dimension must be a non-negative whole number, got {_describe(size)}", i)
    if "base64" in obj and not isinstance(text, str):
        fault("base64", f"base64 must be a string, got {_describe(text)}")
    order = obj.get("order", "row_major")
    if not isinstance(order, str) or order not in ORDERS:
        got = f'"{order[:40]}"' if isinstance(order, str) else _describe(order)
        fault("order", f'order must be "row_major" (the default) or "column_major", got {got}')
    if errors:
        raise InvalidDocument(errors)

    # Sizes come from the shape and the text length alone, before any decoding.
    _check_size(tuple(shape), path, max_elements, ndim)
    itemsize = np.dtype(DTYPES[dtype]).itemsize
    where = join_path(path, "base64")
    if len(text) // 4 * 3 // itemsize > max_elements:
        message = f"the base64 text holds about {len(text) // 4 * 3 // itemsize} {dtype} values, more than the limit"
        raise TooLarge.at(where, f"{message} of {max_elements}")
    if len(text) % 4:
        raise InvalidDocument.at(where, f"not valid base64: its length ({len(text)}) is not a multiple of 4")
    got = len(text) // 4 * 3 - (len(text[-2:]) - len(text[-2:].rstrip("=")))
    count = math.prod(shape)
    if got != count * itemsize:
        raise InvalidDocument.at(
            where,
            f"shape {shape} of {dtype} needs {count * itemsize} bytes ({count} values of {itemsize} bytes), "
            f"but the base64 text decodes to {got} bytes ({got / itemsize:g} values)",
        )
    try:
        raw = _b64decode(text)
    except (binascii.Error, UnicodeEncodeError, ValueError) as exc:
        message = f"not valid base64 (standard alphabet A-Z a-z 0-9 + /, padded with =): {exc}"
        raise InvalidDocument.at(where, message) from None
    # Column-major: the buffer read with the first index fastest; decode_array then copies it to C order.
    return np.frombuffer(raw, dtype=DTYPES[dtype]).reshape(shape, order=ORDERS[order])


def _decode_nested(
    obj: list, path: str, max_elements: int, allow_null: bool, ndim: int | None, keep_ints: bool
) -> np.ndarray:
    shape = []
    node: Any = obj
    while isinstance(node, list):
        shape.append(len(node))
        if len(shape) > MAX_DEPTH:
            raise InvalidDocument.at(path, f"arrays may have at most {MAX_DEPTH} dimensions")
        if not node:
            break
        node = node[0]
    _check_size(tuple(shape), path, max_elements, ndim)
    try:
        array = np.asarray(obj, dtype=np.float64)
    except (ValueError, TypeError, OverflowError):
        array = None
    # np.asarray quietly turns True, "1.5" and None into numbers, so the leaf
    # types are checked too: one C-level pass over the flattened leaves.
    if array is not None and array.shape == tuple(shape) and _leaves_are_numbers(obj, array.ndim, allow_null):
        if allow_null:
            _refuse_nan_numbers(obj, array, path)
        if not keep_ints or not array.size or not _leaves_are_ints(obj, array.ndim):
            return array
        try:
            return np.asarray(obj, dtype=np.int64)
        except OverflowError:
            return array
    _find_fault(obj, shape, [], path, allow_null)
    raise InvalidDocument.at(path, "could not read this array as numbers")


def _leaves(obj: list, depth: int) -> Any:
    leaves: Any = obj
    for _ in range(depth - 1):
        leaves = chain.from_iterable(leaves)
    return leaves


def _leaves_are_numbers(obj: list, depth: int, allow_null: bool) -> bool:
    allowed = _NUMBER_TYPES + ((type(None),) if allow_null else ())
    return all(issubclass(t, allowed) and not issubclass(t, _BOOL_TYPES) for t in set(map(type, _leaves(obj, depth))))


def _refuse_nan_numbers(obj: list, array: np.ndarray, path: str) -> None:
    """Raise at the first NaN that was sent as a number rather than as ``null``.

    In nested lists only ``null`` means "not allowed"; a float NaN there is a
    mistake of the caller (JSON has no NaN), not a second spelling of null.
    """
    nan = np.isnan(array)
    if not nan.any():
        return
    # One C-level pass over the leaves: which NaN entries were None.
    sent_null = np.fromiter(map(operator.is_, _leaves(obj, array.ndim), repeat(None)), dtype=bool, count=array.size)
    numbers = nan.ravel() & ~sent_null
    if numbers.any():
        first = np.unravel_index(int(np.argmax(numbers)), array.shape)
        raise InvalidDocument.at(
            join_path(path, *map(int, first)), "NaN is not a number here; use null for a choice that is not allowed"
        )


def _leaves_are_ints(obj: list, depth: int) -> bool:
    return all(issubclass(t, (int, np.integer)) for t in set(map(type, _leaves(obj, depth))))


def _find_fault(node: Any, shape: list[int], index: list[int], path: str, allow_null: bool) -> None:
    """Walk the nested lists and raise at the first entry that breaks the array."""
    here = join_path(path, *index)
    level = len(index)
    rule = f"shape {shape}, from the first entries"
    if level == len(shape):
        if node is None:
            if allow_null:
                return
            raise InvalidDocument.at(here, "null is not allowed here: expected a number")
        if isinstance(node, list):
            raise InvalidDocument.at(here, f"expected a number, got a list: nested lists must be rectangular ({rule})")
        if isinstance(node, _BOOL_TYPES) or not isinstance(node, _NUMBER_TYPES):
            raise InvalidDocument.at(here, f"expected a number, got {_describe(node)}")
        try:
            float(node)
        except OverflowError:
            raise InvalidDocument.at(here, f"a {len(str(abs(node)))}-digit integer is too large for float64") from None
        return
    if not isinstance(node, list):
        message = f"expected a list of {shape[level]} entries, got {_describe(node)}: nested lists must be rectangular"
        raise InvalidDocument.at(here, f"{message} ({rule})")
    if len(node) != shape[level]:
        message = f"expected {shape[level]} entries, got {len(node)}: nested lists must be rectangular"
        raise InvalidDocument.at(here, f"{message} ({rule})")
    for i, child in enumerate(node):
        _find_fault(child, shape, index + [i], path, allow_null)


def _check_size(shape: tuple[int, ...], path: str, max_elements: int, ndim: int | None) -> None:
    if ndim is not None and len(shape) != ndim:
        raise InvalidDocument.at(path, f"expected a {ndim}-dimensional array, got shape {list(shape)}")
    count = math.prod(shape)
    if count > max_elements:
        raise TooLarge.at(path, f"shape {list(shape)} holds {count} elements, more than the limit of {max_elements}")


def _check_finite(array: np.ndarray, path: str, allow_null: bool) -> None:
    bad = np.isinf(array) if allow_null else ~np.isfinite(array)
    if not bad.any():
        return
    first = np.unravel_index(int(np.argmax(bad)), array.shape)
    value = array[first]
    what = "NaN" if np.isnan(value) else "infinity"
    raise InvalidDocument.at(join_path(path, *map(int, first)), f"{what} is not allowed here: expected a finite number")


def _describe(value: Any) -> str:
    if isinstance(value, _BOOL_TYPES):
        return "true" if value else "false"
    if isinstance(value, _NUMBER_TYPES):
        return f"the number {value!r}"
    names = {type(None): "null", str: "a string", dict: "an object", list: "a list"}
    return names.get(type(value), f"a {type(value).__name__}")


def _b64decode(text: str) -> bytes | np.ndarray:
    if len(text) < _FAST_DECODE_CHARS:
        return binascii.a2b_base64(text, strict_mode=True)
    chars = np.frombuffer(text.encode("ascii"), dtype=np.uint8)
    # The last quad may carry padding, which the strict C decoder handles.
    body = chars.size - 4
    tail = binascii.a2b_base64(text[body:], strict_mode=True)
    out = np.empty(body // 4 * 3 + len(tail), dtype=np.uint8)
    if not _quad_decoder()(chars[:body], _sextet_table(), out):
        raise ValueError("found a character outside the base64 alphabet")
    out[body // 4 * 3 :] = np.frombuffer(tail, dtype=np.uint8)
    return out


@functools.cache
def _sextet_table() -> np.ndarray:
    table = np.full(256, 255, dtype=np.uint8)
    alphabet = b"ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz0123456789+/"
    table[np.frombuffer(alphabet, dtype=np.uint8)] = np.arange(64, dtype=np.uint8)
    return table


def _decode_quads(chars: np.ndarray, table: np.ndarray, out: np.ndarray) -> bool:
    invalid = np.uint8(0)
    for q in range(chars.size // 4):
        a, b = table[chars[4 * q]], table[chars[4 * q + 1]]
        c, d = table[chars[4 * q + 2]], table[chars[4 * q + 3]]
        invalid |= a | b | c | d
        out[3 * q] = (a << 2) | (b >> 4)
        out[3 * q + 1] = ((b & 15) << 4) | (c >> 2)
        out[3 * q + 2] = ((c & 3) << 6) | d
    return invalid < 64


@functools.cache
def _quad_decoder() -> Any:
    # binascii decodes ~200 MB/s; compiled, this loop is several times faster.
    # numba is imported only here so that small documents never pay for it.
    import numba

    return numba.njit(cache=True, nogil=True)(_decode_quads)
