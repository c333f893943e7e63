"""verify checks every stored image whatever its format: a painted-over image, one overwritten
by random bytes and one truncated to 0 bytes are each a finding (exit 1) naming split and
image id, for PNG, JPEG and WebP files and embedded bytes; a dataset written before the byte
checksum was recorded says what it could not check. verify streams part by part: any batch
size, any executor and any worker count give the same report, and `--sample` re-renders a
sample while still reading every stored image."""

from __future__ import annotations

import hashlib
import shutil
from pathlib import Path

import cv2
import numpy as np
import pyarrow.parquet as pq
import pytest

from augsplit import verify as vmod
from augsplit.cli import main
from augsplit.dataset import layout as lay
from augsplit.dataset import read_manifest
from augsplit.generate import Options, generate
from augsplit.verify import verify
from specs import write_spec

SPEC = {
    "seed": 31,
    "canvas": {"width": 24, "height": 24, "mode": "rgb"},
    "objects": {"kind": "polyomino", "cells": 3, "cell_px": 3, "colour": [60, 200, 90]},
    "background": {"kind": "gaussian_noise", "mean": 0.5, "sd": 0.1},
    "axes": {"x": {"range": [5, 19]}, "y": {"range": [5, 19]}, "hue": {"range": [0, 360]}},
    "splits": {"train": {"region": {"y": [5, 10]}, "count": 12}, "test": {"region": {"y": [14, 19]}, "count": 6}},
}
FORMATS = ("png", "jpeg", "webp")
EXT = {"png": ".png", "jpeg": ".jpg", "webp": ".webp"}
VICTIM = "train-0000003"
NAMED = f"split train, image {VICTIM}"


@pytest.fixture(scope="module")
def made(tmp_path_factory) -> dict:
    root = tmp_path_factory.mktemp("stored")
    spec = write_spec(root, SPEC)
    out = {}
    for fmt in FORMATS:
        for store in ("files", "parquet"):
            out[fmt, store] = root / f"{store}-{fmt}"
            generate(spec, out[fmt, store], Options(store=store, format=fmt, shard_size=5, progress=False))
    return out


def _painted(data: bytes, fmt: str) -> bytes:
    img = cv2.imdecode(np.frombuffer(data, np.uint8), cv2.IMREAD_COLOR)
    img[2:12, 2:12] = (0, 0, 255)  # a red square painted over the image, then saved as the same format
    return cv2.imencode(EXT[fmt], img)[1].tobytes()


TAMPER = {
    "painted": _painted,
    "random": lambda data, fmt: np.random.default_rng(0).integers(0, 256, len(data), dtype=np.uint8).tobytes(),
    "empty": lambda data, fmt: b"",
}


def _tamper_file(root: Path, fmt: str, how: str) -> None:
    p = root / lay.IMAGES_DIR / "train" / f"{VICTIM}{EXT[fmt]}"
    p.write_bytes(TAMPER[how](p.read_bytes(), fmt))


def _tamper_embedded(root: Path, fmt: str, how: str) -> None:
    import pyarrow as pa

    part = lay.part_path(root, lay.MANIFEST_DIR, "train", 0)
    t = pq.read_table(part)
    blobs = t.column("image_bytes").to_pylist()
    k = t.column("image_id").to_pylist().index(VICTIM)
    blobs[k] = TAMPER[how](blobs[k], fmt)
    t = t.set_column(t.schema.get_field_index("image_bytes"), "image_bytes", pa.array(blobs, pa.binary()))
    pq.write_table(t, part)


@pytest.mark.parametrize("fmt", FORMATS)
@pytest.mark.parametrize("how", sorted(TAMPER))
@pytest.mark.parametrize("store", ["files", "parquet"])
def test_a_tampered_image_is_a_finding_naming_split_and_image(made, tmp_path, capsys, store, how, fmt):
    dst = tmp_path / "ds"
    shutil.copytree(made[fmt, store], dst)
    assert main(["verify", str(dst), "--quiet"]) == 0
    capsys.readouterr()
    (_tamper_file if store == "files" else _tamper_embedded)(dst, fmt, how)
    assert main(["verify", str(dst), "--quiet"]) == 1
    out = capsys.readouterr().out
    assert NAMED in out, out
    if how == "painted" and fmt != "png":
        # only the checksum of the stored bytes can see a re-encoded lossy image
        assert "do not match their checksum (stored bytes)" in out


def test_the_recorded_checksum_is_sha256_of_the_stored_bytes(made):
    # FIPS 180-4 SHA-256 through the standard library's hashlib, over the bytes on disk
    root = made["webp", "files"]
    df = read_manifest(root)
    for rel, recorded in zip(df["file"], df["file_sha256"]):
        assert hashlib.sha256((root / rel).read_bytes()).hexdigest() == recorded


def test_a_dataset_without_byte_checksums_says_what_it_could_not_check(made, tmp_path, capsys):
    """A dataset written before file_sha256 existed still opens and verifies, and the output
    counts the images whose bytes could not be checked."""
    dst = tmp_path / "old"
    shutil.copytree(made["jpeg", "files"], dst)
    for part in lay.part_files(dst):
        t = pq.read_table(part)
        pq.write_table(t.drop_columns(["file_sha256", "tar_file", "tar_offset"]), part)
    assert main(["verify", str(dst), "--quiet"]) == 0
    out = capsys.readouterr().out
    assert "OK (18 rows checked" in out
    assert "not checked: 18 stored images have no recorded checksum of their bytes" in out


@pytest.mark.parametrize("sample", ["0", "-3"])
def test_a_zero_or_negative_sample_is_one_line_exit_2(made, capsys, sample):
    assert main(["verify", str(made["png", "files"]), "--sample", sample]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "--sample" in err


def test_a_sample_re_renders_some_rows_but_reads_every_stored_image(made, tmp_path, capsys):
    dst = tmp_path / "ds"
    shutil.copytree(made["jpeg", "files"], dst)
    rep = verify(dst, sample=2)
    assert rep.ok and rep.rerendered == 2 and rep.checked == 18
    assert any("16 of 18 rows not re-rendered" in s for s in rep.skipped)
    _tamper_file(dst, "jpeg", "painted")
    for seed in range(4):  # whichever rows the sample picks, the stored file is still checked
        rep = verify(dst, sample=1, seed=seed)
        assert not rep.ok and any(NAMED in p for p in rep.problems)


@pytest.fixture(scope="module")
def damaged(made, tmp_path_factory) -> Path:
    """A dataset with several kinds of damage spread over parts."""
    dst = tmp_path_factory.mktemp("damaged") / "ds"
    shutil.copytree(made["png", "files"], dst)
    _tamper_file(dst, "png", "painted")
    (dst / lay.IMAGES_DIR / "test" / "test-0000004.png").write_bytes(b"")
    (dst / lay.IMAGES_DIR / "train" / "train-0000011.png").unlink()
    shutil.copyfile(dst / lay.IMAGES_DIR / "test" / "test-0000001.png", dst / lay.IMAGES_DIR / "test" / "stray.png")
    return dst


def _summary(rep):
    return rep.checked, rep.rerendered, rep.problems, rep.skipped


def test_batches_of_any_size_give_the_same_report(damaged, monkeypatch):
    whole = verify(damaged, sample=7)
    assert not whole.ok
    monkeypatch.setattr(vmod, "BATCH_ROWS", 2)  # rows cross batch boundaries inside every part
    assert _summary(verify(damaged, sample=7)) == _summary(whole)


def test_two_processes_give_the_serial_report(damaged):
    serial = verify(damaged, sample=9, executor="serial")
    assert len(serial.problems) >= 4
    assert _summary(verify(damaged, sample=9, workers=2, executor="processes")) == _summary(serial)


def test_dask_gives_the_serial_report(damaged):
    pytest.importorskip("distributed")
    serial = verify(damaged, executor="serial")
    assert _summary(verify(damaged, workers=2, executor="dask")) == _summary(serial)


def test_cli_verify_takes_the_executor_options(damaged, capsys):
    assert main(["verify", str(damaged), "--workers", "2", "--executor", "processes", "--quiet"]) == 1
    out = capsys.readouterr().out
    assert NAMED in out and "stray.png" in out and "test-0000004" in out and "train-0000011" in out
    assert main(["verify", str(damaged), "--workers", "0"]) == 2


def test_verify_reads_rows_in_batches_never_the_whole_table(made, monkeypatch):
    """Bounded memory: verify goes through iter_batches; reading every row at once fails here."""
    from augsplit.dataset import rows

    def refuse(*a, **k):
        raise AssertionError("verify read the whole table")

    monkeypatch.setattr(rows, "read_rows", refuse)
    monkeypatch.setattr(rows, "read_manifest", refuse)
    assert verify(made["png", "parquet"]).ok
