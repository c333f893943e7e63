"""Rasterised envelopes and the per-pixel branch and bound (augsplit/plan/envelope.py).

Soundness: every real footprint (the renderer's own) of many sampled placements lies inside
the envelope mask, and a pixel the search excludes is covered by none of them; a placement
the search reports really covers its pixel when rendered. Tightness: against shapely's
Minkowski sums of convex polygons (shapely docs: convex_hull, buffer, unary_union; an open
reference library), the mask holds every pixel centre of an inner polygon and none beyond
an outer one grown by a pixel. Reference for the bilinear algebra: the textbook definition
of bilinear interpolation (from memory), checked against OpenCV's warpAffine.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
import shapely
from shapely import affinity
from shapely.geometry import MultiPoint, box as shp_box
from shapely.ops import unary_union

from augsplit.plan.envelope import (ALPHA_SLACK, SUPER, Item, NodeMax, Pose, Run, bilinear, item_mask, make_tables,
                                    padded_alpha, reach, square_max)
from augsplit.plan.geometry import PositionSet
from augsplit.render import RenderParams, footprint
from augsplit.sources import Polyominoes, Sprite

H = W = 64
CENTRE = (W / 2.0, H / 2.0)


# ---- sprites and items ---------------------------------------------------------------------


@st.composite
def sprites(draw):
    kind = draw(st.sampled_from(["polyomino", "noise", "disc"]))
    if kind == "polyomino":
        src = Polyominoes(draw(st.integers(2, 4)), draw(st.integers(1, 4)), gap_px=draw(st.integers(0, 1)))
        return src.sprite(draw(st.integers(0, len(src.classes) - 1)), 0)
    rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))
    if kind == "noise":  # arbitrary alpha values, the hard case for bilinear thresholds
        h, w = draw(st.integers(1, 8)), draw(st.integers(1, 8))
        rgba = np.zeros((h, w, 4), np.uint8)
        rgba[..., 3] = rng.integers(0, 256, (h, w))
        rgba[0, 0, 3] = 255  # never fully transparent
    else:
        r = draw(st.floats(1.5, 6.0))
        n = int(2 * r + 4)
        yy, xx = np.mgrid[:n, :n] + 0.5
        rgba = np.zeros((n, n, 4), np.uint8)
        rgba[..., 3] = np.rint(np.clip(r + 0.5 - np.hypot(xx - n / 2, yy - n / 2), 0, 1) * 255)
    rgba[..., :3] = 255
    return Sprite.from_rgba(rgba, "s", 0, 0)


@st.composite
def poses(draw):
    lo = draw(st.floats(0.5, 2.0))
    if draw(st.booleans()):
        scales = ((lo, lo * draw(st.floats(1.0, 1.8))),)
    else:  # levels
        scales = tuple((v, v) for v in sorted({lo, lo * draw(st.floats(1.0, 1.5))}))
    how = draw(st.sampled_from(["full", "interval", "levels"]))
    if how == "full":
        angles = ((0.0, 360.0),)
    elif how == "interval":
        a0 = draw(st.floats(-180, 180))
        angles = ((a0, a0 + draw(st.floats(0, 120))),)
    else:
        angles = tuple((v, v) for v in sorted({draw(st.floats(-180, 180)), draw(st.floats(-180, 180))}))
    mirrors = draw(st.sampled_from([(False,), (True,), (False, True)]))
    return Pose(scales, angles, mirrors)


@st.composite
def position_sets(draw):
    if draw(st.booleans()):
        x0, y0 = draw(st.floats(0, 56)), draw(st.floats(0, 56))
        return PositionSet("rect", (x0, x0 + draw(st.floats(0, 10)), y0, y0 + draw(st.floats(0, 10))), CENTRE)
    r0 = draw(st.floats(0, 22))
    p0 = draw(st.floats(0, 359))
    return PositionSet("sector", (r0, r0 + draw(st.floats(0, 8)), p0, p0 + draw(st.floats(1, 360))), CENTRE)


def _sample_positions(ps: PositionSet, rng, n: int) -> np.ndarray:
    """Uniform points and boundary points (where the envelope's edge is decided)."""
    u = rng.random((n, 2))
    edge = rng.random(n) < 0.5
    u[edge, rng.integers(0, 2, int(edge.sum()))] = rng.integers(0, 2, int(edge.sum()))
    if ps.kind == "rect":
        x0, x1, y0, y1 = ps.bounds
        return np.stack([x0 + u[:, 0] * (x1 - x0), y0 + u[:, 1] * (y1 - y0)], axis=1)
    r0, r1, p0, p1 = ps.bounds
    r = r0 + u[:, 0] * (r1 - r0)
    a = np.radians(p0 + u[:, 1] * (p1 - p0))
    return np.stack([CENTRE[0] + r * np.cos(a), CENTRE[1] - r * np.sin(a)], axis=1)


def _sample_placements(item: Item, rng, n: int):
    xy = _sample_positions(item.position, rng, n)
    out = []
    for k in range(n):
        sa, sb = item.pose.scales[rng.integers(len(item.pose.scales))]
        a0, a1 = item.pose.angles[rng.integers(len(item.pose.angles))]
        pick = rng.random(2)
        s = sb if pick[0] < 0.4 else sa + rng.random() * (sb - sa)
        a = (a0 if pick[1] < 0.2 else a1) if pick[1] < 0.4 else a0 + rng.random() * (a1 - a0)
        out.append((item.sprites[rng.integers(len(item.sprites))], xy[k, 0], xy[k, 1], s, a,
                    item.pose.mirrors[rng.integers(len(item.pose.mirrors))]))
    return out


def _canvas_mask(placed) -> np.ndarray:
    m = np.zeros((H, W), bool)
    x0, y0, x1, y1 = placed.bbox
    m[y0:y1, x0:x1] = placed.mask
    return m


# ---- the exact alpha the proofs rest on -----------------------------------------------------


@settings(max_examples=40, deadline=None)
@given(sprite=sprites(), cx=st.floats(10, 54), cy=st.floats(10, 54), scale=st.floats(0.4, 2.5),
       angle=st.floats(-360, 360), mirror=st.booleans(), t=st.floats(0.1, 0.9))
def test_renderer_footprint_is_exact_bilinear_alpha_above_threshold(sprite, cx, cy, scale, angle, mirror, t):
    # the renderer keeps pixel (r, c) iff alpha at the preimage of its centre exceeds t; our
    # float64 bilinear must agree except within ALPHA_SLACK of the threshold (OpenCV 5 warps
    # four-channel float images without snapping coordinates)
    got = _canvas_mask(footprint(sprite, RenderParams(cx, cy, scale, angle, mirror), (H, W), t))
    yy, xx = np.mgrid[:H, :W] + 0.5
    th = math.radians(angle)
    zx, zy = xx - cx, yy - cy
    wx = (math.cos(th) * zx - math.sin(th) * zy) / scale
    wy = (math.sin(th) * zx + math.cos(th) * zy) / scale
    wx = -wx if mirror else wx
    a = bilinear(padded_alpha(sprite), sprite.anchor[0] + wx, sprite.anchor[1] + wy)
    differ = got != (a > t)
    assert not np.any(differ & (np.abs(a - t) >= ALPHA_SLACK))


@settings(max_examples=60, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), d=st.floats(0, 0.499))
def test_square_max_is_the_largest_alpha_on_the_square(seed, d):
    # brute force on a fine grid over the square (never above the exact maximum, and close)
    rng = np.random.default_rng(seed)
    apad = np.pad(rng.random((5, 5)), 1)
    x, y = rng.uniform(-1, 7, 50), rng.uniform(-1, 7, 50)
    m = square_max(apad, x, y, np.full(50, d))
    g = np.linspace(-1, 1, 33)
    dense = np.max([bilinear(apad, x + a * d, y + b * d) for a in g for b in g], axis=0)
    assert np.all(dense <= m + 1e-12)
    # the maximiser lies within d/32 of a grid point on each axis, and |da| <= |dx| + |dy|
    assert np.all(m - dense <= d / 16 + 1e-12)


@settings(max_examples=40, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), h=st.integers(1, 9), w=st.integers(1, 9))
def test_node_max_bounds_alpha_on_any_square(seed, h, w):
    # against a brute-force maximum over the grid values of the touched cells, and dense
    # samples of the bilinear alpha (never above the bound)
    rng = np.random.default_rng(seed)
    a = rng.random((h, w)) * (rng.random((h, w)) < 0.6)
    apad = np.pad(a, 1)
    x, y, d = rng.uniform(-4, w + 4, 200), rng.uniform(-4, h + 4, 200), rng.uniform(0, 4, 200)
    m = NodeMax(apad)(x, y, d)
    for k in range(200):
        ix, iy = x[k] + 0.5, y[k] + 0.5
        c0, c1 = max(math.ceil(ix - d[k]) - 1, 0), min(math.floor(ix + d[k]) + 1, w + 1)
        r0, r1 = max(math.ceil(iy - d[k]) - 1, 0), min(math.floor(iy + d[k]) + 1, h + 1)
        brute = apad[r0:r1 + 1, c0:c1 + 1].max() if c0 <= c1 and r0 <= r1 else 0.0
        assert m[k] == pytest.approx(brute, abs=1e-12)
    g = np.linspace(-1, 1, 17)
    dense = np.max([bilinear(apad, x + u * d, y + v * d) for u in g for v in g], axis=0)
    assert np.all(dense <= m + 1e-12)


# ---- soundness of the mask and of the search --------------------------------------------------


@settings(max_examples=45, deadline=None, suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])
@given(sprite_list=st.lists(sprites(), min_size=1, max_size=2), pose=poses(), ps=position_sets(),
       t=st.sampled_from([0.3, 0.5, 0.7]), seed=st.integers(0, 2**32 - 1))
def test_mask_holds_every_footprint_and_search_is_sound(sprite_list, pose, ps, t, seed):
    rng = np.random.default_rng(seed)
    item = Item(0, 0, ps, pose, tuple(sprite_list))
    tables = make_tables([item], [], t)
    mask = item_mask(item, tables, (0, 0, W, H))
    covered = np.zeros((H, W), bool)
    for spr, cx, cy, s, a, m in _sample_placements(item, rng, 150):
        fp = _canvas_mask(footprint(spr, RenderParams(cx, cy, s, a, m), (H, W), t))
        assert not np.any(fp & ~mask), "a real footprint pixel lies outside the envelope mask"
        covered |= fp
    # the search never excludes a pixel some placement covers, and what it finds is real
    near = np.argwhere(mask & ~covered)
    some = np.argwhere(covered)
    picks = [tuple(p) for p in near[rng.permutation(len(near))[:3]]] + [tuple(p) for p in some[rng.permutation(len(some))[:2]]]
    for row, col in picks:
        r = reach([item], (int(col), int(row)), t, tables)
        if covered[row, col]:
            assert r.status != "excluded"
        if r.status == "covered":
            p = r.placement
            fp = _canvas_mask(footprint(p.sprite, RenderParams(p.cx, p.cy, p.scale, p.angle, p.mirror), (H, W), t))
            assert fp[row, col] and r.pixel == (col, row)
            assert _inside(ps, p.cx, p.cy) and _in_pose(pose, p.scale, p.angle)


def _inside(ps: PositionSet, x: float, y: float) -> bool:
    if ps.kind == "rect":
        x0, x1, y0, y1 = ps.bounds
        return x0 - 1e-9 <= x <= x1 + 1e-9 and y0 - 1e-9 <= y <= y1 + 1e-9
    r0, r1, p0, p1 = ps.bounds
    r = math.hypot(x - CENTRE[0], y - CENTRE[1])
    phi = math.degrees(math.atan2(-(y - CENTRE[1]), x - CENTRE[0]))
    apex = r <= 1e-9  # the centre belongs to every sector that starts at radius 0
    return r0 - 1e-9 <= r <= r1 + 1e-9 and (apex or (phi - p0) % 360.0 <= p1 - p0 + 1e-9 or p1 - p0 >= 360)


def _in_pose(pose: Pose, s: float, a: float) -> bool:
    return (any(lo - 1e-9 <= s <= hi + 1e-9 for lo, hi in pose.scales)
            and any(lo - 1e-9 <= a <= hi + 1e-9 for lo, hi in pose.angles))


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(sprite=sprites(), pose=poses(), x0=st.floats(8, 40), y0=st.floats(8, 40), wx=st.floats(1, 10),
       wy=st.floats(1, 10), down=st.booleans(), seed=st.integers(0, 2**32 - 1))
def test_a_run_is_excluded_only_if_each_of_its_pixels_is(sprite, pose, x0, y0, wx, wy, down, seed):
    # folding a run of pixels into a grown rectangle is exact: compare with pixel-by-pixel
    rng = np.random.default_rng(seed)
    ps = PositionSet("rect", (x0, x0 + wx, y0, y0 + wy), CENTRE)
    item = Item(0, 0, ps, pose, (sprite,))
    tables = make_tables([item], [], 0.5)
    mask = item_mask(item, tables, (0, 0, W, H))
    # a run along the mask's edge, where some pixels are covered and some are not
    col = int(np.flatnonzero(mask.any(axis=0)).max()) if not down else int(rng.integers(0, W))
    row = int(rng.integers(0, H)) if not down else int(np.flatnonzero(mask.any(axis=1)).max())
    run = Run(col, max(row - 4, 0), 0, 1, 8) if not down else Run(max(col - 4, 0), row, 1, 0, 8)
    whole = reach([item], run, 0.5, tables)
    single = [reach([item], run.pixel(k), 0.5, tables).status for k in range(run.n)]
    if whole.status == "excluded":
        assert all(s == "excluded" for s in single)
    if any(s == "covered" for s in single):
        assert whole.status != "excluded"
    if whole.status == "covered":
        p = whole.placement
        fp = _canvas_mask(footprint(p.sprite, RenderParams(p.cx, p.cy, p.scale, p.angle, p.mirror), (H, W), 0.5))
        assert fp[whole.pixel[1], whole.pixel[0]] and _inside(ps, p.cx, p.cy)
        assert whole.pixel in [run.pixel(k) for k in range(run.n)]


# ---- tightness against shapely -------------------------------------------------------------------


def _block(h: int, w: int) -> Sprite:
    rgba = np.zeros((h, w, 4), np.uint8)
    rgba[...] = 255
    return Sprite.from_rgba(rgba, "block", 0, 0)


@pytest.mark.parametrize("angles,scales", [((-20.0, 35.0), (1.0, 1.4)), ((0.0, 360.0), (0.8, 0.8)),
                                           ((10.0, 10.0), (1.2, 1.2))])
def test_envelope_of_a_block_between_shapely_minkowski_sums(angles, scales):
    # A solid h x w block: bilinear alpha is f(x) g(y) with ramps of one pixel at the edges,
    # so alpha > 1/2 holds inside [0.3, w - 0.3] x [0.3, h - 0.3] (alpha >= 0.8^2) and only
    # inside [0, w] x [0, h]. The envelope over a rectangle of anchors P, an angle interval
    # and a scale interval then lies between the Minkowski sums P + K of the two rectangles
    # (convex: the hull of K's corners moved to P's corners), united over sampled poses
    # (inner) and grown by the sampling step's sweep (outer). Reference: shapely.
    h, w = 6, 10
    spr = _block(h, w)
    ax, ay = spr.anchor
    P = (20.0, 27.5, 30.0, 33.0)  # x0, x1, y0, y1
    pose = Pose((scales,), (angles,), (False,))
    item = Item(0, 0, PositionSet("rect", P, CENTRE), pose, (spr,))
    mask = item_mask(item, make_tables([item], [], 0.5), (0, 0, W, H))

    def hull(rect, th, s):
        # object coordinates (y down) -> canvas offsets: rotate counter-clockwise on screen
        k = affinity.translate(rect, -ax, -ay)
        k = affinity.scale(k, s, s, origin=(0, 0))
        k = affinity.rotate(k, -th, origin=(0, 0))  # y down: screen-ccw is a negative math angle
        corners = [(P[0], P[2]), (P[1], P[2]), (P[0], P[3]), (P[1], P[3])]
        return MultiPoint([(x + cx, y + cy) for cx, cy in corners for x, y in k.exterior.coords]).convex_hull

    n_th = 61
    ths = np.linspace(angles[0], angles[1], n_th) if angles[1] > angles[0] else [angles[0]]
    ss = np.linspace(scales[0], scales[1], 5) if scales[1] > scales[0] else [scales[0]]
    inner = unary_union([hull(shp_box(0.3, 0.3, w - 0.3, h - 0.3), th, s) for th in ths for s in ss])
    dth = math.radians((angles[1] - angles[0]) / max(len(ths) - 1, 1))
    ds = (scales[1] - scales[0]) / max(len(ss) - 1, 1)
    rmax = math.hypot(max(ax, w - ax), max(ay, h - ay))
    sweep = rmax * (scales[1] * dth + ds)  # how far a corner moves between sampled poses
    outer = unary_union([hull(shp_box(0, 0, w, h), th, s) for th in ths for s in ss]).buffer(sweep)
    yy, xx = np.mgrid[:H, :W] + 0.5
    in_inner = shapely.contains_xy(inner, xx, yy)
    # looseness allowed: one super-sampled cell (1/SUPER px) each way, the bins and margins
    # (measured at most 0.46 px on these cases)
    near_outer = shapely.contains_xy(outer.buffer(0.6), xx, yy)
    assert not np.any(in_inner & ~mask), "the mask misses pixels every reference agrees are covered"
    assert not np.any(mask & ~near_outer), "the mask reaches a pixel beyond the reference grown by 0.6 px"
    assert SUPER % 2 == 1


# ---- a budget for all tables together --------------------------------------------------------------


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large,
                                                                   HealthCheck.function_scoped_fixture])
@given(sprite_list=st.lists(sprites(), min_size=1, max_size=3), pose=poses(), ps=position_sets(),
       budget=st.sampled_from([300, 3000, 30000]), seed=st.integers(0, 2**32 - 1))
def test_tables_within_the_budget_hold_the_sharp_mask_and_every_footprint(monkeypatch, sprite_list, pose, ps, budget,
                                                                          seed):
    """Thousands of classes share MAX_TABLE_BINS (a spec of 4,655 classes took over 20 GB before):
    coarser tables, whose mask still holds every real footprint (what the proof rests on; it
    need not hold the sharper tables' mask, whose bins carry slack of their own)."""
    import augsplit.plan.envelope as env

    item = Item(0, 0, ps, pose, tuple(sprite_list))
    monkeypatch.setattr(env, "MAX_TABLE_BINS", budget, raising=False)
    tables = make_tables([item], [], 0.5)
    bins = sum((t.sat[0].shape[0] - 1) * t.nphi for t in tables.polar.values())
    assert bins <= budget
    coarse = item_mask(item, tables, (0, 0, W, H))
    for spr, cx, cy, s, a, m in _sample_placements(item, np.random.default_rng(seed), 60):
        fp = _canvas_mask(footprint(spr, RenderParams(cx, cy, s, a, m), (H, W), 0.5))
        assert not np.any(fp & ~coarse)


def test_a_table_of_the_smallest_budget_is_made():
    """The coarsening loop ends at any budget of at least 2 bins (Tables never asks for fewer)."""
    from augsplit.plan.envelope import polar_table

    tab = polar_table(Polyominoes(4, 4).sprite(0, 0), 0.5, 2.0, max_bins=2)
    assert (tab.sat[0].shape[0] - 1) * tab.nphi <= 2
