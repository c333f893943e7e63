"""A shard's image files land in the shard's image folder as it was when the shard opened it
(`io.open_folder`, then each file made by name in it): a folder on the way swapped for a link
out of the dataset mid-shard cannot send them elsewhere, and what is found at an image's name
is replaced only if it is a regular file. Measured before: each image was written by its full
path, so every image after the swap was made in the folder the link pointed to, outside the
dataset, and the shard was committed after syncing the folder the link pointed to.
Also: the image folder is synced, before the shard commits, through the folder found again
and checked to be the one written in, never by a path that may lead elsewhere by then."""

from __future__ import annotations

import dataclasses
import os
from pathlib import Path

import pytest

import augsplit.generate as gen
from augsplit.dataset import layout as lay
from augsplit.errors import DatasetError
from augsplit.generate import Options, generate

SPEC = {
    "seed": 5,
    "canvas": {"width": 24, "height": 24, "mode": "rgb"},
    "objects": {"kind": "polyomino", "cells": 3, "cell_px": 3},
    "background": {"kind": "solid", "value": 0.5},
    "axes": {"x": {"range": [6, 18]}, "y": {"range": [6, 18]}},
    "splits": {"train": {"region": {"x": [6, 10]}, "count": 12}, "test": {"region": {"x": [14, 18]}, "count": 4}},
}
SERIAL = Options(shard_size=6, progress=False)


def _image(out: Path, index: int) -> Path:
    return out / lay.image_relpath("train", f"train-{index:07d}", ".png")


def test_images_written_after_their_folder_is_swapped_for_a_link_out_land_inside(spec_file, serial, tmp_path,
                                                                                   monkeypatch):
    out, outside = tmp_path / "ds", tmp_path / "elsewhere"
    outside.mkdir()
    folder = lay.image_dir(out, "train")
    real, made = gen.write_new_file, []

    def swap_after_the_first_image(name, data, *args, **kw):
        done = real(name, data, *args, **kw)
        made.append(name)
        if len(made) == 1:
            folder.rename(folder.with_name("train.moved"))
            folder.symlink_to(outside, target_is_directory=True)
        return done

    monkeypatch.setattr(gen, "write_new_file", swap_after_the_first_image)
    # refused by the next shard's check of its folders, or by this shard's sync (io.sync_in_folder)
    with pytest.raises(DatasetError, match="is no longer the folder these files were written in|a symbolic link "
                                           "inside the dataset folder"):
        generate(spec_file, out, SERIAL)
    assert sorted(outside.iterdir()) == []
    assert not lay.part_path(out, lay.MANIFEST_DIR, "train", 0).exists()  # its images are not at their names
    moved = folder.with_name("train.moved")
    # the rest of the first shard (6 images) was made in the folder the shard opened
    assert {f"train-{i:07d}.png" for i in range(6)} <= {p.name for p in moved.iterdir()}
    for i in range(6):  # and they are the images of the reference run
        assert (moved / _image(out, i).name).read_bytes() == _image(serial, i).read_bytes()


def test_an_image_folder_opened_as_another_folder_is_refused_before_writing(spec_file, tmp_path, monkeypatch):
    """The folder open is checked to be the shard's image folder as the kernel names it."""
    out = tmp_path / "ds"
    monkeypatch.setattr(gen, "opened_path", lambda fd, path: str(tmp_path / "elsewhere"), raising=False)
    with pytest.raises(DatasetError, match="changed while it was being opened"):
        generate(spec_file, out, SERIAL)
    folder = lay.image_dir(out, "train")
    assert not folder.exists() or sorted(folder.iterdir()) == []


def _uncommitted_first_shard(spec_file, out: Path) -> None:
    """A folder whose first train shard is not committed (its manifest part gone), as a run
    stopped while writing it leaves it; the shard's images are still there."""
    generate(spec_file, out, SERIAL)
    lay.part_path(out, lay.MANIFEST_DIR, "train", 0).unlink()


def test_a_leftover_regular_file_at_an_image_name_is_replaced_whole(spec_file, serial, tmp_path):
    out = tmp_path / "ds"
    _uncommitted_first_shard(spec_file, out)
    _image(out, 2).write_bytes(b"half an image of an earlier attempt")
    generate(spec_file, out, dataclasses.replace(SERIAL, resume=True))
    assert _image(out, 2).read_bytes() == _image(serial, 2).read_bytes()
    assert not [p for p in lay.image_dir(out, "train").iterdir() if ".tmp-" in p.name]


@pytest.mark.parametrize("kind", ["link", "folder"])
def test_something_else_at_an_image_name_is_refused_and_left_alone(spec_file, tmp_path, kind):
    out, mine = tmp_path / "ds", tmp_path / "mine.txt"
    mine.write_bytes(b"the user's own file")
    _uncommitted_first_shard(spec_file, out)
    target = _image(out, 2)
    target.unlink()
    if kind == "link":
        target.symlink_to(mine)
    else:
        target.mkdir()
    with pytest.raises(DatasetError, match="writes only to a new path or over a regular file") as info:
        generate(spec_file, out, dataclasses.replace(SERIAL, resume=True))
    assert str(target) in str(info.value)
    assert mine.read_bytes() == b"the user's own file"
    assert os.path.islink(target) if kind == "link" else target.is_dir()
    assert not [p for p in lay.image_dir(out, "train").iterdir() if ".tmp-" in p.name]


def test_files_are_synced_only_in_the_folder_they_were_written_in(tmp_path):
    """io.sync_in_folder opens the folder again and syncs it only if it is the same folder:
    found by a review, the shard's finish synced its image folder by path, through the link."""
    from augsplit import io as aio

    folder, outside = tmp_path / "images", tmp_path / "elsewhere"
    folder.mkdir()
    outside.mkdir()
    fd = aio.open_folder(folder)
    try:
        assert aio.write_new_file("a.png", b"data", fd)
        identity = aio.folder_identity(fd)
    finally:
        os.close(fd)
    aio.sync_in_folder(str(folder), identity, ["a.png"])  # the same folder: synced
    folder.rename(tmp_path / "moved")
    folder.symlink_to(outside, target_is_directory=True)
    (outside / "a.png").mkfifo() if hasattr(Path, "mkfifo") else os.mkfifo(outside / "a.png")
    with pytest.raises(DatasetError, match="is no longer the folder these files were written in"):
        aio.sync_in_folder(str(folder), identity, ["a.png"])  # the FIFO outside is never opened
    folder.unlink()
    folder.mkdir()  # another folder of the same name: not the one written in either
    with pytest.raises(DatasetError, match="is no longer the folder these files were written in"):
        aio.sync_in_folder(str(folder), identity, ["a.png"])


def test_where_there_is_no_syncfs_each_file_and_the_folder_are_fsynced_in_the_folder(tmp_path, monkeypatch):
    """sync_in_folder's other way (no syncfs, as on macOS): each file written, then the folder,
    fsynced through the folder found again, never by a path."""
    from augsplit import io as aio

    folder = tmp_path / "images"
    folder.mkdir()
    fd = aio.open_folder(folder)
    try:
        for name in ("a.png", "b.png"):
            assert aio.write_new_file(name, b"data", fd)
        identity = aio.folder_identity(fd)
    finally:
        os.close(fd)
    synced, real_fsync = [], os.fsync
    monkeypatch.setattr(aio, "_libc_syncfs", lambda: None)
    monkeypatch.setattr(os, "fsync", lambda fd: synced.append(os.readlink(f"/proc/self/fd/{fd}")) or real_fsync(fd))
    aio.sync_in_folder(str(folder), identity, ["a.png", "b.png"])
    real = os.path.realpath(folder)
    assert synced == [os.path.join(real, "a.png"), os.path.join(real, "b.png"), real]
