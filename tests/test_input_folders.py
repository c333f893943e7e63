"""The files a spec reads (its sprite and background folders) are part of what a dataset was
made from: spec.json records a digest of them, a resume refuses changed files, and verify
names them (measured before: a resume after a sprite changed mixed old and new images, and
verify only said that images did not re-render identically)."""

from __future__ import annotations

import json
import os
import shutil
from pathlib import Path

import cv2
import numpy as np
import pytest
import yaml

from augsplit.build import open_spec
from augsplit.cli import main
from augsplit.dataset import layout as lay
from augsplit.verify import verify
from specs import snapshot, spec_dict


def sprites(root: Path, colour=(200, 40, 40)) -> None:
    for name in ("bolt", "nut"):
        (root / "sprites" / name).mkdir(parents=True, exist_ok=True)
        rgba = np.zeros((7, 7, 4), np.uint8)
        rgba[1:6, 2:5] = (*colour, 255)
        cv2.imwrite(str(root / "sprites" / name / "a.png"), rgba)
    (root / "backgrounds").mkdir(exist_ok=True)
    cv2.imwrite(str(root / "backgrounds" / "grey.png"), np.full((40, 40, 3), 128, np.uint8))


@pytest.fixture
def spec_file(tmp_path) -> Path:
    sprites(tmp_path)
    spec = spec_dict(canvas={"width": 32, "height": 32, "mode": "rgb"},
                     objects={"kind": "folder", "path": "sprites"}, background={"kind": "folder", "path": "backgrounds"},
                     axes={"x": {"range": [4, 28]}, "y": {"range": [4, 28]}},
                     splits={"train": {"region": {"x": [4, 12]}, "per_class": 4},
                             "test": {"region": {"x": [20, 28]}, "per_class": 2}})
    p = tmp_path / "spec.yaml"
    p.write_text(yaml.safe_dump(spec, sort_keys=False))
    return p


def generate(spec: Path, out: Path, *extra: str) -> int:
    return main(["generate", str(spec), "--out", str(out), "--shard-size", "3", "--quiet", *extra])


def digests(spec_file: Path) -> dict:
    return open_spec(spec_file).input_digests()


def test_spec_json_records_a_digest_of_each_input_folder(spec_file, tmp_path):
    assert generate(spec_file, tmp_path / "ds") == 0
    doc = json.loads((tmp_path / "ds" / lay.SPEC_FILE).read_text())
    assert doc["inputs"] == digests(spec_file) and set(doc["inputs"]) == {"objects", "background"}


def test_the_digest_covers_exactly_the_files_the_sources_read(spec_file, tmp_path):
    """Found by review: a digest of the whole folder tree counted files the sources skip (a
    hidden folder, a background subfolder), missed a class folder that is a link, and could
    block on a FIFO."""
    first = digests(spec_file)
    (tmp_path / "sprites" / "nut" / ".ipynb_checkpoints").mkdir()
    cv2.imwrite(str(tmp_path / "sprites" / "nut" / ".ipynb_checkpoints" / "a.png"), np.zeros((3, 3, 4), np.uint8))
    (tmp_path / "sprites" / ".DS_Store").write_bytes(b"the file manager's")
    (tmp_path / "backgrounds" / "unused").mkdir()
    (tmp_path / "backgrounds" / "unused" / "notes.txt").write_text("not an image the source reads")
    os.mkfifo(tmp_path / "backgrounds" / "unused" / "pipe")
    assert digests(spec_file) == first
    cv2.imwrite(str(tmp_path / "sprites" / "nut" / "a_mask.png"), np.full((7, 7), 255, np.uint8))  # read: a mask
    with_mask = digests(spec_file)
    assert with_mask["objects"] != first["objects"] and with_mask["background"] == first["background"]
    (tmp_path / "sprites" / "nut" / "a.png").rename(tmp_path / "sprites" / "nut" / "b.png")
    (tmp_path / "sprites" / "nut" / "a_mask.png").rename(tmp_path / "sprites" / "nut" / "b_mask.png")
    assert digests(spec_file)["objects"] not in (first["objects"], with_mask["objects"])


def test_a_class_folder_that_is_a_link_is_followed(spec_file, tmp_path):
    shutil.move(tmp_path / "sprites" / "nut", tmp_path / "nut-elsewhere")
    (tmp_path / "sprites" / "nut").symlink_to(tmp_path / "nut-elsewhere")
    first = digests(spec_file)
    rgba = np.zeros((7, 7, 4), np.uint8)
    rgba[2:6, 2:5] = (40, 200, 40, 255)
    cv2.imwrite(str(tmp_path / "nut-elsewhere" / "a.png"), rgba)
    assert digests(spec_file)["objects"] != first["objects"]


@pytest.mark.parametrize("changed", ["sprites", "backgrounds"])
def test_a_resume_after_an_input_changed_is_refused(spec_file, tmp_path, capsys, changed):
    out = tmp_path / "ds"
    assert generate(spec_file, out, "--shard", "0/2") == 0
    if changed == "sprites":
        sprites(tmp_path, colour=(40, 200, 40))
    else:
        cv2.imwrite(str(tmp_path / "backgrounds" / "grey.png"), np.full((40, 40, 3), 90, np.uint8))
    before = snapshot(out)
    capsys.readouterr()
    assert generate(spec_file, out, "--resume") == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "changed since this dataset was started" in err and changed in err, err
    assert snapshot(out) == before
    assert generate(spec_file, out, "--shard", "1/2") == 2  # a job-array peer as well


def test_a_resume_with_the_same_files_goes_on(spec_file, tmp_path):
    out = tmp_path / "ds"
    assert generate(spec_file, out, "--shard", "0/2") == 0
    (tmp_path / "sprites" / ".hidden-note").write_text("not read by the source")
    assert generate(spec_file, out, "--resume") == 0
    assert verify(out).ok


def test_verify_names_an_input_folder_that_changed(spec_file, tmp_path):
    out = tmp_path / "ds"
    assert generate(spec_file, out) == 0
    assert verify(out).ok
    shutil.rmtree(tmp_path / "sprites")
    sprites(tmp_path, colour=(40, 200, 40))
    rep = verify(out)
    assert not rep.ok
    assert any("the files of the spec's objects folder" in p and "differ from those the dataset was made from" in p
               for p in rep.problems), rep.problems
