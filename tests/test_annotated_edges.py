"""`assign` and `audit` on users' annotated data at the edges: an output that would replace the
input, links that lead out of the dataset folder, split lists whose ids look like other images'
file names, tables kept as written, split names that clash with assign's own labels, and
malformed COCO fields. Each case was seen to fail (data loss, a read outside the folder, a
wrong verdict or a traceback) before its fix."""

from __future__ import annotations

import json
import os

import cv2
import numpy as np
import pandas as pd
import pytest
import yaml

from augsplit.cli import main

LANES = {
    "seed": 1,
    "canvas": {"width": 100, "height": 100, "mode": "gray"},
    "axes": {"x": {"range": [0, 1], "unit": "frac"}, "y": {"range": [0, 1], "unit": "frac"}},
    "splits": {"train": {"region": {"x": [0, 0.4]}, "count": 10}, "test": {"region": {"x": [0.6, 1.0]}, "count": 10}},
}


def cli(*args) -> int:
    return main([str(a) for a in args])


def spec(tmp_path, d=None, name="lanes.yaml"):
    p = tmp_path / name
    p.write_text(yaml.safe_dump(d or LANES, sort_keys=False))
    return p


def coco(boxes, files=None):
    """A COCO document: image k+1 (file k+1.png unless `files`) holds one 'car' with boxes[k] (x, y, w, h)."""
    files = files or [f"{k + 1}.png" for k in range(len(boxes))]
    return {"images": [{"id": k + 1, "file_name": f, "width": 100, "height": 100} for k, f in enumerate(files)],
            "annotations": [{"id": k + 1, "image_id": k + 1, "category_id": 1, "bbox": list(b)} for k, b in enumerate(boxes)],
            "categories": [{"id": 1, "name": "car"}]}


def write_json(path, doc):
    path.write_text(json.dumps(doc))
    return path


# ---- data loss ---------------------------------------------------------------------------------


def test_assign_never_replaces_its_input_among_its_own_earlier_outputs(tmp_path, capsys):
    s = spec(tmp_path)
    out = tmp_path / "ow"
    out.mkdir()
    src = write_json(out / "all.json", coco([(10, 40, 10, 10), (80, 40, 10, 10)]))
    assert cli("assign", s, src, "--out", out) == 0  # writes ow/train.json, ow/test.json
    before = (out / "train.json").read_bytes()
    swapped = dict(LANES, splits={"train": LANES["splits"]["test"], "test": LANES["splits"]["train"]})
    assert cli("assign", spec(tmp_path, swapped, "swap.yaml"), out / "train.json", "--out", out) == 2
    err = capsys.readouterr().err
    assert "is the input" in err and "train.json" in err
    assert (out / "train.json").read_bytes() == before  # the input is untouched


@pytest.mark.parametrize("out", ["-", "splits.csv"])
def test_assign_of_coco_refuses_an_out_that_is_not_a_folder_name(tmp_path, capsys, monkeypatch, out):
    monkeypatch.chdir(tmp_path)  # '-' would be made here
    src = write_json(tmp_path / "a.json", coco([(10, 40, 10, 10)]))
    assert cli("assign", spec(tmp_path), src, "--out", out) == 2
    assert ("not '-'" if out == "-" else "not a .csv table") in capsys.readouterr().err
    assert not (tmp_path / out).exists()


def test_assign_of_the_working_folder_without_out_is_one_line(tmp_path, capsys, monkeypatch):
    y = tmp_path / "y"
    (y / "images").mkdir(parents=True)
    (y / "labels").mkdir()
    cv2.imwrite(str(y / "images" / "0.png"), np.zeros((100, 100), np.uint8))
    (y / "labels" / "0.txt").write_text("0 0.1 0.5 0.1 0.1\n")
    s = spec(tmp_path)
    monkeypatch.chdir(y)
    assert cli("assign", s, ".") == 0  # written beside the folder, as for any other input
    assert (tmp_path / "y.splits" / "train.txt").is_file()


# ---- reading outside the folder ------------------------------------------------------------------


def _yolo_with_outside_link(tmp_path, what):
    y, outside = tmp_path / "y", tmp_path / "outside"
    for d in (y / "images", y / "labels", outside):
        d.mkdir(parents=True)
    for folder, name in ((y / "images", "0.png"), (outside, "s.png")):
        cv2.imwrite(str(folder / name), np.zeros((100, 100), np.uint8))
    (y / "labels" / "0.txt").write_text("0 0.1 0.5 0.1 0.1\n")
    (outside / "s.txt").write_text("0 0.9 0.5 0.1 0.1\n")
    (outside / "names.txt").write_text("car\n")
    if what == "label":
        (y / "labels" / "9.txt").symlink_to(outside / "s.txt")
        cv2.imwrite(str(y / "images" / "9.png"), np.zeros((100, 100), np.uint8))
    elif what == "image":
        (y / "labels" / "9.txt").write_text("0 0.9 0.5 0.1 0.1\n")
        (y / "images" / "9.png").symlink_to(outside / "s.png")
    else:
        (y / "classes.txt").symlink_to(outside / "names.txt")
    return y


@pytest.mark.parametrize("what", ["label", "image", "class names"])
def test_yolo_links_out_of_the_folder_are_refused_by_assign_and_audit(tmp_path, capsys, what):
    y = _yolo_with_outside_link(tmp_path, what)
    out = tmp_path / "sp"
    assert cli("assign", spec(tmp_path), y, "--out", out) == 2
    err = capsys.readouterr().err
    assert "link out of the dataset folder" in err and "Traceback" not in err
    assert not out.exists()
    os.makedirs(out)
    (out / "splits.csv").write_text("image_id,split\n0,train\n")
    assert cli("audit", y, "--splits", out) == 2
    assert "link out of the dataset folder" in capsys.readouterr().err


def test_yolo_links_inside_the_folder_are_read(tmp_path):
    y = _yolo_with_outside_link(tmp_path, "label")
    (y / "labels" / "9.txt").unlink()
    (y / "spare.txt").write_text("0 0.9 0.5 0.1 0.1\n")
    (y / "labels" / "9.txt").symlink_to(y / "spare.txt")
    assert cli("assign", spec(tmp_path), y, "--out", tmp_path / "sp") == 0
    got = pd.read_csv(tmp_path / "sp" / "splits.csv", dtype=str)
    assert dict(zip(got["image_id"], got["split"])) == {"0": "train", "9": "test"}


def _voc(folder, name, filename="a.png", x=(10, 20)):
    folder.mkdir(parents=True, exist_ok=True)
    (folder / name).write_text(
        f"<annotation><filename>{filename}</filename><size><width>100</width><height>100</height></size>"
        f"<object><name>car</name><bndbox><xmin>{x[0]}</xmin><ymin>40</ymin><xmax>{x[1]}</xmax><ymax>50</ymax>"
        "</bndbox></object></annotation>")


@pytest.mark.parametrize("case", ["xml link", "absolute filename", "dotdot filename", "folder", "broken link"])
def test_voc_inputs_leading_out_of_the_folder_are_one_line(tmp_path, capsys, case):
    voc, outside = tmp_path / "voc", tmp_path / "outside"
    _voc(voc, "a.xml")
    _voc(outside, "b.xml", x=(80, 90))
    if case == "xml link":
        (voc / "b.xml").symlink_to(outside / "b.xml")
    elif case == "absolute filename":
        _voc(voc, "c.xml", filename="/etc/passwd")
    elif case == "dotdot filename":
        _voc(voc, "c.xml", filename="../outside/b.png")
    elif case == "folder":
        (voc / "c.xml").mkdir()
    else:
        (voc / "c.xml").symlink_to(tmp_path / "nothing.xml")
    assert cli("assign", spec(tmp_path), voc, "--out", tmp_path / "sp") == 2
    err = capsys.readouterr().err
    assert "Traceback" not in err and ("out of the dataset folder" in err or "not a regular file" in err
                                       or "link to nothing" in err)
    assert not (tmp_path / "sp").exists()


def test_a_fifo_named_as_a_coco_image_is_refused_not_waited_on(tmp_path, capsys):
    doc = coco([(10, 40, 10, 10)])
    del doc["images"][0]["width"], doc["images"][0]["height"]  # read from the file's header
    os.mkfifo(tmp_path / "1.png")
    src = write_json(tmp_path / "a.json", doc)
    assert cli("assign", spec(tmp_path), src, "--out", tmp_path / "sp") == 2  # returns: no read blocks
    assert "not a regular file" in capsys.readouterr().err


# ---- verdicts ----------------------------------------------------------------------------------------


def test_a_split_list_of_ids_is_read_as_ids_even_where_an_id_is_another_image_file_stem(tmp_path, capsys):
    # image 1 is stored as 2.png and image 2 as 1.png: the split file's id 2 is image 2, not 2.png
    boxes = [(24, 40, 30, 20), (80, 40, 10, 10), (46, 40, 30, 20), (5, 40, 10, 10)]
    src = write_json(tmp_path / "a.json", coco(boxes, ["2.png", "1.png", "3.png", "4.png"]))
    s = spec(tmp_path)
    assert cli("assign", s, src, "--out", tmp_path / "sp") == 0
    capsys.readouterr()
    assert cli("audit", src, "--splits", tmp_path / "sp", "--out", tmp_path / "au") in (0, 1)
    doc = json.loads((tmp_path / "au" / "audit.json").read_text())
    fp = next(c for c in doc["checks"] if c["name"] == "footprint_overlap")
    # by hand: train image 1 covers x 24-54, test image 3 covers x 46-76: they share pixels
    assert fp["verdict"] != "pass", fp


def test_assign_keeps_every_csv_cell_as_written_and_matches_labels_as_written(tmp_path):
    by_class = dict(LANES, splits={
        "train": {"region": {"by_class": {"1": {"x": [0, 0.4]}, "*": {"x": [0.6, 1.0]}}}, "count": 10},
        "test": {"region": {"by_class": {"1": {"x": [0.6, 1.0]}, "*": {"x": [0, 0.4]}}}, "count": 10}})
    t = tmp_path / "t.csv"
    t.write_text("image_id,x,y,class,code\n007,0.1,0.5,1,0012\n008,0.9,0.5,1,NA\n009,0.1,0.5,,\n")
    assert cli("assign", spec(tmp_path, by_class, "c.yaml"), t, "--out", tmp_path / "o.csv") == 0
    lines = (tmp_path / "o.csv").read_text().splitlines()
    assert lines == ["image_id,x,y,class,code,split", "007,0.1,0.5,1,0012,train", "008,0.9,0.5,1,NA,test",
                     "009,0.1,0.5,,,test"]  # a blank label is not class 1: it takes the '*' region


@pytest.mark.parametrize("name", ["none", "outside", "guard", "mixed", "dropped", "empty"])
def test_a_split_named_like_an_assign_label_is_refused(tmp_path, capsys, name):
    d = dict(LANES, splits={"train": LANES["splits"]["train"], name: LANES["splits"]["test"]})
    src = write_json(tmp_path / "a.json", coco([(10, 40, 10, 10), (80, 40, 10, 10)]))
    assert cli("assign", spec(tmp_path, d), src, "--out", tmp_path / "sp") == 2
    assert f"'{name}' is the label assign gives" in capsys.readouterr().err
    assert not (tmp_path / "sp").exists()


@pytest.mark.parametrize("value", ["0", "-10", "nan", "inf"])
def test_ref_size_must_be_a_positive_size(tmp_path, capsys, value):
    src = write_json(tmp_path / "a.json", coco([(10, 40, 10, 10)]))
    with pytest.raises(SystemExit) as e:
        cli("assign", spec(tmp_path), src, "--ref-size", value)
    assert e.value.code == 2 and "positive size" in capsys.readouterr().err


# ---- malformed COCO fields -------------------------------------------------------------------------


def _broken(case):
    doc = coco([(10, 10, 10, 10)])
    a, im = doc["annotations"][0], doc["images"][0]
    if case == "bbox text":
        a["bbox"] = ["a", 1, 2, 3]
    elif case == "bbox nested":
        a["bbox"] = [[1], 1, 2, 3]
    elif case == "bbox huge":
        a["bbox"] = [10 ** 400, 1, 2, 3]
    elif case == "width huge":
        im["width"] = 10 ** 400
    elif case == "category id list":
        a["category_id"] = [1]
    elif case == "image id list":
        im["id"] = [1]
    elif case == "annotation image_id object":
        a["image_id"] = {}
    elif case == "categories not a list":
        doc["categories"] = 5
    elif case == "polygon text":
        del a["bbox"]
        a["segmentation"] = [["a", "b", "c", "d", "e", "f"]]
    elif case == "duplicate category":
        doc["categories"].append({"id": 1, "name": "bus"})
    return json.dumps(doc)


@pytest.mark.parametrize("case", ["bbox text", "bbox nested", "bbox huge", "width huge", "category id list",
                                  "image id list", "annotation image_id object", "categories not a list",
                                  "polygon text", "duplicate category", "deep nesting"])
def test_malformed_coco_is_one_line_exit_2(tmp_path, capsys, case):
    src = tmp_path / "a.json"
    src.write_text("[" * 100000 + "]" * 100000 if case == "deep nesting" else _broken(case))
    assert cli("assign", spec(tmp_path), src, "--out", tmp_path / "sp") == 2
    err = capsys.readouterr().err
    assert "Traceback" not in err and "a.json" in err and len(err.strip().splitlines()) <= 2


# ---- audit reads annotated data as assign does -------------------------------------------------------


def _box_table(tmp_path, sizes=True, files=False):
    t = tmp_path / "b.csv"
    head = "image_id,xmin,ymin,xmax,ymax" + (",image_width,image_height" if sizes else "") + (",file" if files else "")
    rows = [(1, 10, 40, 20, 50), (2, 80, 40, 90, 50), (3, 12, 40, 22, 50), (4, 82, 40, 92, 50)]
    t.write_text(head + "\n" + "".join(",".join(map(str, r)) + (",100,100" if sizes else "")
                                      + (f",img/{r[0]}.png" if files else "") + "\n" for r in rows))
    return t


@pytest.mark.parametrize("sizes", [True, False])
def test_audit_reads_a_box_table_with_the_options_assign_took(tmp_path, capsys, sizes):
    s, t = spec(tmp_path), _box_table(tmp_path, sizes)
    assert cli("assign", s, t, "--boxes", "xyxy", "--out", tmp_path / "a.csv") == 0
    # before: 'unrecognized arguments: --boxes xyxy', and without size columns 'no image size columns'
    assert cli("audit", t, "--splits", tmp_path / "a.csv", "--boxes", "xyxy", "--spec", s, "--out", tmp_path / "au") == 0
    doc = json.loads((tmp_path / "au" / "audit.json").read_text())
    assert {c["name"] for c in doc["checks"]} >= {"footprint_overlap"}


def test_audit_finds_a_table_images_in_the_images_folder(tmp_path):
    s, t = spec(tmp_path), _box_table(tmp_path, files=True)
    pics = tmp_path / "elsewhere" / "img"
    pics.mkdir(parents=True)
    rng = np.random.default_rng(0)
    for k in range(1, 5):
        cv2.imwrite(str(pics / f"{k}.png"), rng.integers(0, 255, (100, 100), dtype=np.uint8))
    assert cli("assign", s, t, "--boxes", "xyxy", "--out", tmp_path / "a.csv") == 0
    assert cli("audit", t, "--splits", tmp_path / "a.csv", "--boxes", "xyxy", "--images", tmp_path / "elsewhere",
               "--out", tmp_path / "au") in (0, 1)
    doc = json.loads((tmp_path / "au" / "audit.json").read_text())
    assert "near_duplicates" in {c["name"] for c in doc["checks"]}  # was skipped: --images was ignored for tables


def test_options_an_input_does_not_take_are_refused_not_ignored(tmp_path, capsys):
    y = _yolo_with_outside_link(tmp_path, "label")
    (y / "labels" / "9.txt").unlink()
    assert cli("assign", spec(tmp_path), y, "--images", tmp_path, "--out", tmp_path / "sp") == 2
    assert "--images" in capsys.readouterr().err
    t = _box_table(tmp_path)
    assert cli("assign", spec(tmp_path), t, "--boxes", "xyxy", "--out", tmp_path / "a.csv") == 0
    assert cli("audit", tmp_path / "a.csv", "--boxes", "xyxy") == 2  # a table with its split column
    assert "--boxes" in capsys.readouterr().err


def test_audit_format_option_reads_a_yolo_folder_holding_a_stray_xml(tmp_path):
    y = _yolo_with_outside_link(tmp_path, "label")
    (y / "labels" / "9.txt").unlink()
    (y / "notes.xml").write_text("<annotations/>")  # detected as VOC without --format
    s = spec(tmp_path)
    assert cli("assign", s, y, "--format", "yolo", "--out", tmp_path / "sp") == 0
    # image 9 has no label (no objects): one split only, nothing to compare (was an IndexError)
    assert cli("audit", y, "--format", "yolo", "--splits", tmp_path / "sp", "--out", tmp_path / "au") == 2
    (y / "labels" / "9.txt").write_text("0 0.9 0.5 0.1 0.1\n")
    assert cli("assign", s, y, "--format", "yolo", "--out", tmp_path / "sp") == 0
    assert cli("audit", y, "--format", "yolo", "--splits", tmp_path / "sp", "--out", tmp_path / "au") in (0, 1)
    assert (tmp_path / "au" / "audit.json").is_file()


# ---- after a second review ------------------------------------------------------------------------


def test_a_box_table_with_zero_padded_ids_audits_against_its_own_assignment(tmp_path):
    t = tmp_path / "boxes.csv"
    t.write_text("image_id,label,bbox_x0,bbox_y0,bbox_x1,bbox_y1,image_width,image_height\n" + "".join(
        f"{i:03d},c,{3 if i % 2 == 0 else 73},30,{7 if i % 2 == 0 else 77},34,100,100\n" for i in range(8)))
    s = spec(tmp_path)
    assert cli("assign", s, t, "--out", tmp_path / "a.csv") == 0
    # the assignment's ids were read as numbers (7, not 007): '8 listed images are not in the dataset'
    assert cli("audit", t, "--splits", tmp_path / "a.csv", "--spec", s, "--out", tmp_path / "au") == 0


def test_a_trailing_comma_with_text_columns_reads(tmp_path):
    t = tmp_path / "t.csv"
    t.write_text("image_id,x,y\na,0.1,0.5,\nb,0.9,0.5,\n")
    assert cli("assign", spec(tmp_path), t, "--out", tmp_path / "o.csv") == 0  # every column is text here
    assert (tmp_path / "o.csv").read_text().splitlines() == ["image_id,x,y,split", "a,0.1,0.5,train", "b,0.9,0.5,test"]


def test_yolo_labels_in_a_linked_folder_inside_the_dataset_are_read(tmp_path):
    y = _yolo_with_outside_link(tmp_path, "label")
    (y / "labels" / "9.txt").unlink()
    (y / "store" / "part").mkdir(parents=True)
    (y / "store" / "part" / "9.txt").write_text("0 0.9 0.5 0.1 0.1\n")
    (y / "labels" / "part").symlink_to(y / "store" / "part")
    (y / "store" / "part" / "again").symlink_to(y / "labels")  # a loop of links: each folder is read once
    (y / "images" / "part").mkdir()
    (y / "images" / "9.png").rename(y / "images" / "part" / "9.png")
    assert cli("assign", spec(tmp_path), y, "--out", tmp_path / "sp") == 0
    got = pd.read_csv(tmp_path / "sp" / "splits.csv", dtype=str)
    assert dict(zip(got["image_id"], got["split"])) == {"0": "train", "part/9": "test"}  # was 'empty'


def test_yolo_labels_in_a_linked_folder_out_of_the_dataset_are_refused(tmp_path, capsys):
    y = _yolo_with_outside_link(tmp_path, "label")
    (y / "labels" / "9.txt").unlink()
    (tmp_path / "outside" / "part").mkdir()
    (y / "labels" / "part").symlink_to(tmp_path / "outside" / "part")
    assert cli("assign", spec(tmp_path), y, "--out", tmp_path / "sp") == 2
    assert "link out of the dataset folder" in capsys.readouterr().err


def test_an_audit_written_into_the_folder_of_split_lists_is_refused(tmp_path, capsys):
    src = write_json(tmp_path / "a.json", coco([(10, 40, 10, 10), (80, 40, 10, 10)]))
    s = spec(tmp_path)
    assert cli("assign", s, src, "--out", tmp_path / "sp") == 0
    lists = tmp_path / "mylists"
    lists.mkdir()
    for n in ("train.json", "test.json"):
        (lists / n).write_bytes((tmp_path / "sp" / n).read_bytes())
    assert cli("audit", src, "--splits", lists, "--spec", s, "--out", lists) == 2
    assert "inside the input folder" in capsys.readouterr().err
    (lists / "audit.json").write_text("{}")  # a report or hidden file beside the lists is not read as one
    (lists / ".notes.json").write_text("{}")
    assert cli("audit", src, "--splits", lists, "--spec", s, "--out", tmp_path / "au") == 0


def test_a_coco_split_named_like_augsplit_s_own_record_is_refused(tmp_path, capsys):
    # its <split>.json is augsplit-splits.json, the folder's record of what assign wrote there
    d = dict(LANES, splits={"train": LANES["splits"]["train"], "augsplit-splits": LANES["splits"]["test"]})
    src = write_json(tmp_path / "a.json", coco([(10, 40, 10, 10), (80, 40, 10, 10)]))
    assert cli("assign", spec(tmp_path, d), src, "--out", tmp_path / "sp") == 2
    assert "augsplit's own file" in capsys.readouterr().err


def test_coco_ids_written_as_integral_floats_are_those_integers(tmp_path, capsys):
    """Tools that keep every JSON number as a float write ids as 1.0. Measured before: refused
    ('the image's id is 1.0, not an integer or a string'). Now 1.0 is the id 1: the same
    splits as the integer file, and the split files keep the ids as written."""
    boxes = [(10, 40, 10, 10), (80, 40, 10, 10), (12, 42, 10, 10)]
    ints = write_json(tmp_path / "ints.json", coco(boxes))
    doc = coco(boxes)
    for im in doc["images"]:
        im["id"] = float(im["id"])
    for a in doc["annotations"]:
        a["id"], a["image_id"], a["category_id"] = float(a["id"]), float(a["image_id"]), float(a["category_id"])
    doc["categories"][0]["id"] = 1.0
    floats = write_json(tmp_path / "floats.json", doc)
    assert cli("assign", spec(tmp_path), ints, "--out", tmp_path / "a") == 0
    assert cli("assign", spec(tmp_path), floats, "--out", tmp_path / "b") == 0
    a, b = (pd.read_csv(tmp_path / d / "splits.csv", dtype=str) for d in ("a", "b"))
    assert a.equals(b) and len(a) == 3
    written = [json.loads(f.read_text()) for f in (tmp_path / "b").glob("*.json") if f.name in
               {f"{s}.json" for s in b["split"]}]
    ids = [im["id"] for doc_ in written for im in doc_["images"]]
    assert len(ids) == 3 and all(isinstance(i, float) for i in ids)  # the ids as the file wrote them
    doc["images"][0]["id"] = 1.5
    bad = write_json(tmp_path / "bad.json", doc)
    assert cli("assign", spec(tmp_path), bad, "--out", tmp_path / "c") == 2
    err = capsys.readouterr().err
    assert "1.5, not an integer or a string" in err and "Traceback" not in err


def test_split_lists_of_coco_files_with_integral_float_ids_name_the_images(tmp_path):
    """A folder of <split>.json files whose ids are written 1.0 splits the images they name.
    Measured before: their ids read as '1.0', which named no image."""
    from augsplit.formats.coco import read_coco
    from augsplit.formats.write import read_assignment

    doc = coco([(10, 40, 10, 10), (80, 40, 10, 10)])
    src = write_json(tmp_path / "a.json", doc)
    lists = tmp_path / "lists"
    lists.mkdir()
    for name, im in zip(("train", "test"), doc["images"]):
        write_json(lists / f"{name}.json", {"images": [dict(im, id=float(im["id"]))], "annotations": []})
    objs = read_coco(src)
    got = dict(zip(objs.images["image_id"], read_assignment(lists, objs)))
    assert got == {1: "train", 2: "test"}


@pytest.mark.parametrize("name", ["train.json", "train.txt", "splits.csv"])
def test_a_split_list_linked_out_of_the_splits_folder_is_refused_not_read(tmp_path, capsys, name):
    """The folder given to --splits is read only inside: measured before, a list (or an assign
    folder's splits.csv) linked out of it was read and its images audited as that split."""
    s = spec(tmp_path)
    src = write_json(tmp_path / "all.json", coco([(10, 40, 10, 10), (80, 40, 10, 10)]))
    out = tmp_path / "sp"
    assert cli("assign", s, src, "--out", out) == 0
    if name != "splits.csv":  # a folder of per-split lists, not assign's own
        out = tmp_path / "lists"
        out.mkdir()
        (out / "test.txt").write_text("2\n")
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    body = {"train.json": json.dumps(coco([(10, 40, 10, 10)])), "train.txt": "1\n",
            "splits.csv": "image_id,split\n1,train\n2,test\n"}[name]
    (elsewhere / name).write_text(body)
    (out / name).unlink(missing_ok=True)
    (out / name).symlink_to(elsewhere / name)
    capsys.readouterr()
    assert cli("audit", src, "--splits", out, "--spec", s, "--out", tmp_path / "au") == 2
    err = capsys.readouterr().err
    assert "link out of the splits folder" in err and "Traceback" not in err and len(err.strip().splitlines()) == 1


@pytest.mark.parametrize("case", ["splits.csv not UTF-8", "a list that is a FIFO"])
def test_a_bad_file_in_the_splits_folder_is_one_line(tmp_path, capsys, case):
    """Found by a review: a splits.csv that is not UTF-8 printed a traceback (on main too), and
    a per-split list that is a FIFO was passed over, so its split seemed to have no images."""
    s = spec(tmp_path)
    src = write_json(tmp_path / "all.json", coco([(10, 40, 10, 10), (80, 40, 10, 10)]))
    out = tmp_path / "sp"
    if case == "splits.csv not UTF-8":
        assert cli("assign", s, src, "--out", out) == 0
        (out / "splits.csv").write_bytes(b"image_id,split\n1,tr\xffain\n")
    else:
        out.mkdir()
        (out / "test.txt").write_text("2\n")
        os.mkfifo(out / "train.txt")
    capsys.readouterr()
    assert cli("audit", src, "--splits", out, "--spec", s, "--out", tmp_path / "au") == 2
    err = capsys.readouterr().err
    assert "Traceback" not in err and len(err.strip().splitlines()) == 1
    assert ("unreadable splits table" in err) if case.startswith("splits") else ("not a regular file" in err)
