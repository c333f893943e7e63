"""`--store tar`: one POSIX ustar archive per shard of (image, JSON row) members in image order.
The archives are byte-identical whatever the executor, worker count or job-array split; a
shard without its manifest part is redone and its archive replaced; the standard library's
tarfile reads back the manifest's images; verify checks every member; and the dataset's image
of a row (loader, preview, audit) reads from the archives."""

from __future__ import annotations

import dataclasses
import io
import json
import shutil
import tarfile

import cv2
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from augsplit.cli import main
from augsplit.data import Dataset
from augsplit.dataset import image_of, layout as lay, open_dataset, read_manifest
from augsplit.generate import Options, finalize, generate
from augsplit.manifest import pixel_sha256
from augsplit.verify import verify
from specs import assert_same_tree, tree

SPEC = {
    "seed": 7,
    "canvas": {"width": 24, "height": 24, "mode": "rgb"},
    "objects": {"kind": "polyomino", "cells": 3, "cell_px": 3, "colour": [200, 60, 90]},
    "background": {"kind": "uniform_noise", "lo": 0.2, "hi": 0.6},
    "axes": {"x": {"range": [5, 19]}, "y": {"range": [5, 19]}, "angle": {"range": [0, 360]}},
    "render": {"distractors": {"count": [0, 1]}},
    "splits": {"train": {"region": {"y": [5, 10]}, "count": 14}, "test": {"region": {"y": [14, 19]}, "count": 7}},
}
SERIAL = Options(store="tar", shard_size=4, progress=False)


def shards(root):
    return {k: v for k, v in tree(root).items() if k.startswith(lay.SHARDS_DIR + "/")}


def test_one_archive_per_shard(serial):
    names = sorted(shards(serial))
    assert names == [f"shards/split=test/part-{k:06d}.tar" for k in range(2)] + \
        [f"shards/split=train/part-{k:06d}.tar" for k in range(4)]


def test_two_processes_give_the_serial_bytes(spec_file, serial, tmp_path):
    out = tmp_path / "procs"
    generate(spec_file, out, dataclasses.replace(SERIAL, workers=2, executor="processes"))
    assert_same_tree(serial, out)


def test_dask_gives_the_serial_bytes(spec_file, serial, tmp_path):
    pytest.importorskip("distributed")
    out = tmp_path / "dask"
    generate(spec_file, out, dataclasses.replace(SERIAL, workers=2, executor="dask"))
    assert_same_tree(serial, out)


def test_job_array_shards_then_finalize_give_the_serial_bytes(spec_file, serial, tmp_path):
    out = tmp_path / "array"
    for k in (2, 0, 1):
        generate(spec_file, out, dataclasses.replace(SERIAL, array_shard=(k, 3)))
    finalize(out)
    assert_same_tree(serial, out)


def test_a_shard_without_its_part_is_redone_and_its_archive_replaced(spec_file, serial, tmp_path):
    out = tmp_path / "resume"
    shutil.copytree(serial, out)
    (out / lay.SUMMARY_FILE).unlink()
    lay.part_path(out, lay.MANIFEST_DIR, "train", 1).unlink()
    lay.part_path(out, lay.DISTRACTOR_DIR, "train", 1).unlink(missing_ok=True)
    # the archive a killed run left half-written before its part committed
    (out / lay.tar_relpath("train", 1)).write_bytes(b"half a tar")
    generate(spec_file, out, dataclasses.replace(SERIAL, resume=True))
    assert_same_tree(serial, out)


def test_the_standard_library_reads_back_the_manifests_images(serial):
    """Reference: the POSIX ustar format as Python's tarfile reads it (magic 'ustar\\x0000' at
    byte 257 of each header, POSIX.1-1988); members come in image order, image then JSON row."""
    df = read_manifest(serial)
    got = {}
    for rel in sorted(shards(serial)):
        raw = (serial / rel).read_bytes()
        assert raw[257:265] == b"ustar\x0000"
        with tarfile.open(serial / rel) as tf:
            members = tf.getmembers()
            assert all(m.mtime == 0 and m.uid == 0 and m.gid == 0 and m.mode == 0o644 and m.uname == "" and
                       m.gname == "" and m.isreg() for m in members)
            names = [m.name for m in members]
            assert names[0::2] == [n[:-5] + ".png" for n in names[1::2]]
            for img_m, row_m in zip(members[0::2], members[1::2]):
                row = json.loads(tf.extractfile(row_m).read())
                img = cv2.imdecode(np.frombuffer(tf.extractfile(img_m).read(), np.uint8), cv2.IMREAD_COLOR)
                got[row["image_id"]] = (pixel_sha256(cv2.cvtColor(img, cv2.COLOR_BGR2RGB)), row, img_m.offset)
    assert sorted(got) == sorted(df["image_id"])
    for _, r in df.iterrows():
        sha, row, offset = got[r["image_id"]]
        assert sha == r["sha256"] and row["sha256"] == r["sha256"] and row["split"] == r["split"]
        assert r["tar_offset"] == offset and r["file"] == "" and r["image_bytes"] is None
        assert row["cx_px"] == r["cx_px"] and row["tar_offset"] == offset


def test_image_of_a_row_and_the_loader_read_the_archives(serial):
    folder = open_dataset(serial)
    df = read_manifest(serial)
    for _, r in df.iloc[[0, 5, 15]].iterrows():
        assert pixel_sha256(image_of(folder, r)) == r["sha256"]
    items = Dataset(serial, "test")
    assert pixel_sha256(items[3]["image"]) == df[df["image_id"] == "test-0000003"]["sha256"].iloc[0]


def test_what_generate_makes_verifies_and_previews(serial, tmp_path, capsys):
    assert main(["verify", str(serial), "--quiet"]) == 0
    assert main(["preview", str(serial), "--out", str(tmp_path / "pics")]) == 0


@pytest.fixture()
def copy(serial, tmp_path):
    dst = tmp_path / "ds"
    shutil.copytree(serial, dst)
    return dst


def _member(root, rel, name):
    with tarfile.open(root / rel) as tf:
        m = tf.getmember(name)
        return m.offset_data, m.size


def test_overwritten_image_bytes_are_a_finding(copy):
    rel = lay.tar_relpath("train", 1)
    off, size = _member(copy, rel, "train-0000005.png")
    raw = bytearray((copy / rel).read_bytes())
    raw[off:off + size] = np.random.default_rng(1).integers(0, 256, size, dtype=np.uint8).tobytes()
    (copy / rel).write_bytes(bytes(raw))
    rep = verify(copy)
    assert not rep.ok and any("split train, image train-0000005" in p for p in rep.problems), rep.problems


def test_an_edited_json_row_is_a_finding(copy):
    rel = lay.tar_relpath("test", 0)
    off, size = _member(copy, rel, "test-0000002.json")
    raw = bytearray((copy / rel).read_bytes())
    row = raw[off:off + size]
    edited = row.replace(b'"class_index":', b'"class_index":9', 1)[:size]  # same length, one value changed
    raw[off:off + size] = edited
    (copy / rel).write_bytes(bytes(raw))
    rep = verify(copy)
    assert any("test-0000002" in p and "differs from the manifest row" in p for p in rep.problems), rep.problems


def test_an_emptied_or_missing_archive_is_a_finding(copy):
    (copy / lay.tar_relpath("train", 2)).write_bytes(b"")
    (copy / lay.tar_relpath("test", 1)).unlink()
    text = "\n".join(verify(copy).problems)
    assert "split train, image train-0000008" in text and "split test, image test-0000004" in text


def test_an_archive_without_a_part_is_a_stray(copy):
    shutil.copyfile(copy / lay.tar_relpath("train", 0), copy / "shards" / "split=train" / "part-000009.tar")
    assert any("shard archive without a manifest part" in p for p in verify(copy).problems)


def test_overwrite_removes_a_tar_dataset(spec_file, copy):
    generate(spec_file, copy, dataclasses.replace(SERIAL, store="parquet", overwrite=True))
    assert not (copy / lay.SHARDS_DIR).exists() and verify(copy).ok


def test_the_archives_are_the_bytes_pythons_tarfile_writes_for_their_members(serial):
    """Reference: the standard library's tarfile writing the same members as ustar with the
    fixed owner, mode and time; the archive (headers, padding, end blocks) must be identical."""
    for rel in sorted(shards(serial)):
        raw = (serial / rel).read_bytes()
        with tarfile.open(serial / rel) as tf:
            members = [(m.name, tf.extractfile(m).read()) for m in tf.getmembers()]
        buf = io.BytesIO()
        with tarfile.open(fileobj=buf, mode="w", format=tarfile.USTAR_FORMAT) as tw:
            for name, data in members:
                ti = tarfile.TarInfo(name)
                ti.size, ti.mtime, ti.mode, ti.uid, ti.gid, ti.uname, ti.gname = len(data), 0, 0o644, 0, 0, "", ""
                tw.addfile(ti, io.BytesIO(data))
        assert buf.getvalue() == raw, rel


@settings(max_examples=300, deadline=None)
@given(name=st.text(st.characters(min_codepoint=33, max_codepoint=0x2FFF, exclude_characters="/"), min_size=1,
                    max_size=100).filter(lambda n: len(n.encode()) <= 100),
       size=st.integers(0, 8**11 - 1))
def test_a_member_header_is_the_one_pythons_tarfile_writes(name, size):
    """Reference: the standard library's tarfile, ustar, with the fixed owner, mode and time.
    The header's checksum is summed from its varying fields only; any name and size must give
    tarfile's bytes."""
    from augsplit.dataset.tarstore import header

    ti = tarfile.TarInfo(name)
    ti.size, ti.mtime, ti.mode, ti.uid, ti.gid, ti.uname, ti.gname = size, 0, 0o644, 0, 0, "", ""
    assert header(name, size) == ti.tobuf(tarfile.USTAR_FORMAT, "utf-8", "surrogateescape")


def test_a_name_too_long_for_ustar_is_refused_in_one_line():
    from augsplit.dataset.tarstore import header
    from augsplit.errors import DatasetError

    with pytest.raises(DatasetError, match="1 to 100 bytes"):
        header("s" * 95 + "-0000001.png", 10)  # ustar names hold at most 100 bytes (POSIX.1-1988)


def test_a_failure_while_writing_the_archive_commits_nothing(spec_file, tmp_path, monkeypatch):
    """The archive is complete and renamed before the part, the shard's commit, is renamed: a
    shard whose archive could not be finished leaves neither, and a resumed run makes both."""
    from augsplit.dataset import tarstore

    out = tmp_path / "fail"
    real_close = tarstore.TarShardWriter.close

    def failing_close(self):
        raise OSError(5, "Input/output error")

    monkeypatch.setattr(tarstore.TarShardWriter, "close", failing_close)
    from augsplit.errors import DatasetError

    with pytest.raises(DatasetError, match="Input/output error"):
        generate(spec_file, out, SERIAL)
    assert not lay.part_files(out) and not list((out / lay.SHARDS_DIR).rglob("*.tar"))
    monkeypatch.setattr(tarstore.TarShardWriter, "close", real_close)
    generate(spec_file, out, dataclasses.replace(SERIAL, resume=True))
    assert verify(out).ok
