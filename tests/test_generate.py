"""Generation: the same bytes whatever the executor, workers, shard grouping or row-group size;
bounded-memory streaming of manifest parts; storage options a resumed run must share; options
checked up front."""

from __future__ import annotations

import dataclasses
import json

import numpy as np
import pyarrow.parquet as pq
import pytest

from augsplit import generate as gen
from augsplit.build import open_mapping, open_spec
from augsplit.dataset import layout as lay
from augsplit.dataset import open_dataset, read_manifest
from augsplit.errors import DatasetError
from augsplit.generate import Options, finalize, generate, shard_jobs
from augsplit.verify import verify
from specs import assert_same_tree, tree

SPEC = {
    "seed": 11,
    "canvas": {"width": 32, "height": 32, "mode": "rgb"},
    "objects": {"kind": "polyomino", "cells": 3, "cell_px": 3, "colour": [200, 60, 40]},
    "background": {"kind": "gaussian_noise", "mean": 0.4, "sd": 0.1},
    "axes": {"x": {"range": [6, 26]}, "y": {"range": [6, 26]}, "scale": {"range": [0.8, 1.25], "dist": "log"},
             "angle": {"range": [0, 360]}, "hue": {"range": [0, 360]}},
    "render": {"distractors": {"count": [0, 1]}},
    "splits": {"train": {"region": {"x": [6, 14]}, "count": 30}, "test": {"region": {"x": [18, 26]}, "count": 14}},
}
SERIAL = QUICK = Options(shard_size=8, progress=False)


def test_serial_run_is_a_verified_dataset_with_distractors(serial):
    assert verify(serial).ok
    df = read_manifest(serial)
    assert len(df) == 44 and sorted(df["image_id"]) == sorted(set(df["image_id"]))
    # the spec allows distractors: the second table exists and joins on image_id
    d = read_manifest(serial, lay.DISTRACTOR_DIR)
    assert len(d) == int(df["n_distractors"].sum()) > 0
    assert set(d["image_id"]) <= set(df["image_id"])


def test_process_pool_gives_the_serial_bytes(spec_file, serial, tmp_path):
    generate(spec_file, tmp_path / "p", dataclasses.replace(QUICK, workers=2))
    assert_same_tree(serial, tmp_path / "p")


@pytest.mark.parametrize("executor", ["serial", "processes"])
def test_forced_executor_gives_the_serial_bytes(spec_file, serial, tmp_path, executor):
    generate(spec_file, tmp_path / "p", dataclasses.replace(QUICK, workers=1, executor=executor))
    assert_same_tree(serial, tmp_path / "p")


def test_small_row_groups_stream_the_same_rows(spec_file, serial, tmp_path, monkeypatch):
    """A shard larger than a row group is written group by group; the rows, images and
    distractors are those of the one-group run (only the Parquet grouping differs)."""
    monkeypatch.setattr(gen, "ROW_GROUP_ROWS", 3)
    out = tmp_path / "rg"
    generate(spec_file, out, QUICK)
    part = lay.part_path(out, lay.MANIFEST_DIR, "train", 0)
    md = pq.ParquetFile(part).metadata
    assert md.num_rows == 8 and md.num_row_groups == 3  # 3 + 3 + 2
    a, b = tree(serial), tree(out)
    assert sorted(a) == sorted(b)
    for k in a:
        if k.endswith(".parquet"):
            assert pq.read_table(serial / k).equals(pq.read_table(out / k)), k
        else:
            assert a[k] == b[k], k
    assert verify(out).ok


def test_parquet_store_packs_images_in_row_groups(spec_file, tmp_path):
    out = tmp_path / "pq"
    generate(spec_file, out, dataclasses.replace(QUICK, store="parquet", shard_size=30))
    assert not (out / lay.IMAGES_DIR).exists()
    parts = lay.part_files(out)
    assert len(parts) == 2  # one file per shard: train (30) and test (14)
    df = read_manifest(out)
    assert df["image_bytes"].notna().all() and (df["file"] == "").all()
    assert verify(out).ok  # decodes every stored image and compares its checksum


def test_row_groups_of_large_canvases_are_bounded_by_bytes():
    big = dict(SPEC, canvas={"width": 1024, "height": 1024, "mode": "rgb"},
               axes={"x": {"range": [100, 900]}, "y": {"range": [100, 900]}},
               splits={"a": {"region": {"x": [100, 400]}, "count": 2}})
    built = open_mapping(big)
    rows = gen.rows_per_group(built, Options(store="parquet"))
    assert 1 <= rows and rows * 1024 * 1024 * 3 <= gen.ROW_GROUP_BYTES < (rows + 1) * 1024 * 1024 * 3
    assert gen.rows_per_group(built, Options(store="files")) == gen.ROW_GROUP_ROWS


def test_reopened_dataset_keeps_the_order_of_splits_and_axes(spec_file, serial):
    """Split order is part of every image's seed key and axis order of its draws: the spec a
    dataset folder re-opens must be the one it was made from, not a key-sorted copy."""
    made, reopened = open_spec(spec_file).plan, open_dataset(serial).plan
    assert [s.name for s in reopened.splits] == [s.name for s in made.splits] == ["train", "test"]
    assert reopened.space.names == made.space.names
    assert reopened.hash == made.hash


def test_spec_json_records_the_storage_layout(serial):
    doc = json.loads((serial / lay.SPEC_FILE).read_text())
    # a Gaussian-noise background: zlib at its default level (dataset/png.py, default_deflate)
    assert doc["layout"] == {"shard_size": 8, "store": "files", "format": "png", "quality": 95,
                             "png_deflate": "zlib", "png_level": 1}


@pytest.mark.parametrize("change,flag", [({"shard_size": 5}, "--shard-size 8"), ({"store": "parquet"}, "--store files"),
                                         ({"format": "webp"}, "--format png")])
def test_resume_with_other_storage_options_is_refused(spec_file, tmp_path, change, flag):
    out = tmp_path / "d"
    generate(spec_file, out, dataclasses.replace(QUICK, array_shard=(0, 3)))
    with pytest.raises(DatasetError, match=f"rerun with {flag}"):
        generate(spec_file, out, dataclasses.replace(QUICK, resume=True, **change))


def test_resume_with_a_changed_shard_size_cannot_duplicate_rows(spec_file, tmp_path):
    """Old shard 2 of size 8 (rows 16..23) must never pass for new shard 2 of size 4 (8..11):
    the recorded layout refuses the mix instead of guessing from row counts."""
    out = tmp_path / "d"
    generate(spec_file, out, dataclasses.replace(QUICK, array_shard=(0, 1)))
    (out / lay.SUMMARY_FILE).unlink(missing_ok=True)
    with pytest.raises(DatasetError, match="--shard-size 8"):
        generate(spec_file, out, dataclasses.replace(QUICK, shard_size=4, resume=True))


@pytest.mark.parametrize("opts,where", [(Options(store="tape"), "store"), (Options(format="gif"), "format"),
                                        (Options(executor="slurm"), "executor"), (Options(shard_size=0), "--shard-size"),
                                        (Options(workers=0), "--workers"),
                                        (Options(store="none", format="jpeg"), "--format")])
def test_bad_options_are_one_line_errors_before_any_work(spec_file, tmp_path, opts, where):
    with pytest.raises(DatasetError, match=where) as err:
        generate(spec_file, tmp_path / "never", opts)
    assert "\n" not in str(err.value)
    assert not (tmp_path / "never").exists()


def test_resume_of_a_complete_dataset_makes_nothing_and_keeps_bytes(spec_file, serial, tmp_path):
    import shutil

    copy = tmp_path / "copy"
    shutil.copytree(serial, copy)
    before = tree(copy)
    summary = generate(spec_file, copy, dataclasses.replace(QUICK, resume=True))
    assert summary["images"] == 44
    assert tree(copy) == before


def test_finalize_reads_the_shard_size_from_the_folder(spec_file, serial):
    built = open_spec(spec_file)
    assert open_dataset(serial).shard_size == 8
    assert len(shard_jobs(built, 8)) == 4 + 2
    assert finalize(serial)["images"] == 44


def test_shard_jobs_cover_every_index_once():
    built = open_mapping(SPEC)
    for size in (1, 7, 8, 30, 1000):
        jobs = shard_jobs(built, size)
        for s in built.plan.splits:
            idx = np.concatenate([np.arange(j.start, j.stop) for j in jobs if j.split == s.name])
            assert np.array_equal(idx, np.arange(s.total))



def test_a_store_none_folder_recorded_as_jpeg_by_an_earlier_version_resumes(spec_file, tmp_path):
    """Found by review: since --store none refuses --format jpeg, a folder an earlier version
    began that way could not be finished ('rerun with --format jpeg', then refused again)."""
    out = tmp_path / "d"
    generate(spec_file, out, dataclasses.replace(QUICK, store="none", array_shard=(0, 2)))
    doc = json.loads((out / lay.SPEC_FILE).read_text())
    doc["layout"].update(format="jpeg", quality=80, png_deflate=None, png_level=None)
    (out / lay.SPEC_FILE).write_text(json.dumps(doc))
    summary = generate(spec_file, out, dataclasses.replace(QUICK, store="none", resume=True))
    assert summary["images"] == 44
    with pytest.raises(DatasetError, match=r"rerun with --shard-size 8$"):  # what the run recorded, nothing else
        generate(spec_file, out, dataclasses.replace(QUICK, store="none", shard_size=5, resume=True))
