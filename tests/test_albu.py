"""The albumentations plugin transforms (augsplit.albu).

Outside references, named beside each check: OpenCV's cv2.transform for moved points,
albumentations 2.0's own A.Affine / A.HorizontalFlip for bboxes, keypoints and pixels,
the standard library's colorsys for HSV colour arithmetic.
"""

from __future__ import annotations

import colorsys
import math

import albumentations as A
import cv2
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from augsplit.albu import HeldOutPlacement, RegionColour, RegionPlacement
from augsplit.build import open_mapping
from augsplit.errors import DatasetError, SpecError
from augsplit.paramlog import ParamLog, read_log

H = W = 64


def spec(axes: dict, train: dict, test: dict, cells: int = 2, **extra) -> dict:
    return {"seed": 11, "canvas": {"width": W, "height": H},
            "objects": {"kind": "polyomino", "cells": cells, "cell_px": 3},
            "axes": axes, "splits": {"train": {"region": train, "count": 10}, "test": {"region": test, "count": 10}},
            **extra}


GEOM = spec({"x": {"range": [8, 56]}, "y": {"range": [8, 56]}, "scale": {"range": [0.5, 1.0]},
             "angle": {"range": [0, 360]}, "mirror": {}},
            {"x": [8, 30]}, {"x": [36, 56]})
# Integer px positions (levels), so albumentations' Affine — whose translation is a whole number
# of pixels — can reproduce every draw exactly.
LEVELS = spec({"x": {"levels": [20, 27, 32, 38, 44]}, "y": {"levels": [18, 32, 41]},
               "scale": {"range": [0.5, 1.0]}, "angle": {"range": [0, 360]}},
              {"x": [20, 32]}, {"x": [38, 44]})
# A composition holdout: the left half and the red-to-green hues were both seen in training,
# their combination never was.
COMPOSITION = spec({"x": {"range": [0, 64]}, "y": {"range": [0, 64]}, "scale": {"range": [0.5, 1.0]},
                    "angle": {"range": [0, 360]}, "hue": {"range": [0, 360]}},
                   {"minus": {"x": [0, 32], "hue": [0, 120]}}, {"x": [0, 32], "hue": [0, 120]})


@pytest.fixture(scope="module")
def geom():
    return open_mapping(GEOM)


@pytest.fixture(scope="module")
def levels():
    return open_mapping(LEVELS)


@pytest.fixture(scope="module")
def composition():
    return open_mapping(COMPOSITION)


def photo(h=32, w=32, seed=0) -> np.ndarray:
    return np.random.default_rng(seed).integers(0, 256, (h, w, 3), dtype=np.uint8)


def in_region(built, split: str, placement: dict) -> bool:
    sp = built.plan.split(split)
    pt = {n: [placement["class_index"] if n == "class" else placement[n]] for n in built.plan.space.names}
    return bool(sp.region.contains(pt)[0])


# ---- construction refusals ------------------------------------------------------------------


def test_unknown_split(geom):
    with pytest.raises(SpecError, match="unknown split 'val'.*train, test"):
        RegionPlacement(geom, "val", content_size=(32, 32))


def test_roles(geom):
    with pytest.raises(SpecError, match="held out .*leaks it into training"):
        RegionPlacement(geom, "test", content_size=(32, 32))
    with pytest.raises(SpecError, match="training split"):
        HeldOutPlacement(geom, "train", content_size=(32, 32))
    assert HeldOutPlacement(geom, "test", content_size=(32, 32)).p == 1.0


def test_content_that_cannot_fit_is_refused_at_construction(geom):
    # 130 px at the smallest scale 0.5 is 65 px > the 64 px canvas
    with pytest.raises(SpecError) as e:
        RegionPlacement(geom, "train", content_size=(130, 40))
    msg = str(e.value)
    assert "130x40 px is 65.0x20.0 px at the region's smallest scale 0.5" in msg and "64x64 canvas" in msg
    assert msg.startswith("splits.train.region:") and "\n" not in msg
    RegionPlacement(geom, "train", content_size=(128, 128))  # exactly fits at scale 0.5


def test_image_larger_than_declared_content_is_refused(geom):
    t = RegionPlacement(geom, "train", content_size=(32, 32))
    with pytest.raises(DatasetError, match="40x32 px, larger than the content_size 32x32"):
        t(image=photo(32, 40))


def test_class_dependent_region_needs_class_key():
    by_class = spec({"x": {"range": [0, 64]}}, {"by_class": {"P3-00": {"x": [0, 20]}, "*": {"x": [20, 40]}}},
                    {"x": [44, 64]}, cells=3)
    b = open_mapping(by_class)
    with pytest.raises(SpecError, match="differs by class.*class_key"):
        RegionPlacement(b, "train", content_size=(16, 16))
    t = RegionPlacement(b, "train", content_size=(16, 16), class_key="label")
    for label, (lo, hi) in (("P3-00", (0, 20)), (1, (20, 40))):
        for s in range(20):
            t.set_random_seed(s)
            x = t(image=photo(16, 16), label=label)
            assert lo <= t.params["placement"]["x"] <= hi
    with pytest.raises(DatasetError, match="no 'label'"):
        t(image=photo(16, 16))
    with pytest.raises(DatasetError, match="unknown class 'Z9'"):
        t(image=photo(16, 16), label="Z9")
    assert x["image"].shape == (H, W, 3)


def test_colour_apart_from_geometry_needs_a_separable_region(composition, geom):
    with pytest.raises(SpecError, match="ties colour to position"):
        RegionPlacement(composition, "train", content_size=(16, 16), colour=False)
    with pytest.raises(SpecError, match="ties colour to position"):
        RegionColour(composition, "train")
    RegionPlacement(composition, "train", content_size=(16, 16))  # jointly: fine
    sep = open_mapping(spec({"x": {"range": [0, 64]}, "hue": {"range": [0, 360]}}, {"x": [0, 30], "hue": [0, 180]},
                            {"x": [34, 64]}))
    RegionColour(sep, "train")
    RegionPlacement(sep, "train", content_size=(16, 16), colour=False)


def test_bad_options(geom):
    with pytest.raises(SpecError, match="anchor"):
        RegionPlacement(geom, "train", content_size=(8, 8), anchor="corner")
    with pytest.raises(SpecError, match="p is a probability"):
        RegionPlacement(geom, "train", content_size=(8, 8), p=1.5)
    with pytest.raises(SpecError, match="content_size"):
        RegionPlacement(geom, "train", content_size=(8,))


def test_bboxes_need_a_declared_format(geom):
    t = RegionPlacement(geom, "train", content_size=(32, 32))
    with pytest.raises(DatasetError, match="without a declared format"):
        t(image=photo(), bboxes=np.array([[1, 2, 10, 12]]))
    # a declared format the boxes do not follow is caught by albumentations' own check
    # (coco [x, y, w, h] read from pascal_voc-style corners runs off the 32 px image)
    c = A.Compose([t], bbox_params=A.BboxParams(format="coco", label_fields=[]))
    with pytest.raises(ValueError, match="x_max"):
        c(image=photo(), bboxes=[[10, 10, 30, 30]])


LANES = spec({"x": {"range": [8, 56]}, "y": {"range": [6, 58]}, "scale": {"range": [0.8, 1.0]},
               "angle": {"range": [0, 360]}},
              {"y": [6, 20]}, {"y": [44, 58]},
              guarantees=[{"disjoint": "footprint", "between": ["train", "test"]}])


def test_footprint_guarantee_is_kept_for_the_content():
    b = open_mapping(LANES)
    # lanes 24 px apart; content of 20 px reaches 14.8 px from its centre: 2 x 14.8 + 0.25 > 24
    with pytest.raises(SpecError) as e:
        RegionPlacement(b, "train", content_size=(20, 20))
    msg = str(e.value)
    assert msg.startswith("guarantees.0:") and "20x20 px reaches 14.8 px" in msg and "24.0 px apart" in msg
    with pytest.raises(SpecError, match="footprint-disjoint"):
        HeldOutPlacement(b, "test", content_size=(20, 20))
    RegionPlacement(b, "train", content_size=(20, 20), check_footprint=False)  # on request
    # content of 12 px fits: placed train and held-out content never share a canvas pixel
    # (the footprint guarantee itself, checked on the warped pixels)
    tr = A.Compose([RegionPlacement(b, "train", content_size=(12, 12))], seed=1)
    te = A.Compose([HeldOutPlacement(b, "test", content_size=(12, 12))], seed=2)
    ones = np.full((12, 12), 255, np.uint8)
    cover = {"train": np.zeros((H, W), bool), "test": np.zeros((H, W), bool)}
    for _ in range(300):
        cover["train"] |= tr(image=ones)["image"] > 0
        cover["test"] |= te(image=ones)["image"] > 0
    assert cover["train"].any() and cover["test"].any()
    assert not (cover["train"] & cover["test"]).any()


def test_footprint_guarantee_with_a_mask_anchor_is_checked_per_item():
    b = open_mapping(LANES)
    t = RegionPlacement(b, "train", content_size=(12, 12), anchor="mask")
    assert 10 < t.max_radius < 12
    centred = np.zeros((12, 12), np.uint8)
    centred[4:8, 4:8] = 1
    t(image=photo(12, 12), mask=centred)
    corner = np.zeros((12, 12), np.uint8)
    corner[0:2, 0:2] = 1  # anchor near a corner: the far corner is 16 px away
    with pytest.raises(DatasetError, match="footprint-disjoint"):
        t(image=photo(12, 12), mask=corner)


# ---- draws inside the region ----------------------------------------------------------------


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(seed=st.integers(0, 2**32 - 1), name=st.sampled_from(["geom", "composition"]))
def test_every_draw_lies_in_its_region(seed, name, geom, composition):
    built = {"geom": geom, "composition": composition}[name]
    c = A.Compose([RegionPlacement(built, "train", content_size=(16, 16))], seed=seed, save_applied_params=True)
    for _ in range(5):
        r = c(image=photo(16, 16))
        placement = r["applied_transforms"][0][1]["placement"]
        assert in_region(built, "train", placement)
        assert not in_region(built, "test", placement)
        # the reported cell is the box of the split's region holding the draw (Region.box_of_t)
        space = built.plan.space
        pt = {n: [placement["class_index"] if n == "class" else placement[n]] for n in space.names}
        assert placement["cell"] == built.plan.split("train").region.box_of_t(space.to_t(pt))[0]


@settings(max_examples=30, deadline=None)
@given(a=st.floats(0, 60), w=st.floats(1, 40), s0=st.floats(0.3, 0.9), ds=st.floats(0.05, 1.0),
       h0=st.floats(0, 360), dh=st.floats(5, 350), seed=st.integers(0, 2**32 - 1))
def test_draws_lie_in_random_regions(a, w, s0, ds, h0, dh, seed):
    # random boxes, log-scale axes and hue intervals that may wrap past 360
    b = open_mapping(spec({"x": {"range": [0, 128]}, "scale": {"range": [0.3, 2.0], "dist": "log"},
                           "hue": {"range": [0, 360]}, "angle": {"range": [0, 360]}},
                          {"x": [a, a + w], "scale": [s0, min(s0 + ds, 2.0)], "hue": [h0, h0 + dh]},
                          {"x": [100, 128]}))
    t = HeldOutPlacement(b, "test", content_size=(8, 8))
    tr = RegionPlacement(b, "train", content_size=(8, 8), colour=True)
    tr.set_random_seed(seed)
    for _ in range(8):
        tr(image=photo(8, 8))
        assert in_region(b, "train", tr.params["placement"])
    t.set_random_seed(seed)
    t(image=photo(8, 8))
    assert in_region(b, "test", t.params["placement"])


def test_log_of_10k_train_draws_has_no_row_in_the_held_out_region(composition, tmp_path):
    log = ParamLog(tmp_path / "log", flush_every=2500)
    t = RegionPlacement(composition, "train", content_size=(4, 4), log=log)
    c = A.Compose([t], seed=5)
    img = photo(4, 4)
    for _ in range(10_000):
        c(image=img)
    log.close()
    df = read_log(tmp_path / "log")
    assert len(df) == 10_000 and list(df["item"]) == list(range(10_000))
    space = composition.plan.space
    pts = {n: df["class_index"].to_numpy() if n == "class" else df[n].to_numpy() for n in space.names}
    assert composition.plan.split("train").region.contains(pts).all()
    assert not composition.plan.split("test").region.contains(pts).any()
    # and the draws do reach both parts of the training region around the hole
    assert ((df["x"] < 32) & (df["hue"] > 120)).any() and ((df["x"] > 32) & (df["hue"] < 120)).any()
    assert set(df["source"]) == {"RegionPlacement"} and set(df["split"]) == {"train"}


# ---- geometry against OpenCV and albumentations ----------------------------------------------


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(seed=st.integers(0, 2**32 - 1))
def test_points_and_box_corners_follow_cv2_transform(seed, geom):
    # Reference: cv2.transform (OpenCV) of the same points with the matrix the transform applied.
    t = RegionPlacement(geom, "train", content_size=(32, 24))
    c = A.Compose([t], seed=seed, bbox_params=A.BboxParams(format="pascal_voc", label_fields=[]),
                  keypoint_params=A.KeypointParams(format="xy", remove_invisible=False))
    kps = np.array([[3.0, 4.0], [20.5, 11.25], [31.0, 23.0], [16.0, 12.0]])
    box = np.array([5.0, 6.0, 22.0, 19.0])
    r = c(image=photo(24, 32), keypoints=kps, bboxes=[box])
    params = t.get_applied_params()
    want = cv2.transform(kps.reshape(-1, 1, 2), params["matrix"]).reshape(-1, 2)
    np.testing.assert_allclose(np.asarray(r["keypoints"])[:, :2], want, atol=1e-4)
    corners = np.array([[box[0], box[1]], [box[2], box[1]], [box[2], box[3]], [box[0], box[3]]])
    moved = cv2.transform(corners.reshape(-1, 1, 2), params["bbox_matrix"]).reshape(-1, 2)
    if len(r["bboxes"]):  # the box's canvas is 64 px; the content may be placed partly off it
        np.testing.assert_allclose(r["bboxes"][0], np.r_[np.clip(moved.min(0), 0, W), np.clip(moved.max(0), 0, W)],
                                   atol=1e-3)
    # the canvas box the content can touch (logged for the audit): its corners moved, out to
    # whole pixels, clipped to the canvas
    cc = cv2.transform(np.array([[[0.0, 0.0]], [[32.0, 0.0]], [[32.0, 24.0]], [[0.0, 24.0]]]),
                       params["bbox_matrix"]).reshape(-1, 2)
    x0, y0 = max(math.floor(cc[:, 0].min()), 0), max(math.floor(cc[:, 1].min()), 0)
    x1, y1 = min(math.ceil(cc[:, 0].max()), W), min(math.ceil(cc[:, 1].max()), H)
    want_box = (x0, y0, x1, y1) if x1 > x0 and y1 > y0 else (0, 0, 0, 0)
    pl = params["placement"]
    assert (pl["bbox_x0"], pl["bbox_y0"], pl["bbox_x1"], pl["bbox_y1"]) == want_box
    # the anchor (image centre, continuous coordinates) lands on the drawn position
    p = params["placement"]
    centre = cv2.transform(np.array([[[16.0, 12.0]]]), params["bbox_matrix"])[0, 0]
    np.testing.assert_allclose(centre, [p["cx_px"], p["cy_px"]], atol=1e-9)
    # the matrix is scale x rotation (counter-clockwise on screen, y down) x mirror
    th = math.radians(p["angle"])
    lin = p["scale"] * np.array([[math.cos(th), math.sin(th)], [-math.sin(th), math.cos(th)]])
    if p["mirror"]:
        lin = lin @ np.diag([-1.0, 1.0])
    np.testing.assert_allclose(params["bbox_matrix"][:, :2], lin, atol=1e-12)


def _affine_twin(p: dict, hw) -> A.Affine:
    h, w = hw
    # Our anchor is the content centre (w/2, h/2) in continuous coordinates; A.Affine turns and
    # scales about the same centre (w/2, h/2 for boxes, w/2 - 0.5 for pixel indices — the same
    # point) and then shifts by translate_px, so translate = drawn position - canvas centre.
    tx, ty = p["cx_px"] - w / 2, p["cy_px"] - h / 2
    assert tx == round(tx) and ty == round(ty)
    return A.Affine(scale=p["scale"], rotate=(p["angle"], p["angle"]),
                    translate_px={"x": (int(tx), int(tx)), "y": (int(ty), int(ty))}, p=1.0)


@settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(seed=st.integers(0, 2**32 - 1), mirror=st.booleans())
def test_same_as_albumentations_affine(seed, mirror, levels):
    # Reference: albumentations 2.0's A.Affine (and A.HorizontalFlip for the mirror, which flips
    # about the image centre — our anchor) on the same image, boxes and keypoints.
    bp = A.BboxParams(format="pascal_voc", label_fields=["labels"])
    kp = A.KeypointParams(format="xyas", remove_invisible=False, angle_in_degrees=True)
    ours = RegionPlacement(levels, "train", content_size=(W, H))
    img = photo(H, W, seed % 7)
    boxes = [[4.0, 7.0, 30.0, 40.0], [20.5, 3.0, 60.0, 22.0], [10.0, 30.0, 12.0, 33.0]]
    kps = [[3.0, 4.0, 10.0, 1.0], [40.0, 50.0, 200.0, 2.0], [63.0, 0.0, 359.0, 0.5]]
    pre = [A.HorizontalFlip(p=1.0)] if mirror else []
    mine = A.Compose(pre + [ours], seed=seed, bbox_params=bp, keypoint_params=kp)
    r1 = mine(image=img, bboxes=boxes, labels=[0, 1, 2], keypoints=kps)
    p = ours.get_applied_params()["placement"]
    theirs = A.Compose(pre + [_affine_twin(p, (H, W))], bbox_params=bp, keypoint_params=kp)
    r2 = theirs(image=img, bboxes=boxes, labels=[0, 1, 2], keypoints=kps)
    assert r1["labels"] == r2["labels"]
    np.testing.assert_allclose(np.asarray(r1["bboxes"]), np.asarray(r2["bboxes"]), atol=1e-3)
    k1, k2 = np.asarray(r1["keypoints"]), np.asarray(r2["keypoints"])
    np.testing.assert_allclose(k1[:, :2], k2[:, :2], atol=1e-3)
    np.testing.assert_allclose(k1[:, 3], k2[:, 3], rtol=1e-5)  # keypoint scale
    # Keypoint angles: A.Affine turns them the opposite way from its own image rotation (and from
    # A.RandomRotate90; see test_keypoint_angles_follow_the_geometry), so only the sign differs.
    k0 = np.asarray(A.Compose(pre or [A.NoOp()], keypoint_params=kp)(image=img, keypoints=kps)["keypoints"])
    ours_turn, their_turn = k1[:, 2] - k0[:, 2], k2[:, 2] - k0[:, 2]
    assert np.abs((ours_turn + their_turn + 180) % 360 - 180).max() < 1e-3
    # pixels: the same cv2.warpAffine with matrices equal to rounding: at most 1 grey level apart
    diff = np.abs(r1["image"].astype(int) - r2["image"].astype(int))
    assert diff.max() <= 1 and (diff > 0).mean() < 0.01


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(seed=st.integers(0, 2**32 - 1), angle=st.floats(0, 360))
def test_keypoint_angles_follow_the_geometry(seed, angle, geom):
    # Reference: the direction of a keypoint is the step from it to a point a little way along
    # its angle (image coordinates, y down, as albumentations' keypoints); moving both points
    # with cv2.transform gives the new direction.
    t = RegionPlacement(geom, "train", content_size=(32, 32))
    kp = A.KeypointParams(format="xya", remove_invisible=False, angle_in_degrees=True)
    r = A.Compose([t], seed=seed, keypoint_params=kp)(image=photo(), keypoints=[[10.0, 12.0, angle]])
    m = t.get_applied_params()["matrix"]
    a = math.radians(angle)
    pts = np.array([[[10.0, 12.0]], [[10.0 + 1e-3 * math.cos(a), 12.0 + 1e-3 * math.sin(a)]]])
    moved = cv2.transform(pts, m)[:, 0]
    want = math.degrees(math.atan2(*(moved[1] - moved[0])[::-1])) % 360
    got = r["keypoints"][0][2]
    assert abs((got - want + 180) % 360 - 180) < 1e-3


def test_quarter_turn_matches_random_rotate90():
    # Reference: albumentations' A.RandomRotate90 (factor 1 is a counter-clockwise quarter turn)
    # on a square image: pixels and keypoints (position and angle) agree with ours at angle 90.
    b = open_mapping(spec({"angle": {"levels": [90]}, "x": {"levels": [32]}, "y": {"levels": [32]}}, {}, {}))
    ours = RegionPlacement(b, "train", content_size=(W, H), interpolation=cv2.INTER_NEAREST)
    kp = A.KeypointParams(format="xya", remove_invisible=False, angle_in_degrees=True)
    img, kps = photo(H, W, 3), [[50.0, 20.0, 0.0], [5.0, 60.0, 123.0]]
    r1 = A.Compose([ours], keypoint_params=kp)(image=img, keypoints=kps)
    rot = A.RandomRotate90(p=1.0)
    for seed in range(40):  # find a seed that picks factor 1
        r2 = A.Compose([rot], keypoint_params=kp, seed=seed, save_applied_params=True)(image=img, keypoints=kps)
        if r2["applied_transforms"][0][1]["factor"] == 1:
            break
    assert np.array_equal(r1["image"], r2["image"])
    np.testing.assert_allclose(np.asarray(r1["keypoints"]), np.asarray(r2["keypoints"]), atol=1e-3)


def test_pixels_land_where_the_matrix_says(geom):
    # a lit 3x3 patch, nearest-neighbour (scale >= 0.5 keeps a sample inside it): it lands
    # around cv2.transform of its centre pixel's index
    t = RegionPlacement(geom, "train", content_size=(32, 32), interpolation=cv2.INTER_NEAREST)
    checked = 0
    for s in range(30):
        t.set_random_seed(s)
        img = np.zeros((32, 32, 3), np.uint8)
        img[8:11, 20:23] = 255
        out = t(image=img)["image"]
        ys, xs = np.nonzero(out[..., 0])
        want = cv2.transform(np.array([[[21.0, 9.0]]]), t.params["matrix"])[0, 0]
        if 2 <= want[0] < W - 3 and 2 <= want[1] < H - 3:
            checked += 1
            assert len(xs) >= 1
            assert np.all(np.abs(xs - want[0]) <= 2.0) and np.all(np.abs(ys - want[1]) <= 2.0)
    assert checked >= 10


def test_mask_and_bbox_anchors(geom):
    mask = np.zeros((32, 32), np.uint8)
    mask[4:12, 18:30] = 1  # centroid (24, 8) in continuous coordinates
    t = RegionPlacement(geom, "train", content_size=(32, 32), anchor="mask")
    c = A.Compose([t], seed=3)
    checked = 0
    for _ in range(20):
        r = c(image=photo(), mask=mask)
        p = t.params["placement"]
        assert (p["anchor_x"], p["anchor_y"]) == (24.0, 8.0)
        m = cv2.moments(r["mask"], binaryImage=True)
        if _inside(p, 12):
            checked += 1
            # the warped mask's centroid sits on the drawn position (to within a pixel of rounding)
            assert abs(m["m10"] / m["m00"] + 0.5 - p["cx_px"]) < 1.0
            assert abs(m["m01"] / m["m00"] + 0.5 - p["cy_px"]) < 1.0
    tb = RegionPlacement(geom, "train", content_size=(32, 32), anchor="bbox")
    cb = A.Compose([tb], seed=4, bbox_params=A.BboxParams(format="pascal_voc", label_fields=[]))
    for _ in range(20):
        r = cb(image=photo(), bboxes=[[2, 20, 10, 30]])
        p = tb.params["placement"]
        assert (p["anchor_x"], p["anchor_y"]) == (6.0, 25.0)
        if _inside(p, 8):
            checked += 1
            x0, y0, x1, y1 = r["bboxes"][0]
            # a turned box's enclosing box is symmetric about the turned centre
            assert abs((x0 + x1) / 2 - p["cx_px"]) < 1e-3 and abs((y0 + y1) / 2 - p["cy_px"]) < 1e-3
    assert checked >= 10
    with pytest.raises(ValueError, match="requires \\['mask'\\]"):  # albumentations' own check
        t(image=photo())
    with pytest.raises(DatasetError, match="at least one non-zero"):
        t(image=photo(), mask=np.zeros((32, 32), np.uint8))


def _inside(p, margin):
    return margin <= p["cx_px"] <= W - margin and margin <= p["cy_px"] <= H - margin


# ---- albumentations behaviour: p, seed, applied params, Compose ---------------------------------


def test_probability_and_compose_seed(geom):
    img = photo()
    def run(seed, p):
        c = A.Compose([RegionPlacement(geom, "train", content_size=(32, 32), p=p)], seed=seed)
        return [c(image=img)["image"] for _ in range(40)]

    a, b, other = run(1, 0.5), run(1, 0.5), run(2, 0.5)
    assert all(np.array_equal(x, y) for x, y in zip(a, b))  # the Compose seed fixes every draw
    assert any(x.shape != y.shape or not np.array_equal(x, y) for x, y in zip(a, other))
    applied = sum(x.shape == (H, W, 3) for x in a)
    assert 8 <= applied <= 32  # p = 0.5 of 40 calls, binomial 1 - 1e-4 band
    assert all(x.shape == (H, W, 3) for x in run(1, 1.0))
    assert all(np.array_equal(x, img) for x in run(1, 0.0))


def test_reseeding_replays_the_draws(geom):
    # draws are taken from the generator in batches; reseeding must still replay them exactly
    t = RegionPlacement(geom, "train", content_size=(32, 32))
    img = photo()

    def xs(k):
        out = []
        for _ in range(k):
            t(image=img)
            out.append(t.params["placement"]["x"])
        return out

    t.set_random_seed(5)
    first = xs(100)
    t.set_random_seed(5)
    assert xs(3) == first[:3]
    t.set_random_seed(5)
    assert xs(100) == first and len(set(first)) == 100
    t.set_random_state(np.random.default_rng(5), __import__("random").Random(5))
    assert xs(100) == first  # the same generator state, handed over directly


def test_applied_params_are_returned(geom, tmp_path):
    t = RegionPlacement(geom, "train", content_size=(32, 32), params_key="placement")
    c = A.Compose([A.HorizontalFlip(p=0.5), t, A.RandomBrightnessContrast(p=1.0)], seed=9, save_applied_params=True)
    r = c(image=photo())
    names = [n for n, _ in r["applied_transforms"]]
    assert "RegionPlacement" in names and r["image"].shape == (H, W, 3)
    saved = dict(r["applied_transforms"])["RegionPlacement"]["placement"]
    assert saved == r["placement"] == t.get_applied_params()["placement"]
    assert set(saved) >= {"x", "y", "scale", "angle", "mirror", "cx_px", "cy_px", "split", "cell", "class_name"}


def test_item_key_gives_per_item_draws_in_any_order(geom):
    t = HeldOutPlacement(geom, "test", content_size=(32, 32), item_key="item")
    img = photo()
    forward = [t(image=img, item=i)["image"] for i in range(6)]
    pf = []
    for i in range(6):
        t(image=img, item=i)
        pf.append(t.params["placement"]["x"])
    backward = [t(image=img, item=i)["image"] for i in reversed(range(6))][::-1]
    assert all(np.array_equal(a, b) for a, b in zip(forward, backward))
    assert len(set(pf)) == 6
    t.set_epoch(1)
    t(image=img, item=0)
    assert t.params["placement"]["x"] != pf[0]


def test_masks_keep_their_values_and_dtype(geom):
    t = RegionPlacement(geom, "train", content_size=(32, 32), fill_mask=0)
    labels = np.zeros((32, 32), np.uint8)
    labels[5:15, 5:15] = 3
    labels[20:30, 10:25] = 7
    boolean = labels > 0
    r = A.Compose([t], seed=2)(image=photo(), mask=labels, masks=[labels, boolean.astype(np.uint8)])
    assert r["mask"].shape == (H, W) and set(np.unique(r["mask"])) <= {0, 3, 7}
    assert np.array_equal(np.asarray(r["masks"])[0], r["mask"])


# ---- colour -----------------------------------------------------------------------------------


def test_colour_matches_colorsys():
    # Reference: the standard library's colorsys (RGB <-> HSV) with hue turned by the drawn
    # angle and saturation / value multiplied and clipped to 1.
    b = open_mapping(spec({"x": {"range": [0, 64]}, "hue": {"range": [0, 360]}, "saturation": {"range": [0.2, 1.5]},
                           "brightness": {"range": [0.3, 1.4]}}, {}, {"x": [60, 64]}))
    t = RegionColour(b, "train", params_key="colour")
    rng = np.random.default_rng(1)
    img = rng.integers(0, 256, (6, 6, 3), dtype=np.uint8)
    for s in range(10):
        t.set_random_seed(s)
        r = t(image=img)
        col = r["colour"]
        for (y, x) in ((0, 0), (2, 3), (5, 5)):
            h, sat, v = colorsys.rgb_to_hsv(*(img[y, x] / 255.0))
            h = (h + col["hue"] / 360.0) % 1.0
            want = np.array(colorsys.hsv_to_rgb(h, min(sat * col["saturation"], 1.0), min(v * col["brightness"], 1.0)))
            np.testing.assert_allclose(r["image"][y, x] / 255.0, want, atol=1.5 / 255)


def test_placement_recolours_the_content_not_the_fill(composition):
    t = RegionPlacement(composition, "train", content_size=(16, 16), fill=0)
    img = np.full((16, 16, 3), (200, 30, 30), np.uint8)
    for s in range(5):
        t.set_random_seed(s)
        out = t(image=img)["image"]
        p = t.params["placement"]
        assert out[0, 0].tolist() == [0, 0, 0] or not _inside(p, 16)
        # the centre pixel of the content carries the drawn hue
        cx, cy = int(p["cx_px"]), int(p["cy_px"])
        if _inside(p, 12):
            h = colorsys.rgb_to_hsv(*(out[cy, cx] / 255.0))[0] * 360
            base = colorsys.rgb_to_hsv(200 / 255, 30 / 255, 30 / 255)[0] * 360
            assert abs(((h - base - p["hue"]) + 180) % 360 - 180) < 2.0


def test_grey_images_take_brightness_only():
    b = open_mapping(spec({"x": {"range": [0, 64]}, "hue": {"range": [0, 360]}, "brightness": {"range": [0.5, 0.6]}},
                          {}, {"x": [60, 64]}))
    t = RegionColour(b, "train")
    img = np.full((4, 4), 200, np.uint8)
    out = t(image=img)["image"]
    v = t.params["colour"]["brightness"]
    assert out.shape == (4, 4) and np.all(out == int(200 * v + 0.5))


# ---- arguments that are not what they say: one line, not a raw error ------------------------------


@pytest.mark.parametrize("kwargs", [{"content_size": (float("inf"), 8)}, {"content_size": "88"},
                                    {"content_size": (8.5, 8)}, {"interpolation": 99}, {"mask_interpolation": True},
                                    {"fill": "x"}, {"fill_mask": [float("nan")]}, {"class_key": 5},
                                    {"item_key": 3}, {"log": 5}])
def test_region_placement_refuses_bad_arguments_in_one_line(geom, kwargs):
    # before: OverflowError, a cv2.error on the first call, or silently accepted ('88' became 8x8)
    from augsplit.errors import AugsplitError

    args = dict(content_size=(8, 8))
    args.update(kwargs)
    with pytest.raises(AugsplitError) as e:
        RegionPlacement(geom, "train", **args)
    assert next(iter(kwargs)) in str(e.value)


@pytest.mark.parametrize("value", [-5, "a", 2.5, True])
def test_region_placement_refuses_a_bad_item_number_in_one_line(geom, value):
    from augsplit.errors import AugsplitError

    t = A.Compose([RegionPlacement(geom, "train", content_size=(8, 8), item_key="item")])
    with pytest.raises(AugsplitError) as e:
        t(image=np.zeros((8, 8, 3), np.uint8), item=value)
    assert "item" in str(e.value)


def test_region_placement_refuses_an_empty_image_in_one_line(geom):
    from augsplit.errors import AugsplitError

    t = A.Compose([RegionPlacement(geom, "train", content_size=(8, 8))])
    with pytest.raises(AugsplitError) as e:
        t(image=np.zeros((0, 8, 3), np.uint8))
    assert "empty" in str(e.value)
