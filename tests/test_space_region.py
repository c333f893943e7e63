"""Region algebra over disjoint boxes, checked against set theory and brute force.

Regions are built from "spec boxes" (an interval in axis units per axis, wrap-around
circular intervals and levels included). The reference for membership is a plain loop over
those spec boxes in axis units, which shares no code with the region's boxes in t.
"""

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from augsplit.space import CIRCULAR, LEVELS, LINEAR, LOG, Axis, Region, Space

X = Axis("x", -6.0, 6.0, LINEAR, "deg")
SCALE = Axis("scale", 0.5, 4.0, LOG, "x")
ANGLE = Axis("angle", 0.0, 360.0, CIRCULAR, "deg")
MIRROR = Axis("mirror", 0.0, 1.0, LEVELS, levels=(0.0, 1.0))
CLS = Axis("class", 0.0, 3.0, LEVELS, levels=(0.0, 1.0, 2.0, 3.0))
SPACE = Space([X, SCALE, ANGLE, MIRROR, CLS])
NAMES = SPACE.names

# Interval ends come from coarse grids, so boxes often share faces and touch: the cases
# where a careless decomposition double-counts or leaves slivers.
X_GRID = [-6.0 + 0.75 * i for i in range(17)]
SCALE_GRID = [0.5 * 2 ** (i / 4) for i in range(13)]  # 0.5 .. 4 evenly in log


@st.composite
def spec_boxes(draw):
    """{axis: (a, b)} in axis units; an axis left out spans its whole range."""
    box = {}
    if draw(st.booleans()):
        a, b = sorted(draw(st.lists(st.sampled_from(X_GRID), min_size=2, max_size=2, unique=True)))
        box["x"] = (a, b)
    if draw(st.booleans()):
        a, b = sorted(draw(st.lists(st.sampled_from(SCALE_GRID), min_size=2, max_size=2, unique=True)))
        box["scale"] = (a, b)
    if draw(st.booleans()):
        a = 15.0 * draw(st.integers(0, 23))
        w = 15.0 * draw(st.integers(1, 23))
        # write the same arc three ways: past 360, wrapped back, or starting below 0
        form = draw(st.integers(0, 2))
        box["angle"] = [(a, a + w), (a, (a + w) % 360.0), (a - 360.0, a + w - 360.0)][form]
    if draw(st.booleans()):
        box["mirror"] = (v := float(draw(st.integers(0, 1))), v)
    if draw(st.booleans()):
        a, b = sorted(draw(st.lists(st.integers(0, 3), min_size=2, max_size=2)))
        box["class"] = (float(a), float(b))
    return box


def arc(a, b):
    """Start and counter-clockwise width of a circular interval, as interval_to_t reads it."""
    return a, (360.0 if b - a >= 360.0 else (b - a) % 360.0)


def region_of(box):
    return Region.box(SPACE, {n: SPACE[n].interval_to_t(*iv) for n, iv in box.items()})


def region_of_union(boxes):
    r = Region.empty(SPACE)
    for b in boxes:
        r = r | region_of(b)
    return r


def ref_member(boxes, v):
    """Brute force: is each point (axis units, (N, ndim)) in any of the spec boxes?"""
    out = np.zeros(len(v), bool)
    for box in boxes:
        inside = np.ones(len(v), bool)
        for n, (a, b) in box.items():
            c = v[:, SPACE.index[n]]
            if n == "angle":
                start, w = arc(a, b)
                inside &= np.mod(c - start, 360.0) <= w
            else:
                inside &= (c >= a) & (c <= b)
        out |= inside
    return out


def near_boundary(boxes, v, delta=1e-6):
    """Points within delta of any interval end (the only place closed/open matters)."""
    near = np.zeros(len(v), bool)
    for box in boxes:
        for n, (a, b) in box.items():
            if SPACE[n].measure == LEVELS:
                continue  # values are exact levels, never near a cell face
            c = v[:, SPACE.index[n]]
            if n == "angle":
                start, w = arc(a, b)
                for e in (start, start + w):
                    d = np.mod(c - e, 360.0)
                    near |= np.minimum(d, 360.0 - d) < delta
            else:
                near |= (np.abs(c - a) < delta) | (np.abs(c - b) < delta)
    return near


def uniform_points(seed, n):
    """Points uniform under the space's measure, drawn in t and returned in axis units."""
    rng = np.random.default_rng(seed)
    t = SPACE.t_lo + rng.random((n, SPACE.ndim)) * SPACE.t_span
    return SPACE.from_t(t)


def hand_mass(box):
    """Mass of one spec box from the interval widths: the definition of each measure."""
    m = 1.0
    for n, (a, b) in box.items():
        if n == "x":
            m *= (b - a) / 12.0
        elif n == "scale":
            m *= math.log(b / a) / math.log(4.0 / 0.5)
        elif n == "angle":
            m *= arc(a, b)[1] / 360.0
        else:
            m *= sum(a <= lv <= b for lv in SPACE[n].levels) / len(SPACE[n].levels)
    return m


def overlap_volume(r):
    """Largest t-volume shared by two distinct boxes of a region (0 when disjoint)."""
    if r.nbox < 2:
        return 0.0
    w = np.minimum(r.hi[:, None], r.hi[None]) - np.maximum(r.lo[:, None], r.lo[None])
    vol = np.prod(np.clip(w, 0, None), axis=2)
    np.fill_diagonal(vol, 0.0)
    return float(vol.max())


unions = st.lists(spec_boxes(), min_size=1, max_size=3)


# ---- single boxes -------------------------------------------------------------------------
@given(spec_boxes())
def test_mass_of_one_box_is_the_product_of_its_interval_measures(box):
    # product measure of a box: product of the 1-D measures (definition of a product measure)
    assert region_of(box).mass() == pytest.approx(hand_mass(box), rel=1e-9)


# ---- algebra -----------------------------------------------------------------------------
@settings(deadline=None, max_examples=150)
@given(unions, unions)
def test_masses_obey_inclusion_exclusion(a_boxes, b_boxes):
    a, b = region_of_union(a_boxes), region_of_union(b_boxes)
    ma, mb, mab = a.mass(), b.mass(), (a & b).mass()
    # |A u B| = |A| + |B| - |A n B| (inclusion-exclusion, standard measure theory)
    assert (a | b).mass() == pytest.approx(ma + mb - mab, abs=1e-9)
    # |A \ B| = |A| - |A n B| (additivity over the disjoint pieces A n B and A \ B)
    assert (a - b).mass() == pytest.approx(ma - mab, abs=1e-9)
    # |A^c| = 1 - |A| (the whole space has mass 1)
    assert a.complement().mass() == pytest.approx(1.0 - ma, abs=1e-9)
    # a union of spec boxes weighs no more than its parts (subadditivity)
    assert ma <= sum(hand_mass(x) for x in a_boxes) + 1e-9
    assert ma >= max(hand_mass(x) for x in a_boxes) - 1e-9


@settings(deadline=None, max_examples=150)
@given(unions, unions)
def test_boxes_of_every_result_are_pairwise_disjoint(a_boxes, b_boxes):
    a, b = region_of_union(a_boxes), region_of_union(b_boxes)
    for r in (a, b, a | b, a & b, a - b, b - a, a.complement(), (a | b).simplify()):
        assert overlap_volume(r) <= 1e-12
        assert np.all(r.hi > r.lo)
        assert np.all(r.lo >= SPACE.t_lo) and np.all(r.hi <= SPACE.t_hi)


@settings(deadline=None, max_examples=150)
@given(unions, unions, st.integers(0, 2**32 - 1))
def test_membership_equals_the_boolean_combination_of_memberships(a_boxes, b_boxes, seed):
    a, b = region_of_union(a_boxes), region_of_union(b_boxes)
    v = uniform_points(seed, 3000)
    v = v[~near_boundary(a_boxes + b_boxes, v)]
    in_a, in_b = ref_member(a_boxes, v), ref_member(b_boxes, v)  # brute force over spec boxes
    assert np.array_equal(a.contains(v), in_a)
    assert np.array_equal(b.contains(v), in_b)
    assert np.array_equal((a | b).contains(v), in_a | in_b)
    assert np.array_equal((a & b).contains(v), in_a & in_b)
    assert np.array_equal((a - b).contains(v), in_a & ~in_b)
    assert np.array_equal(a.complement().contains(v), ~in_a)
    assert np.array_equal((a | b).simplify().contains(v), in_a | in_b)
    # restrict is intersection with a band of one axis
    assert np.array_equal(a.restrict("x", -1.5, 3.0).contains(v), in_a & (v[:, 0] >= -1.5) & (v[:, 0] <= 3.0))


@settings(deadline=None, max_examples=60, derandomize=True)
@given(unions, unions, st.sampled_from(["a", "or", "and", "minus"]))
def test_mass_agrees_with_a_monte_carlo_estimate(a_boxes, b_boxes, op):
    a, b = region_of_union(a_boxes), region_of_union(b_boxes)
    region = {"a": a, "or": a | b, "and": a & b, "minus": a - b}[op]
    n = 20000
    v = uniform_points(12345, n)
    in_a, in_b = ref_member(a_boxes, v), ref_member(b_boxes, v)
    hits = {"a": in_a, "or": in_a | in_b, "and": in_a & in_b, "minus": in_a & ~in_b}[op]
    m = region.mass()
    # the hit count is Binomial(n, m): allow 5 standard deviations (normal approximation to
    # the binomial, common practice, no source), plus a little slack for m near 0 or 1
    assert abs(hits.mean() - m) <= 5 * math.sqrt(m * (1 - m) / n) + 3.0 / n


@settings(deadline=None, max_examples=80)
@given(unions, unions, st.integers(0, 2**32 - 1))
def test_box_of_t_names_the_first_box_holding_each_point(a_boxes, b_boxes, seed):
    r = region_of_union(a_boxes) - region_of_union(b_boxes)
    v = uniform_points(seed, 2000)
    # half the points sit on grid faces in x, where two touching boxes both hold them
    v[::2, 0] = np.random.default_rng(seed).choice(X_GRID, len(v[::2]))
    t = SPACE.to_t(v)
    ang = t[:, SPACE.index["angle"]]
    t = t[np.minimum(ang, 360.0 - ang) > 1e-6]  # off the seam, where a box can be met from both sides
    k = r.box_of_t(t)
    assert np.array_equal(k >= 0, r.contains_t(t))
    tol = 1e-9 * np.maximum(1.0, SPACE.t_span)  # the documented closed-box tolerance
    for i in np.flatnonzero(k >= 0):
        assert np.all(t[i] >= r.lo[k[i]] - tol) and np.all(t[i] <= r.hi[k[i]] + tol)
        earlier = np.all((t[i] >= r.lo[: k[i]] - tol) & (t[i] <= r.hi[: k[i]] + tol), axis=1)
        assert not earlier.any()


@settings(deadline=None, max_examples=30)
@given(unions, st.integers(0, 2**32 - 1), st.integers(1, 50))
def test_chunked_membership_matches_one_pass(a_boxes, seed, chunk):
    r = region_of_union(a_boxes)
    t = SPACE.to_t(uniform_points(seed, 500))
    assert np.array_equal(r.contains_t(t, chunk=chunk), r.contains_t(t, chunk=10**9))
    assert np.array_equal(r.box_of_t(t, chunk=chunk), r.box_of_t(t, chunk=10**9))


# ---- fixed cases ----------------------------------------------------------------------------
def test_circular_seam_belongs_to_boxes_touching_it_from_either_side():
    # 360 deg and 0 deg are the same direction; regression: an interval up to 360 missed both
    up_to_seam = region_of({"angle": (300.0, 360.0)})
    from_seam = region_of({"angle": (0.0, 30.0)})
    pts = {"x": 0.0, "scale": 1.0, "angle": np.array([0.0, 360.0, 720.0, -360.0]), "mirror": 0.0, "class": 0.0}
    assert up_to_seam.contains(pts).all()
    assert from_seam.contains(pts).all()
    assert not region_of({"angle": (30.0, 300.0)}).contains(pts).any()


def test_wrap_around_box_is_two_boxes_and_membership_crosses_zero():
    r = region_of({"angle": (330.0, 30.0)})
    assert r.nbox == 2 and r.mass() == pytest.approx(60.0 / 360.0)
    angles = np.array([331.0, 359.9, 0.0, 15.0, 29.0, 31.0, 180.0, 329.0])
    pts = {"x": 0.0, "scale": 1.0, "angle": angles, "mirror": 1.0, "class": 2.0}
    assert r.contains(pts).tolist() == [True] * 5 + [False] * 3


def test_simplify_joins_adjacent_pieces_into_one_box():
    left, right = region_of({"x": (-6.0, 0.0)}), region_of({"x": (0.0, 6.0)})
    whole = (left | right).simplify()
    assert whole.nbox == 1 and whole.mass() == pytest.approx(1.0)
    # a frame (full minus a central hole) cannot become one box, but keeps its mass
    frame = Region.full(SPACE) - region_of({"x": (-1.5, 1.5), "angle": (90.0, 180.0)})
    s = frame.simplify()
    assert s.nbox <= frame.nbox and s.mass() == pytest.approx(frame.mass())


def test_class_levels_select_whole_cells():
    r = region_of({"class": (1.0, 2.0)})
    assert r.mass() == pytest.approx(0.5)  # two of four classes
    pts = {"x": 0.0, "scale": 1.0, "angle": 0.0, "mirror": 0.0, "class": np.array([0.0, 1.0, 2.0, 3.0, 1.5])}
    assert r.contains(pts).tolist() == [False, True, True, False, False]  # 1.5 is no class


def test_empty_full_and_errors():
    e, f = Region.empty(SPACE), Region.full(SPACE)
    assert e.is_empty() and e.mass() == 0.0 and f.mass() == pytest.approx(1.0)
    assert (f - f).is_empty() and (e | f).mass() == pytest.approx(1.0)
    assert not e.contains_t(np.zeros((3, SPACE.ndim))).any()
    assert e.axis_extent("x") is None
    assert f.axis_extent("angle") == (0.0, 360.0)
    with pytest.raises(ValueError, match="unknown axes"):
        Region.box(SPACE, {"hue": [(0.0, 10.0)]})
    with pytest.raises(ValueError, match="different spaces"):
        f | Region.full(Space([X]))
    with pytest.raises(TypeError):
        f | 3
    with pytest.raises(ValueError, match="shape"):
        f.contains_t(np.zeros((4, 3)))


def test_boxes_are_clipped_to_the_space():
    r = Region(SPACE, [[-10.0, SPACE.t_lo[1], 0.0, -0.5, -0.5]], [[0.0, SPACE.t_hi[1], 360.0, 1.5, 3.5]])
    assert r.mass() == pytest.approx(0.5)
    assert r.lo[0, 0] == -6.0
