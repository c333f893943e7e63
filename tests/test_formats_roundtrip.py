"""Generated images written out as COCO (with masks), YOLO and VOC, split back by placement
with `augsplit assign`, audited with `augsplit audit`: the splits equal the manifest's own, the
audit passes, and a planted leak fails it."""

from __future__ import annotations

import json
import shutil

import numpy as np
import pytest
from annotated import write_coco, write_voc, write_yolo
from specs import write_spec

from augsplit.cli import main
from augsplit.generate import Options
from augsplit.dataset import read_manifest

pytest.importorskip("pycocotools")

SPEC = {
    "seed": 5,
    "canvas": {"width": 64, "height": 64, "mode": "rgb"},
    "objects": {"kind": "polyomino", "cells": 3, "cell_px": 4},
    "background": {"kind": "uniform_noise", "lo": 0.0, "hi": 0.4},
    "axes": {"x": {"range": [8, 56]}, "y": {"range": [8, 56]}, "scale": {"range": [0.8, 1.2]}},
    "splits": {"train": {"region": {"x": [8, 20]}, "per_class": 8},
               "test": {"region": {"x": [44, 56]}, "per_class": 5}},
    "guarantees": [{"disjoint": "footprint", "between": ["train", "test"]}],
}
SERIAL = Options(progress=False)

# A spec that only splits existing data: no objects, the boundary in the middle of the gap,
# and the footprint claim the audit checks on the real boxes and masks.
SPLIT_SPEC = {
    "seed": 0,
    "canvas": {"width": 64, "height": 64},
    "axes": {"x": {"range": [0, 64]}, "y": {"range": [0, 64]}},
    "splits": {"train": {"region": {"x": [0, 32]}, "count": 1}, "test": {"region": {"x": [32, 64]}, "count": 1}},
    "guarantees": [{"disjoint": "footprint", "between": ["train", "test"]}],
}


@pytest.fixture(scope="module")
def manifest(serial):
    return read_manifest(serial)


@pytest.fixture(scope="module")
def split_spec(tmp_path_factory):
    return write_spec(tmp_path_factory.mktemp("splitspec"), SPLIT_SPEC)


def cli(*args) -> int:
    return main([str(a) for a in args])


def test_coco_split_and_audit(serial, manifest, split_spec, tmp_path, capsys):
    coco = write_coco(serial, manifest, tmp_path / "coco" / "ann.json", upscale=3)  # a third at 128 x 128 px
    assert cli("assign", split_spec, coco, "--out", tmp_path / "splits") == 0
    data = json.loads(coco.read_text())
    name_of = {im["id"]: im["file_name"] for im in data["images"]}
    got = {}
    for s in ("train", "test"):
        part = json.loads((tmp_path / "splits" / f"{s}.json").read_text())
        assert part["categories"] == data["categories"]
        assert {a["image_id"] for a in part["annotations"]} == {im["id"] for im in part["images"]}
        assert all(a in data["annotations"] for a in part["annotations"])  # ids and masks kept as they were
        got.update({name_of[im["id"]]: s for im in part["images"]})
    truth = {f"images/{i}.png": s for i, s in zip(manifest["image_id"], manifest["split"])}
    assert got == truth

    assert cli("audit", coco, "--splits", tmp_path / "splits", "--spec", split_spec, "--out", tmp_path / "a1") == 0
    report = json.loads((tmp_path / "a1" / "audit.json").read_text())
    fp = next(c for c in report["checks"] if c["name"] == "footprint_overlap")
    assert fp["verdict"] == "pass" and fp["numbers"]["n_masks"] == len(manifest)
    assert fp["numbers"]["claim"] is True

    # plant a leak: a test image also holds a copy of a training object (box and mask)
    tr = next(a for a in data["annotations"] if got[name_of[a["image_id"]]] == "train" and isinstance(a["segmentation"], dict)
              and next(im for im in data["images"] if im["id"] == a["image_id"])["width"] == 64)
    te = next(im for im in data["images"] if got[im["file_name"]] == "test" and im["width"] == 64)
    data["annotations"].append(dict(tr, id=99999, image_id=te["id"]))
    coco.write_text(json.dumps(data))
    capsys.readouterr()
    assert cli("audit", coco, "--splits", tmp_path / "splits", "--spec", split_spec, "--out", tmp_path / "a2") == 1
    report = json.loads((tmp_path / "a2" / "audit.json").read_text())
    fp = next(c for c in report["checks"] if c["name"] == "footprint_overlap")
    assert fp["verdict"] == "fail" and fp["numbers"]["n_overlapping"] == 1


def test_yolo_split_and_audit(serial, manifest, split_spec, tmp_path):
    root = write_yolo(serial, manifest, tmp_path / "yolo", upscale=2, polygons=True)
    assert cli("assign", split_spec, root, "--out", tmp_path / "splits") == 0
    got = {}
    for s in ("train", "test"):
        for line in (tmp_path / "splits" / f"{s}.txt").read_text().splitlines():
            got[line.rsplit("/", 1)[1].removesuffix(".png")] = s
    assert got == dict(zip(manifest["image_id"], manifest["split"]))
    assert cli("audit", root, "--splits", tmp_path / "splits", "--spec", split_spec, "--out", tmp_path / "a1") == 0

    # plant a leak: a test image becomes an exact copy of a training image
    tr = next(p for p in (root / "images").rglob("train-*.png"))
    te = next(p for p in (root / "images").rglob("test-*.png") if p.stat().st_size and _size(p) == _size(tr))
    shutil.copyfile(tr, te)
    assert cli("audit", root, "--splits", tmp_path / "splits", "--spec", split_spec, "--out", tmp_path / "a2") == 1
    report = json.loads((tmp_path / "a2" / "audit.json").read_text())
    nd = next(c for c in report["checks"] if c["name"] == "near_duplicates")
    assert nd["verdict"] == "fail"


def test_voc_split_and_audit(serial, manifest, split_spec, tmp_path):
    root = write_voc(serial, manifest, tmp_path / "voc", upscale=2)
    assert cli("assign", split_spec, root, "--out", tmp_path / "splits") == 0
    got = {}
    for s in ("train", "test"):
        got.update({i: s for i in (tmp_path / "splits" / f"{s}.txt").read_text().split()})
    assert got == dict(zip(manifest["image_id"], manifest["split"]))
    assert cli("audit", root, "--splits", tmp_path / "splits", "--spec", split_spec, "--out", tmp_path / "a1") == 0

    # plant a leak: a training object's box is added to a test image's XML
    tr = manifest[manifest["split"] == "train"].iloc[1]  # odd rows keep their size
    te = manifest[manifest["split"] == "test"].iloc[1]
    xml = root / "Annotations" / f"{te['image_id']}.xml"
    box = (f"<object><name>{tr['class_name']}</name><bndbox><xmin>{tr['bbox_x0'] + 1}</xmin><ymin>{tr['bbox_y0'] + 1}"
           f"</ymin><xmax>{tr['bbox_x1']}</xmax><ymax>{tr['bbox_y1']}</ymax></bndbox></object>")
    xml.write_text(xml.read_text().replace("</annotation>", box + "</annotation>"))
    assert cli("audit", root, "--splits", tmp_path / "splits", "--spec", split_spec, "--out", tmp_path / "a2") == 1
    report = json.loads((tmp_path / "a2" / "audit.json").read_text())
    fp = next(c for c in report["checks"] if c["name"] == "footprint_overlap")
    assert fp["verdict"] == "fail" and fp["numbers"]["n_overlapping"] >= 1


def _size(p):
    from augsplit.formats.imagesize import image_size

    return image_size(p)


def test_coco_masks_reach_the_audit_as_rendered(serial, manifest, split_spec, tmp_path):
    """RLE and polygon masks, some on images twice the canvas size, come back as the rendered
    footprints on the canvas, pixel for pixel; polygons rasterise as pycocotools does."""
    import pycocotools.mask as cm
    from annotated import full_masks

    from augsplit.build import open_spec
    from augsplit.formats.audit_input import audit_input
    from augsplit.formats.boxes import polygons_mask
    from augsplit.formats.coco import read_coco

    coco = write_coco(serial, manifest, tmp_path / "ann.json", upscale=3)
    objs = read_coco(coco)
    data = audit_input(objs, manifest["split"].to_numpy(), open_spec(split_spec, for_data=True).plan)
    assert len(data.mask_rows) == len(manifest) and data.canvas_hw == (64, 64)
    for i, truth in enumerate(full_masks(serial, manifest)):
        x0, y0, x1, y1 = data.table.loc[i, ["bbox_x0", "bbox_y0", "bbox_x1", "bbox_y1"]]
        assert np.array_equal(data.mask_loader(i), truth[y0:y1, x0:x1]), i
    raw = json.loads(coco.read_text())
    for a, im in zip(raw["annotations"], raw["images"]):
        if isinstance(a["segmentation"], list):  # the COCO API's rasteriser as the reference
            ref = cm.decode(cm.merge(cm.frPyObjects(a["segmentation"], im["height"], im["width"]))).astype(bool)
            assert np.array_equal(polygons_mask(a["segmentation"], im["height"], im["width"], "t"), ref)
