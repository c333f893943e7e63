"""Multi-index Hamming search against brute force (reference: direct XOR + popcount)."""

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from augsplit.audit.nearest_hash import HashIndex, check_near_duplicates, choose_substrings


def _brute(train, test):
    # Reference: brute force, Python's int.bit_count over every pair.
    return np.array([[(int(a) ^ int(b)).bit_count() for b in train] for a in test], dtype=int).reshape(len(test), len(train))


@st.composite
def clustered_hashes(draw):
    """Hashes near a few centres, with duplicates, so that many pairs fall under small radii."""
    seed = draw(st.integers(0, 2**32 - 1))
    rng = np.random.default_rng(seed)
    centres = rng.integers(0, 2**64, size=draw(st.integers(1, 6)), dtype=np.uint64)

    def gen(n):
        h = centres[rng.integers(0, len(centres), n)]
        for _ in range(int(rng.integers(0, 8))):
            flip = np.uint64(1) << rng.integers(0, 64, n).astype(np.uint64)
            h = h ^ np.where(rng.random(n) < 0.5, flip, np.uint64(0))
        return h
    return gen(draw(st.integers(0, 120))), gen(draw(st.integers(0, 60)))


@settings(max_examples=60, deadline=None)
@given(clustered_hashes(), st.integers(0, 16), st.sampled_from([None, 0, 1, 2, 3, 4, 5, 8]))
def test_pairs_within_radius_equal_brute_force(data, radius, m):
    train, test = data
    if m is not None and m > 0 and radius // m > 4:
        m = None  # keep the number of probes small in a test
    index = HashIndex.build(train, radius, m)
    q, t, d = index.pairs_within(test)
    D = _brute(train, test)
    bq, bt = np.nonzero(D <= radius)
    assert np.array_equal(q, bq) and np.array_equal(t, bt)
    assert np.array_equal(d, D[bq, bt])
    dist, near = index.nearest_within(test)
    if len(train):
        best = D.min(axis=1) if len(test) else np.zeros(0, int)
        assert np.array_equal(dist, np.where(best <= radius, best, -1))
        first = np.argmax(D == best[:, None], axis=1) if len(test) else np.zeros(0, int)
        assert np.array_equal(near, np.where(best <= radius, first, -1))
    else:
        assert (dist == -1).all()


def test_substring_choice_follows_size():
    # Norouzi et al. (CVPR 2012): substrings of about log2(n) bits are best; brute force for tiny n.
    assert choose_substrings(5, 5) == 0
    assert choose_substrings(800_000, 5) in (3, 4)


def test_check_flags_exact_and_near_copies():
    rng = np.random.default_rng(0)
    train = rng.integers(0, 2**64, 1000, dtype=np.uint64)
    test = rng.integers(0, 2**64, 300, dtype=np.uint64)
    test[7] = train[3] ^ np.uint64(0b101)  # 2 bits away
    sha_tr = [f"t{i}" for i in range(1000)]; sha_te = [f"s{i}" for i in range(300)]
    sha_te[9] = sha_tr[11]
    res = check_near_duplicates(train, test, 5, sha_tr, sha_te)
    assert res.verdict == "fail"
    assert res.numbers["n_exact_duplicates"] == 1
    assert res.worst.iloc[0]["test_row"] == 9 and bool(res.worst.iloc[0]["exact_copy"])
    near = res.worst[res.worst["test_row"] == 7].iloc[0]
    assert near["hamming"] == 2 and near["train_row"] == 3
    clean = check_near_duplicates(train, rng.integers(0, 2**64, 300, dtype=np.uint64), 5)
    assert clean.verdict == "pass"  # random 64-bit hashes: P(<= 5 bits) per pair ~ 5e-13


@settings(max_examples=80, deadline=None)
@given(st.lists(st.sampled_from(["a1", "b2", "c3", "d4", None]), min_size=0, max_size=40),
       st.lists(st.sampled_from(["a1", "b2", "c3", "e5", None]), min_size=1, max_size=40))
def test_exact_sources_is_the_first_train_row_with_the_same_content_hash(train, test):
    from augsplit.audit.nearest_hash import _exact_sources

    got = _exact_sources(np.array(train, dtype=object), test, len(test), len(train))
    # brute force; a missing hash is the text "None", as the audit has always compared them
    want = [next((i for i, t in enumerate(train) if str(t) == str(q)), -1) for q in test]
    assert got.tolist() == want
