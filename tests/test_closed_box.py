"""The dataset is a closed box: a `file` path read from a manifest is resolved inside the dataset
folder, must name a regular file and is read with a size limit. `..`, absolute paths, symbolic
links out of the folder, /dev/zero, a FIFO and an oversized file are findings naming split and
image id (verify and audit exit 1) or a one-line error (loaders, preview), and are never read.
A corrupt image is a finding naming its row, in verify and in audit."""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from augsplit.cli import main
from augsplit.data import Dataset
from augsplit.errors import DatasetError
from augsplit.generate import Options, generate
from specs import write_spec

SPEC = {
    "seed": 43,
    "canvas": {"width": 24, "height": 24, "mode": "rgb"},
    "objects": {"kind": "polyomino", "cells": 3, "cell_px": 3, "colour": [200, 60, 60]},
    "background": {"kind": "gaussian_noise", "mean": 0.5, "sd": 0.2},
    "axes": {"x": {"range": [5, 19]}, "y": {"range": [5, 19]}, "angle": {"range": [0, 360]}},
    "splits": {"train": {"region": {"x": [5, 10]}, "count": 12}, "test": {"region": {"x": [14, 19]}, "count": 6}},
    "guarantees": [{"disjoint": "parameters", "between": ["train", "test"], "margin": 0.05}],
}
SERIAL = Options(shard_size=5, progress=False)  # the reference run (conftest.serial)
VICTIM = "train-0000003"  # row 3 of manifest/split=train/part-000000.parquet
NAMED = f"split train, image {VICTIM}"
FIRST = "split train, image train-0000000"  # with the whole folder linked out, the first row is named
CLI = [sys.executable, "-m", "augsplit.cli"]


def part0(root: Path) -> Path:
    return root / "manifest" / "split=train" / "part-000000.parquet"


def set_column(root: Path, column: str, value) -> None:
    """Replace the victim row's value of one column, keeping the part's schema and metadata."""
    p = part0(root)
    t = pq.read_table(p)
    values = t.column(column).to_pylist()
    values[t.column("image_id").to_pylist().index(VICTIM)] = value
    t = t.set_column(t.schema.get_field_index(column), column, pa.array(values, t.schema.field(column).type))
    pq.write_table(t, p)


@pytest.fixture()
def ds(serial, tmp_path) -> Path:
    """A copy of the reference dataset in tmp_path/ds, with a copy of the victim's own image
    file outside it (tmp_path/x.png): bytes that would pass every check if they were read."""
    root = tmp_path / "ds"
    shutil.copytree(serial, root)
    shutil.copyfile(root / "images" / "train" / f"{VICTIM}.png", tmp_path / "x.png")
    return root


def escape(kind: str, root: Path) -> None:
    outside = root.parent / "x.png"
    if kind == "dotdot":
        set_column(root, "file", "../x.png")
    elif kind == "dotdot_inside":
        set_column(root, "file", "images/../../x.png")
    elif kind == "absolute":
        set_column(root, "file", str(outside))
    elif kind == "symlink":
        (root / "images" / "train" / f"{VICTIM}.png").unlink()
        os.symlink(outside, root / "images" / "train" / f"{VICTIM}.png")
    elif kind == "folder_link":
        shutil.move(root / "images" / "train", root.parent / "train_copy")
        os.symlink(root.parent / "train_copy", root / "images" / "train")
    elif kind == "dev_zero":
        set_column(root, "file", "/dev/zero")
    elif kind == "fifo":
        os.mkfifo(root.parent / "a_fifo")
        set_column(root, "file", "../a_fifo")
    elif kind == "fifo_inside":
        os.mkfifo(root / "images" / "train" / "pipe.png")
        set_column(root, "file", "images/train/pipe.png")
    elif kind == "folder":
        set_column(root, "file", "images/train")
    elif kind == "oversized":
        # a sparse file far beyond any 24x24 image: a bound must refuse it before reading
        with open(root / "images" / "train" / f"{VICTIM}.png", "r+b") as f:
            f.truncate(64 << 20)
    elif kind == "corrupt":
        (root / "images" / "train" / f"{VICTIM}.png").write_bytes(b"\x89PNG\r\n\x1a\n" + b"not an image" * 20)
    elif kind == "missing":
        (root / "images" / "train" / f"{VICTIM}.png").unlink()


ESCAPES = ["dotdot", "dotdot_inside", "absolute", "symlink", "folder_link", "dev_zero", "fifo", "fifo_inside", "folder", "oversized"]
READABLE_ESCAPES = ["dotdot", "absolute", "symlink", "folder_link"]  # what an unguarded reader takes silently


@pytest.mark.parametrize("kind", ESCAPES + ["corrupt", "missing"])
def test_verify_reports_the_row_and_never_reads_outside(kind, ds):
    escape(kind, ds)
    # a child process with a deadline: a reader that opened the FIFO would wait forever, and
    # one that read /dev/zero would run out of memory first
    proc = subprocess.run(CLI + ["verify", str(ds)], capture_output=True, text=True, timeout=120)
    assert proc.returncode == 1, proc.stdout + proc.stderr
    assert "Traceback" not in proc.stderr
    assert NAMED in proc.stdout, proc.stdout


@pytest.mark.parametrize("kind", READABLE_ESCAPES + ["corrupt", "fifo_inside", "oversized"])
def test_the_loader_refuses_the_row(kind, ds):
    escape(kind, ds)
    items = Dataset(ds, "train")
    if kind != "folder_link":
        assert items[2]["image"].shape == (24, 24, 3)  # other rows are untouched
    with pytest.raises(DatasetError) as e:
        items[3]
    assert VICTIM in str(e.value) and "\n" not in str(e.value)


@pytest.mark.parametrize("kind", READABLE_ESCAPES + ["corrupt", "missing"])
def test_preview_is_one_line_naming_the_row(kind, ds, tmp_path, capsys):
    escape(kind, ds)
    code = main(["preview", str(ds), "--out", str(tmp_path / "pics")])
    err = capsys.readouterr().err
    assert code == 2 and err.count("\n") == 1 and (FIRST if kind == "folder_link" else NAMED) in err, err


@pytest.mark.parametrize("kind", READABLE_ESCAPES + ["corrupt", "missing", "fifo_inside"])
def test_audit_fails_the_image_files_check_naming_the_row(kind, ds, tmp_path, capsys):
    escape(kind, ds)
    code = main(["audit", str(ds), "--out", str(tmp_path / "rep"), "--quiet"])
    cap = capsys.readouterr()
    assert code == 1, cap.out + cap.err
    doc = json.loads((tmp_path / "rep" / "audit.json").read_text())
    check = next(c for c in doc["checks"] if c["name"] == "image_files")
    first = "train-0000000" if kind == "folder_link" else VICTIM
    assert check["verdict"] == "fail" and check["worst"][0]["image_id"] == first
    assert check["worst"][0]["split"] == "train"
    # the other checks still ran on every other row, and no stand-in faked a duplicate
    near = next(c for c in doc["checks"] if c["name"] == "near_duplicates")
    assert near["numbers"].get("n_exact_duplicates", 0) == 0


def test_a_corrupt_embedded_image_is_a_finding(tmp_path):
    spec = write_spec(tmp_path, SPEC)
    out = tmp_path / "pq"
    generate(spec, out, Options(store="parquet", shard_size=5, progress=False))
    set_column(out, "image_bytes", b"\x89PNG\r\n\x1a\n" + b"garbage" * 10)
    proc = subprocess.run(CLI + ["verify", str(out)], capture_output=True, text=True, timeout=120)
    assert proc.returncode == 1 and NAMED in proc.stdout, proc.stdout + proc.stderr
    with pytest.raises(DatasetError, match=VICTIM):
        Dataset(out, "train")[3]


def test_a_resolved_path_must_stay_inside(tmp_path):
    """The rule itself, against the standard library's own path resolution."""
    from augsplit.dataset.images import ImageError, resolve_inside

    root = tmp_path / "root"
    (root / "a").mkdir(parents=True)
    (root / "a" / "f.png").write_bytes(b"x")
    os.symlink(root / "a", root / "inner_link")  # a link that stays inside is fine
    os.symlink(tmp_path, root / "outer_link")
    (tmp_path / "x.png").write_bytes(b"x")
    assert resolve_inside(root, "a/f.png") == (root / "a" / "f.png").resolve()
    assert resolve_inside(root, "inner_link/f.png") == (root / "a" / "f.png").resolve()
    # a link out and back in again resolves inside: it is allowed (the box is where the bytes are)
    assert resolve_inside(root, "outer_link/root/a/f.png") == (root / "a" / "f.png").resolve()
    for bad in ["../x.png", "/etc/passwd", str(tmp_path / "x.png"), "outer_link/x.png", "a/../../x.png", "", "a",
                "~/f.png", "a/f.png\x00"]:
        with pytest.raises(ImageError):
            resolve_inside(root, bad)
