"""augsplit.columnar builds the arrays `pa.array(values, type=..., from_pandas=True)` builds
(NaN and None to nulls), from buffers, so generation never imports pandas; and reads float
columns back with nulls as NaN."""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

from augsplit.columnar import floats, to_arrow

INTS = {pa.int8(): np.int8, pa.int16(): np.int16, pa.int32(): np.int32, pa.int64(): np.int64}


def same(values, type_):
    """The reference: pyarrow's own conversion (pyarrow.array with from_pandas=True)."""
    got, want = to_arrow(values, type_), pa.array(values, type=type_, from_pandas=True)
    got.validate(full=True)
    assert got.type == want.type and got.equals(want) and got.null_count == want.null_count


@settings(deadline=None)  # the reference, pa.array, imports pandas on its first call
@given(st.sampled_from(list(INTS)), st.data())
def test_integers_from_numpy_and_lists(type_, data):
    info = np.iinfo(INTS[type_])
    values = data.draw(hnp.arrays(np.int64, st.integers(0, 40), elements=st.integers(info.min, info.max)))
    same(values, type_)
    same([int(v) for v in values], type_)


@settings(deadline=None)  # the reference, pa.array, imports pandas on its first call
@given(st.sampled_from([pa.float32(), pa.float64()]),
       hnp.arrays(np.float64, st.integers(0, 40), elements=st.floats(allow_nan=True, allow_infinity=True, width=32)))
def test_floats_with_nan_become_nulls(type_, values):
    same(values, type_)
    same([np.float64(v) for v in values], type_)  # distractor rows hold numpy scalars


@settings(deadline=None)  # the reference, pa.array, imports pandas on its first call
@given(st.lists(st.one_of(st.none(), st.text(max_size=8)), max_size=30))
def test_strings_with_none(values):
    same(values, pa.string())
    same(np.array(values, dtype=object), pa.string())


@settings(deadline=None)  # the reference, pa.array, imports pandas on its first call
@given(st.lists(st.text(st.characters(max_codepoint=127), max_size=70), max_size=30))
def test_ascii_strings(values):
    """ASCII text without None (ids, checksums, paths) takes a one-join way of its own."""
    same(values, pa.string())
    same(np.array(values, dtype=object), pa.string())
    same(values + ["\u00e9"], pa.string())  # one non-ASCII value: the general way


@settings(deadline=None)  # the reference, pa.array, imports pandas on its first call
@given(st.lists(st.one_of(st.none(), st.binary(max_size=20)), max_size=30))
def test_binary_with_none(values):
    same(values, pa.binary())


@settings(deadline=None)  # the reference, pa.array, imports pandas on its first call
@given(hnp.arrays(np.bool_, st.integers(0, 40)))
def test_bools(values):
    same(values, pa.bool_())


def test_what_it_does_not_take_apart_goes_to_pyarrow():
    same([1, None, 3], pa.int32())  # None in an integer list
    with pytest.raises(pa.ArrowInvalid):
        to_arrow(np.array([2**40]), pa.int32())  # out of range: pyarrow's own error


@settings(deadline=None)  # the reference, pa.array, imports pandas on its first call
@given(hnp.arrays(np.float32, st.integers(0, 40), elements=st.floats(width=32)), st.data())
def test_floats_reads_back_with_nulls_as_nan(values, data):
    valid = data.draw(hnp.arrays(np.bool_, len(values)))
    arr = pa.array(values, type=pa.float32(), mask=~valid)
    start = data.draw(st.integers(0, len(values)))
    sliced = arr.slice(start)
    want = np.where(valid, values.astype(np.float64), np.nan)[start:]
    np.testing.assert_array_equal(floats(sliced), want)
