"""The albumentations transforms use the core's drawing, recolouring and footprint bound.

Each check compares the transform with the formula it used before it called the core (written
out here: class by cumulative per-class counts, exact region sampling, the renderer's HSV
arithmetic, the disc bound solved for the radius), and with the core itself (plan.draw,
render.recoloured, plan.guarantees.footprint_gaps): same draws, same pixels, same bound.
"""

from __future__ import annotations

import math

import albumentations as A
import cv2
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from augsplit.albu import HeldOutPlacement, RegionColour, RegionDraws, RegionPlacement, recolour
from augsplit.space.streams import PLUGIN
from augsplit.build import open_mapping
from augsplit.plan.draw import params_from_t
from augsplit.plan.guarantees import footprint_gaps, largest_shared_radius
from augsplit.render import RenderParams, recoloured
from augsplit.space.sample import sample_t


def spec(axes, train, test, cells=2, **extra):
    return {"seed": 11, "canvas": {"width": 64, "height": 64},
            "objects": {"kind": "polyomino", "cells": cells, "cell_px": 3}, "axes": axes,
            "splits": {"train": {"region": train, "count": 10}, "test": {"region": test, "count": 10}}, **extra}


SPECS = {
    # a region of several boxes around a held-out combination, colour and geometry tied
    "composition": spec({"x": {"range": [0, 64]}, "y": {"range": [0, 64]}, "scale": {"range": [0.5, 1.0]},
                         "angle": {"range": [0, 360]}, "hue": {"range": [0, 360]}, "mirror": {}},
                        {"minus": {"x": [0, 32], "hue": [0, 120]}}, {"x": [0, 32], "hue": [0, 120]}),
    # a region per class, polar positions, levels
    "by_class": spec({"eccentricity": {"range": [0, 30]}, "polar_angle": {"range": [0, 360]},
                      "scale": {"levels": [0.5, 0.75, 1.0]}},
                     {"by_class": {"P3-00": {"eccentricity": [0, 10]}, "*": {"eccentricity": [10, 20]}}},
                     {"eccentricity": [24, 30]}, cells=3),
}
DROPPED = ("index", "instance", "instance_seen")


@pytest.fixture(scope="module", params=list(SPECS))
def built(request):
    return open_mapping(SPECS[request.param])


def old_draws(built, split_name, u, c=None):
    """What RegionDraws.draw_many computed itself: the class from u[0] by the cumulative
    per-class counts (or c), the point by exact sampling of that class's region with u[1:]."""
    split = built.plan.split(split_name)
    counts = np.asarray(split.counts, dtype=float)
    present = np.flatnonzero(counts > 0)
    cls = np.searchsorted(np.cumsum(counts) / counts.sum(), u[:, 0], side="right") if c is None else np.full(len(u), c)
    cls = np.where(np.isin(cls, present), cls, present[-1])
    t = np.empty((len(u), built.plan.space.ndim))
    for k in np.unique(cls):
        rows = np.flatnonzero(cls == k)
        t[rows], _ = sample_t(split.class_region(int(k)), u[rows, 1:])
    cols = params_from_t(built.plan, t)
    cols.update(class_index=cls, cell=split.region.box_of_t(t))
    return cols


CORE = {"class_index", "cell", "cx_px", "cy_px", "scale", "angle", "mirror"}


def same(draw: dict, cols: dict, i: int) -> None:
    """draw holds row i of cols (NaN equal to NaN); a placement without colour has no colour keys."""
    assert CORE <= set(draw)
    for k, v in cols.items():
        if k not in draw and k in ("hue", "saturation", "brightness"):
            continue
        want = v[i].item() if isinstance(v[i], np.generic) else v[i]
        assert draw[k] == want or (want != want and draw[k] != draw[k]), k


@settings(max_examples=20, deadline=None)
@given(seed=st.integers(0, 2**32 - 1))
def test_draws_are_the_old_formula_and_the_planners(seed):
    for name, b in ((n, open_mapping(s)) for n, s in SPECS.items()):
        d = RegionDraws(b, "train")
        u = np.random.default_rng(seed).random((50, d.k))
        got = d.draw_many(u)
        want = old_draws(b, "train", u)
        for i, g in enumerate(got):
            same(g, want, i)
            assert not set(DROPPED) & set(g)
        for c in d.present:  # a given class (class_key)
            want_c = old_draws(b, "train", u[:5], c)
            for i, g in enumerate(d.draw_many(u[:5], c)):
                same(g, want_c, i)
                assert g["class_index"] == c


def test_item_streams_give_the_old_draws(built):
    # an item's draw is its own stream's first k uniforms through the old formula
    t = HeldOutPlacement(built, "test", content_size=(8, 8), item_key="item", check_footprint=False)
    photo = np.zeros((8, 8, 3), np.uint8)
    for epoch in (0, 3):
        t.set_epoch(epoch)
        for item in (0, 1, 17):
            t(image=photo, item=item)
            ss = np.random.SeedSequence(11, spawn_key=(PLUGIN, built.plan.split("test").index, epoch, item))
            u = np.random.Generator(np.random.PCG64(ss)).random((1, built.plan.space.ndim + 2))
            same(t.params["placement"], old_draws(built, "test", u), 0)


def test_transform_batches_give_the_old_draws():
    b = open_mapping(SPECS["composition"])
    t = RegionPlacement(b, "train", content_size=(8, 8))
    t.set_random_state(np.random.default_rng(5), __import__("random").Random(5))
    u = np.random.default_rng(5).random((64, RegionDraws(b, "train").k))
    want = old_draws(b, "train", u)
    for i in range(10):
        t(image=np.zeros((8, 8, 3), np.uint8))
        same(t.params["placement"], want, i)


def old_recolour(image, hue, saturation, brightness):
    """The transform's own HSV arithmetic before it called the renderer's."""
    is_u8 = image.dtype == np.uint8
    f = image.astype(np.float32) * np.float32(1 / 255) if is_u8 else image.astype(np.float32)
    if f.ndim == 2 or f.shape[2] == 1:
        out = np.minimum(f * np.float32(brightness), np.float32(1.0))
    else:
        h, s, v = cv2.split(cv2.cvtColor(np.ascontiguousarray(f[..., :3]), cv2.COLOR_RGB2HSV))
        h = h + np.float32(hue % 360.0)
        s = np.minimum(s * np.float32(saturation), np.float32(1.0))
        v = np.minimum(v * np.float32(brightness), np.float32(1.0))
        rgb = cv2.cvtColor(cv2.merge((h, s, v)), cv2.COLOR_HSV2RGB)
        out = np.concatenate([rgb, f[..., 3:]], axis=2) if f.shape[2] > 3 else rgb
    if is_u8:
        return (out * np.float32(255) + np.float32(0.5)).astype(np.uint8)
    return out.astype(image.dtype, copy=False)


@settings(max_examples=40, deadline=None)
@given(hue=st.floats(-720, 720), sat=st.floats(0, 2), bright=st.floats(0, 2), channels=st.sampled_from([1, 3, 4, 5]),
       seed=st.integers(0, 1000))
def test_recolour_is_the_old_arithmetic(hue, sat, bright, channels, seed):
    img = np.random.default_rng(seed).integers(0, 256, (5, 7, channels), dtype=np.uint8)
    assert np.array_equal(recolour(img, hue, sat, bright), old_recolour(img, hue, sat, bright))
    f = img.astype(np.float32) / 255
    np.testing.assert_array_equal(recolour(f, hue, sat, bright), old_recolour(f, hue, sat, bright))
    grey = img[..., 0]
    assert np.array_equal(recolour(grey, hue, sat, bright), old_recolour(grey, hue, sat, bright))


def test_recolour_is_the_renderers(built):
    # the renderer's recoloured patch (premultiplied) is the transform's recolour of the
    # sprite's straight colour, times the same premultiply weights, to the bit
    sprite = built.source.sprite(0, 0)
    for hue, sat, bright in ((37.5, 0.6, 1.3), (300.0, 1.0, 0.5), (0.0, 1.4, 1.0)):
        p = RenderParams(10.0, 10.0, hue=hue, saturation=sat, brightness=bright)
        mine = recolour(sprite.rgb, hue, sat, bright) * sprite.premultiply_weights[..., :3]
        assert np.array_equal(recoloured(sprite, p, grey=False)[..., :3], mine)


LANES = spec({"x": {"range": [8, 56]}, "y": {"range": [6, 58]}, "scale": {"range": [0.8, 1.0]},
              "angle": {"range": [0, 360]}},
             {"y": [6, 20]}, {"y": [44, 58]}, guarantees=[{"disjoint": "footprint", "between": ["train", "test"]}])


def test_footprint_bound_is_the_planners():
    b = open_mapping(LANES)
    plan = b.plan
    a, c = plan.split("train").region, plan.split("test").region
    t = RegionPlacement(b, "train", content_size=(12, 12))
    # the old formula: footprint_gaps at the content's radius r0, then (gap - slack) / (scales)
    r0 = math.hypot(6.5, 6.5)
    n = len(plan.classes)
    old = math.inf
    for g in footprint_gaps(plan.space, plan.canvas, a, c, np.full(n, r0), np.full(n, r0), False):
        scales = (g.need_px - 0.25) / r0  # 0.25 px: plan.geometry.WARP_SLACK_PX
        old = min(old, (g.gap_px - 0.25) / scales)
    assert t.max_radius == pytest.approx(old, rel=1e-12)
    # and it is the planner's own bound: just below it every pair of boxes is proved apart,
    # just above it one is not
    r, gap = largest_shared_radius(plan.space, plan.canvas, a, c, False)
    assert t.max_radius == r and gap is not None
    for radius, proved in ((r * (1 - 1e-9), True), (r * (1 + 1e-9), False)):
        gaps = footprint_gaps(plan.space, plan.canvas, a, c, np.full(n, radius), np.full(n, radius), False)
        assert all(g.slack_px > 0 for g in gaps) is proved
    # no footprint guarantee, no bound
    free = open_mapping({**LANES, "guarantees": []})
    assert RegionColour(free, "train") is not None
    assert RegionPlacement(free, "train", content_size=(12, 12)).max_radius == math.inf


def test_the_placed_content_keeps_the_planners_bound():
    # content right under the bound, placed on both sides at the corners of their regions,
    # never shares a canvas pixel (the footprint guarantee, on warped pixels)
    b = open_mapping(LANES)
    side = int(2 * RegionPlacement(b, "train", content_size=(4, 4)).max_radius / math.sqrt(2)) - 1
    tr = A.Compose([RegionPlacement(b, "train", content_size=(side, side))], seed=1)
    te = A.Compose([HeldOutPlacement(b, "test", content_size=(side, side))], seed=2)
    ones = np.full((side, side), 255, np.uint8)
    cover = [np.zeros((64, 64), bool), np.zeros((64, 64), bool)]
    for _ in range(200):
        cover[0] |= tr(image=ones)["image"] > 0
        cover[1] |= te(image=ones)["image"] > 0
    assert cover[0].any() and cover[1].any() and not (cover[0] & cover[1]).any()
