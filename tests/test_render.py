"""The renderer: geometry against OpenCV, colour against colorsys, compositing against
Porter & Duff, footprints, and lossless PNG round trips."""

from __future__ import annotations

import colorsys
import math

import cv2
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from augsplit.plan.geometry import WARP_SLACK_PX, support_radius

from augsplit.render import (Placed, RenderParams, add_footprint, footprint, masks_overlap, place, recolour_hsv, render,
                             similarity_matrix)
from augsplit.sources import Polyominoes, Sprite

finite = dict(allow_nan=False, allow_infinity=False)


def solid_sprite(h, w, rgb=(255, 255, 255), alpha=255) -> Sprite:
    rgba = np.empty((h, w, 4), np.uint8)
    rgba[..., :3] = rgb
    rgba[..., 3] = alpha
    return Sprite.from_rgba(rgba, "s", 0, 0)


def soft_disc(radius=7.0, rgb=(255, 255, 255)) -> Sprite:
    """A disc with an antialiased rim; transparent pixels have colour 0 (the hard case for
    interpolating straight alpha)."""
    n = int(2 * radius + 4)
    yy, xx = np.mgrid[:n, :n] + 0.5
    a = np.clip(radius + 0.5 - np.hypot(xx - n / 2, yy - n / 2), 0, 1)
    rgba = np.zeros((n, n, 4), np.uint8)
    rgba[..., 3] = np.rint(a * 255)
    rgba[a > 0, :3] = rgb
    return Sprite.from_rgba(rgba, "disc", 0, 0)


# --- geometry -------------------------------------------------------------------------------

@settings(max_examples=200, deadline=None)
@given(ax=st.floats(-50, 50, **finite), ay=st.floats(-50, 50, **finite), angle=st.floats(-720, 720, **finite),
       scale=st.floats(0.05, 20, **finite), cx=st.floats(-100, 200, **finite), cy=st.floats(-100, 200, **finite))
def test_similarity_matrix_is_cv2_rotation_matrix_plus_translation(ax, ay, angle, scale, cx, cy):
    m = similarity_matrix((ax, ay), RenderParams(cx, cy, scale, angle))
    ref = cv2.getRotationMatrix2D((ax, ay), angle, scale)  # OpenCV reference
    ref[:, 2] += (cx - ax, cy - ay)
    # OpenCV takes the centre as a float32 point (cv::Point2f), so agreement is to float32 precision
    np.testing.assert_allclose(m, ref, rtol=0, atol=1e-6 * (1 + (abs(ax) + abs(ay)) * (1 + scale)))
    # the anchor lands on (cx, cy)
    np.testing.assert_allclose(m @ [ax, ay, 1.0], [cx, cy], atol=1e-9 * (1 + scale * 100 + abs(cx) + abs(cy)))


@settings(max_examples=100, deadline=None)
@given(ax=st.floats(-50, 50, **finite), ay=st.floats(-50, 50, **finite), angle=st.floats(0, 360, **finite),
       scale=st.floats(0.1, 5, **finite))
def test_mirror_flips_about_the_anchor_before_rotating(ax, ay, angle, scale):
    m = similarity_matrix((ax, ay), RenderParams(ax, ay, scale, angle, mirror=True))
    flip = np.array([[-1.0, 0, 2 * ax], [0, 1.0, 0], [0, 0, 1.0]])  # x -> 2ax - x
    ref = cv2.getRotationMatrix2D((ax, ay), angle, scale) @ flip  # centre as float32, as above
    np.testing.assert_allclose(m, ref, rtol=0, atol=1e-6 * (1 + (abs(ax) + abs(ay)) * (1 + scale)))


def test_angle_is_counter_clockwise_on_screen():
    bar = solid_sprite(4, 20)  # long along x
    img, (pl,) = render(np.zeros((64, 64, 1), np.uint8), [(bar, RenderParams(32, 32, angle=90))])
    x0, y0, x1, y1 = pl.bbox
    assert (y1 - y0) > 3 * (x1 - x0)  # now vertical
    # a point to the right of the anchor goes up (smaller y) for a positive angle
    m = similarity_matrix(bar.anchor, RenderParams(32, 32, angle=30))
    x, y = m @ [bar.anchor[0] + 5, bar.anchor[1], 1]
    assert x > 32 and y < 32


def _moments(img: np.ndarray):
    m = cv2.moments(img.astype(np.float64))  # OpenCV image moments, pixel-index coordinates
    cx, cy = m["m10"] / m["m00"] + 0.5, m["m01"] / m["m00"] + 0.5
    theta = 0.5 * math.degrees(math.atan2(2 * m["mu11"], m["mu20"] - m["mu02"]))  # major axis, y down
    return cx, cy, theta


def _angle_diff_mod180(a, b):
    return abs((a - b + 90) % 180 - 90)


def test_rendered_centroid_and_orientation_match_cv2_moments():
    # Reference: centroid and principal-axis orientation from OpenCV image moments
    # (orientation = 0.5 atan2(2 mu11, mu20 - mu02), a standard moment formula, from memory).
    bar = solid_sprite(6, 36)
    r = np.random.default_rng(11)
    for _ in range(150):
        p = RenderParams(float(r.uniform(35, 93)), float(r.uniform(35, 93)), float(r.uniform(0.6, 1.5)),
                         float(r.uniform(0, 360)), bool(r.integers(2)))
        img, (pl,) = render(np.zeros((128, 128, 1), np.uint8), [(bar, p)])
        assert pl.visible_fraction == 1.0
        cx, cy, theta = _moments(img[..., 0])
        assert abs(cx - p.cx) < 0.5 and abs(cy - p.cy) < 0.5
        # screen counter-clockwise angle a points the long axis along (cos a, -sin a) in image
        # coordinates, i.e. at -a; a mirrored bar is symmetric so mirror does not change it.
        assert _angle_diff_mod180(theta, -p.angle) < 1.0


def test_asymmetric_shapes_centre_on_their_anchor():
    src = Polyominoes(5, 6)
    r = np.random.default_rng(12)
    for ci in range(len(src.classes)):
        sp = src.sprite(ci, 0)
        for _ in range(10):
            p = RenderParams(float(r.uniform(40, 56)), float(r.uniform(40, 56)), float(r.uniform(0.5, 1.6)),
                             float(r.uniform(0, 360)), bool(r.integers(2)))
            img, _ = render(np.zeros((96, 96, 1), np.uint8), [(sp, p)])
            cx, cy, _ = _moments(img[..., 0])  # OpenCV moments
            assert abs(cx - p.cx) < 0.5 and abs(cy - p.cy) < 0.5


@pytest.mark.parametrize("angle", [0.0, 37.0, 90.0, 211.5])
def test_mirror_equals_rendering_the_flipped_patch(angle):
    sp = Polyominoes(5, 5, colour=(30, 160, 240)).sprite(3, 0)
    flipped = Sprite(sp.rgba[:, ::-1], (sp.width - sp.anchor[0], sp.anchor[1]), "f", 0, 0)
    bg = np.full((64, 64, 3), 40, np.uint8)
    a, pa = render(bg, [(sp, RenderParams(30.3, 33.9, 1.3, angle, mirror=True))])
    b, pb = render(bg, [(flipped, RenderParams(30.3, 33.9, 1.3, angle))])
    assert np.abs(a.astype(int) - b).max() <= 1
    assert pa[0].footprint_px == pytest.approx(pb[0].footprint_px, abs=2)


def test_footprint_area_scales_with_the_square_of_scale():
    sq = solid_sprite(10, 10)
    for scale in (0.5, 1.0, 2.0, 3.3):
        pl = footprint(sq, RenderParams(60.2, 60.7, scale, 17.0), (128, 128))
        side = 10 * scale
        # area of a similarity image is scale^2 x area (geometry); pixelisation moves the
        # boundary by under a pixel, so allow one perimeter's worth
        assert abs(pl.footprint_px - side * side) <= 4 * side


@settings(max_examples=150, deadline=None)
@given(cx=st.floats(-20, 84, **finite), cy=st.floats(-20, 84, **finite), scale=st.floats(0.3, 3, **finite),
       angle=st.floats(0, 360, **finite), mirror=st.booleans())
def test_every_touched_pixel_lies_within_the_support_radius(cx, cy, scale, angle, mirror):
    sp = Polyominoes(5, 5).sprite(7, 0)
    canvas = np.zeros((64, 64, 1), np.uint8)
    place(canvas, sp, RenderParams(cx, cy, scale, angle, mirror))
    rows, cols = np.nonzero(canvas[..., 0])
    d = np.hypot(cols + 0.5 - cx, rows + 0.5 - cy)
    assert (d <= scale * support_radius(sp.rgba, sp.anchor) + WARP_SLACK_PX).all()
    # and the footprint (alpha above one half) lies within the tighter, threshold-aware bound
    fp = footprint(sp, RenderParams(cx, cy, scale, angle, mirror), (64, 64))
    rows, cols = np.nonzero(fp.mask)
    d = np.hypot(cols + fp.bbox[0] + 0.5 - cx, rows + fp.bbox[1] + 0.5 - cy)
    assert (d <= scale * support_radius(sp.rgba, sp.anchor, 0.5) + WARP_SLACK_PX).all()


# --- footprints and visibility --------------------------------------------------------------

@settings(max_examples=200, deadline=None)
@given(cx=st.floats(-30, 94, **finite), cy=st.floats(-30, 94, **finite), scale=st.floats(0.2, 3, **finite),
       angle=st.floats(0, 360, **finite), mirror=st.booleans(), hue=st.floats(0, 360, **finite),
       grey=st.booleans())
def test_footprint_equals_the_mask_place_makes(cx, cy, scale, angle, mirror, hue, grey):
    sp = Polyominoes(6, 4, colour=(200, 40, 90)).sprite(20, 0)
    p = RenderParams(cx, cy, scale, angle, mirror, hue, 0.7, 1.2)
    canvas = np.zeros((64, 64, 1 if grey else 3), np.uint8)
    placed = place(canvas, sp, p)
    fp = footprint(sp, p, (64, 64))
    assert fp.bbox == placed.bbox and fp.footprint_px == placed.footprint_px
    assert fp.visible_fraction == placed.visible_fraction
    np.testing.assert_array_equal(fp.mask, placed.mask)

    # Independent check of the clipping: the same object on a canvas padded by 100 px on every
    # side is never clipped; its footprint there is the unbounded footprint.
    pad = 100
    big = footprint(sp, RenderParams(cx + pad, cy + pad, scale, angle, mirror), (64 + 2 * pad, 64 + 2 * pad))
    full = np.zeros((64 + 2 * pad, 64 + 2 * pad), bool)
    full[big.bbox[1]:big.bbox[3], big.bbox[0]:big.bbox[2]] = big.mask
    inside = full[pad:pad + 64, pad:pad + 64]
    assert big.visible_fraction == 1.0
    assert fp.footprint_px == inside.sum()
    on_canvas = np.zeros((64, 64), bool)
    if fp.footprint_px:
        x0, y0, x1, y1 = fp.bbox
        on_canvas[y0:y1, x0:x1] = fp.mask
        # bbox holds exactly the footprint: every edge row and column of the mask has a pixel
        assert fp.mask.shape == (y1 - y0, x1 - x0)
        assert fp.mask[0].any() and fp.mask[-1].any() and fp.mask[:, 0].any() and fp.mask[:, -1].any()
        assert fp.visible_fraction == pytest.approx(fp.footprint_px / big.footprint_px)
    else:
        assert fp.bbox == (0, 0, 0, 0) and fp.visible_fraction == 0.0
    np.testing.assert_array_equal(on_canvas, inside)


def test_visible_fraction_inside_edge_and_off_canvas():
    sq = solid_sprite(10, 10)
    inside = footprint(sq, RenderParams(32, 32), (64, 64))
    assert inside.visible_fraction == 1.0 and inside.footprint_px == 100 and inside.bbox == (27, 27, 37, 37)
    half = footprint(sq, RenderParams(0, 32), (64, 64))  # centred on the left edge
    assert half.visible_fraction == pytest.approx(0.5) and half.bbox == (0, 27, 5, 37)
    corner = footprint(sq, RenderParams(64, 64), (64, 64))
    assert corner.visible_fraction == pytest.approx(0.25) and corner.bbox == (59, 59, 64, 64)
    off = footprint(sq, RenderParams(-20, 32), (64, 64))
    assert off.visible_fraction == 0.0 and off.footprint_px == 0 and off.bbox == (0, 0, 0, 0)
    assert off.mask.size == 0 and not off.visible
    canvas = np.full((64, 64, 3), 9, np.uint8)
    assert place(canvas, sq, RenderParams(200, -50)).footprint_px == 0
    assert (canvas == 9).all()


# --- compositing ----------------------------------------------------------------------------

def test_over_operator_on_worked_pixels():
    # Porter & Duff (1984), "over" with premultiplied colour onto an opaque backdrop:
    # C_out = C_src * a_src + C_dst * (1 - a_src). Worked by hand below, 8-bit, rounded.
    rgba = np.zeros((2, 3, 4), np.uint8)
    rgba[0, 0] = (255, 0, 0, 255)      # opaque red over blue -> (255, 0, 0)
    rgba[0, 1] = (255, 0, 0, 128)      # half red over blue -> (128, 0, 127)
    rgba[0, 2] = (255, 255, 255, 64)   # quarter white over blue -> (64, 64, 64 + 255*191/255 = 255)
    rgba[1, 0] = (0, 255, 0, 0)        # transparent: blue stays
    rgba[1, 1] = (100, 200, 50, 191)   # (75, 150, 37.5 + 63.75 = 101.25) -> (75, 150, 101)
    rgba[1, 2] = (0, 0, 0, 255)        # opaque black -> (0, 0, 0)
    sp = Sprite(rgba, (0.5, 0.5), "w", 0, 0)  # anchor at the centre of pixel (0, 0)
    bg = np.zeros((8, 8, 3), np.uint8)
    bg[...] = (0, 0, 255)
    img, _ = render(bg, [(sp, RenderParams(3.5, 2.5))])  # pixel (r, c) lands on (2 + r, 3 + c)
    expected = [[(255, 0, 0), (128, 0, 127), (64, 64, 255)],
                [(0, 0, 255), (75, 150, 101), (0, 0, 0)]]
    np.testing.assert_array_equal(img[2:4, 3:6], np.array(expected, np.uint8))
    assert (img[:2] == (0, 0, 255)).all() and (img[4:] == (0, 0, 255)).all()
    # over a grey backdrop: half red on 100 -> 128 + 100 * 127/255 = 177.8 -> 178 (red), 49.8 -> 50
    img, _ = render(np.full((8, 8, 3), 100, np.uint8), [(sp, RenderParams(3.5, 2.5))])
    np.testing.assert_array_equal(img[2, 4], (178, 50, 50))
    # a grey canvas sees BT.601 luma: half red -> 0.299 * 255 * 128/255 + 100 * 127/255 = 38.27 + 49.80 -> 88
    img, _ = render(np.full((8, 8, 1), 100, np.uint8), [(sp, RenderParams(3.5, 2.5))])
    assert img[2, 4, 0] == 88


@settings(max_examples=60, deadline=None)
@given(cx=st.floats(5, 59, **finite), cy=st.floats(5, 59, **finite), scale=st.floats(0.3, 4, **finite),
       angle=st.floats(0, 360, **finite))
def test_premultiplied_warp_has_no_dark_fringe(cx, cy, scale, angle):
    # Interpolating premultiplied colour (Porter & Duff 1984) keeps a white object on a white
    # canvas white at every edge pixel; interpolating straight colour would pull in the
    # transparent pixels' black.
    sp = soft_disc()
    img, _ = render(np.full((64, 64, 3), 255, np.uint8), [(sp, RenderParams(cx, cy, scale, angle))])
    assert (img == 255).all()
    # on black the result is the warped alpha itself, so colour == coverage everywhere
    img, (pl,) = render(np.zeros((64, 64, 3), np.uint8), [(sp, RenderParams(cx, cy, scale, angle))])
    assert (img[..., 0] == img[..., 1]).all() and (img[..., 1] == img[..., 2]).all()
    if pl.footprint_px:
        x0, y0, x1, y1 = pl.bbox
        assert (img[y0:y1, x0:x1, 0][pl.mask] >= 128).all()  # alpha > 0.5 there


def test_later_objects_draw_over_earlier_and_background_is_untouched():
    bg = np.full((32, 32, 3), 50, np.uint8)
    red, blue = solid_sprite(8, 8, (255, 0, 0)), solid_sprite(8, 8, (0, 0, 255))
    img, placed = render(bg, [(red, RenderParams(16, 16)), (blue, RenderParams(20, 16))])
    assert (bg == 50).all()
    assert tuple(img[16, 13]) == (255, 0, 0) and tuple(img[16, 18]) == (0, 0, 255)
    assert masks_overlap(*placed)
    _, far = render(bg, [(red, RenderParams(6, 6)), (blue, RenderParams(26, 26))])
    assert not masks_overlap(*far)
    counts = np.zeros((32, 32), np.int32)
    for pl in placed:
        add_footprint(counts, pl)
    assert counts.max() == 2 and counts.sum() == sum(pl.footprint_px for pl in placed)


# --- colour ---------------------------------------------------------------------------------

@settings(max_examples=300, deadline=None)
@given(rgb=st.tuples(*[st.integers(0, 255)] * 3), hue=st.floats(-360, 720, **finite),
       sat=st.one_of(st.just(1.0), st.floats(0, 2, **finite)),  # 1.0 and 1.0: a hue turn alone, its own path
       bright=st.one_of(st.just(1.0), st.floats(0, 2, **finite)))
def test_colour_axes_match_colorsys(rgb, hue, sat, bright):
    # Reference: Python's colorsys (RGB <-> HSV). Expected colour: hue rotated, saturation and
    # value multiplied and clipped to 1. Tolerance: 0.5 level of 8-bit rounding plus float32.
    sp = solid_sprite(9, 9, rgb)
    h, s, v = colorsys.rgb_to_hsv(*(c / 255 for c in rgb))
    want = np.array(colorsys.hsv_to_rgb((h + hue / 360) % 1.0, min(s * sat, 1.0), min(v * bright, 1.0))) * 255
    p = RenderParams(16.0, 16.0, 1.7, 23.0, hue=hue, saturation=sat, brightness=bright)
    img, _ = render(np.zeros((32, 32, 3), np.uint8), [(sp, p)])
    centre = img[12:20, 12:20].reshape(-1, 3).astype(float)  # well inside the 15 px square
    assert np.abs(centre - want).max() <= 0.6
    grey, _ = render(np.zeros((32, 32, 1), np.uint8), [(sp, p)])
    luma = want @ [0.299, 0.587, 0.114]  # ITU-R BT.601 luma, as cv2.COLOR_RGB2GRAY
    assert np.abs(grey[12:20, 12:20].astype(float) - luma).max() <= 0.6


@settings(max_examples=300, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), hue=st.floats(-720, 720, **finite), channels=st.sampled_from([3, 4]))
def test_a_hue_turn_alone_equals_the_sum_plane_by_plane(seed, hue, channels):
    # A hue turn alone is one cv2.add on the HSV image; its definition is numpy's float32 sum
    # on the H plane (the path every other colour change takes), which it must equal bit for bit.
    rgb = np.random.default_rng(seed).random((7, 11, 3), dtype=np.float32)
    hsv = cv2.cvtColor(rgb, cv2.COLOR_RGB2HSV)
    h, s, v = cv2.split(hsv)
    want = cv2.cvtColor(cv2.merge((h + np.float32(hue % 360.0), s, v)), cv2.COLOR_HSV2RGB, dstCn=channels)
    np.testing.assert_array_equal(recolour_hsv(hsv, hue, 1.0, 1.0, channels), want)
    np.testing.assert_array_equal(hsv, cv2.cvtColor(rgb, cv2.COLOR_RGB2HSV))  # the sprite's HSV is not changed


def test_colour_axes_leave_the_background_alone():
    sp = soft_disc(rgb=(250, 120, 10))
    bg = np.random.default_rng(0).integers(0, 256, (48, 48, 3), dtype=np.uint8)
    img, (pl,) = render(bg, [(sp, RenderParams(24, 24, 1.0, 0, hue=120, saturation=0.5, brightness=0.7))])
    changed = (img != bg).any(axis=2)
    rows, cols = np.nonzero(changed)
    assert changed.any()
    assert (np.hypot(cols + 0.5 - 24, rows + 0.5 - 24) <= support_radius(sp.rgba, sp.anchor) + WARP_SLACK_PX).all()


# --- output format --------------------------------------------------------------------------

@pytest.mark.parametrize("channels", [1, 3])
def test_png_round_trip_is_lossless(channels):
    # PNG is lossless for 8-bit images (PNG specification, ISO/IEC 15948); checked with OpenCV.
    src = Polyominoes(5, 6, colour=(230, 90, 20))
    r = np.random.default_rng(5)
    bg = r.integers(0, 256, (96, 96, channels), dtype=np.uint8)
    placements = [(src.sprite(int(r.integers(12)), 0),
                   RenderParams(*r.uniform(0, 96, 2), r.uniform(0.5, 2), r.uniform(0, 360), bool(r.integers(2)),
                                r.uniform(0, 360), r.uniform(0, 1.5), r.uniform(0.5, 1.5))) for _ in range(4)]
    img, _ = render(bg, placements)
    ok, buf = cv2.imencode(".png", img)
    back = cv2.imdecode(buf, cv2.IMREAD_UNCHANGED)
    assert ok and back.dtype == np.uint8
    np.testing.assert_array_equal(back.reshape(img.shape), img)


def test_render_params_reject_nonsense():
    for bad in (dict(scale=0.0), dict(scale=-1.0), dict(saturation=-0.1), dict(angle=float("nan"))):
        with pytest.raises(ValueError):
            RenderParams(1.0, 1.0, **bad)
    with pytest.raises(ValueError):
        place(np.zeros((8, 8, 4), np.uint8), solid_sprite(2, 2), RenderParams(4, 4))


def test_placed_is_a_value_not_a_copy_of_the_canvas():
    canvas = np.zeros((16, 16, 3), np.uint8)
    pl = place(canvas, solid_sprite(3, 3), RenderParams(7.5, 7.5))  # pixel centres on pixel centres
    assert isinstance(pl, Placed) and pl.mask.dtype == bool and pl.mask.shape == (3, 3)
    assert pl.bbox == (6, 6, 9, 9) and pl.footprint_px == 9
