"""Columns between numpy / Python lists and pyarrow arrays, without pandas.

`pyarrow.array` and `Array.to_numpy` import pandas on first use (0.5 s, pyarrow 26), which
every generation worker would pay for a few row groups of numbers and strings. `to_arrow`
builds the same arrays as `pa.array(values, type=type, from_pandas=True)` (NaN and None
become nulls) from their buffers; anything it does not recognise goes to `pa.array` itself.
`floats` reads a float column back as numpy, nulls as NaN.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa

_NUMPY = {pa.int8(): np.int8, pa.int16(): np.int16, pa.int32(): np.int32, pa.int64(): np.int64,
          pa.float32(): np.float32, pa.float64(): np.float64}
_OFFSETS_MAX = np.iinfo(np.int32).max  # string and binary offsets are int32


def _validity(valid: np.ndarray) -> pa.Buffer | None:
    """Arrow's validity bitmap (least significant bit first), or None when every value is valid."""
    return None if valid.all() else pa.py_buffer(np.packbits(valid, bitorder="little"))


def _numbers(values, type_: pa.DataType, dtype) -> pa.Array | None:
    arr = np.asarray(values)
    n = len(arr)
    if arr.ndim != 1:
        return None
    if np.issubdtype(dtype, np.floating):
        if arr.dtype.kind not in "fiu":
            return None
        out = np.ascontiguousarray(arr, dtype=dtype)
        return pa.Array.from_buffers(type_, n, [_validity(~np.isnan(out)), pa.py_buffer(out)])
    if arr.dtype.kind not in "iu":
        return None
    out = np.ascontiguousarray(arr, dtype=dtype)
    if n and not np.array_equal(out, arr):  # out of range: pa.array raises its own error
        return None
    return pa.Array.from_buffers(type_, n, [None, pa.py_buffer(out)])


def _bools(values) -> pa.Array | None:
    arr = np.asarray(values)
    if arr.ndim != 1 or arr.dtype != np.bool_:
        return None
    return pa.Array.from_buffers(pa.bool_(), len(arr), [None, pa.py_buffer(np.packbits(arr, bitorder="little"))])


def _ascii_strings(values: list) -> pa.Array | None:
    """A list of ASCII str (no None) as a string array from one join (its UTF-8 bytes are its
    characters, so each length is len()): 0.25x the time of `_strings` at 500 values of 15-64
    characters, a manifest part's id and checksum columns. None for any other list."""
    try:
        joined = "".join(values)  # TypeError on None or any non-str
    except TypeError:
        return None
    if not joined.isascii() or len(joined) > _OFFSETS_MAX:
        return None
    n = len(values)
    offsets = np.zeros(n + 1, dtype=np.int32)
    np.cumsum(np.fromiter(map(len, values), dtype=np.int32, count=n), out=offsets[1:])
    return pa.Array.from_buffers(pa.string(), n, [None, pa.py_buffer(offsets), pa.py_buffer(joined.encode("ascii"))])


def _strings(values: list, type_: pa.DataType) -> pa.Array | None:
    if type_ == pa.string():
        fast = _ascii_strings(values)
        if fast is not None:
            return fast
    kind = str if type_ == pa.string() else bytes
    present = [v for v in values if v is not None]
    if not all(isinstance(v, kind) for v in present):
        return None
    data = [v.encode() for v in present] if kind is str else present
    valid = np.fromiter((v is not None for v in values), dtype=bool, count=len(values))
    lengths = np.zeros(len(values), dtype=np.int64)
    lengths[valid] = [len(v) for v in data]
    offsets = np.zeros(len(values) + 1, dtype=np.int64)
    np.cumsum(lengths, out=offsets[1:])
    if offsets[-1] > _OFFSETS_MAX:
        return None
    return pa.Array.from_buffers(type_, len(values), [_validity(valid), pa.py_buffer(offsets.astype(np.int32)),
                                                      pa.py_buffer(b"".join(data))])


def to_arrow(values, type_: pa.DataType) -> pa.Array:
    """`values` (a 1-D numpy array or a list) as a pyarrow array of `type_`, exactly as
    `pa.array(values, type=type_, from_pandas=True)` makes it, without importing pandas."""
    if len(values) == 0:
        return pa.nulls(0, type_)
    if type_ in _NUMPY:
        out = _numbers(values, type_, _NUMPY[type_])
    elif type_ == pa.bool_():
        out = _bools(values)
    elif type_ in (pa.string(), pa.binary()):
        out = _strings(list(values), type_)
    else:
        out = None
    return pa.array(values, type=type_, from_pandas=True) if out is None else out


def floats(arr: pa.Array) -> np.ndarray:
    """A float32 or float64 array's values as numpy, nulls as NaN (no pandas import)."""
    dtype = _NUMPY[arr.type]
    validity, data = arr.buffers()[:2]
    out = np.frombuffer(data, dtype=dtype, count=arr.offset + len(arr))[arr.offset:].astype(np.float64)
    if arr.null_count:
        bits = np.unpackbits(np.frombuffer(validity, dtype=np.uint8), bitorder="little")
        out[~bits[arr.offset:arr.offset + len(arr)].astype(bool)] = np.nan
    return out
