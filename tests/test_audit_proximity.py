"""Parameter proximity against brute-force numpy distances, periodic axes included."""

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from augsplit.audit.proximity import AxisScale, check_proximity, nearest_by_group, nearest_distances, normalise

SCALES = [AxisScale("x", -6, 6), AxisScale("scale", 0.5, 2.0, log=True), AxisScale("angle", 0, 360, periodic=True),
          AxisScale("hue", 0, 360, periodic=True)]


def _brute(train, test, scales, p=2.0):
    # Reference: brute force in numpy; periodic axes take min(|d|, 1 - |d|) (the short way round).
    a, b = normalise(train, scales), normalise(test, scales)
    d = np.abs(b[:, None, :] - a[None, :, :])
    per = np.array([s.periodic for s in scales])
    d[..., per] = np.minimum(d[..., per], 1 - d[..., per])
    D = (d ** p).sum(-1) ** (1 / p) if np.isfinite(p) else d.max(-1)
    return D


def _draw(rng, n, out_of_range=False):
    lo, hi = (-12, 12) if out_of_range else (-6, 6)
    return np.column_stack([rng.uniform(lo, hi, n), np.exp(rng.uniform(np.log(0.5), np.log(2), n)),
                            rng.uniform(-720, 720, n), rng.uniform(0, 360, n)])


@settings(max_examples=40, deadline=None)
@given(st.integers(0, 2**32 - 1), st.integers(1, 60), st.integers(1, 30), st.sampled_from([2.0, 1.0, np.inf]),
       st.booleans())
def test_nearest_equals_brute_force(seed, n_train, n_test, p, out_of_range):
    rng = np.random.default_rng(seed)
    train, test = _draw(rng, n_train, out_of_range), _draw(rng, n_test, out_of_range)
    per = np.array([s.periodic for s in SCALES])
    d, i = nearest_distances(normalise(train, SCALES), normalise(test, SCALES), per, p=p)
    D = _brute(train, test, SCALES, p)
    np.testing.assert_allclose(d, D.min(axis=1), rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(D[np.arange(n_test), i], D.min(axis=1), rtol=1e-9, atol=1e-12)


def test_wrap_around_is_short_way():
    # 359 deg and 1 deg are 2 deg apart on a circle: 2/360 normalised (from memory: circular distance).
    s = [AxisScale("angle", 0, 360, periodic=True)]
    d, _ = nearest_distances(normalise([[359.0]], s), normalise([[1.0], [181.0]], s), np.array([True]))
    np.testing.assert_allclose(d, [2 / 360, 178 / 360])


def test_same_class_distance_by_group_equals_brute_force():
    rng = np.random.default_rng(1)
    train, test = _draw(rng, 80), _draw(rng, 40)
    ctr, cte = rng.integers(0, 3, 80), rng.integers(0, 4, 40)  # class 3 has no train rows
    per = np.array([s.periodic for s in SCALES])
    d, i = nearest_by_group(normalise(train, SCALES), normalise(test, SCALES), per, ctr, cte)
    D = _brute(train, test, SCALES)
    D[ctr[None, :] != cte[:, None]] = np.inf
    np.testing.assert_allclose(d, D.min(axis=1))
    assert (i[cte == 3] == -1).all() and (ctr[i[cte != 3]] == cte[cte != 3]).all()


def test_verdict_follows_margin_and_names_the_row():
    rng = np.random.default_rng(2)
    train = _draw(rng, 200); train[:, 0] = rng.uniform(-6, -2, 200)
    test = _draw(rng, 50); test[:, 0] = rng.uniform(2, 6, 50)
    ok = check_proximity(train, test, SCALES, margin=0.2)
    assert ok.verdict == "pass" and ok.numbers["distance"]["min"] >= 4 / 12 - 1e-12
    test[17] = train[5] + [0.01, 0, 0, 0]  # a train row moved into the test region
    bad = check_proximity(train, test, SCALES, margin=0.2)
    assert bad.verdict == "fail" and bad.numbers["n_below_margin"] == 1
    assert bad.worst.iloc[0]["test_row"] == 17 and bad.worst.iloc[0]["train_row"] == 5
    assert check_proximity(train, test, SCALES).verdict == "pass"  # no margin declared, no exact repeat
    test[18] = train[6]
    assert check_proximity(train, test, SCALES).verdict == "warn"
