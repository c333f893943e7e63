"""The annotated-format readers: RLE and polygon masks, image headers, COCO, YOLO and VOC files,
and box conventions, each checked against a reference (pycocotools, shapely, OpenCV, Pillow)."""

from __future__ import annotations

import json

import cv2
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from augsplit.errors import DatasetError
from augsplit.formats import rle
from augsplit.formats.boxes import polygons_mask, to_px, to_xyxy
from augsplit.formats.coco import read_coco
from augsplit.formats.imagesize import image_size
from augsplit.formats.voc import read_voc
from augsplit.formats.yolo import read_yolo

masks = st.tuples(st.integers(1, 30), st.integers(1, 30), st.integers(0, 2**32 - 1), st.floats(0, 1)).map(
    lambda a: np.random.default_rng(a[2]).random((a[0], a[1])) < a[3])


@settings(max_examples=150, deadline=None)
@given(masks)
def test_rle_matches_pycocotools(m):
    cm = pytest.importorskip("pycocotools.mask")
    ref = cm.encode(np.asfortranarray(m.astype(np.uint8)))  # the COCO API's own encoder
    mine = rle.encode(m)
    assert mine["counts"] == ref["counts"].decode("ascii") and mine["size"] == list(ref["size"])
    assert np.array_equal(rle.decode(ref), m)
    assert np.array_equal(rle.decode({"size": mine["size"], "counts": rle.counts_from_string(mine["counts"])}), m)


def test_rle_refuses_counts_that_do_not_fit():
    with pytest.raises(DatasetError, match="do not add up"):
        rle.decode({"size": [2, 2], "counts": [1, 2]})
    with pytest.raises(DatasetError, match="ends inside a number"):
        rle.decode({"size": [2, 2], "counts": "o"})


@settings(max_examples=60, deadline=None)
@given(st.lists(st.tuples(st.floats(0.3, 19.7), st.floats(0.3, 19.7)), min_size=3, max_size=8))
def test_polygon_mask_is_the_pixel_centres_inside(points):
    shapely = pytest.importorskip("shapely")
    from shapely.geometry import Point, Polygon

    poly = Polygon(points)
    if not poly.is_valid or poly.area < 1.0:
        return
    centres = [(j + 0.5, i + 0.5) for i in range(20) for j in range(20)]
    # shapely is the reference for "inside"; points within 0.1 px of an edge may go either way
    inside = np.array([poly.contains(Point(c)) for c in centres]).reshape(20, 20)
    near = np.array([poly.exterior.distance(Point(c)) < 0.1 for c in centres]).reshape(20, 20)
    got = polygons_mask([np.ravel(points).tolist()], 20, 20, "test")
    assert np.array_equal(got[~near], inside[~near]), shapely.__version__


@given(st.floats(0, 50), st.floats(0, 50), st.floats(0.5, 30), st.floats(0.5, 30))
def test_box_conventions_agree(x0, y0, w, h):
    a = np.array(to_xyxy(x0, y0, x0 + w, y0 + h, "xyxy"))
    b = np.array(to_xyxy(x0, y0, w, h, "xywh"))
    c = np.array(to_xyxy(x0 + w / 2, y0 + h / 2, w, h, "cxcywh"))
    assert np.allclose(a, b) and np.allclose(a, c)
    n = np.array(to_px(*(a / [100, 80, 100, 80]), "norm", 100, 80))
    assert np.allclose(n, a)


@pytest.mark.parametrize("ext", ["png", "jpg", "bmp", "webp", "tiff"])
def test_image_size_from_headers(tmp_path, ext):
    for w, h in ((37, 21), (640, 480), (1, 3)):
        p = tmp_path / f"a.{ext}"
        cv2.imwrite(str(p), np.zeros((h, w, 3), np.uint8))
        assert image_size(p) == (w, h)  # OpenCV wrote it with this shape


def test_image_size_gif_progressive_jpeg_and_lossless_webp(tmp_path):
    from PIL import Image

    for name, kw in (("a.gif", {}), ("b.jpg", {"progressive": True}), ("c.webp", {"lossless": True})):
        Image.new("RGB", (33, 17)).save(tmp_path / name, **kw)
        assert image_size(tmp_path / name) == (33, 17)  # Pillow wrote it with this size
    (tmp_path / "bad.png").write_bytes(b"not an image")
    with pytest.raises(DatasetError, match="not an image file"):
        image_size(tmp_path / "bad.png")


def _coco(tmp_path, anns, images=None, cats=None):
    data = {"images": images or [{"id": 7, "file_name": "a.png", "width": 40, "height": 30}],
            "annotations": anns, "categories": cats or [{"id": 1, "name": "car"}]}
    p = tmp_path / "ann.json"
    p.write_text(json.dumps(data))
    return p


def test_coco_boxes_masks_and_labels(tmp_path):
    m = np.zeros((30, 40), bool)
    m[5:9, 20:31] = True
    r = rle.encode(m)
    p = _coco(tmp_path, [{"id": 1, "image_id": 7, "category_id": 1, "bbox": [2, 3, 10, 4]},
                         {"id": 2, "image_id": 7, "category_id": 1, "segmentation": r},  # no bbox: the mask's
                         {"id": 3, "image_id": 7, "category_id": 1, "bbox": [0, 0, 4, 4],
                          "segmentation": [[0, 0, 4, 0, 4, 4, 0, 4]]}])
    objs = read_coco(p)
    o = objs.objects
    assert o["label"].tolist() == ["car"] * 3 and o["object_id"].tolist() == [1, 2, 3]
    assert o.loc[0, ["bbox_x0", "bbox_y0", "bbox_x1", "bbox_y1"]].tolist() == [2, 3, 12, 7]  # x, y from the top-left
    assert o.loc[1, ["bbox_x0", "bbox_y0", "bbox_x1", "bbox_y1"]].tolist() == [20, 5, 31, 9]
    assert (o["width"] == 40).all() and objs.images["image_id"].tolist() == [7]


@pytest.mark.parametrize("ann,msg", [
    ({"id": 1, "image_id": 8, "category_id": 1, "bbox": [0, 0, 1, 1]}, "image_id is not among the images"),
    ({"id": 1, "image_id": 7, "category_id": 9, "bbox": [0, 0, 1, 1]}, "category_id 9"),
    ({"id": 1, "image_id": 7, "category_id": 1}, "neither a bbox"),
    ({"id": 1, "image_id": 7, "category_id": 1, "bbox": [0, 0, 0, 1]}, "boxes are empty"),
])
def test_coco_refusals_name_the_annotation(tmp_path, ann, msg):
    with pytest.raises(DatasetError, match=msg) as e:
        read_coco(_coco(tmp_path, [ann]))
    assert "ann.json" in str(e.value)


def test_yolo_boxes_polygons_names_and_sizes(tmp_path):
    for d in ("images/a", "labels/a"):
        (tmp_path / d).mkdir(parents=True)
    cv2.imwrite(str(tmp_path / "images/a/one.jpg"), np.zeros((50, 100, 3), np.uint8))
    cv2.imwrite(str(tmp_path / "images/a/two.png"), np.zeros((20, 20, 3), np.uint8))  # no label file: no objects
    (tmp_path / "labels/a/one.txt").write_text("1 0.5 0.5 0.2 0.4\n\n0 0.1 0.1 0.3 0.1 0.3 0.3\n")
    (tmp_path / "data.yaml").write_text("names: {0: car, 1: bus}\n")
    objs = read_yolo(tmp_path)
    o = objs.objects
    assert o["label"].tolist() == ["bus", "car"] and o["object_id"].tolist() == [1, 3]  # the line numbers
    assert np.allclose(o.loc[0, ["bbox_x0", "bbox_y0", "bbox_x1", "bbox_y1"]].to_numpy(float), [40, 15, 60, 35])
    assert np.allclose(o.loc[1, ["bbox_x0", "bbox_y0", "bbox_x1", "bbox_y1"]].to_numpy(float), [10, 5, 30, 15])
    assert o.loc[1, "segmentation"] == [[10.0, 5.0, 30.0, 5.0, 30.0, 15.0]]
    assert objs.images["image_id"].tolist() == ["a/one", "a/two"] and objs.images["width"].tolist() == [100, 20]


def test_yolo_refusals(tmp_path):
    for d in ("images", "labels"):
        (tmp_path / d).mkdir()
    cv2.imwrite(str(tmp_path / "images/one.png"), np.zeros((10, 10, 3), np.uint8))
    (tmp_path / "labels/one.txt").write_text("0 0.5 0.5 0.2\n")
    with pytest.raises(DatasetError, match=r"one.txt:1: 3 numbers after the class"):
        read_yolo(tmp_path)
    (tmp_path / "labels/two.txt").write_text("0 0.5 0.5 0.2 0.2\n")
    (tmp_path / "labels/one.txt").write_text("0 0.5 0.5 0.2 0.2\n")
    with pytest.raises(DatasetError, match="no image file with this name"):
        read_yolo(tmp_path)


def test_voc_corners_are_one_based(tmp_path):
    (tmp_path / "Annotations").mkdir()
    (tmp_path / "Annotations" / "im1.xml").write_text(
        "<annotation><filename>im1.jpg</filename><size><width>50</width><height>40</height></size>"
        "<object><name>dog</name><bndbox><xmin>1</xmin><ymin>11</ymin><xmax>10</xmax><ymax>20</ymax></bndbox></object>"
        "</annotation>")
    o = read_voc(tmp_path).objects
    assert o.loc[0, ["bbox_x0", "bbox_y0", "bbox_x1", "bbox_y1"]].tolist() == [0, 10, 10, 20]  # 10 px wide
    assert o.loc[0, "label"] == "dog" and o.loc[0, "image_id"] == "im1"
    (tmp_path / "Annotations" / "im2.xml").write_text("<annotation><size><width>50</width></size></annotation>")
    with pytest.raises(DatasetError, match="im2.xml: <size> needs a positive"):
        read_voc(tmp_path)


def test_polygon_parts_add_up_and_crops_match_the_whole():
    a = [0.2, 0.2, 6.1, 0.2, 6.1, 5.9, 0.2, 5.9]
    b = [3.2, 3.2, 9.7, 3.2, 9.7, 9.8, 3.2, 9.8]  # overlaps a: the union, not its even-odd xor
    whole = polygons_mask([a, b], 10, 10, "t")
    assert np.array_equal(whole, polygons_mask([a], 10, 10, "t") | polygons_mask([b], 10, 10, "t"))
    assert whole[4, 4]
    crop = polygons_mask([a, b], 6, 5, "t", offset=(3, 2))  # rows 2..7, columns 3..7
    assert np.array_equal(crop, whole[2:8, 3:8])
    big = polygons_mask([a, b], 20, 20, "t", scale=(2, 2))
    assert big.sum() == pytest.approx(4 * whole.sum(), rel=0.15)


def test_coco_without_image_sizes_reads_them_from_the_files(tmp_path):
    cv2.imwrite(str(tmp_path / "a.png"), np.zeros((30, 40, 3), np.uint8))
    p = _coco(tmp_path, [{"id": 1, "image_id": 7, "category_id": 1, "bbox": [2, 3, 10, 4]}],
              images=[{"id": 7, "file_name": "a.png"}])
    o = read_coco(p).objects
    assert o.loc[0, ["width", "height"]].tolist() == [40, 30]


def test_annotations_cannot_reach_outside_the_images_folder_or_size(tmp_path):
    from augsplit.formats.audit_input import audit_input
    from augsplit.formats.boxes import MAX_PIXELS

    (tmp_path / "imgs").mkdir()
    p = _coco(tmp_path, [{"id": 1, "image_id": 7, "category_id": 1, "bbox": [2, 3, 10, 4]}],
              images=[{"id": 7, "file_name": "../secret.png", "width": 40, "height": 30}])
    objs = read_coco(p, tmp_path / "imgs")
    with pytest.raises(DatasetError, match="leaves the images folder"):
        audit_input(objs, ["train"])
    with pytest.raises(DatasetError, match=f"larger than {MAX_PIXELS} px"):
        read_coco(_coco(tmp_path, [{"id": 1, "image_id": 7, "category_id": 1, "bbox": [2, 3, 10, 4]}],
                        images=[{"id": 7, "file_name": "a.png", "width": 1 << 15, "height": 1 << 15}]))
    big = {"size": [30, 40], "counts": [1 << 40]}
    with pytest.raises(DatasetError, match="do not add up"):
        rle.decode(big)
    with pytest.raises(DatasetError, match="is not its image's"):
        from augsplit.formats.boxes import segmentation_mask

        segmentation_mask({"size": [1 << 20, 1 << 20], "counts": "0"}, 30, 40, "t")
