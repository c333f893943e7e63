"""Exports of a generated dataset, read back with the libraries their users read them with:
pycocotools for COCO, a reader of the published YOLO label format, Python's tarfile for tar
shards, and Hugging Face `datasets` for the Parquet layout. Each store (files, Parquet bytes,
none) is exported; masks are compared with the renderer's own footprints, boxes with the
manifest's columns."""

from __future__ import annotations

import json
import os
import tarfile
from pathlib import Path

import cv2
import numpy as np
import pytest
import yaml
from scipy import ndimage
from specs import snapshot, spec_dict, write_spec

from augsplit.cli import main
from augsplit.dataset import image_of, open_dataset, read_rows
from augsplit.dataset.images import decode
from augsplit.generate import Options, generate
from augsplit.render import footprint
from augsplit.scene import render_params

SPEC = spec_dict(canvas={"width": 40, "height": 32, "mode": "rgb"}, render={"distractors": {"count": [0, 2]}},
                 axes={"x": {"range": [0, 40]}, "y": {"range": [0, 32]}, "angle": {"range": [0, 360]},
                       "scale": {"range": [0.8, 1.6]}},
                 splits={"train": {"region": {"x": [0, 16]}, "per_class": 4},
                         "test": {"region": {"x": [24, 40]}, "per_class": 2}})
STORES = ("files", "parquet", "none")


@pytest.fixture(scope="module")
def datasets_by_store(tmp_path_factory):
    base = tmp_path_factory.mktemp("export")
    spec = write_spec(base, SPEC)
    out = {}
    for store in STORES:
        generate(spec, base / store, Options(store=store, progress=False))
        out[store] = base / store
    return out


def run_export(ds: Path, out: Path, to: str, *extra: str) -> int:
    return main(["export", str(ds), "--to", to, "--out", str(out), "--quiet", *extra])


def rows_by_id(ds: Path) -> dict:
    return {r["image_id"]: r for r in read_rows(open_dataset(ds)).to_dict("records")}


def objects_by_id(ds: Path) -> dict:
    """image id -> {k: row}: the target (k = -1) and its distractors, from the manifest."""
    folder = open_dataset(ds)
    out = {iid: {-1: r} for iid, r in rows_by_id(ds).items()}
    for r in read_rows(folder, "distractors").to_dict("records"):
        out[r["image_id"]][int(r["k"])] = r
    return out


def rendered_mask(folder, r) -> np.ndarray:
    """The footprint of one object, straight from the renderer, on the whole canvas."""
    sprite = folder.built.source.sprite(int(r["class_index"]), int(r["instance"]))
    placed = footprint(sprite, render_params(r), folder.hw, folder.spec.render.alpha_threshold)
    m = np.zeros(folder.hw, dtype=np.uint8)
    x0, y0, x1, y1 = placed.bbox
    m[y0:y1, x0:x1] = placed.mask
    return m


def box(r) -> list[int]:
    return [int(r["bbox_x0"]), int(r["bbox_y0"]), int(r["bbox_x1"]), int(r["bbox_y1"])]


@pytest.mark.parametrize("store", STORES)
def test_coco_reads_back_with_pycocotools(datasets_by_store, tmp_path, store):
    from pycocotools import mask as mask_utils
    from pycocotools.coco import COCO

    ds = datasets_by_store[store]
    out = tmp_path / "coco"
    assert run_export(ds, out, "coco") == 0
    folder = open_dataset(ds)
    objects, rows = objects_by_id(ds), rows_by_id(ds)
    seen_images = 0
    for split in folder.splits:
        coco = COCO(str(out / f"{split}.json"))
        assert [c["name"] for c in coco.loadCats(coco.getCatIds())] == list(folder.built.source.classes)
        for img in coco.loadImgs(coco.getImgIds()):
            seen_images += 1
            row = rows[img["augsplit_image_id"]]
            assert row["split"] == split and (img["height"], img["width"]) == folder.hw
            pixels = decode((out / img["file_name"]).read_bytes(), 3)
            assert np.array_equal(pixels, image_of(folder, row))
            anns = coco.loadAnns(coco.getAnnIds(imgIds=img["id"]))
            visible = {k: r for k, r in objects[row["image_id"]].items() if r["footprint_px"] > 0}
            assert sorted(a["augsplit_object"] for a in anns) == sorted(visible)
            for a in anns:
                r = visible[a["augsplit_object"]]
                x0, y0, x1, y1 = box(r)
                assert a["bbox"] == [x0, y0, x1 - x0, y1 - y0]  # COCO bbox: [x, y, width, height] (COCO format doc)
                m = coco.annToMask(a)
                assert np.array_equal(m, rendered_mask(folder, r))
                assert a["area"] == int(m.sum()) == r["footprint_px"]
                # pycocotools' own box of the RLE: the tight box of the mask, as the manifest states it
                assert mask_utils.toBbox(a["segmentation"]).tolist() == [x0, y0, x1 - x0, y1 - y0]
                assert coco.loadCats(a["category_id"])[0]["name"] == r["class_name"]
    assert seen_images == len(rows)


def read_yolo_labels(path: Path) -> list[tuple[int, list[float]]]:
    """A YOLO label file: one object a line, the class index then numbers as fractions of the
    image width and height (the published label format, from memory of its documentation)."""
    out = []
    for line in path.read_text().splitlines():
        parts = line.split()
        out.append((int(parts[0]), [float(v) for v in parts[1:]]))
    return out


def test_yolo_detection_labels(datasets_by_store, tmp_path):
    import yaml

    ds = datasets_by_store["files"]
    out = tmp_path / "yolo"
    assert run_export(ds, out, "yolo") == 0
    folder = open_dataset(ds)
    h, w = folder.hw
    data = yaml.safe_load((out / "data.yaml").read_text())
    assert [data["names"][i] for i in range(data["nc"])] == list(folder.built.source.classes)
    n = 0
    for iid, objs in objects_by_id(ds).items():
        split = objs[-1]["split"]
        assert data[split] == f"images/{split}"
        assert np.array_equal(decode((out / data[split] / f"{iid}.png").read_bytes(), 3), image_of(folder, objs[-1]))
        got = read_yolo_labels(out / "labels" / split / f"{iid}.txt")
        want = [r for k, r in sorted(objs.items()) if r["footprint_px"] > 0]
        assert len(got) == len(want)
        for (c, (cx, cy, bw, bh)), r in zip(got, want):
            x0, y0, x1, y1 = box(r)
            assert c == r["class_index"]
            # centre and size as fractions, to the 6 decimals written
            assert np.allclose([cx * w - bw * w / 2, cy * h - bh * h / 2, cx * w + bw * w / 2, cy * h + bh * h / 2],
                               [x0, y0, x1, y1], atol=1e-3)
            n += 1
    assert n > len(objects_by_id(ds))  # distractors are labelled too


def test_yolo_segmentation_polygons(datasets_by_store, tmp_path):
    ds = datasets_by_store["none"]
    out = tmp_path / "seg"
    assert run_export(ds, out, "yolo-seg") == 0
    folder = open_dataset(ds)
    h, w = folder.hw
    for iid, objs in objects_by_id(ds).items():
        got = read_yolo_labels(out / "labels" / objs[-1]["split"] / f"{iid}.txt")
        want = [r for k, r in sorted(objs.items()) if r["footprint_px"] > 0]
        assert len(got) == len(want)
        for (c, coords), r in zip(got, want):
            assert c == r["class_index"] and len(coords) >= 6 and len(coords) % 2 == 0
            pts = np.rint(np.array(coords).reshape(-1, 2) * [w, h]).astype(np.int32)
            filled = np.zeros((h, w), np.uint8)
            cv2.fillPoly(filled, [pts], 1)  # the polygon rasterised, as a YOLO-seg reader draws it
            mask = rendered_mask(folder, r).astype(bool)
            labels, n = ndimage.label(mask, structure=np.ones((3, 3)))  # scipy: 8-connected components
            largest = labels == 1 + np.argmax(ndimage.sum(mask, labels, range(1, n + 1)))
            # the polygon covers the object's largest component and nothing beyond it and its holes
            assert filled[largest].all()
            assert not (filled.astype(bool) & ~ndimage.binary_fill_holes(largest)).any()


def test_tar_shards_read_with_tarfile(datasets_by_store, tmp_path):
    ds = datasets_by_store["parquet"]
    out, again = tmp_path / "tar", tmp_path / "tar2"
    assert run_export(ds, out, "tar", "--per-shard", "3") == 0
    assert run_export(ds, again, "tar", "--per-shard", "3") == 0
    folder = open_dataset(ds)
    rows = rows_by_id(ds)
    shards = sorted(out.glob("*.tar"))
    assert [p.name for p in shards] == [p.name for p in sorted(again.glob("*.tar"))]
    assert all(p.read_bytes() == (again / p.name).read_bytes() for p in shards)  # byte-identical reruns
    seen = {}
    for split in folder.splits:
        mine = [p for p in shards if p.name.startswith(f"{split}-")]
        sizes = []
        for p in mine:
            with tarfile.open(p) as tar:
                members = tar.getmembers()
                for m in members:
                    assert (m.mtime, m.uid, m.gid, m.mode, m.uname, m.gname) == (0, 0, 0, 0o644, "", "") and m.isfile()
                keys = sorted({m.name.rsplit(".", 1)[0] for m in members})
                sizes.append(len(keys))
                for key in keys:
                    meta = json.loads(tar.extractfile(f"{key}.json").read())
                    pixels = decode(tar.extractfile(f"{key}.png").read(), 3)
                    row = rows[key]
                    assert meta["split"] == split and meta["class_name"] == row["class_name"]
                    assert box(meta) == box(row) and meta["sha256"] == row["sha256"]
                    assert np.array_equal(pixels, image_of(folder, row))
                    seen[key] = split
        n = sum(1 for r in rows.values() if r["split"] == split)
        assert sum(sizes) == n and all(s == 3 for s in sizes[:-1]) and 0 < sizes[-1] <= 3
    assert sorted(seen) == sorted(rows)


def test_hugging_face_datasets_keeps_the_splits(datasets_by_store, tmp_path, monkeypatch):
    monkeypatch.setenv("HF_HUB_OFFLINE", "1")
    datasets = pytest.importorskip("datasets")
    ds = datasets_by_store["files"]
    rows = rows_by_id(ds)
    folder = open_dataset(ds)
    # on the manifest folder itself, `datasets` sees one split of every row: the reason for the export
    whole = datasets.load_dataset("parquet", data_dir=str(ds / "manifest"), cache_dir=str(tmp_path / "cache0"))
    assert list(whole) == ["train"] and whole["train"].num_rows == len(rows)
    out = tmp_path / "hf"
    assert run_export(ds, out, "hf", "--per-shard", "3") == 0
    loaded = datasets.load_dataset(str(out), cache_dir=str(tmp_path / "cache"))
    assert list(loaded) == list(folder.splits)
    for split in folder.splits:
        part = loaded[split]
        want = [r for r in rows.values() if r["split"] == split]
        assert part.num_rows == len(want) and set(part["split"]) == {split}
        assert sorted(part["image_id"]) == sorted(r["image_id"] for r in want)
        for item in part:
            row = rows[item["image_id"]]
            assert np.array_equal(np.asarray(item["image"].convert("RGB")), image_of(folder, row))
            assert box(item) == box(row) and item["scale"] == row["scale"]
    files = sorted(p.name for p in (out / "data").iterdir())
    assert files == ["test-00000-of-00002.parquet", "test-00001-of-00002.parquet",
                     "train-00000-of-00003.parquet", "train-00001-of-00003.parquet", "train-00002-of-00003.parquet"]


def test_the_export_folder_is_guarded(datasets_by_store, tmp_path, capsys):
    ds = datasets_by_store["files"]
    before_ds = snapshot(ds)
    busy = tmp_path / "busy"
    busy.mkdir()
    (busy / "notes.txt").write_text("mine")
    assert run_export(ds, busy, "coco") == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "notes.txt" in err and "Traceback" not in err
    assert sorted(p.name for p in busy.iterdir()) == ["notes.txt"]
    assert run_export(ds, ds / "inside", "coco") == 2 and not (ds / "inside").exists()
    # an earlier export of ours is replaced: stale shards of it go, nothing else is touched
    out = tmp_path / "out"
    parent_before = {k: v for k, v in snapshot(tmp_path).items() if not k.startswith("out")}
    assert run_export(ds, out, "tar", "--per-shard", "2") == 0
    assert len(list(out.glob("train-*.tar"))) == 4
    assert run_export(ds, out, "tar", "--per-shard", "5") == 0
    assert sorted(p.name for p in out.iterdir()) == ["augsplit-export.json", "test-000000.tar", "train-000000.tar",
                                                   "train-000001.tar"]
    assert run_export(ds, out, "coco") == 0  # another format over our own export
    assert not list(out.glob("*.tar")) and (out / "train.json").is_file()
    assert {k: v for k, v in snapshot(tmp_path).items() if not k.startswith("out")} == parent_before
    assert snapshot(ds) == before_ds  # the dataset is read, never written
    (out / "train" / "extra.png").write_bytes(b"x")
    assert run_export(ds, out, "yolo") == 2
    assert "extra.png" in capsys.readouterr().err


def test_hf_refuses_split_names_it_cannot_load(tmp_path, capsys):
    spec = write_spec(tmp_path, spec_dict(splits={"train": {"region": {"x": [0, 20]}, "per_class": 1},
                                                  "test-far": {"region": {"x": [44, 64]}, "per_class": 1}}))
    ds = tmp_path / "ds"
    generate(spec, ds, Options(store="none", progress=False))
    assert run_export(ds, tmp_path / "hf", "hf") == 2
    assert "test-far" in capsys.readouterr().err
    assert not (tmp_path / "hf").exists()  # refused before the folder is made
    assert run_export(ds, tmp_path / "tar", "tar") == 0  # other formats take any safe split name


def test_export_needs_a_finished_dataset(tmp_path, capsys):
    assert run_export(tmp_path / "missing", tmp_path / "o", "coco") == 2
    assert "no such dataset folder" in capsys.readouterr().err
    assert not os.path.exists(tmp_path / "o")


def test_an_interrupted_export_is_finished_by_a_rerun(datasets_by_store, tmp_path, monkeypatch):
    from augsplit.formats import export as ex

    ds = datasets_by_store["files"]
    fresh, out = tmp_path / "fresh", tmp_path / "out"
    assert run_export(ds, fresh, "yolo") == 0
    real, calls = ex.Rows._encoded, []

    def dies_on_the_fifth(self, row):
        calls.append(row["image_id"])
        if len(calls) == 5:
            raise KeyboardInterrupt
        return real(self, row)

    monkeypatch.setattr(ex.Rows, "_encoded", dies_on_the_fifth)
    monkeypatch.setattr("augsplit.formats.exporters.BATCH_FILES", 2)  # files land before the interruption
    with pytest.raises(KeyboardInterrupt):
        ex.export(ds, out, "yolo")
    monkeypatch.setattr(ex.Rows, "_encoded", real)
    assert json.loads((out / ex.MARKER).read_text())["complete"] is False
    assert any(out.rglob("*.png"))  # the first files are there
    assert run_export(ds, out, "yolo") == 0
    mine, want = snapshot(out), snapshot(fresh)
    assert {k: v for k, v in mine.items() if k != ex.MARKER} == {k: v for k, v in want.items() if k != ex.MARKER}


def test_a_moved_dataset_exports_its_stored_images_without_the_sprite_folder(tmp_path, capsys):
    import shutil

    from augsplit.build import open_mapping

    sprites = tmp_path / "sprites"
    for name, colour in (("bolt", (255, 0, 0)), ("nut", (0, 255, 0))):
        (sprites / name).mkdir(parents=True)
        rgba = np.zeros((7, 7, 4), np.uint8)
        rgba[1:6, 2:5] = (*colour, 255)
        cv2.imwrite(str(sprites / name / "a.png"), cv2.cvtColor(rgba, cv2.COLOR_RGBA2BGRA))
    spec = spec_dict(objects={"kind": "folder", "path": str(sprites)}, canvas={"width": 32, "height": 32, "mode": "rgb"},
                     axes={"x": {"range": [4, 28]}, "y": {"range": [4, 28]}},
                     splits={"train": {"region": {"x": [4, 12]}, "per_class": 2},
                             "test": {"region": {"x": [20, 28]}, "per_class": 1}})
    ds = tmp_path / "ds"
    generate(None, ds, Options(progress=False), built=open_mapping(spec, base_dir=tmp_path))
    shutil.rmtree(sprites)
    assert run_export(ds, tmp_path / "yolo", "yolo") == 0  # boxes and stored images need no sprites
    assert (tmp_path / "yolo" / "data.yaml").read_text().endswith('names:\n  0: "bolt"\n  1: "nut"\n')
    assert run_export(ds, tmp_path / "coco", "coco") == 2  # masks are re-rendered: the sprites are named
    assert "sprites" in capsys.readouterr().err and not (tmp_path / "coco").exists()


def _damage(root: Path, store: str) -> str:
    """Change the stored bytes of one row in place, its recorded checksum kept; its image id."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    part = root / "manifest" / "split=train" / "part-000000.parquet"
    t = pq.read_table(part)
    row = t.slice(2, 1).to_pylist()[0]
    if store == "files":
        p = root / row["file"]
        p.write_bytes(p.read_bytes()[:60])  # truncated
    elif store == "tar":
        with open(root / row["tar_file"], "r+b") as f:  # one byte of the PNG member's pixels
            f.seek(row["tar_offset"] + 512 + 60)
            b = f.read(1)
            f.seek(-1, os.SEEK_CUR)
            f.write(bytes([b[0] ^ 0xFF]))
    else:  # parquet: another row's image in its place
        blobs = t.column("image_bytes").to_pylist()
        blobs[2] = blobs[3]
        k = t.schema.get_field_index("image_bytes")
        pq.write_table(t.set_column(k, t.schema.field(k), pa.array(blobs, pa.binary())), part)
    return row["image_id"]


@pytest.mark.parametrize("store", ["files", "parquet", "tar"])
@pytest.mark.parametrize("to", ["coco", "tar"])
def test_a_stored_image_changed_since_it_was_written_is_not_exported(tmp_path, capsys, store, to):
    """Measured before: a truncated image file (and any image whose bytes changed) was copied
    into the export with exit 0, though verify, preview and the loader refuse it."""
    root = tmp_path / "ds"
    generate(write_spec(tmp_path, SPEC), root, Options(store=store, progress=False))
    victim = _damage(root, store)
    code = run_export(root, tmp_path / "out", to)
    err = capsys.readouterr().err
    assert code == 2 and err.count("\n") == 1 and "Traceback" not in err, err
    assert f"image {victim}: the stored image does not match its checksum" in err


def test_yolo_data_yaml_keeps_split_names_yaml_reads_as_booleans(tmp_path):
    # YAML 1.1 reads a bare key on, yes or no as a boolean (PyYAML does): the split was lost
    spec = write_spec(tmp_path, dict(SPEC, splits={"on": {"region": {"x": [0, 16]}, "per_class": 1},
                                                   "no": {"region": {"x": [24, 40]}, "per_class": 1}}))
    generate(spec, tmp_path / "ds", Options(store="none", progress=False))
    assert run_export(tmp_path / "ds", tmp_path / "y", "yolo") == 0
    data = yaml.safe_load((tmp_path / "y" / "data.yaml").read_text())
    assert data["on"] == "images/on" and data["no"] == "images/no"
