"""Map-style datasets and the on-the-fly sampler (augsplit.data).

Outside references: torch's DataLoader (torch 2.13 CPU) for batching and worker processes,
pandas for query semantics, hashlib's SHA-256 for pixel identity.
"""

from __future__ import annotations

import json
import pickle
import shutil
import subprocess
import sys

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest

from augsplit import manifest as mf
from augsplit.build import open_mapping
from augsplit.data import Dataset, DatasetIndexError, OnlineSampler
from augsplit.dataset import layout as lay
from augsplit.dataset import read_manifest
from augsplit.errors import AugsplitError, DatasetError, SpecError
from augsplit.generate import Options, generate
from augsplit.paramlog import ParamLog, read_log
from augsplit.manifest import pixel_sha256

SPEC = {
    "seed": 4242,
    "canvas": {"width": 32, "height": 32, "mode": "rgb"},
    "objects": {"kind": "polyomino", "cells": 3, "cell_px": 3, "colour": [230, 40, 40]},
    # a noisy background: every image depends on its render stream, not only on its row
    "background": {"kind": "uniform_noise", "lo": 0.1, "hi": 0.5},
    "axes": {"x": {"range": [4, 28]}, "y": {"range": [4, 28]}, "scale": {"range": [0.8, 1.25], "dist": "log"},
             "angle": {"range": [0, 360]}, "hue": {"range": [0, 360]}},
    "splits": {
        "train": {"region": {"x": [4, 14], "cells": {"grid": {"y": 2}, "pick": "all"}}, "per_class": 30},
        "test_right": {"region": {"x": [20, 28]}, "per_class": 10},
    },
}


def _make(tmp_path_factory, store: str):
    out = tmp_path_factory.mktemp(f"ds_{store}") / "ds"
    generate(None, out, Options(store=store, progress=False, shard_size=40), built=open_mapping(SPEC))
    return out


@pytest.fixture(scope="module")
def files_ds(tmp_path_factory):
    return _make(tmp_path_factory, "files")


@pytest.fixture(scope="module")
def parquet_ds(tmp_path_factory):
    return _make(tmp_path_factory, "parquet")


@pytest.fixture(scope="module")
def none_ds(tmp_path_factory):
    return _make(tmp_path_factory, "none")


# ---- items, targets, stores ------------------------------------------------------------------


def test_items_of_every_store_are_the_generated_pixels(files_ds, parquet_ds, none_ds):
    a, b, c = (Dataset(d, "train") for d in (files_ds, parquet_ds, none_ds))
    assert len(a) == len(b) == len(c) == 60
    rows = read_manifest(files_ds, splits=["train"])
    for i in range(len(a)):
        ia, ib, ic = a[i]["image"], b[i]["image"], c[i]["image"]
        assert ia.dtype == np.uint8 and ia.shape == (32, 32, 3)
        # byte-identical: lazily re-rendered item i == decoded PNG i == the manifest's SHA-256
        assert np.array_equal(ia, ib) and np.array_equal(ia, ic)
        assert pixel_sha256(ic) == rows["sha256"][i] == c[i]["row"]["sha256"]


def test_item_carries_the_manifest_row_and_class_target(files_ds):
    ds = Dataset(files_ds, "test_right")
    df = read_manifest(files_ds, splits=["test_right"])
    for i in (0, 7, len(ds) - 1):
        item = ds[i]
        assert item["target"] == int(df["class_index"][i])
        assert item["row"]["image_id"] == df["image_id"][i]
        assert item["row"]["x"] == pytest.approx(df["x"][i])
        assert "image_bytes" not in item["row"]


def test_targets_params_bbox_mask(none_ds, files_ds):
    for root in (none_ds, files_ds):  # mask from the re-render and from the row alone
        ds = Dataset(root, "train", target=("class", "params", "bbox", "mask", "scale"))
        assert ds.param_names == ("x", "y", "scale", "angle", "hue")
        for i in (0, 13, 59):
            cls, params, bbox, mask, scale = ds[i]["target"]
            row = ds[i]["row"]
            assert cls == row["class_index"]
            assert params.dtype == np.float32
            np.testing.assert_allclose(params, [row[n] for n in ds.param_names], rtol=1e-6)
            assert scale == row["scale"]
            assert mask.shape == (32, 32) and mask.dtype == np.uint8
            # the mask is the footprint the manifest describes: its pixel count and its box
            assert int(mask.sum()) == row["footprint_px"]
            ys, xs = np.nonzero(mask)
            assert list(bbox) == [xs.min(), ys.min(), xs.max() + 1, ys.max() + 1]


def test_chw_float(files_ds):
    ds = Dataset(files_ds, "train", chw_float=True)
    raw = Dataset(files_ds, "train")[3]["image"]
    img = ds[3]["image"]
    assert img.dtype == np.float32 and img.shape == (3, 32, 32)
    assert img.min() >= 0.0 and img.max() <= 1.0
    np.testing.assert_allclose(img, raw.transpose(2, 0, 1) / 255.0, atol=1e-7)


def test_negative_and_out_of_range_indices(files_ds):
    ds = Dataset(files_ds, "test_right")
    assert ds[-1]["row"]["image_id"] == ds[len(ds) - 1]["row"]["image_id"]
    assert ds[-len(ds)]["row"]["index"] == 0
    for bad in (len(ds), -len(ds) - 1, 10**9):
        with pytest.raises(DatasetIndexError) as e:
            ds[bad]
        assert isinstance(e.value, IndexError) and isinstance(e.value, DatasetError)
        assert f"index {bad} is out of range for {len(ds)} item(s)" in str(e.value)
    with pytest.raises(TypeError):
        ds[1.5]
    # Python's iteration protocol stops on the IndexError
    assert len(list(ds)) == len(ds)


def test_filters_class_cell_query(files_ds):
    full = Dataset(files_ds, "train")
    df = full.manifest
    name = full.classes[1]
    by_name = Dataset(files_ds, "train", classes=[name])
    by_index = Dataset(files_ds, "train", classes=1)
    assert len(by_name) == len(by_index) == int((df["class_name"] == name).sum()) > 0
    assert {by_name[i]["row"]["class_name"] for i in range(len(by_name))} == {name}
    assert set(df["cell"]) == {0, 1}  # the region is cut into two cells along y
    cell1 = Dataset(files_ds, "train", cells=[1])
    assert len(cell1) == int((df["cell"] == 1).sum()) > 0
    assert all(cell1[i]["row"]["cell"] == 1 for i in range(len(cell1)))
    q = "scale > 1.0 and angle < 180"
    sub = Dataset(files_ds, "train", query=q, classes=[name])
    want = df.query(q)  # pandas' own query is the reference
    want = want[want["class_name"] == name]
    assert [sub[i]["row"]["image_id"] for i in range(len(sub))] == want["image_id"].tolist()


def test_split_must_exist(files_ds):
    with pytest.raises(DatasetError) as e:
        Dataset(files_ds, "test_left")
    msg = str(e.value)
    assert "no split 'test_left'" in msg and "train, test_right" in msg and "\n" not in msg


def test_not_a_dataset(tmp_path):
    with pytest.raises(DatasetError, match="no such dataset folder"):
        Dataset(tmp_path / "missing", "train")
    (tmp_path / "plain").mkdir()
    (tmp_path / "plain" / "x.png").write_bytes(b"")
    with pytest.raises(DatasetError, match="not an augsplit dataset"):
        Dataset(tmp_path / "plain", "train")


def test_manifest_of_another_spec_is_refused(files_ds, tmp_path):
    root = tmp_path / "mixed"
    shutil.copytree(files_ds, root)
    part = lay.part_files(root)[0]
    t = pq.read_table(part)
    md = dict(t.schema.metadata)
    md[mf.META_HASH] = b"0123456789abcdef"
    pq.write_table(t.replace_schema_metadata(md), part)
    with pytest.raises(DatasetError) as e:
        Dataset(root, part.parent.name.split("=", 1)[1])
    assert "spec 0123456789abcdef" in str(e.value) and str(part) in str(e.value)


def test_incomplete_dataset_is_refused(files_ds, tmp_path):
    root = tmp_path / "partial"
    shutil.copytree(files_ds, root)
    (root / lay.SUMMARY_FILE).unlink()
    with pytest.raises(DatasetError, match="incomplete"):
        Dataset(root, "train")


def test_bad_target_and_query(files_ds):
    with pytest.raises(DatasetError, match="unknown target 'clas'.*did you mean 'class'"):
        Dataset(files_ds, "train", target="clas")
    with pytest.raises(DatasetError, match="query"):
        Dataset(files_ds, "train", query="no_such_column > 3")
    with pytest.raises(DatasetError, match="unknown class 'Q'"):
        Dataset(files_ds, "train", classes=["Q"])


def test_missing_image_file_names_it(files_ds, tmp_path):
    root = tmp_path / "lost"
    shutil.copytree(files_ds, root)
    ds = Dataset(root, "train")
    path = root / ds[4]["row"]["file"]
    path.unlink()
    with pytest.raises(DatasetError) as e:
        ds[4]
    assert str(path) in str(e.value)


def test_check_pixels_catches_a_swapped_file(files_ds, tmp_path):
    root = tmp_path / "swapped"
    shutil.copytree(files_ds, root)
    ds = Dataset(root, "train", check_pixels=True)
    a, b = root / ds.row(0)["file"], root / ds.row(1)["file"]
    data_a = a.read_bytes()
    a.write_bytes(b.read_bytes())
    b.write_bytes(data_a)
    with pytest.raises(DatasetError, match="checksum"):
        ds[0]
    assert Dataset(root, "train")[0]["image"].shape == (32, 32, 3)  # off by default


def test_check_pixels_refuses_lossy_stores(tmp_path):
    out = tmp_path / "jpeg"
    generate(None, out, Options(store="parquet", format="jpeg", progress=False), built=open_mapping(SPEC))
    assert Dataset(out, "test_right")[0]["image"].shape == (32, 32, 3)
    with pytest.raises(DatasetError, match="lossless"):
        Dataset(out, "test_right", check_pixels=True)[0]


def test_transform_hook(files_ds):
    def flip(item):
        item["image"] = item["image"][:, ::-1].copy()
        return item

    ds, plain = Dataset(files_ds, "train", transform=flip, chw_float=True), Dataset(files_ds, "train")
    np.testing.assert_allclose(ds[2]["image"], plain[2]["image"][:, ::-1].transpose(2, 0, 1) / 255.0, atol=1e-7)


def test_a_moved_dataset_opens_without_its_sprite_folder(tmp_path):
    # images on disk need no object source: only re-rendering or a mask target does
    import cv2

    sprites = tmp_path / "sprites"
    for name, colour in (("bolt", (255, 0, 0)), ("nut", (0, 255, 0))):
        (sprites / name).mkdir(parents=True)
        rgba = np.zeros((7, 7, 4), np.uint8)
        rgba[1:6, 2:5] = (*colour, 255)
        cv2.imwrite(str(sprites / name / "a.png"), cv2.cvtColor(rgba, cv2.COLOR_RGBA2BGRA))
    spec = {**SPEC, "objects": {"kind": "folder", "path": str(sprites)}}
    out = tmp_path / "ds"
    generate(None, out, Options(progress=False), built=open_mapping(spec, base_dir=tmp_path))
    shutil.rmtree(sprites)
    ds = Dataset(out, "train", target="bbox")
    assert ds.classes == ("bolt", "nut") and ds[0]["image"].shape == (32, 32, 3)
    with pytest.raises(AugsplitError, match="sprites"):
        Dataset(out, "train", target="mask")[0]


def test_pickles_without_built_objects(none_ds):
    ds = Dataset(none_ds, "train", target="mask")
    first = ds[5]
    clone = pickle.loads(pickle.dumps(ds))
    assert "built" not in clone.folder._cache and "built" in ds.folder._cache
    assert np.array_equal(clone[5]["image"], first["image"])
    assert np.array_equal(clone[5]["target"], first["target"])


# ---- torch ---------------------------------------------------------------------------------


def _batches(loader):
    out = []
    for b in loader:
        out.append((b["image"].numpy().copy(), b["target"].numpy().copy(), list(b["row"]["image_id"])))
    return out


@pytest.mark.parametrize("store", ["parquet", "none"])
def test_torch_dataloader_two_workers_equal_one_process(store, parquet_ds, none_ds):
    # Reference: torch.utils.data.DataLoader (torch 2.13 CPU) — with a seeded sampler the
    # batches of num_workers=2 are exactly those of num_workers=0.
    torch = pytest.importorskip("torch")
    from torch.utils.data import DataLoader

    root = parquet_ds if store == "parquet" else none_ds
    ds = Dataset(root, "train", chw_float=True, parquet_cache=1)

    def run(workers):
        g = torch.Generator().manual_seed(7)
        return _batches(DataLoader(ds, batch_size=8, shuffle=True, generator=g, num_workers=workers))

    zero, two = run(0), run(2)
    assert len(zero) == len(two) == 8
    for (ia, ta, na), (ib, tb, nb) in zip(zero, two):
        assert na == nb
        assert np.array_equal(ia, ib) and np.array_equal(ta, tb)
    assert sorted(n for _, _, names in zero for n in names) == sorted(ds.manifest["image_id"])


def test_torch_dataloader_spawned_workers(files_ds):
    # spawn sends the dataset by pickle: it must travel without open handles and rebuild itself
    pytest.importorskip("torch")
    from torch.utils.data import DataLoader

    ds = Dataset(files_ds, "test_right", target="params")
    loader = DataLoader(ds, batch_size=5, num_workers=1, multiprocessing_context="spawn")
    got = _batches(loader)
    ref = _batches(DataLoader(ds, batch_size=5))
    assert [n for *_, n in got] == [n for *_, n in ref]
    assert all(np.array_equal(a[0], b[0]) for a, b in zip(got, ref))


def test_import_does_not_import_torch():
    code = "import sys, augsplit.data, augsplit.paramlog; print('torch' in sys.modules)"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False"


# ---- the on-the-fly sampler ----------------------------------------------------------------


@pytest.fixture(scope="module")
def built():
    return open_mapping(SPEC)


def _same_row(a: dict, b: dict) -> bool:
    return a.keys() == b.keys() and all(a[k] == b[k] or (a[k] != a[k] and b[k] != b[k]) for k in a)


def test_sampler_items_are_deterministic_and_fresh(built):
    s = OnlineSampler(built, "train", length=40)
    a, b = s[3], OnlineSampler(built, "train", length=40)[3]
    assert np.array_equal(a["image"], b["image"]) and _same_row(a["row"], b["row"])
    assert a["row"]["epoch"] == 0 and a["row"]["item"] == 3
    # another index, epoch or seed is another draw
    assert s[4]["row"]["x"] != a["row"]["x"]
    s.set_epoch(1)
    c = s[3]
    assert c["row"]["x"] != a["row"]["x"] and not np.array_equal(c["image"], a["image"])
    assert OnlineSampler(built, "train", length=40, seed=1)[3]["row"]["x"] != a["row"]["x"]
    assert _same_row(s.item(3, epoch=0)["row"], a["row"])
    # online streams are spawned apart from the generated images' streams of the same index
    from augsplit.data import online_rng
    from augsplit.space.streams import PARAMS, RENDER, image_rng

    sp = built.plan.split("train").index
    for purpose in (PARAMS, RENDER):
        assert online_rng(4242, sp, 0, 3, purpose).random() != image_rng(4242, sp, 3, purpose).random()


def test_sampler_draws_lie_in_the_split_region(built):
    s = OnlineSampler(built, "train", length=300)
    split = built.plan.split("train")
    test = built.plan.split("test_right")
    rows = pd.DataFrame([s.draw(i) for i in range(300)])
    pts = {n: rows["class_index"].to_numpy() if n == "class" else rows[n].to_numpy() for n in built.plan.space.names}
    assert split.region.contains(pts).all()
    assert not test.region.contains(pts).any()
    # the drawn cell is the box of the region that holds the point (Region.box_of_t)
    t = built.plan.space.to_t(pts)
    assert np.array_equal(rows["cell"].to_numpy(), split.region.box_of_t(t))
    assert set(rows["cell"]) == {0, 1}


def test_sampler_items_match_their_own_render(built):
    s = OnlineSampler(built, "train", target=("class", "bbox", "mask"), length=10)
    for i in range(5):
        it = s[i]
        cls, bbox, mask = it["target"]
        assert cls == it["row"]["class_index"]
        assert int(mask.sum()) == it["row"]["footprint_px"]
        ys, xs = np.nonzero(mask)
        assert list(bbox) == [xs.min(), ys.min(), xs.max() + 1, ys.max() + 1]


def test_sampler_iteration_and_length(built):
    s = OnlineSampler(built, "train", length=6)
    items = list(s)
    assert [it["row"]["item"] for it in items] == list(range(6))
    endless = iter(OnlineSampler(built, "train"))
    assert [next(endless)["row"]["item"] for _ in range(4)] == [0, 1, 2, 3]
    with pytest.raises(TypeError, match="no length"):
        len(OnlineSampler(built, "train"))
    with pytest.raises(DatasetIndexError):
        s[6]
    with pytest.raises(SpecError, match="unknown split 'nope'"):
        OnlineSampler(built, "nope")
    with pytest.raises(DatasetError, match="unknown target 'sha256'"):  # a column only stored images have
        OnlineSampler(built, "train", target="sha256")
    assert OnlineSampler(built, "train", target="footprint_px", length=1)[0]["target"] > 0


def test_sampler_in_dataloader_map_style_and_iterable(built):
    pytest.importorskip("torch")
    from torch.utils.data import DataLoader

    s = OnlineSampler(built, "train", length=32, chw_float=True)
    ref = _batches(DataLoader(s, batch_size=8))
    two = _batches(DataLoader(s, batch_size=8, num_workers=2))
    assert [r[2] for r in ref] == [r[2] for r in two]
    assert all(np.array_equal(a[0], b[0]) for a, b in zip(ref, two))
    # iterable mode: worker w takes blocks w, w + 2, ... of batch_size items, so DataLoader's
    # round-robin over workers rebuilds the single-process order
    it = OnlineSampler(built, "train", length=32, chw_float=True, block=8)
    ref_it = _batches(DataLoader(it.torch_iterable(), batch_size=8))
    two_it = _batches(DataLoader(it.torch_iterable(), batch_size=8, num_workers=2))
    assert [r[2] for r in ref_it] == [r[2] for r in two_it] == [r[2] for r in ref]
    assert all(np.array_equal(a[0], b[0]) for a, b in zip(ref_it, two_it))


def test_sampler_logs_every_item_once_across_workers(built, tmp_path):
    pytest.importorskip("torch")
    from torch.utils.data import DataLoader

    log = ParamLog(tmp_path / "log", flush_every=5)
    s = OnlineSampler(built, "train", length=24, log=log, block=4)
    for epoch in (0, 1):
        s.set_epoch(epoch)
        for _ in DataLoader(s.torch_iterable(), batch_size=4, num_workers=2):
            pass
    df = read_log(tmp_path / "log")
    assert len(df) == 48
    assert sorted(zip(df["epoch"], df["item"])) == [(e, i) for e in (0, 1) for i in range(24)]
    assert set(df["worker"]) == {0, 1}
    # the logged values are the drawn ones
    one = df[(df["epoch"] == 1) & (df["item"] == 5)].iloc[0]
    s.set_epoch(1)
    d = s.draw(5)
    assert one["x"] == d["x"] and one["class_name"] == d["class_name"] and one["split"] == "train"


def test_sampler_from_a_dataset_folder(files_ds):
    s = OnlineSampler(files_ds, "test_right", length=3)
    assert s[0]["image"].shape == (32, 32, 3)
    with pytest.raises(AugsplitError):
        OnlineSampler(files_ds / "manifest", "train")


def test_summary_lists_splits_in_spec_order(files_ds):
    # the split list in error messages follows dataset.json
    summary = json.loads((files_ds / lay.SUMMARY_FILE).read_text())
    assert set(summary["splits"]) == {"train", "test_right"}


@pytest.mark.parametrize("kwargs", [{"classes": 1.0}, {"cells": 1.5}, {"cells": ["a"]}, {"parquet_cache": "x"},
                                    {"parquet_cache": 0}])
def test_dataset_refuses_bad_arguments_in_one_line(none_ds, kwargs):
    # before: TypeError or ValueError from inside the filter (and parquet_cache=0 was taken as 1)
    from augsplit.errors import AugsplitError

    with pytest.raises(AugsplitError) as e:
        Dataset(none_ds, "train", **kwargs)
    assert next(iter(kwargs)) in str(e.value)
