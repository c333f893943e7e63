"""The batched streams against numpy's own generators (numpy's SeedSequence and PCG64 are
the reference: `first_doubles` must give exactly the draws `Generator.random()` gives)."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from augsplit.space.streams import ONLINE, PARAMS, RENDER, first_doubles, image_rng, image_uniforms, stream

keys = st.integers(min_value=0, max_value=2**70)
words = st.integers(min_value=0, max_value=2**32 - 1)


@settings(max_examples=200, deadline=None)
@given(seed=keys, head=st.lists(keys, max_size=3), tail=st.lists(keys, max_size=2),
       varying=st.lists(st.one_of(words, st.integers(0, 2**63 - 1)), min_size=1, max_size=12),
       k=st.integers(0, 9))
def test_first_doubles_are_numpys_draws(seed, head, tail, varying, k):
    got = first_doubles(seed, tuple(head), np.array(varying, dtype=np.int64), tuple(tail), k)
    want = np.array([stream(seed, *head, v, *tail).random(k) for v in varying]).reshape(len(varying), k)
    assert got.shape == (len(varying), k)
    assert np.array_equal(got, want)  # bit for bit, not approximately


def test_image_uniforms_are_each_images_params_stream():
    idx = np.array([0, 1, 7, 4095, 2**31, 2**32 - 1, 2**32, 2**40 + 3])
    got = image_uniforms(20261201, 1, idx, 6)
    for row, i in zip(got, idx):
        assert np.array_equal(row, image_rng(20261201, 1, int(i), PARAMS).random(6))


def test_the_order_and_company_of_rows_change_nothing():
    """Image i's draws do not depend on which other images are drawn with it, nor in what order."""
    idx = np.arange(1000, 1200)
    alone = np.vstack([image_uniforms(5, 0, [i], 4) for i in idx[::-1]])[::-1]
    assert np.array_equal(image_uniforms(5, 0, idx, 4), alone)
    shuffled = np.random.default_rng(0).permutation(idx)
    assert np.array_equal(image_uniforms(5, 0, shuffled, 4), image_uniforms(5, 0, idx, 4)[shuffled - 1000])


def test_domains_stay_apart():
    a = first_doubles(9, (0,), np.arange(50), (PARAMS,), 2)
    b = first_doubles(9, (0,), np.arange(50), (RENDER,), 2)
    c = first_doubles(9, (ONLINE, 0, 0), np.arange(50), (PARAMS,), 2)
    assert not np.isin(a, b).any() and not np.isin(a, c).any()


def test_negative_keys_are_refused_as_numpy_refuses_them():
    with pytest.raises(ValueError):
        np.random.SeedSequence(1, spawn_key=(0, -1, 0))
    with pytest.raises(ValueError, match="non-negative"):
        first_doubles(1, (0,), np.array([3, -1]), (0,), 2)
    with pytest.raises(ValueError, match="non-negative"):
        first_doubles(-1, (0,), np.array([3]), (0,), 2)


def test_keys_beyond_64_bits_are_numpys_too():
    """Keys numpy takes (any non-negative int) give numpy's draws, whatever array they come in."""
    big = [2**63 + 5, 2**64 - 1, 2**64, 2**90 + 7, 3]
    want = np.array([stream(5, 1, v, 0).random(3) for v in big])
    assert np.array_equal(first_doubles(5, (1,), big, (0,), 3), want)
    assert np.array_equal(first_doubles(5, (1,), np.array(big[:2], dtype=np.uint64), (0,), 3), want[:2])


def test_float_keys_are_refused_as_numpy_refuses_them():
    with pytest.raises(TypeError):
        np.random.SeedSequence(1, spawn_key=(0, 1.5, 0))
    with pytest.raises(TypeError, match="integers"):
        first_doubles(5, (1,), np.array([1.5]), (0,), 2)
