"""`augsplit assign` / `augsplit audit` on users' annotated data: box conventions, each image's
own size, labels as written, specs without objects, outside rows, guard bands, images whose
objects fall in different splits, and never overwriting what augsplit did not write."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
import yaml

from augsplit.cli import main

NO_OBJECTS = {
    "seed": 0,
    "canvas": {"width": 64, "height": 64},
    "axes": {"x": {"range": [0, 64]}, "y": {"range": [0, 64]}},
    "splits": {"train": {"region": {"x": [0, 32]}, "count": 1}, "test": {"region": {"x": [32, 64]}, "count": 1}},
}

TINY = {"kind": "polyomino", "cells": 2, "cell_px": 2}  # for checks that must not depend on leaving objects out


def cli(*args) -> int:
    return main([str(a) for a in args])


def spec_file(tmp_path, spec=None, name="spec.yaml", **changes):
    d = dict(spec or NO_OBJECTS, **changes)
    p = tmp_path / name
    p.write_text(yaml.safe_dump(d, sort_keys=False))
    return p


def demo_boxes(n=150, seed=0, size=64):
    """Objects on the demo spec's canvas: centres, 12 px boxes, and the split each centre is in
    (train: y <= 20, first in spec order; test_far_lane: y >= 44)."""
    rng = np.random.default_rng(seed)
    cx, cy = rng.uniform(14, 50, n), rng.uniform(8, 56, n)
    truth = np.where(cy <= 20, "train", np.where(cy >= 44, "test_far_lane", "none"))
    return cx, cy, truth


def test_flattened_coco_csv_needs_its_convention_and_then_is_right(tmp_path, capsys):
    cx, cy, truth = demo_boxes()
    w = h = 12.0
    df = pd.DataFrame({"image_id": np.arange(len(cx)), "file_name": [f"{i}.jpg" for i in range(len(cx))],
                       "width": 64, "height": 64, "category": "P4-00", "x": cx - w / 2, "y": cy - h / 2, "w": w, "h": h})
    src = tmp_path / "coco_flat.csv"
    df.to_csv(src, index=False)
    # x, y of a COCO box are its top-left corner: read as a centre, every object would be 6 px off
    assert cli("assign", "demo", src, "--out", tmp_path / "a.csv") == 2
    err = capsys.readouterr().err
    assert "columns x, y, w, h look like boxes" in err and "--boxes" in err
    assert not (tmp_path / "a.csv").exists()
    assert cli("assign", "demo", src, "--boxes", "xywh", "--out", tmp_path / "a.csv") == 0
    out = pd.read_csv(tmp_path / "a.csv")
    assert (out["split"].to_numpy() == truth).all()
    assert list(out.columns[: len(df.columns)]) == list(df.columns)  # the user's table, columns kept


@pytest.mark.parametrize("conv,units", [("xyxy", "px"), ("cxcywh", "norm"), ("xywh", "px")])
def test_images_of_another_size_than_the_canvas(tmp_path, conv, units):
    cx, cy, truth = demo_boxes(seed=1)
    f = np.where(np.arange(len(cx)) % 3 == 0, 2.0, np.where(np.arange(len(cx)) % 3 == 1, 0.5, 1.0))  # 128, 32, 64 px
    W = H = 64 * f
    x, y, s = cx * f, cy * f, 10 * f
    cols = {"xyxy": (x - s / 2, y - s / 2, x + s / 2, y + s / 2), "xywh": (x - s / 2, y - s / 2, s, s),
            "cxcywh": (x, y, s, s)}[conv]
    if units == "norm":
        cols = (cols[0] / W, cols[1] / H, cols[2] / W, cols[3] / H)
    df = pd.DataFrame(dict(zip(("a", "b", "c", "d"), cols), image_width=W, image_height=H))
    src = tmp_path / "boxes.parquet"
    df.to_parquet(src)
    assert cli("assign", "demo", src, "--boxes", conv, "--box-units", units, "--box-columns", "a,b,c,d",
               "--out", tmp_path / "out.parquet") == 0
    assert (pd.read_parquet(tmp_path / "out.parquet")["split"].to_numpy() == truth).all()


def test_boxes_need_no_ref_size_when_no_split_depends_on_scale(tmp_path):
    cx, cy, truth = demo_boxes(seed=2)
    df = pd.DataFrame({"bbox_x0": cx - 5, "bbox_y0": cy - 5, "bbox_x1": cx + 5, "bbox_y1": cy + 5})
    df.to_csv(tmp_path / "b.csv", index=False)
    assert cli("assign", "demo", tmp_path / "b.csv", "--out", tmp_path / "o.csv") == 0  # the demo splits by y only
    assert (pd.read_csv(tmp_path / "o.csv")["split"].to_numpy() == truth).all()


def test_ref_size_is_asked_for_where_a_split_depends_on_scale(tmp_path, capsys):
    spec = spec_file(tmp_path, axes={"x": {"range": [0, 64]}, "scale": {"range": [0.5, 2.0]}},
                     splits={"train": {"region": {"scale": [0.5, 1.0]}, "count": 1},
                             "test": {"region": {"scale": [1.0, 2.0]}, "count": 1}})
    side = np.array([6.0, 9.0, 15.0, 20.0])  # with a native size of 10 px: scales 0.6, 0.9, 1.5, 2.0
    pd.DataFrame({"bbox_x0": 10.0, "bbox_y0": 10.0, "bbox_x1": 10 + side, "bbox_y1": 10 + side}).to_csv(tmp_path / "b.csv", index=False)
    assert cli("assign", spec, tmp_path / "b.csv") == 2
    assert "--ref-size" in capsys.readouterr().err
    assert cli("assign", spec, tmp_path / "b.csv", "--ref-size", 10, "--out", tmp_path / "o.csv") == 0
    assert pd.read_csv(tmp_path / "o.csv")["split"].tolist() == ["train", "train", "test", "test"]


def test_rows_outside_the_axis_ranges_are_counted_and_named(tmp_path, capsys):
    spec = spec_file(tmp_path, objects=TINY, axes={"x": {"range": [8, 56]}, "y": {"range": [0, 64]}},
                     splits={"train": {"region": {"x": [8, 30]}, "count": 1}, "test": {"region": {"x": [34, 56]}, "count": 1}})
    cx = np.array([2.0, 20.0, 32.0, 40.0, 60.0, 61.0])
    pd.DataFrame({"image_id": [f"im{i}" for i in range(6)], "bbox_x0": cx - 2, "bbox_y0": 30.0, "bbox_x1": cx + 2,
                  "bbox_y1": 34.0}).to_csv(tmp_path / "b.csv", index=False)
    assert cli("assign", spec, tmp_path / "b.csv", "--out", tmp_path / "o.csv") == 0
    out = capsys.readouterr().out
    assert pd.read_csv(tmp_path / "o.csv")["split"].tolist() == ["outside", "train", "none", "test", "outside", "outside"]
    assert "3 objects lie outside the spec's axis ranges (x 3), labelled 'outside'; e.g. images im0, im4, im5" in out


def test_user_labels_map_to_by_class_regions_without_objects_or_renaming(tmp_path):
    spec = spec_file(tmp_path, splits={
        "train": {"region": {"by_class": {"car": {"x": [0, 32]}, "*": {"x": [32, 64]}}}, "count": 1},
        "test": {"region": {"by_class": {"car": {"x": [32, 64]}, "*": {"x": [0, 32]}}}, "count": 1}})
    df = pd.DataFrame({"label": ["car", "car", "bus", "bus", "truck"], "x": [10.0, 50.0, 10.0, 50.0, 50.0], "y": 20.0})
    df.to_csv(tmp_path / "t.csv", index=False)
    assert cli("assign", spec, tmp_path / "t.csv", "--out", tmp_path / "o.csv") == 0
    out = pd.read_csv(tmp_path / "o.csv")
    assert out["split"].tolist() == ["train", "test", "test", "train", "train"]
    assert out["label"].tolist() == df["label"].tolist()


def test_spec_without_objects_cannot_generate_or_plan(tmp_path, capsys):
    spec = spec_file(tmp_path)
    assert cli("plan", spec) == 2
    assert "objects: required key is missing" in capsys.readouterr().err


def test_an_existing_split_column_is_kept_unless_asked(tmp_path, capsys):
    df = pd.DataFrame({"x": [10.0, 50.0], "y": 20.0, "split": ["mine", "mine"]})
    df.to_csv(tmp_path / "t.csv", index=False)
    spec = spec_file(tmp_path, objects=TINY)
    assert cli("assign", spec, tmp_path / "t.csv", "--out", tmp_path / "o.csv") == 2
    assert "already has a 'split' column; pass --replace-split" in capsys.readouterr().err
    assert not (tmp_path / "o.csv").exists()
    assert cli("assign", spec, tmp_path / "t.csv", "--out", tmp_path / "o.csv", "--replace-split") == 0
    assert pd.read_csv(tmp_path / "o.csv")["split"].tolist() == ["train", "test"]


def test_guard_only_where_auto_guard_took_a_band_from_a_split(tmp_path):
    spec = spec_file(tmp_path, {
        "seed": 1, "canvas": {"width": 100, "height": 20}, "objects": {"kind": "polyomino", "cells": 2, "cell_px": 2},
        "axes": {"x": {"range": [0, 100]}},
        "splits": {"train": {"region": {"x": [0, 30]}, "count": 2}, "test": {"region": {"x": [35, 100]}, "count": 2}},
        "guarantees": [{"disjoint": "parameters", "between": ["train", "test"], "margin": 0.1, "auto_guard": True}]})
    # the guard grows train by 0.1 of the axis (to 40): it takes [35, 40] from test; (30, 35) was never test's
    pd.DataFrame({"x": [20.0, 32.0, 37.0, 50.0]}).to_csv(tmp_path / "t.csv", index=False)
    assert cli("assign", spec, tmp_path / "t.csv", "--out", tmp_path / "o.csv") == 0
    assert pd.read_csv(tmp_path / "o.csv")["split"].tolist() == ["train", "none", "guard", "test"]


# ---- images whose objects fall in different splits; writing back ----------------------------

def write_coco(path, images, anns, cats=("car", "bus")):
    data = {"images": [{"id": i, "file_name": f"{i}.png", "width": w, "height": h} for i, w, h in images],
            "annotations": [{"id": k, "image_id": i, "category_id": cats.index(c) + 1, "bbox": list(b)}
                            for k, (i, c, b) in enumerate(anns, start=10)],
            "categories": [{"id": k + 1, "name": c} for k, c in enumerate(cats)]}
    path.write_text(json.dumps(data))
    return path


@pytest.fixture
def mixed_coco(tmp_path):
    # image 1: two train objects; image 2: a small train object and a large test object; image 3: none
    return write_coco(tmp_path / "ann.json", [(1, 64, 64), (2, 64, 64), (3, 64, 64)],
                      [(1, "car", (4, 4, 8, 8)), (1, "bus", (10, 30, 8, 8)), (2, "car", (4, 4, 6, 6)),
                       (2, "bus", (40, 20, 16, 16))])


@pytest.mark.parametrize("rule,train,test,extra", [("drop", [1], [], {}), ("keep", [1], [], {"mixed": [2]}),
                                                   ("largest", [1], [2], {})])
def test_mixed_images_follow_the_chosen_rule(tmp_path, mixed_coco, capsys, rule, train, test, extra):
    out = tmp_path / "splits"
    assert cli("assign", spec_file(tmp_path), mixed_coco, "--mixed", rule, "--out", out) == 0
    text = capsys.readouterr().out
    assert "1 images have objects in different splits" in text and f"--mixed {rule}" in text
    for name, ids in [("train", train), ("test", test), *extra.items()]:
        part = json.loads((out / f"{name}.json").read_text())
        assert [im["id"] for im in part["images"]] == ids
        assert sorted(a["id"] for a in part["annotations"]) == [a for i in ids for a in {1: [10, 11], 2: [12, 13]}[i]]
        assert [c["name"] for c in part["categories"]] == ["car", "bus"]
    table = pd.read_csv(out / "splits.csv")
    assert table["split"].tolist()[2] == "empty"


def test_rerun_replaces_only_its_own_files(tmp_path, mixed_coco):
    out = tmp_path / "splits"
    assert cli("assign", spec_file(tmp_path), mixed_coco, "--mixed", "keep", "--out", out) == 0
    assert (out / "mixed.json").exists()
    assert cli("assign", spec_file(tmp_path), mixed_coco, "--mixed", "drop", "--out", out) == 0
    assert not (out / "mixed.json").exists()  # written by the first run, not wanted by the second
    foreign = tmp_path / "other"
    foreign.mkdir()
    (foreign / "train.json").write_text("mine")
    assert cli("assign", spec_file(tmp_path), mixed_coco, "--out", foreign) == 2
    assert (foreign / "train.json").read_text() == "mine" and not (foreign / "test.json").exists()


def test_yolo_lists_and_voc_image_sets(tmp_path):
    import cv2

    for d in ("yolo/images", "yolo/labels"):
        (tmp_path / d).mkdir(parents=True)
    for name, cx in (("a", 0.2), ("b", 0.8)):
        cv2.imwrite(str(tmp_path / f"yolo/images/{name}.png"), np.zeros((32, 48, 3), np.uint8))
        (tmp_path / f"yolo/labels/{name}.txt").write_text(f"0 {cx} 0.5 0.1 0.1\n")
    assert cli("assign", spec_file(tmp_path), tmp_path / "yolo") == 0
    out = tmp_path / "yolo.splits"  # the default: beside the input
    assert (out / "train.txt").read_text() == f"{(tmp_path / 'yolo/images/a.png').resolve()}\n"
    assert (out / "test.txt").read_text() == f"{(tmp_path / 'yolo/images/b.png').resolve()}\n"


# ---- audit ------------------------------------------------------------------------------------

def test_audit_needs_the_split_assignment(tmp_path, mixed_coco, capsys):
    assert cli("audit", mixed_coco) == 2
    err = capsys.readouterr().err
    assert "--splits" in err and err.count("\n") == 1


def test_audit_footprints_same_class_or_any_class(tmp_path, capsys):
    # a test bus covers the pixels of a training car: not a leak per class, an overlap across classes
    coco = write_coco(tmp_path / "ann.json", [(1, 64, 64), (2, 64, 64)],
                      [(1, "car", (4, 4, 10, 10)), (2, "bus", (8, 8, 10, 10))])
    pd.DataFrame({"image_id": [1, 2], "split": ["train", "test"]}).to_csv(tmp_path / "s.csv", index=False)
    common = ("audit", coco, "--splits", tmp_path / "s.csv", "--threshold", "near_duplicates_fail=false")
    assert cli(*common, "--out", tmp_path / "a") == 0  # no image files: near-duplicates skipped
    r = json.loads((tmp_path / "a" / "audit.json").read_text())
    fp = next(c for c in r["checks"] if c["name"] == "footprint_overlap")
    assert fp["verdict"] == "pass"
    assert any(s["name"] == "near_duplicates" for s in r["skipped"])  # a check that could not run is not a pass
    assert any("no image files found" in n for n in r["inputs"]["notes"])
    assert cli(*common, "--threshold", "footprint_per_class=false", "--out", tmp_path / "b") == 0
    fp = next(c for c in json.loads((tmp_path / "b" / "audit.json").read_text())["checks"] if c["name"] == "footprint_overlap")
    assert fp["verdict"] == "warn" and fp["numbers"]["shared_px_total"] == 36  # the 6 x 6 px both boxes cover
    assert cli(*common, "--threshold", "footprint_per_class=false", "--threshold", "footprint_disjoint=true",
               "--out", tmp_path / "c") == 1


def test_labels_are_not_looked_up_when_no_split_depends_on_the_class(tmp_path):
    cx, cy, truth = demo_boxes(seed=3)
    pd.DataFrame({"label": "car", "x": cx, "y": cy}).to_csv(tmp_path / "t.csv", index=False)
    assert cli("assign", "demo", tmp_path / "t.csv", "--out", tmp_path / "o.csv") == 0  # no renaming to P4-00
    out = pd.read_csv(tmp_path / "o.csv")
    assert (out["split"].to_numpy() == truth).all() and (out["label"] == "car").all()


def test_a_spec_with_objects_names_the_labels_it_does_not_have(tmp_path, capsys):
    spec = spec_file(tmp_path, objects=dict(TINY, cells=3), splits={
        "train": {"region": {"by_class": {"P3-00": {"x": [0, 32]}, "*": {"x": [32, 64]}}}, "count": 2},
        "test": {"region": {"by_class": {"P3-00": {"x": [32, 64]}, "*": {"x": [0, 32]}}}, "count": 2}})
    pd.DataFrame({"label": ["P3-00", "car"], "x": [10.0, 50.0], "y": 5.0}).to_csv(tmp_path / "t.csv", index=False)
    assert cli("assign", spec, tmp_path / "t.csv") == 2
    assert "column 'label' holds classes the spec does not have: car (the spec's classes: P3-00, P3-01)" in capsys.readouterr().err


def test_audit_parameter_proximity_on_real_boxes(tmp_path):
    spec = spec_file(tmp_path, guarantees=[{"disjoint": "parameters", "between": ["train", "test"], "margin": 0.1}],
                     splits={"train": {"region": {"x": [0, 24]}, "count": 1}, "test": {"region": {"x": [32, 64]}, "count": 1}})
    anns = [(1, "car", (4, 20, 8, 8)), (2, "car", (12, 40, 8, 8)), (3, "car", (44, 20, 8, 8)), (4, "car", (50, 40, 8, 8))]
    coco = write_coco(tmp_path / "ann.json", [(i, 64, 64) for i in range(1, 5)], anns)
    assert cli("assign", spec, coco, "--out", tmp_path / "s") == 0
    assert cli("audit", coco, "--splits", tmp_path / "s", "--spec", spec, "--out", tmp_path / "a") == 0
    # a test object 4 px (0.0625 of the axis) from a training one: closer than the 0.1 margin
    coco = write_coco(tmp_path / "ann.json", [(i, 64, 64) for i in range(1, 6)], anns + [(5, "car", (16, 40, 8, 8))])
    pd.DataFrame({"image_id": [5], "split": ["test"]}).to_csv(tmp_path / "extra.csv", index=False)
    s = pd.concat([pd.read_csv(tmp_path / "s" / "splits.csv")[["image_id", "split"]], pd.read_csv(tmp_path / "extra.csv")])
    s.to_csv(tmp_path / "s2.csv", index=False)
    assert cli("audit", coco, "--splits", tmp_path / "s2.csv", "--spec", spec, "--out", tmp_path / "b") == 1
    r = json.loads((tmp_path / "b" / "audit.json").read_text())
    prox = next(c for c in r["checks"] if c["name"] == "parameter_proximity")
    assert prox["verdict"] == "fail" and prox["numbers"]["distance"]["min"] == pytest.approx(0.0625)


def test_positions_in_degrees_of_visual_angle_on_images_of_any_size(tmp_path):
    # 57 cm at 10 px/cm: 570 px to the screen; x = atan((px - 64) / 570) from the canvas centre
    spec = spec_file(tmp_path, canvas={"width": 128, "height": 64}, viewing={"distance_cm": 57, "px_per_cm": 10},
                     axes={"x": {"range": [-5.5, 5.5], "unit": "deg"}},
                     splits={"train": {"region": {"x": [-5.5, -2]}, "count": 1}, "test": {"region": {"x": [2, 5.5]}, "count": 1}})
    px = np.array([20.0, 40.0, 64.0, 90.0, 110.0])  # -4.41, -2.41, 0, 2.61, 4.61 deg (exact atan, from units.py's formula)
    expect = ["train", "train", "none", "test", "test"]
    images = [(i, 128 * f, 64 * f) for i, f in zip(range(1, 6), (1, 2, 1, 2, 1))]
    anns = [(i, "car", (x * f - 3 * f, 20 * f, 6 * f, 6 * f)) for (i, _, _), x, f in zip(images, px, (1, 2, 1, 2, 1))]
    coco = write_coco(tmp_path / "ann.json", images, anns)
    assert cli("assign", spec, coco, "--out", tmp_path / "s") == 0
    assert pd.read_csv(tmp_path / "s" / "splits.csv")["split"].tolist() == expect
    assert np.allclose(np.degrees(np.arctan((px - 64) / 570)), [-4.41, -2.41, 0, 2.61, 4.61], atol=0.01)
