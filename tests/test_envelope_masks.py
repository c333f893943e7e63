"""The envelope masks of stage 2 equal the construction they replace.

The planner's masks were built as a binary dilation computed by FFT convolution on the
super-sampled grid (scipy.signal.fftconvolve, thresholded at 1/2: an exact count of the
(position cell, offset cell) pairs that sum to each pixel's centre cell). The package now
builds them from row runs without touching the super-sampled grid. `_reference_mask` below
is the earlier construction, kept here (not in the package) as the reference: both must give
the same mask, pixel for pixel, for random items and for the items of several real specs.
The offset cells are rebuilt here in one piece as well (the package does them in row blocks).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scipy.signal import fftconvolve

from augsplit.build import open_mapping
from augsplit.plan.envelope import (SUPER, TWO_PI, Item, Pose, _window, item_mask, item_patch, make_tables, offset_cells,
                                    position_runs, region_items, row_runs, square_polar)
from augsplit.plan.geometry import PositionSet
from augsplit.sources import Polyominoes

from test_envelope import CENTRE, H, W, poses, position_sets, sprites


# ---- the earlier construction (reference) ---------------------------------------------------------


def _reference_offsets(tables, pose, h):
    smax = pose.max_scale
    reach = max(t.rho_max for t in tables) * smax
    n = int(math.ceil(reach / h)) + 1
    k = np.arange(-n, n + 1) * h
    cx, cy = np.meshgrid(k, k)
    half = h / 2
    dmin, dmax, plo, width = square_polar(cx - half, cy - half, cx + half, cy + half)
    mask = np.zeros(cx.shape, dtype=bool)
    for tab in tables:
        for m in pose.mirrors:
            for sa, sb in pose.scales:
                for a0, a1 in pose.angles:
                    th0, th1 = math.radians(a0), math.radians(a1)
                    todo = ~mask
                    mask[todo] |= tab.may_meet(m, dmin[todo] / sb, dmax[todo] / sa, plo[todo] - th1,
                                               width[todo] + (th1 - th0))
    return n, mask


def _reference_position_cells(ps, h, ax_range, ay_range):
    if ps.kind == "rect":
        x0, x1, y0, y1 = ps.bounds
        a0 = max(int(math.ceil(x0 / h - 1 - 1e-9)), ax_range[0])
        a1 = min(int(math.floor(x1 / h + 1e-9)), ax_range[1])
        b0 = max(int(math.ceil(y0 / h - 1 - 1e-9)), ay_range[0])
        b1 = min(int(math.floor(y1 / h + 1e-9)), ay_range[1])
        if a1 < a0 or b1 < b0:
            return None
        return a0, b0, np.ones((b1 - b0 + 1, a1 - a0 + 1), dtype=bool)
    r0, r1, p0, p1 = ps.bounds
    ccx, ccy = ps.centre
    a0 = max(int(math.floor((ccx - r1) / h)) - 1, ax_range[0])
    a1 = min(int(math.ceil((ccx + r1) / h)) + 1, ax_range[1])
    b0 = max(int(math.floor((ccy - r1) / h)) - 1, ay_range[0])
    b1 = min(int(math.ceil((ccy + r1) / h)) + 1, ay_range[1])
    if a1 < a0 or b1 < b0:
        return None
    gx, gy = np.meshgrid(np.arange(a0, a1 + 1) * h - ccx, np.arange(b0, b1 + 1) * h - ccy)
    dmin, dmax, plo, width = square_polar(gx, gy, gx + h, gy + h)
    radial = (dmax >= r0 - 1e-9) & (dmin <= r1 + 1e-9)
    s0, span = math.radians(p0), math.radians(p1 - p0)
    angular = ((width >= TWO_PI) | (span >= TWO_PI - 1e-12)
               | (np.mod(plo - s0, TWO_PI) <= span + 1e-9) | (np.mod(s0 - plo, TWO_PI) <= width + 1e-9))
    mask = radial & angular
    if not mask.any():
        return None
    return a0, b0, mask


def _reference_mask(item, tables, window, f=SUPER):
    c0, r0, c1, r1 = window
    out = np.zeros((max(r1 - r0, 0), max(c1 - c0, 0)), dtype=bool)
    if out.size == 0:
        return out
    h = 1.0 / f
    n, k = _reference_offsets([tables.polar[s] for s in item.sprites], item.pose, h)
    mx = f * np.arange(c0, c1) + (f - 1) // 2
    my = f * np.arange(r0, r1) + (f - 1) // 2
    pc = _reference_position_cells(item.position, h, (int(mx[0]) - n, int(mx[-1]) + n), (int(my[0]) - n, int(my[-1]) + n))
    if pc is None:
        return out
    a0, b0, pm = pc
    conv = fftconvolve(pm.astype(np.float64), k.astype(np.float64), mode="full")
    jx = mx - a0 + n
    jy = my - b0 + n
    okx = (jx >= 0) & (jx < conv.shape[1])
    oky = (jy >= 0) & (jy < conv.shape[0])
    out[np.ix_(np.flatnonzero(oky), np.flatnonzero(okx))] = conv[np.ix_(jy[oky], jx[okx])] > 0.5
    return out


# ---- the same masks --------------------------------------------------------------------------------


@st.composite
def windows(draw):
    c0, r0 = draw(st.integers(0, W - 1)), draw(st.integers(0, H - 1))
    return c0, r0, draw(st.integers(c0, W)), draw(st.integers(r0, H))


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])
@given(sprite_list=st.lists(sprites(), min_size=1, max_size=2), pose=poses(), ps=position_sets(),
       t=st.sampled_from([0.3, 0.5, 0.7]), window=st.one_of(st.just((0, 0, W, H)), windows()),
       f=st.sampled_from([1, 3, SUPER]))
def test_item_mask_equals_the_fft_construction(sprite_list, pose, ps, t, window, f):
    item = Item(0, 0, ps, pose, tuple(sprite_list))
    tables = make_tables([item], [], t)
    got = item_mask(item, tables, window, f)
    want = _reference_mask(item, tables, window, f)
    assert got.shape == want.shape
    assert np.array_equal(got, want)
    # the patch holds every pixel of the mask (nothing is lost by keeping the patch only)
    patch = item_patch(item, tables, window, f)
    if want.any():
        assert patch is not None and int(patch[2].sum()) == int(want.sum())


SPECS = {
    # train in the middle of x, test on both sides, a domino that turns a little
    "translation": {"objects": {"kind": "polyomino", "cells": 2, "cell_px": 4},
                    "axes": {"x": {"range": [0, 96]}, "y": {"range": [0, 96]}, "angle": {"range": [-10, 10]},
                             "scale": {"range": [0.9, 1.1], "dist": "log"}},
                    "splits": {"train": {"region": {"x": [30, 66]}, "per_class": 2},
                               "test": {"region": {"x": [[0, 24], [72, 96]]}, "per_class": 2}}},
    # pentominoes turning freely, mirrored, on a 3 x 3 checkerboard
    "cells": {"objects": {"kind": "polyomino", "cells": 5, "cell_px": 3},
              "axes": {"x": {"range": [0, 96]}, "y": {"range": [0, 96]}, "angle": {"range": [0, 360]},
                       "mirror": {"levels": [0, 1]}},
              "splits": {"train": {"region": {"cells": {"grid": {"x": 3, "y": 3}, "pick": "checkerboard"}}, "per_class": 1},
                         "test": {"region": {"cells": {"grid": {"x": 3, "y": 3}, "pick": "checkerboard_odd"}},
                                  "per_class": 1}}},
    # polar sectors, scale levels
    "sectors": {"objects": {"kind": "polyomino", "cells": 3, "cell_px": 4},
                "axes": {"eccentricity": {"range": [4, 40]}, "polar_angle": {"range": [0, 360]},
                         "scale": {"levels": [0.8, 1.25]}, "angle": {"range": [-30, 30]}},
                "splits": {"train": {"region": {"polar_angle": [10, 170]}, "per_class": 2},
                           "test": {"region": {"polar_angle": [190, 350]}, "per_class": 2}}},
    # glyphs, several instances per class
    "glyphs": {"objects": {"kind": "glyphs", "texts": ["A", "T"], "height_px": 12},
               "axes": {"x": {"range": [0, 96]}, "y": {"range": [20, 76]}, "angle": {"range": [-20, 20]}},
               "splits": {"train": {"region": {"y": [20, 44]}, "per_class": 2},
                          "test": {"region": {"y": [52, 76]}, "per_class": 2}}},
}


@pytest.mark.parametrize("name", sorted(SPECS))
def test_masks_of_real_specs_equal_the_fft_construction(name):
    spec = {"seed": 2, "canvas": {"width": 96, "height": 96, "mode": "gray"}, **SPECS[name]}
    built = open_mapping(spec, strict=False)
    plan, source = built.plan, built.source
    sprites_of = {c: [source.sprite(c, i) for i in range(source.n_instances(c))] for c in range(len(plan.classes))}
    items_a = region_items(plan.space, plan.canvas, plan.split("train").region, sprites_of)
    items_b = region_items(plan.space, plan.canvas, plan.split("test").region, sprites_of)
    tables = make_tables(items_a, items_b, 0.5)
    compared = 0
    for window in [_window(items_a, items_b, tables, plan.canvas), (0, 0, 96, 96)]:
        for it in items_a + items_b:
            got = item_mask(it, tables, window)
            assert np.array_equal(got, _reference_mask(it, tables, window)), f"{name}: item {it.box}/{it.cls} differs"
            compared += int(got.any())
    assert compared > 0  # some mask was not empty


# ---- the pieces -----------------------------------------------------------------------------------


@settings(max_examples=60, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), h=st.integers(1, 12), w=st.integers(1, 12), p=st.floats(0, 1))
def test_row_runs_rebuild_the_mask(seed, h, w, p):
    # brute force: painting the runs back gives the mask, and runs are maximal
    m = np.random.default_rng(seed).random((h, w)) < p
    rows, first, last = row_runs(m, 3, 5)
    back = np.zeros_like(m)
    for r, a, b in zip(rows, first, last):
        assert a <= b
        back[r - 3, a - 5:b - 5 + 1] = True
        assert a - 5 == 0 or not m[r - 3, a - 6]
        assert b - 5 == w - 1 or not m[r - 3, b - 4]
    assert np.array_equal(back, m)
    assert len(rows) == int(np.count_nonzero(np.diff(np.pad(m, ((0, 0), (1, 0))).astype(np.int8), axis=1) == 1))


@settings(max_examples=40, deadline=None)
@given(ps=position_sets(), block=st.integers(1, 40))
def test_position_runs_are_the_position_cells(ps, block):
    h = 1.0 / SUPER
    rng = (-10, 70 * SUPER)
    ref = _reference_position_cells(ps, h, rng, rng)
    runs = position_runs(ps, h, rng, rng, block=block)
    if ref is None:
        assert runs is None
        return
    a0, b0, pm = ref
    assert runs is not None
    want = row_runs(pm, b0, a0)
    for g, w_ in zip(runs, want):
        assert np.array_equal(g, w_)


def test_offset_cells_in_blocks_equal_one_piece():
    sp = Polyominoes(4, 3).sprite(1, 0)
    item = Item(0, 0, PositionSet("rect", (10, 20, 10, 20), CENTRE), Pose(((0.8, 1.3),), ((-40.0, 25.0),), (False, True)), (sp,))
    tables = make_tables([item], [], 0.5)
    tabs = [tables.polar[sp]]
    n, ref = _reference_offsets(tabs, item.pose, 1.0 / SUPER)
    for block in (1, 7, 256):
        m, got = offset_cells(tabs, item.pose, 1.0 / SUPER, block=block)
        assert m == n and np.array_equal(got, ref)


def test_a_512_px_footprint_proof_allocates_no_super_sampled_window():
    # Tetrominoes 32 px across, turning freely; train a band in the middle of x, test both
    # sides, 36 px apart: the disc bound refuses and the envelopes prove it. The earlier construction convolved the whole
    # super-sampled window (25 values per pixel, in complex double precision) and peaked at
    # about 200 MiB of numpy memory here; the masks now never hold more than a pixel window.
    # Measured with tracemalloc (numpy reports its allocations to it; Python docs).
    import tracemalloc

    spec = {"seed": 5, "canvas": {"width": 512, "height": 512, "mode": "gray"},
            "objects": {"kind": "polyomino", "cells": 4, "cell_px": 8},
            "axes": {"x": {"range": [0, 512]}, "y": {"range": [0, 512]}, "angle": {"range": [0, 360]},
                     "scale": {"range": [0.9, 1.1], "dist": "log"}},
            "splits": {"train": {"region": {"x": [154, 358]}, "per_class": 4},
                       "test": {"region": {"x": [[0, 118], [394, 512]]}, "per_class": 2}},
            "guarantees": [{"disjoint": "footprint", "between": ["train", "test"]}]}
    tracemalloc.start()
    try:
        (v,) = open_mapping(spec, strict=False).plan.verdicts
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert v.status == "proved" and v.numbers["stage"] == "envelope"
    assert peak < 96 * 2**20, f"peak {peak / 2**20:.0f} MiB"
