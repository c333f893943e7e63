"""`generate --overwrite` removes augsplit's own layout and nothing else: a folder holding anything
augsplit did not make is refused in one line naming up to five such entries, with every byte of
it left in place (a checksum of the tree before and after); the spec being read and the working
directory are never removed; a crash half-way leaves no usable part of the old dataset, and the
next --overwrite finishes the job."""

from __future__ import annotations

import os
import shutil
from pathlib import Path

import pytest

from augsplit.cli import main
from augsplit.generate import Options
from specs import assert_same_tree, snapshot, write_spec

SPEC = {
    "seed": 47,
    "canvas": {"width": 24, "height": 24, "mode": "rgb"},
    "objects": {"kind": "polyomino", "cells": 3, "cell_px": 3, "colour": [60, 200, 90]},
    "background": {"kind": "uniform_noise", "lo": 0.1, "hi": 0.8},
    "axes": {"x": {"range": [5, 19]}, "y": {"range": [5, 19]}},
    "splits": {"train": {"region": {"x": [5, 10]}, "count": 8}, "test": {"region": {"x": [14, 19]}, "count": 4}},
}
SERIAL = Options(shard_size=5, progress=False)  # the reference run (conftest.serial)


def overwrite(spec: Path, out: Path, capsys) -> tuple[int, str]:
    code = main(["generate", str(spec), "--out", str(out), "--overwrite", "--shard-size", "5", "--quiet"])
    return code, capsys.readouterr().err


def assert_refused(code: int, err: str, *named: str) -> None:
    assert code == 2 and err.count("\n") == 1 and "Traceback" not in err, err
    for name in named:
        assert name in err, err


def test_a_project_folder_with_an_empty_manifest_folder_is_left_alone(spec_file, tmp_path, capsys):
    project = tmp_path / "project"
    (project / "manifest").mkdir(parents=True)
    (project / "notes.txt").write_text("my notes")
    (project / "data").mkdir()
    (project / "data" / "raw.csv").write_text("a,b\n1,2\n")
    spec = write_spec(project, SPEC)  # the very spec being read lies inside
    before = snapshot(project)
    code, err = overwrite(spec, project, capsys)
    assert_refused(code, err)
    assert snapshot(project) == before


def test_a_folder_with_foreign_files_in_manifest_is_left_alone(spec_file, tmp_path, capsys):
    out = tmp_path / "service"
    (out / "manifest").mkdir(parents=True)
    (out / "manifest" / "deploy.yaml").write_text("replicas: 3\n")
    (out / "src.py").write_text("print('hi')\n")
    before = snapshot(out)
    code, err = overwrite(spec_file, out, capsys)
    assert_refused(code, err, "manifest/deploy.yaml", "src.py")
    assert snapshot(out) == before


def test_a_dataset_folder_with_user_files_is_left_alone(spec_file, serial, tmp_path, capsys):
    out = tmp_path / "ds"
    shutil.copytree(serial, out)
    (out / "my_notes.txt").write_text("what I tried")
    (out / "checkpoints").mkdir()
    (out / "checkpoints" / "model.pt").write_bytes(b"\x00weights")
    (out / "images" / "train" / "favourite.png").write_bytes(b"mine")
    before = snapshot(out)
    code, err = overwrite(spec_file, out, capsys)
    assert_refused(code, err, "my_notes.txt", "checkpoints", "images/train/favourite.png")
    assert snapshot(out) == before


def test_the_refusal_names_five_strangers_and_counts_the_rest(spec_file, serial, tmp_path, capsys):
    out = tmp_path / "ds"
    shutil.copytree(serial, out)
    for k in range(7):
        (out / f"user_{k}.txt").write_text(str(k))
    code, err = overwrite(spec_file, out, capsys)
    assert_refused(code, err, "and 2 more")
    assert sum(f"user_{k}.txt" in err for k in range(7)) == 5


def test_symbolic_links_are_strangers_and_their_targets_are_untouched(spec_file, serial, tmp_path, capsys):
    precious = tmp_path / "precious"
    precious.mkdir()
    (precious / "thesis.tex").write_text("chapter 1")
    out = tmp_path / "ds"
    shutil.copytree(serial, out)
    shutil.rmtree(out / "distractors", ignore_errors=True)
    os.symlink(precious, out / "distractors")  # one of our names, but a link out
    before, kept = snapshot(out), snapshot(precious)
    code, err = overwrite(spec_file, out, capsys)
    assert_refused(code, err, "distractors")
    assert snapshot(out) == before and snapshot(precious) == kept


def test_a_spec_inside_a_report_folder_is_never_removed(serial, tmp_path, capsys):
    import json

    out = tmp_path / "ds"
    shutil.copytree(serial, out)
    (out / "score").mkdir()
    spec = out / "score" / "spec.json"  # a report-like name, but the spec being read (YAML reads JSON)
    spec.write_text(json.dumps(SPEC))
    before = snapshot(out)
    code, err = overwrite(spec, out, capsys)
    assert_refused(code, err, "lies inside")
    assert snapshot(out) == before


def test_the_working_directory_is_never_removed(spec_file, serial, tmp_path, capsys, monkeypatch):
    out = tmp_path / "ds"
    shutil.copytree(serial, out)
    monkeypatch.chdir(out / "images" / "train")
    before = snapshot(out)
    code, err = overwrite(spec_file, out, capsys)
    assert_refused(code, err, "working directory")
    assert snapshot(out) == before
    # run from the dataset folder itself: its layout is replaced, the folder stays the same one
    monkeypatch.chdir(out)
    inode = os.stat(out).st_ino
    code, err = overwrite(spec_file, out, capsys)
    assert code == 0, err
    assert os.stat(".").st_ino == inode and os.path.samefile(os.getcwd(), out)
    assert_same_tree(out, serial)


def test_augsplits_own_layout_and_reports_are_replaced(spec_file, serial, tmp_path, capsys):
    out = tmp_path / "ds"
    shutil.copytree(serial, out)
    assert main(["preview", str(out), "--per-split", "2"]) == 0
    assert main(["audit", str(out), "--quiet"]) in (0, 1)
    (out / "images" / "train" / ".train-0000001.png.tmp-77").write_bytes(b"half")  # a killed write
    assert {"preview", "audit"} <= {p.name for p in out.iterdir()}
    capsys.readouterr()
    code, err = overwrite(spec_file, out, capsys)
    assert code == 0, err
    assert_same_tree(out, serial)  # exactly a fresh dataset: old reports, temporaries and trash gone
    assert sorted(p.name for p in out.iterdir()) == sorted(p.name for p in serial.iterdir())


def test_a_crash_half_way_leaves_no_usable_dataset_and_the_next_run_finishes(spec_file, serial, tmp_path, capsys,
                                                                            monkeypatch):
    from augsplit.dataset import overwrite as ow

    out = tmp_path / "ds"
    shutil.copytree(serial, out)
    real_rename = os.rename
    moved = []

    def rename_then_die(src, dst):
        if moved:  # the second move "crashes"
            raise OSError(5, "Input/output error", str(src))
        moved.append(Path(src).name)
        return real_rename(src, dst)

    monkeypatch.setattr(ow.os, "rename", rename_then_die)
    code, err = overwrite(spec_file, out, capsys)
    assert_refused(code, err, "cannot remove the old dataset")
    assert moved == ["spec.json"]  # the dataset's identity went first
    monkeypatch.undo()
    # what is left is no dataset any command would use
    assert main(["verify", str(out)]) == 2 and "no spec.json" in capsys.readouterr().err
    code, err = overwrite(spec_file, out, capsys)  # the next --overwrite sweeps the rest, trash included
    assert code == 0, err
    assert_same_tree(out, serial)
    assert not [p for p in out.iterdir() if p.name.startswith(".")]


@pytest.mark.parametrize("make", ["missing", "empty"])
def test_overwrite_of_nothing_just_generates(make, spec_file, serial, tmp_path, capsys):
    out = tmp_path / "ds"
    if make == "empty":
        out.mkdir()
    code, err = overwrite(spec_file, out, capsys)
    assert code == 0, err
    assert_same_tree(out, serial)


def test_a_split_name_that_leaves_the_folder_writes_nothing_outside(tmp_path, capsys):
    """Second line of defence behind the spec's name rule: every folder name made from a split
    is one path component, checked before anything is written."""
    spec = dict(SPEC, splits={"../../ESCAPED": SPEC["splits"]["train"], "test": SPEC["splits"]["test"]})
    spec_path = write_spec(tmp_path, spec)
    work = tmp_path / "a" / "b"
    work.mkdir(parents=True)
    before = snapshot(tmp_path)
    code = main(["generate", str(spec_path), "--out", str(work / "out"), "--quiet"])
    err = capsys.readouterr().err
    assert code == 2 and err.count("\n") == 1 and "ESCAPED" in err, err
    after = snapshot(tmp_path)
    assert {k: v for k, v in after.items() if not k.startswith("a/b/out")} == before


def test_a_resume_never_writes_through_a_link_out_of_the_folder(spec_file, tmp_path, capsys):
    out = tmp_path / "ds"
    assert main(["generate", str(spec_file), "--out", str(out), "--shard", "0/2", "--shard-size", "5", "--quiet"]) == 0
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    (elsewhere / "keep.txt").write_text("mine")
    shutil.rmtree(out / "images" / "train")
    os.symlink(elsewhere, out / "images" / "train")
    kept = snapshot(elsewhere)
    capsys.readouterr()
    code = main(["generate", str(spec_file), "--out", str(out), "--resume", "--shard-size", "5", "--quiet"])
    err = capsys.readouterr().err
    assert_refused(code, err, "symbolic link", str(out / "images" / "train"))
    assert snapshot(elsewhere) == kept


# hidden files of a user's that look a little like an atomic write's temporary (measured before:
# every one of them was taken for augsplit's own leftover: --resume deleted them without a
# word, and --overwrite removed them with the dataset)
LOOKALIKES = [".env.tmpl", ".tmpnotes", "images/train/.backup.tmp", "manifest/split=train/.notes.tmp-12",
              ".draft.txt.tmp-7-abc123"]


def _plant(root: Path) -> None:
    for rel in LOOKALIKES:
        (root / rel).write_text("the user's own")


def test_a_resume_keeps_a_users_hidden_files_and_still_sweeps_its_own(spec_file, serial, tmp_path, capsys):
    copy = tmp_path / "copy"
    shutil.copytree(serial, copy)
    (copy / "dataset.json").unlink()
    _plant(copy)
    own = [copy / "images/train/.train-0000003.png.tmp-999-a1b2c3", copy / "manifest/split=train/.part-000001.parquet.tmp-9",
           copy / ".spec.json.tmp-5-ffffff"]
    for f in own:
        f.write_bytes(b"half written")
    code = main(["generate", str(spec_file), "--out", str(copy), "--resume", "--shard-size", "5", "--quiet"])
    assert code == 0, capsys.readouterr().err
    assert all((copy / rel).read_text() == "the user's own" for rel in LOOKALIKES)
    assert not any(f.exists() for f in own)


@pytest.mark.parametrize("rel", LOOKALIKES)
def test_overwrite_refuses_a_folder_holding_a_users_hidden_file(spec_file, serial, tmp_path, capsys, rel):
    copy = tmp_path / "copy"
    shutil.copytree(serial, copy)
    (copy / rel).write_text("the user's own")
    before = snapshot(copy)
    assert_refused(*overwrite(spec_file, copy, capsys), rel.rsplit("/", 1)[-1])
    assert snapshot(copy) == before


@pytest.mark.parametrize("where", ["sprites/out", "sprites/bolt/out", "sprites", "backgrounds/out"])
def test_an_output_inside_a_folder_the_spec_reads_is_refused(tmp_path, capsys, where):
    """Measured before: --out inside the spec's sprite folder was accepted; the dataset then
    sat among the sprites, and every later command refused the spec ('not an image file',
    'class folders hold image files, not subfolders')."""
    import cv2
    import numpy as np
    import yaml

    for name in ("bolt", "nut"):
        (tmp_path / "sprites" / name).mkdir(parents=True)
        rgba = np.zeros((7, 7, 4), np.uint8)
        rgba[1:6, 2:5] = (200, 40, 40, 255)
        cv2.imwrite(str(tmp_path / "sprites" / name / "a.png"), rgba)
    (tmp_path / "backgrounds").mkdir()
    cv2.imwrite(str(tmp_path / "backgrounds" / "grey.png"), np.full((40, 40, 3), 128, np.uint8))
    spec = {**SPEC, "objects": {"kind": "folder", "path": "sprites"},
            "background": {"kind": "folder", "path": "backgrounds"}}
    (tmp_path / "spec.yaml").write_text(yaml.safe_dump(spec, sort_keys=False))
    before = snapshot(tmp_path)
    code = main(["generate", str(tmp_path / "spec.yaml"), "--out", str(tmp_path / where), "--quiet"])
    assert_refused(code, capsys.readouterr().err, "a folder the spec reads images from")
    assert snapshot(tmp_path) == before
    assert main(["generate", str(tmp_path / "spec.yaml"), "--out", str(tmp_path / "ds"), "--quiet"]) == 0
