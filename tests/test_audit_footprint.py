"""Footprint overlap against brute-force mask intersection and shapely polygon geometry."""

import cv2
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from shapely.geometry import Polygon

from augsplit.audit.footprint import box_counts, box_sums, check_footprint, summed_area

HW = (48, 56)


def _poly(rng, cx, cy, r):
    """A random star-shaped polygon (3-6 vertices round a centre it contains), pixel units."""
    k = int(rng.integers(3, 7))
    ang = np.linspace(0, 2 * np.pi, k, endpoint=False) + rng.uniform(0, 0.3 * 2 * np.pi / k, k) + rng.uniform(0, 2 * np.pi)
    rad = rng.uniform(0.7 * r, r, k)
    return np.column_stack([cx + rad * np.cos(ang), cy + rad * np.sin(ang)])


def _raster(pts):
    """fillPoly mask on the canvas (vertices at 1/16 px), its bbox and the crop at that bbox."""
    m = np.zeros(HW, np.uint8)
    cv2.fillPoly(m, [np.round(pts * 16).astype(np.int32)], 1, shift=4)
    m = m.astype(bool)
    ys, xs = np.nonzero(m)
    if len(xs) == 0:
        return m, (0, 0, 0, 0), np.zeros((0, 0), bool)
    b = (xs.min(), ys.min(), xs.max() + 1, ys.max() + 1)
    return m, b, m[b[1]:b[3], b[0]:b[2]]


def _scene(seed, n_train, n_test, n_cls):
    rng = np.random.default_rng(seed)
    polys = [_poly(rng, rng.uniform(0, HW[1]), rng.uniform(0, HW[0]), rng.uniform(2, 9)) for _ in range(n_train + n_test)]
    rasters = [_raster(p) for p in polys]
    cls = rng.integers(0, n_cls, n_train + n_test)
    return polys, rasters, cls


@settings(max_examples=40, deadline=None)
@given(st.integers(0, 2**32 - 1), st.integers(1, 25), st.integers(1, 25), st.integers(1, 3), st.booleans())
def test_shared_pixels_equal_brute_force_mask_intersection(seed, n_train, n_test, n_cls, masks):
    polys, rasters, cls = _scene(seed, n_train, n_test, n_cls)
    boxes = np.array([r[1] for r in rasters])
    crops = [r[2] for r in rasters]
    res = check_footprint(boxes[:n_train], boxes[n_train:], HW, cls[:n_train], cls[n_train:],
                          mask_loader=(lambda i: crops[i]) if masks else None,
                          train_rows=np.arange(n_train), test_rows=np.arange(n_train, n_train + n_test), worst_k=1000)
    # Reference: brute force, union of same-class train footprints AND each test footprint.
    full = [r[0] for r in rasters] if masks else [_box_mask(b) for b in boxes]
    expect = np.zeros(n_test, int)
    for j in range(n_test):
        union = np.zeros(HW, bool)
        for i in range(n_train):
            if cls[i] == cls[n_train + j]:
                union |= full[i]
        expect[j] = int((union & full[n_train + j]).sum())
    got = np.zeros(n_test, int)
    got[res.worst["test_row"].to_numpy(int)] = res.worst["shared_px"].to_numpy(int)
    assert np.array_equal(got, expect)
    assert res.numbers["n_overlapping"] == int((expect > 0).sum())


def _box_mask(b):
    m = np.zeros(HW, bool); m[b[1]:b[3], b[0]:b[2]] = True
    return m


@pytest.mark.parametrize("seed", range(6))
def test_agrees_with_shapely_for_well_separated_and_clearly_overlapping_polygons(seed):
    # Reference: shapely polygon geometry. Pairs more than 2 px apart must share no pixel;
    # pairs whose intersection still holds a disk of radius 1.5 px must share some.
    rng = np.random.default_rng(100 + seed)
    checked = {"apart": 0, "overlap": 0}
    for k in range(60):
        ca_x, ca_y = rng.uniform(8, 48), rng.uniform(8, 40)
        pa = _poly(rng, ca_x, ca_y, rng.uniform(3, 8))
        if k % 2:  # every other pair close together, so that both cases occur
            pb = _poly(rng, ca_x + rng.uniform(-4, 4), ca_y + rng.uniform(-4, 4), rng.uniform(3, 8))
        else:
            pb = _poly(rng, rng.uniform(8, 48), rng.uniform(8, 40), rng.uniform(3, 8))
        A, B = Polygon(pa), Polygon(pb)
        if not (A.is_valid and B.is_valid):
            continue
        (_, ba, ca), (_, bb, cb) = _raster(pa), _raster(pb)
        if ca.size == 0 or cb.size == 0:
            continue
        crops = [ca, cb]
        res = check_footprint(np.array([ba]), np.array([bb]), HW, mask_loader=lambda i: crops[i],
                              train_rows=[0], test_rows=[1])
        if A.distance(B) > 2.0:
            assert res.numbers["n_overlapping"] == 0
            checked["apart"] += 1
        elif not A.intersection(B).buffer(-1.5).is_empty:
            assert res.numbers["n_overlapping"] == 1
            checked["overlap"] += 1
    assert checked["apart"] > 5 and checked["overlap"] > 3


def test_summed_area_and_box_counts_against_loops():
    # Reference: direct numpy sums and a painting loop (common practice, no source).
    rng = np.random.default_rng(4)
    m = rng.random((13, 17)) > 0.6
    sat = summed_area(m)
    boxes = np.array([[0, 0, 17, 13], [3, 2, 9, 11], [5, 5, 5, 9], [16, 12, 17, 13]])
    assert list(box_sums(sat, boxes)) == [int(m[b[1]:b[3], b[0]:b[2]].sum()) for b in boxes]
    bx = rng.integers(-5, 20, size=(40, 4)); bx[:, 2:] = bx[:, :2] + rng.integers(0, 10, size=(40, 2))
    paint = np.zeros((13, 17), int)
    for x0, y0, x1, y1 in bx:
        paint[max(y0, 0):max(min(y1, 13), 0), max(x0, 0):max(min(x1, 17), 0)] += 1
    assert np.array_equal(box_counts(bx, (13, 17))[0], paint)


def test_claim_turns_overlap_into_failure():
    tr = np.array([[0, 0, 10, 10]]); te = np.array([[9, 9, 20, 20], [30, 30, 40, 40]])
    claimed = check_footprint(tr, te, (48, 48), claim=True)
    assert claimed.verdict == "fail" and claimed.numbers["shared_px_total"] == 1
    assert claimed.worst.iloc[0]["test_row"] == 0 and claimed.worst.iloc[0]["train_row"] == 0
    assert check_footprint(tr, te, (48, 48)).verdict == "warn"
    assert check_footprint(tr, te[1:], (48, 48), claim=True).verdict == "pass"
    # same pixels but another class: no leak (the no-overlap claim is per class)
    assert check_footprint(tr, te, (48, 48), ["a"], ["b", "b"], claim=True).verdict == "pass"


# ---- masks in batches: the RowCache's array path against asking row by row ------------------------

def _cache_with(masks, unmade=(), chunks=1):
    """A RowCache holding these masks (None: a row whose footprint could not be made), as the
    chunk tasks would have placed them, `chunks` chunk results of consecutive rows (the cache
    then holds that many bit arrays until it joins them)."""
    from augsplit.audit.parallel import ChunkResult, RowCache

    n = len(masks)
    cache = RowCache(None, [], n)
    for rows in np.array_split(np.arange(n), chunks):
        shapes = np.array([masks[r].shape if masks[r] is not None else (-1, -1) for r in rows], np.int32).reshape(-1, 2)
        bits = [np.packbits(masks[r], axis=None) for r in rows if masks[r] is not None]
        k = len(rows)
        cache._place(rows, ChunkResult(np.zeros(k, np.uint64), [None] * k, np.zeros((k, 63), np.float16), {}, shapes,
                                       np.concatenate(bits) if bits else np.zeros(0, np.uint8),
                                       {int(np.flatnonzero(rows == u)[0]): "could not be made" for u in unmade if u in rows}))
    return cache


def _random_masks(rng, n, hw):
    """n random masks with boxes anywhere around (and partly off) an H x W canvas; some rows unmade."""
    masks, boxes = [], []
    for _ in range(n):
        h, w = (int(v) for v in rng.integers(1, 14, 2)) if rng.random() < 0.9 else (0, 0)  # (0, 0): nothing visible
        x0, y0 = int(rng.integers(-8, hw[1] + 2)), int(rng.integers(-8, hw[0] + 2))
        masks.append(rng.random((h, w)) < rng.uniform(0.1, 0.9))
        boxes.append((x0, y0, x0 + w, y0 + h))
    unmade = [k for k in range(n) if rng.random() < 0.1]
    for k in unmade:
        masks[k] = None
    return masks, np.array(boxes, np.int64).reshape(n, 4), unmade


def _pixel_set(has, owner, lin):
    return has.tolist(), sorted(zip(owner.tolist(), lin.tolist()))


@settings(max_examples=60, deadline=None)
@given(st.integers(0, 2**32 - 1), st.integers(1, 40))
def test_row_cache_pixels_equal_its_masks_cut_row_by_row(seed, n):
    from augsplit.audit.footprint import row_pixels

    rng = np.random.default_rng(seed)
    masks, boxes, unmade = _random_masks(rng, n, HW)
    cache = _cache_with(masks, unmade, chunks=int(rng.integers(1, 4)))
    rows = rng.integers(0, n, int(rng.integers(1, 2 * n + 1)))  # in any order, some twice
    made = np.array([masks[r] is not None for r in rows])
    got = cache.pixels(rows, boxes[rows], HW)
    assert got[0].tolist() == made.tolist()
    ok = np.flatnonzero(made)  # the rows mask() answers: asked one by one, they give the same pixels
    ref = row_pixels(cache, rows[ok], boxes[rows[ok]], HW)
    keep = np.isin(got[1], ok)
    assert sorted(zip(ok[ref[1]].tolist(), ref[2].tolist())) == sorted(zip(got[1][keep].tolist(), got[2][keep].tolist()))
    assert keep.all()
    # every pixel given lies on the canvas
    assert ((got[2] >= 0) & (got[2] < HW[0] * HW[1])).all()


@settings(max_examples=40, deadline=None)
@given(st.integers(0, 2**32 - 1), st.integers(2, 40))
def test_guarded_batches_equal_the_guard_row_by_row_and_record_the_same_rows(seed, n):
    """A box recorded with the wrong size, or a footprint not made, counts as the box and is
    recorded, whether the guard asks the cache row by row or in one batch."""
    import pandas as pd

    from augsplit.audit.checks import _GuardedMasks
    from augsplit.audit.footprint import mask_pixels

    rng = np.random.default_rng(seed)
    masks, boxes, unmade = _random_masks(rng, n, HW)
    wrong = [k for k in range(n) if rng.random() < 0.15]
    boxes[wrong, 2] += 1  # the table's box one pixel wider than the mask
    cache = _cache_with(masks, unmade)
    df = pd.DataFrame({"split": ["train"] * n})
    ids = np.array([f"i{k}" for k in range(n)])
    batch = _GuardedMasks(cache, boxes.astype(float), df, ids)
    one_by_one = _GuardedMasks(lambda r: cache.mask(r), boxes.astype(float), df, ids)
    rows = np.arange(n)
    got = [_pixel_set(*b[1:]) for b in mask_pixels(batch, rows, boxes, HW, batch=7)]
    ref = [_pixel_set(*b[1:]) for b in mask_pixels(one_by_one, rows, boxes, HW, batch=7)]
    assert got == ref
    assert batch.bad == one_by_one.bad
    assert set(batch.bad) == set(unmade) | set(wrong)


@settings(max_examples=30, deadline=None)
@given(st.integers(0, 2**32 - 1), st.integers(1, 30), st.integers(1, 30), st.integers(1, 3))
def test_footprint_check_gives_the_same_result_from_batches_and_row_by_row(seed, n_train, n_test, n_cls):
    import pandas as pd

    from augsplit.audit.checks import _GuardedMasks

    rng = np.random.default_rng(seed)
    n = n_train + n_test
    masks, boxes, unmade = _random_masks(rng, n, HW)
    table_boxes = boxes.copy()
    wrong = [k for k in range(n) if rng.random() < 0.1]
    table_boxes[wrong, 3] += 1  # recorded one pixel taller than the mask
    cache = _cache_with(masks, unmade, chunks=2)
    df, ids = pd.DataFrame({"split": ["s"] * n}), np.arange(n).astype(str)
    cls = rng.integers(0, n_cls, n)
    args = (table_boxes[:n_train], table_boxes[n_train:], HW, cls[:n_train], cls[n_train:])
    kw = dict(train_rows=np.arange(n_train), test_rows=np.arange(n_train, n), worst_k=1000)
    a = check_footprint(*args, mask_loader=_GuardedMasks(cache, table_boxes.astype(float), df, ids), **kw)
    b = check_footprint(*args, mask_loader=_GuardedMasks(lambda r: cache.mask(r), table_boxes.astype(float), df, ids),
                        **kw)
    assert a.numbers == b.numbers
    for k in a.arrays:
        assert np.array_equal(a.arrays[k], b.arrays[k])
    assert a.worst.equals(b.worst)


def test_a_mask_whose_box_lies_off_the_canvas_has_no_pixel_on_it():
    from augsplit.audit.footprint import _mask_crop

    m = np.ones((4, 5), bool)
    for box in [(57, 3, 62, 7), (3, 50, 8, 54), (-9, 3, -4, 7), (3, -6, 8, -2)]:  # right, below, left, above
        assert _mask_crop(lambda r: m, 0, np.array(box), HW).size == 0
    assert _mask_crop(lambda r: m, 0, np.array((54, 46, 59, 50)), HW).shape == (2, 2)  # a corner on it


@settings(max_examples=40, deadline=None)
@given(st.integers(0, 2**32 - 1), st.integers(1, 60), st.integers(1, 400), st.integers(1, 9))
def test_mask_batches_are_bounded_in_pixels_and_rows_and_cover_every_row_once(seed, n, batch_px, batch):
    from augsplit.audit.footprint import mask_pixels

    rng = np.random.default_rng(seed)
    _, boxes, _ = _random_masks(rng, n, HW)
    seen = []

    class Loader:
        def pixels(self, rows, frame, hw):
            area = int(((frame[:, 2] - frame[:, 0]) * (frame[:, 3] - frame[:, 1])).sum())
            assert len(rows) <= batch and (area <= batch_px or len(rows) == 1)
            seen.extend(rows.tolist())
            return np.ones(len(rows), bool), np.zeros(0, np.int64), np.zeros(0, np.int64)

    starts = [lo for lo, *_ in mask_pixels(Loader(), np.arange(n), boxes, HW, batch=batch, batch_px=batch_px)]
    assert seen == list(range(n)) and starts[0] == 0
