"""Files a dataset names are checked where they are, and again once open: a folder on the way
swapped for a link out of the dataset between the check and the open is refused, never read
through. Measured before: every reader here returned the bytes of the file outside (the
manifest images' Box opened with O_NOFOLLOW, which guards only the last name of the path; the
annotation readers checked a path, then read it by name).

The swap is made by an audit hook on the "open" event (PEP 578: raised before the file is
opened, by the built-in open and by os.open alike), so it lands between any check and the
open whichever way a reader opens its files."""

from __future__ import annotations

import os
import sys
from contextlib import contextmanager
from pathlib import Path

import cv2
import numpy as np
import pytest

from augsplit.dataset.images import Box, ImageError, opened_path
from augsplit.errors import DatasetError

_ARMED: list = []  # (path suffix, folder to swap, where its link points); emptied once fired


def _hook(event, args):
    if event != "open" or not _ARMED or not isinstance(args[0], (str, bytes, os.PathLike)):
        return
    suffix, folder, outside = _ARMED[0]
    if os.fsdecode(args[0]).endswith(suffix):
        _ARMED.clear()
        folder.rename(folder.with_name(folder.name + ".moved"))
        folder.symlink_to(outside, target_is_directory=True)


sys.addaudithook(_hook)  # hooks cannot be removed: this one does nothing unless a test arms it


@pytest.fixture
def swap():
    """swap(suffix, folder, outside): when a file whose path ends in `suffix` is next opened,
    `folder` is first moved aside and replaced by a link to `outside`."""
    def arm(suffix: str, folder: Path, outside: Path) -> None:
        _ARMED[:] = [(suffix, folder, outside)]

    yield arm
    _ARMED.clear()


def _pair(tmp_path, rel: str, inside: bytes, outside: bytes) -> tuple[Path, Path]:
    """A dataset folder holding `rel`, and a folder outside it holding a file of the same name
    with other bytes. Returns (dataset root, outside folder)."""
    root, out = tmp_path / "ds", tmp_path / "elsewhere"
    (root / rel).parent.mkdir(parents=True)
    (root / rel).write_bytes(inside)
    out.mkdir()
    (out / Path(rel).name).write_bytes(outside)
    return root, out


def test_a_manifest_image_whose_folder_is_swapped_for_a_link_out_while_opened_is_not_read(tmp_path, swap):
    root, out = _pair(tmp_path, "images/train/a.png", b"inside", b"SECRET")
    assert Box(root).read("images/train/a.png", 100) == b"inside"
    swap("images/train/a.png", root / "images" / "train", out)
    with pytest.raises(ImageError, match="out of the dataset folder"):
        Box(root).read("images/train/a.png", 100)  # before: b"SECRET"


def test_a_yolo_label_whose_folder_is_swapped_while_opened_is_not_read(tmp_path, swap):
    from augsplit.formats.yolo import read_yolo

    root, out = _pair(tmp_path, "labels/part/9.txt", b"0 0.5 0.5 0.1 0.1\n", b"0 0.9 0.9 0.1 0.1\n")
    (root / "images" / "part").mkdir(parents=True)
    cv2.imwrite(str(root / "images" / "part" / "9.png"), np.zeros((10, 10), np.uint8))
    assert len(read_yolo(root).objects) == 1
    swap("labels/part/9.txt", root / "labels" / "part", out)
    with pytest.raises(DatasetError, match="out of the dataset folder"):
        read_yolo(root)  # before: the outside label's box (0.9, 0.9)


def test_a_yolo_image_header_whose_folder_is_swapped_while_opened_is_not_read(tmp_path, swap):
    from augsplit.formats.yolo import read_yolo

    root, out = _pair(tmp_path, "labels/part/9.txt", b"0 0.5 0.5 0.1 0.1\n", b"")
    (root / "images" / "part").mkdir(parents=True)
    cv2.imwrite(str(root / "images" / "part" / "9.png"), np.zeros((10, 10), np.uint8))
    cv2.imwrite(str(out / "9.png"), np.zeros((77, 55), np.uint8))
    assert read_yolo(root).images[["width", "height"]].values.tolist() == [[10, 10]]
    swap("images/part/9.png", root / "images" / "part", out)
    with pytest.raises(DatasetError, match="out of the dataset folder"):
        read_yolo(root)  # before: the outside image's size, 55 x 77


def test_a_voc_file_whose_folder_is_swapped_while_opened_is_not_read(tmp_path, swap):
    from augsplit.formats.voc import read_voc

    xml = ("<annotation><filename>a.png</filename><size><width>100</width><height>100</height></size>"
           "<object><name>{}</name><bndbox><xmin>10</xmin><ymin>10</ymin><xmax>20</xmax><ymax>20</ymax>"
           "</bndbox></object></annotation>")
    root, out = _pair(tmp_path, "Annotations/a.xml", xml.format("car").encode(), xml.format("secret").encode())
    assert read_voc(root).objects["label"].tolist() == ["car"]
    swap("Annotations/a.xml", root / "Annotations", out)
    with pytest.raises(DatasetError, match="out of the dataset folder"):
        read_voc(root)  # before: the label 'secret'


def test_an_annotated_image_read_for_the_audit_whose_folder_is_swapped_is_not_read(tmp_path, swap):
    from augsplit.audit.annotated import _image_loader

    root, out = _pair(tmp_path, "images/a.png", b"", b"")
    cv2.imwrite(str(root / "images" / "a.png"), np.full((8, 8), 10, np.uint8))
    cv2.imwrite(str(out / "a.png"), np.full((8, 8), 200, np.uint8))
    real = root.resolve()
    load, notes = _image_loader(np.array([real / "images" / "a.png"], dtype=object), real)
    swap("images/a.png", root / "images", out)
    with pytest.raises(DatasetError, match="out of the dataset folder"):
        load(0)  # before: the outside image, all 200


def test_image_size_reads_inside_the_folder_it_is_given(tmp_path, swap):
    from augsplit.formats.boxes import dataset_box
    from augsplit.formats.imagesize import image_size

    root, out = _pair(tmp_path, "im/a.png", b"", b"")
    cv2.imwrite(str(root / "im" / "a.png"), np.zeros((12, 34), np.uint8))
    cv2.imwrite(str(out / "a.png"), np.zeros((5, 6), np.uint8))
    assert image_size(root / "im" / "a.png", dataset_box(root)) == (34, 12)
    swap("im/a.png", root / "im", out)
    with pytest.raises(DatasetError, match="out of the dataset folder"):
        image_size(root / "im" / "a.png", dataset_box(root))


def test_image_size_of_a_format_without_a_known_header_is_decoded_from_the_bytes_read(tmp_path):
    from augsplit.formats.imagesize import image_size

    p = tmp_path / "a.tif"  # TIFF: not one of the headers read; OpenCV decodes it
    assert cv2.imwrite(str(p), np.zeros((21, 13, 3), np.uint8))
    assert image_size(p) == (13, 21)


def test_opened_path_without_proc_compares_the_open_file_with_the_name(tmp_path, monkeypatch):
    a, b = tmp_path / "a", tmp_path / "b"
    a.write_bytes(b"a")
    b.write_bytes(b"b")
    monkeypatch.setattr(os, "readlink", lambda *args, **kw: (_ for _ in ()).throw(OSError("no /proc")))
    fd = os.open(a, os.O_RDONLY)
    try:
        assert opened_path(fd, str(a)) == os.path.realpath(a)
        os.replace(b, a)  # the name now holds another file than the one open
        assert opened_path(fd, str(a)) is None
    finally:
        os.close(fd)


def test_opened_path_names_the_open_file_after_its_name_moved(tmp_path):
    if not os.path.isdir("/proc/self/fd"):
        pytest.skip("no /proc/self/fd on this system")
    (tmp_path / "d").mkdir()
    a = tmp_path / "d" / "a"
    a.write_bytes(b"a")
    fd = os.open(a, os.O_RDONLY)
    try:
        (tmp_path / "d").rename(tmp_path / "e")
        assert opened_path(fd, str(a)) == os.path.realpath(tmp_path / "e" / "a")  # the kernel's name for it
    finally:
        os.close(fd)


def test_a_tar_shard_whose_folder_is_swapped_while_opened_is_not_read(tmp_path, swap):
    from types import SimpleNamespace

    from augsplit.dataset.tarstore import _open_in_box

    root, out = _pair(tmp_path, "shards/train/part-000000.tar", b"inside", b"SECRET")
    folder = SimpleNamespace(root=root, box=Box(root))
    with _open_in_box(folder, "shards/train/part-000000.tar", "here") as f:
        assert f.read() == b"inside"
    swap("shards/train/part-000000.tar", root / "shards" / "train", out)
    with pytest.raises(ImageError, match="shard archive .* out of the dataset folder"):
        _open_in_box(folder, "shards/train/part-000000.tar", "here").__enter__()  # before: the outside bytes


def _yolo(root: Path, names=("0", "1"), x: float = 0.5) -> Path:
    (root / "labels").mkdir(parents=True)
    (root / "images").mkdir()
    for n in names:
        (root / "labels" / f"{n}.txt").write_text(f"0 {x} 0.5 0.1 0.1\n")
        cv2.imwrite(str(root / "images" / f"{n}.png"), np.zeros((10, 10), np.uint8))
    return root


def test_a_dataset_folder_swapped_for_a_link_between_two_files_is_not_read_on(tmp_path, monkeypatch):
    """Every file of one read is judged against the folder as it was resolved when the read
    began. Measured before: each file made its own box, which resolved the folder again, so
    once the folder was swapped for a link the rest of the read came from outside."""
    from augsplit.formats.yolo import read_yolo

    root, out = _yolo(tmp_path / "ds"), _yolo(tmp_path / "elsewhere", x=0.9)
    real_open = Box.open
    closed = []

    @contextmanager
    def swap_after_the_first_file(self, *args, **kw):
        with real_open(self, *args, **kw) as f:
            yield f
        closed.append(args[0])
        if len(closed) == 1:  # the first file read and closed: the folder itself becomes a link out
            root.rename(tmp_path / "ds.moved")
            root.symlink_to(out, target_is_directory=True)

    monkeypatch.setattr(Box, "open", swap_after_the_first_file)
    with pytest.raises(DatasetError, match="out of the dataset folder"):
        read_yolo(root)  # before: the boxes of the labels outside, at x = 0.9


@pytest.mark.parametrize("name", ["~a", "a\\b"])
def test_files_found_in_an_annotated_folder_are_taken_by_their_names(tmp_path, name):
    """A YOLO or VOC folder's own files are named literally: a name beginning with `~` or
    holding a backslash is a name (a manifest's paths may hold neither). Measured on the
    commit before: refused as 'leaves the dataset folder'."""
    from augsplit.formats.voc import read_voc
    from augsplit.formats.yolo import read_yolo

    got = read_yolo(_yolo(tmp_path / "y", names=(name,)))
    assert got.images["image_id"].tolist() == [name]
    voc = tmp_path / "voc"
    voc.mkdir()
    (voc / f"{name}.xml").write_text(
        "<annotation><filename>a.png</filename><size><width>100</width><height>100</height></size><object>"
        "<name>car</name><bndbox><xmin>10</xmin><ymin>10</ymin><xmax>20</xmax><ymax>20</ymax></bndbox></object>"
        "</annotation>")
    assert read_voc(voc).objects["label"].tolist() == ["car"]


def test_a_large_image_of_an_annotated_folder_has_only_its_header_read(tmp_path):
    """Measured on the commit before: an image file above 256 MiB was refused by its size,
    though only its header is read."""
    from augsplit.formats.yolo import read_yolo

    root = _yolo(tmp_path / "y", names=("0",))
    cv2.imwrite(str(root / "images" / "0.png"), np.zeros((20, 30), np.uint8))
    with open(root / "images" / "0.png", "r+b") as f:
        f.truncate(300 << 20)  # sparse: PNG readers stop at IEND; the header is what is read
    assert read_yolo(root).images[["width", "height"]].values.tolist() == [[30, 20]]


def test_an_image_decoded_whole_for_its_size_is_bounded(tmp_path, monkeypatch):
    import augsplit.dataset.images as images
    from augsplit.formats.imagesize import image_size

    p = tmp_path / "a.tif"
    assert cv2.imwrite(str(p), np.random.default_rng(0).integers(0, 255, (40, 40, 3), dtype=np.uint8))
    assert image_size(p) == (40, 40)
    monkeypatch.setattr(images, "FOREIGN_MAX_BYTES", p.stat().st_size - 1)
    with pytest.raises(DatasetError, match="larger than"):
        image_size(p)  # before: the first bytes only, decoded: "not an image file OpenCV can read"


def test_a_yaml_file_with_a_control_character_is_one_line(tmp_path, capsys):
    """Measured before: a NUL in a spec (or a YOLO data.yaml) printed a traceback."""
    from augsplit.cli import main

    (tmp_path / "nul.yaml").write_bytes(b"seed: 1\x00\n")
    assert main(["plan", str(tmp_path / "nul.yaml")]) == 2
    err = capsys.readouterr().err
    assert "unacceptable character" in err and "Traceback" not in err and len(err.strip().splitlines()) == 1


# ---- a dataset's own files: its Parquet parts, spec.json and dataset.json ----------------------

TINY = {
    "seed": 2,
    "canvas": {"width": 16, "height": 16, "mode": "gray"},
    "objects": {"kind": "polyomino", "cells": 2, "cell_px": 3},
    "background": {"kind": "solid", "value": 0.5},
    "axes": {"x": {"range": [4, 12]}},
    "splits": {"train": {"region": {"x": [4, 7]}, "count": 6}, "test": {"region": {"x": [9, 12]}, "count": 3}},
}


@pytest.fixture(scope="module")
def tiny(tmp_path_factory) -> Path:
    from augsplit.generate import Options, generate
    from specs import write_spec

    out = tmp_path_factory.mktemp("tiny") / "ds"
    generate(write_spec(tmp_path_factory.mktemp("spec"), TINY), out, Options(store="none", progress=False))
    return out


def _linked_out(tmp_path, tiny, rel: str) -> Path:
    """A copy of the tiny dataset whose `rel` (a file or folder) was moved out of it and
    replaced by a link to where it went. Returns the copy."""
    import shutil

    root, out = tmp_path / "ds", tmp_path / "elsewhere"
    shutil.copytree(tiny, root)
    out.mkdir()
    moved = out / Path(rel).name
    (root / rel).rename(moved)
    (root / rel).symlink_to(moved, target_is_directory=moved.is_dir())
    return root


@pytest.mark.parametrize("rel", ["manifest/split=train", "manifest/split=train/part-000000.parquet",
                                 "spec.json", "dataset.json"])
def test_a_dataset_file_linked_out_of_the_folder_is_refused_not_read(tmp_path, tiny, rel):
    """Measured before: verify and audit read the rows (or the spec) through the link, from
    outside the dataset folder, and verify said OK."""
    from augsplit.dataset.rows import read_manifest

    root = _linked_out(tmp_path, tiny, rel)
    with pytest.raises(DatasetError, match="symbolic link out of the dataset folder; it was not read"):
        read_manifest(root)


def test_a_split_folder_linked_inside_the_dataset_is_followed(tmp_path, tiny):
    """A link that stays inside the folder is read, as an image's is."""
    import shutil

    from augsplit.dataset.rows import read_manifest

    root = tmp_path / "ds"
    shutil.copytree(tiny, root)
    (root / "manifest" / "split=train").rename(root / "kept")
    (root / "manifest" / "split=train").symlink_to(Path("..", "kept"), target_is_directory=True)
    assert len(read_manifest(root)) == 9


@pytest.mark.parametrize("reader", ["rows", "column"])
def test_a_part_whose_folder_is_swapped_for_a_link_out_while_opened_is_not_read(tmp_path, tiny, swap, reader):
    import shutil

    from augsplit.dataset.folder import open_dataset
    from augsplit.dataset.rows import read_column, read_rows

    root, out = tmp_path / "ds", tmp_path / "elsewhere"
    shutil.copytree(tiny, root)
    shutil.copytree(tiny / "manifest" / "split=train", out)
    folder = open_dataset(root)
    swap("split=train/part-000000.parquet", root / "manifest" / "split=train", out)
    with pytest.raises(DatasetError, match="out of the dataset folder while it was opened"):
        if reader == "rows":
            read_rows(folder)
        else:
            read_column(folder, folder.parts_of(splits=["train"])[0], "image_id")


def test_a_table_folder_part_linked_out_of_the_folder_is_refused_not_read(tmp_path):
    """A folder given as a table (a parameter log, predictions) is read through a box of it.
    Measured before: the part outside was read and its rows returned."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    from augsplit.formats.table import read_table

    folder, out = tmp_path / "log", tmp_path / "elsewhere"
    folder.mkdir()
    out.mkdir()
    pq.write_table(pa.table({"a": [1, 2]}), folder / "part-0.parquet")
    pq.write_table(pa.table({"a": [3]}), out / "secret.parquet")
    assert list(read_table(folder)["a"]) == [1, 2]
    (folder / "part-1.parquet").symlink_to(out / "secret.parquet")
    with pytest.raises(DatasetError, match="symbolic link out of the folder given; it was not read"):
        read_table(folder)
    pq.write_table(pa.table({"a": [4]}), folder / "kept.parquet")
    (folder / "part-1.parquet").unlink()
    (folder / "part-1.parquet").symlink_to("kept.parquet")  # a link inside the folder is read
    assert sorted(read_table(folder)["a"]) == [1, 2, 4, 4]


def test_parts_are_read_through_python_where_there_is_no_proc(tmp_path, tiny, monkeypatch):
    """open_part reopens the checked file through /proc/self/fd for pyarrow's own reads; where
    that fails it reads through the checked Python file: the same rows either way."""
    import pyarrow as pa

    from augsplit.dataset.rows import read_manifest

    want = read_manifest(tiny)

    def no_proc(path, *a, **kw):
        raise FileNotFoundError(2, "No such file or directory", path)

    monkeypatch.setattr(pa, "OSFile", no_proc)
    got = read_manifest(tiny)
    assert got.equals(want) and len(got) == 9


def test_a_split_folder_swapped_for_a_link_out_after_the_dataset_was_opened_is_not_read(tmp_path, tiny):
    """The parts are judged when read, not only when the folder was opened: measured before,
    every reader read the parts outside (here generate's count of low-visibility images)."""
    import shutil

    from augsplit.dataset.folder import open_dataset
    from augsplit.generate import low_visibility

    root, out = tmp_path / "ds", tmp_path / "elsewhere"
    shutil.copytree(tiny, root)
    shutil.copytree(tiny / "manifest" / "split=train", out)
    folder = open_dataset(root)
    (root / "manifest" / "split=train").rename(tmp_path / "moved")
    (root / "manifest" / "split=train").symlink_to(out, target_is_directory=True)
    with pytest.raises(DatasetError, match="out of the dataset folder.*; it was not read"):
        low_visibility(folder)


@pytest.mark.parametrize("unlisted", ["manifest/split=train", "images/train"])
def test_a_folder_of_the_dataset_that_cannot_be_listed_is_one_line(tmp_path, tiny, monkeypatch, unlisted):
    """Found by a review: an unreadable split folder was taken for an empty one (the parts in
    it silently missing), and verify printed a traceback for an unreadable image folder. No
    permission is simulated (the tests may run as root, whom chmod does not stop)."""
    import shutil

    from augsplit.dataset.folder import open_dataset
    from augsplit.verify import verify

    root = tmp_path / "ds"
    shutil.copytree(tiny, root)
    (root / "images" / "train").mkdir(parents=True, exist_ok=True)
    real = os.scandir

    def scandir(path="."):
        if os.fspath(path).endswith(unlisted):
            raise PermissionError(13, "Permission denied", os.fspath(path))
        return real(path)

    monkeypatch.setattr(os, "scandir", scandir)
    with pytest.raises(DatasetError, match="cannot be listed: Permission denied"):
        if unlisted.startswith("manifest"):
            open_dataset(root)
        else:
            verify(root)


@pytest.mark.parametrize("kind", ["fifo", "folder"])
def test_a_spec_json_that_is_not_a_regular_file_is_named_as_such(tmp_path, tiny, kind):
    """Found reading the change: a spec.json that is a FIFO or a folder was reported as missing
    ("not an augsplit dataset"); the box now says what it is, and it is never opened."""
    import shutil

    from augsplit.dataset.folder import open_dataset

    root = tmp_path / "ds"
    shutil.copytree(tiny, root)
    (root / "spec.json").unlink()
    os.mkfifo(root / "spec.json") if kind == "fifo" else (root / "spec.json").mkdir()
    with pytest.raises(DatasetError, match="'spec.json' is not a regular file; it was not read"):
        open_dataset(root)
