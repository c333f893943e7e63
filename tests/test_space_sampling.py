"""Exact sampling from regions, checked with goodness-of-fit tests, and per-image streams.

Every statistical check uses a fixed seed (deterministic) and rejects at p < 1e-3; each is
paired with a check that the same test has the power to reject a wrong distribution.
"""

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

from augsplit.space import CIRCULAR, LEVELS, LINEAR, LOG, Axis, Region, Space, image_rng, image_uniforms, sample, sample_t

X = Axis("x", -6.0, 6.0, LINEAR, "deg")
SCALE = Axis("scale", 0.5, 4.0, LOG, "x")
ANGLE = Axis("angle", 0.0, 360.0, CIRCULAR, "deg")
CLS = Axis("class", 0.0, 9.0, LEVELS, levels=tuple(float(i) for i in range(10)))
SPACE = Space([X, SCALE, ANGLE, CLS])
N = 4000
ALPHA = 1e-3


def draw(region, seed, n=N):
    u = np.random.default_rng(seed).random((n, region.space.ndim + 1))
    v, box = sample(region, u)
    return v, box


def region_of(**box):
    return Region.box(SPACE, {n: SPACE[n].interval_to_t(*iv) for n, iv in box.items()})


def col(v, name):
    return v[:, SPACE.index[name]]


# ---- one box --------------------------------------------------------------------------------
def test_uniform_within_a_box():
    r = region_of(x=(-2.0, 3.0), angle=(10.0, 100.0), scale=(1.0, 2.0), **{"class": (2.0, 5.0)})
    v, _ = draw(r, 1)
    # Kolmogorov-Smirnov against the uniform law on each side (scipy.stats.kstest)
    assert stats.kstest(col(v, "x"), stats.uniform(-2.0, 5.0).cdf).pvalue > ALPHA
    assert stats.kstest(col(v, "angle"), stats.uniform(10.0, 90.0).cdf).pvalue > ALPHA
    # jointly uniform, not just marginally: chi-square on a 5 x 5 grid of equal cells
    # (Pearson's test, scipy.stats.chisquare)
    hx = np.floor((col(v, "x") + 2.0) / 1.0).astype(int)
    ha = np.floor((col(v, "angle") - 10.0) / 18.0).astype(int)
    counts = np.bincount(hx * 5 + ha, minlength=25)
    assert stats.chisquare(counts).pvalue > ALPHA
    # power check: the same KS test rejects a triangular law on the same interval
    tri = np.random.default_rng(1).triangular(-2.0, 0.5, 3.0, N)
    assert stats.kstest(tri, stats.uniform(-2.0, 5.0).cdf).pvalue < ALPHA


def test_log_uniform_on_a_log_axis():
    r = region_of(scale=(0.5, 4.0))
    s = col(draw(r, 2)[0], "scale")
    assert s.min() >= 0.5 and s.max() <= 4.0
    # log-uniform means ln s is uniform on [ln 0.5, ln 4] (definition; KS from scipy.stats)
    assert stats.kstest(np.log(s), stats.uniform(math.log(0.5), math.log(8.0)).cdf).pvalue > ALPHA
    # and scipy's own log-uniform law agrees (scipy.stats.loguniform)
    assert stats.kstest(s, stats.loguniform(0.5, 4.0).cdf).pvalue > ALPHA
    # power check: the values themselves are far from uniform
    assert stats.kstest(s, stats.uniform(0.5, 3.5).cdf).pvalue < ALPHA


@pytest.mark.parametrize("a, b", [(300.0, 60.0), (-60.0, 60.0), (330.0, 360.0), (350.0, 10.0)])
def test_uniform_across_a_wrap_around_interval(a, b):
    r = region_of(angle=(a, b))
    w = (b - a) % 360.0
    ang = col(draw(r, 3)[0], "angle")
    assert np.all((ang >= 0.0) & (ang < 360.0))
    # unwrap: the counter-clockwise distance from the start must be uniform on [0, w]
    # (KS, scipy.stats.kstest)
    d = np.mod(ang - a, 360.0)
    assert d.max() <= w + 1e-9
    assert stats.kstest(d, stats.uniform(0.0, w).cdf).pvalue > ALPHA


def test_uniform_over_levels():
    r = region_of(**{"class": (0.0, 9.0)})
    c = col(draw(r, 4)[0], "class")
    assert set(np.unique(c)) == set(range(10))  # exact level values, never in between
    # chi-square against equal probabilities (Pearson's test, scipy.stats.chisquare)
    assert stats.chisquare(np.bincount(c.astype(int), minlength=10)).pvalue > ALPHA


def test_uniform_over_non_adjacent_level_runs():
    r = region_of(**{"class": (1.0, 2.0)}) | region_of(**{"class": (6.0, 6.0)})
    c = col(draw(r, 5)[0], "class").astype(int)
    counts = np.bincount(c, minlength=10)
    assert counts[[0, 3, 4, 5, 7, 8, 9]].sum() == 0
    assert stats.chisquare(counts[[1, 2, 6]]).pvalue > ALPHA  # Pearson's test, scipy.stats.chisquare


# ---- several boxes ----------------------------------------------------------------------------
def test_union_of_unequal_boxes_picks_boxes_in_proportion_to_mass():
    # three disjoint x-bands of widths 1, 2 and 5 (other axes full): masses in ratio 1 : 2 : 5
    bands = [(-6.0, -5.0), (-3.0, -1.0), (1.0, 6.0)]
    r = region_of(x=bands[0]) | region_of(x=bands[2]) | region_of(x=bands[1])
    x = col(draw(r, 6)[0], "x")
    which = np.select([(x >= a) & (x <= b) for a, b in bands], [0, 1, 2], -1)
    assert np.all(which >= 0)
    expected = np.array([1.0, 2.0, 5.0]) / 8.0 * N
    # Pearson's chi-square against the hand-computed proportions (scipy.stats.chisquare)
    assert stats.chisquare(np.bincount(which, minlength=3), expected).pvalue > ALPHA
    # power check: equal proportions are rejected
    assert stats.chisquare(np.bincount(which, minlength=3)).pvalue < ALPHA


def test_uniform_over_a_region_with_a_hole():
    # full x-angle square minus a central block: the difference is cut into several boxes,
    # yet the points must spread evenly over what remains
    hole = region_of(x=(-3.0, 3.0), angle=(90.0, 270.0))
    r = Region.full(SPACE) - hole
    assert r.nbox > 1
    v, _ = draw(r, 7, n=6000)
    x, ang = col(v, "x"), col(v, "angle")
    assert not np.any((np.abs(x) < 3.0) & (ang > 90.0) & (ang < 270.0))
    # 4 x 4 grid of cells 3 wide in x and 90 deg in angle; the 4 central cells are the hole
    gx = np.clip(np.floor((x + 6.0) / 3.0), 0, 3).astype(int)
    ga = np.clip(np.floor(ang / 90.0), 0, 3).astype(int)
    counts = np.bincount(gx * 4 + ga, minlength=16).reshape(4, 4)
    assert counts[1:3, 1:3].sum() == 0
    ring = np.delete(counts.ravel(), [5, 6, 9, 10])
    assert stats.chisquare(ring).pvalue > ALPHA  # equal cells, Pearson's test, scipy.stats.chisquare


@st.composite
def regions(draw):
    def one():
        box = {}
        if draw(st.booleans()):
            a, b = sorted(draw(st.lists(st.integers(-6, 6), min_size=2, max_size=2, unique=True)))
            box["x"] = (float(a), float(b))
        if draw(st.booleans()):
            a = 30.0 * draw(st.integers(0, 11))
            box["angle"] = (a, a + 30.0 * draw(st.integers(1, 11)))
        if draw(st.booleans()):
            a, b = sorted(draw(st.lists(st.integers(0, 9), min_size=2, max_size=2)))
            box["class"] = (float(a), float(b))
        if draw(st.booleans()):
            a, b = sorted(draw(st.lists(st.integers(0, 6), min_size=2, max_size=2, unique=True)))
            box["scale"] = (0.5 * 2 ** (a / 2), 0.5 * 2 ** (b / 2))
        return region_of(**box)

    r = one() | one()
    return r - one() if draw(st.booleans()) else r


@settings(deadline=None, max_examples=100)
@given(regions(), st.integers(0, 2**32 - 1))
def test_every_sample_lies_in_its_region_and_in_the_box_reported(r, seed):
    if r.is_empty():
        with pytest.raises(ValueError, match="empty"):
            sample_t(r, np.zeros((1, SPACE.ndim + 1)))
        return
    u = np.random.default_rng(seed).random((500, SPACE.ndim + 1))
    u[:5] = 0.0  # the corners of [0, 1) are where off-by-one mistakes live
    u[5:10] = np.nextafter(1.0, 0.0)
    t, box = sample_t(r, u)
    assert np.all((box >= 0) & (box < r.nbox))
    assert np.all((t >= r.lo[box]) & (t <= r.hi[box]))
    assert r.contains_t(t).all()
    v, _ = sample(r, u)
    assert r.contains(v).all()  # and in axis units, after the round trip through values


def test_levels_draws_on_a_cell_face_stay_in_their_box():
    # regression: u = 0 on a levels box [0.5, 1.5] used to give t = 0.5, i.e. level 0
    r = region_of(**{"class": (1.0, 1.0)})
    v, _ = sample(r, np.zeros((1, SPACE.ndim + 1)))
    assert col(v, "class")[0] == 1.0


def test_bad_uniforms_are_refused():
    r = Region.full(SPACE)
    with pytest.raises(ValueError, match="shape"):
        sample_t(r, np.zeros((10, SPACE.ndim)))
    with pytest.raises(ValueError, match=r"\[0, 1\]"):
        sample_t(r, np.full((2, SPACE.ndim + 1), 1.5))
    t, _ = sample_t(r, np.full(SPACE.ndim + 1, 0.5))  # one point as a flat row is fine
    assert t.shape == (1, SPACE.ndim)


# ---- per-image streams ------------------------------------------------------------------------
@settings(deadline=None, max_examples=50)
@given(st.lists(st.integers(0, 10**6), min_size=1, max_size=20, unique=True), st.randoms(use_true_random=False))
def test_image_uniforms_do_not_depend_on_the_other_indices_or_their_order(indices, rnd):
    seed, split, k = 20261201, 2, 6
    together = image_uniforms(seed, split, indices, k)
    alone = np.vstack([image_uniforms(seed, split, [i], k) for i in indices])
    assert np.array_equal(together, alone)
    shuffled = list(indices)
    rnd.shuffle(shuffled)
    again = image_uniforms(seed, split, shuffled, k)
    pos = {i: r for r, i in enumerate(shuffled)}
    assert np.array_equal(together, again[[pos[i] for i in indices]])


def test_image_streams_follow_the_documented_seed_sequence():
    # numpy's SeedSequence with a spawn key (numpy.random documentation, "parallel random number
    # generation"): the stream is a pure function of (seed, split, image, purpose)
    ref = np.random.Generator(np.random.PCG64(np.random.SeedSequence(7, spawn_key=(1, 42, 0)))).random(4)
    assert np.array_equal(image_rng(7, 1, 42).random(4), ref)
    assert np.array_equal(image_uniforms(7, 1, [42], 4)[0], ref)
    # a different split, image or purpose is a different stream
    others = [image_rng(7, 2, 42), image_rng(7, 1, 43), image_rng(7, 1, 42, purpose=1), image_rng(8, 1, 42)]
    assert all(not np.array_equal(g.random(4), ref) for g in others)


def test_first_uniforms_of_consecutive_images_are_uniform_and_uncorrelated():
    u = image_uniforms(99, 0, np.arange(3000), 2)
    assert stats.kstest(u[:, 0], stats.uniform.cdf).pvalue > ALPHA  # KS, scipy.stats.kstest
    # neighbouring images must not share structure: Pearson r near 0 (scipy.stats.pearsonr)
    assert stats.pearsonr(u[:-1, 0], u[1:, 0]).pvalue > ALPHA
    assert stats.pearsonr(u[:, 0], u[:, 1]).pvalue > ALPHA


# ---- rows from several regions at once -------------------------------------------------------------
@settings(max_examples=40, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), n=st.integers(1, 40))
def test_sample_t_each_gives_the_numbers_of_sample_t_row_by_row(seed, n):
    # reference: sample_t on each row alone, from its own region (the numbers must be equal)
    from augsplit.space.sample import sample_t_each

    rng = np.random.default_rng(seed)
    regions = []
    for _ in range(4):
        a, b = sorted(rng.uniform(-6, 5.9, 2))
        lv = sorted(rng.choice(10, 2, replace=False).astype(float))
        regions.append(region_of(x=(a, b + 0.1), **{"class": (lv[0], lv[1])}) | region_of(angle=(350.0, 20.0)))
    which = rng.integers(0, 4, n)
    u = rng.random((n, SPACE.ndim + 1))
    u[rng.random(n) < 0.1, 0] = 1.0  # the top end goes to the last box
    got = sample_t_each(regions, which, u)
    want = np.stack([sample_t(regions[k], u[i:i + 1])[0][0] for i, k in enumerate(which)])
    np.testing.assert_array_equal(got, want)
    cum = np.cumsum(regions[0].box_masses())
    np.testing.assert_array_equal(regions[0].cumulative_share(), cum / cum[-1])
