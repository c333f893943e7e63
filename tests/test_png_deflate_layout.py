"""Where the PNG deflate setting (png_deflate, png_level) decides bytes and where it does not.

- JPEG and WebP files never pass through the PNG writer: their folders resume whatever the PNG
  options say, including a folder made before `png_deflate` was recorded (which recorded
  png_level 1), and a PNG level is not held to a PNG library the run never uses.
- A `--store none` dataset's images are re-made and PNG-encoded on export: by the setting its
  layout records, so its export holds the same bytes as the export of the same dataset stored
  as files (as it did when every PNG was zlib level 1).
"""

from __future__ import annotations

import json

import pytest

from augsplit.build import open_mapping
from augsplit.cli import main
from augsplit.dataset import open_dataset
from augsplit.errors import DatasetError
from augsplit.generate import Options, finalize, generate
from augsplit.verify import verify

SPEC = {
    "seed": 5, "canvas": {"width": 32, "height": 24, "mode": "rgb"},
    "objects": {"kind": "polyomino", "cells": 3, "cell_px": 3},
    "background": {"kind": "solid", "value": 0.4},
    "axes": {"x": {"range": [6, 26]}, "y": {"range": [6, 18]}},
    "splits": {"train": {"region": {"x": [6, 14]}, "count": 8}, "test": {"region": {"x": [18, 26]}, "count": 4}},
}
NOISE = dict(SPEC, background={"kind": "uniform_noise", "lo": 0.0, "hi": 0.35})


def _as_before_png_deflate(d):
    doc = json.loads((d / "spec.json").read_text())
    del doc["layout"]["png_deflate"]  # as a run before the option wrote it (png_level 1 was recorded)
    (d / "spec.json").write_text(json.dumps(doc))


@pytest.mark.parametrize("fmt", ["jpeg", "webp"])
def test_an_old_lossy_folder_resumes_without_png_options(tmp_path, fmt):
    d = tmp_path / "old"
    generate(None, d, Options(format=fmt, png_deflate="zlib", png_level=1, shard_size=4, progress=False,
                              array_shard=(0, 2)), built=open_mapping(SPEC))
    _as_before_png_deflate(d)
    # the command that resumed it before: no PNG option, since no PNG is written
    generate(None, d, Options(format=fmt, shard_size=4, progress=False, resume=True), built=open_mapping(SPEC))
    assert verify(d).ok


def test_png_options_do_not_split_a_jpeg_job_array(tmp_path):
    d = tmp_path / "ds"
    generate(None, d, Options(format="jpeg", png_deflate="zlib", png_level=9, shard_size=4, progress=False,
                              array_shard=(0, 2)), built=open_mapping(SPEC))
    generate(None, d, Options(format="jpeg", shard_size=4, progress=False, array_shard=(1, 2)),
             built=open_mapping(SPEC))
    finalize(d)
    assert verify(d).ok


def test_a_png_level_with_jpeg_is_not_checked_against_an_unused_library(tmp_path, capsys):
    """d169d02 accepted `--format jpeg --png-level 5`; the background's default library (ISA-L
    here, levels 0-2) deflates nothing in a JPEG run, so it cannot make the level wrong."""
    spec = tmp_path / "spec.json"
    spec.write_text(json.dumps(SPEC))
    out = tmp_path / "ds"
    assert main(["generate", str(spec), "--out", str(out), "--quiet", "--format", "jpeg", "--png-level", "5"]) == 0
    assert verify(out).ok
    # a PNG run is still held to the background's library
    assert main(["generate", str(spec), "--out", str(tmp_path / "png"), "--quiet", "--png-level", "5"]) == 2
    assert "0..2 for isal" in capsys.readouterr().err
    assert not (tmp_path / "png").exists()


def test_a_png_folder_still_resumes_only_with_its_setting(tmp_path):
    d = tmp_path / "ds"
    generate(None, d, Options(png_deflate="zlib", png_level=1, shard_size=4, progress=False, array_shard=(0, 2)),
             built=open_mapping(SPEC))
    _as_before_png_deflate(d)
    with pytest.raises(DatasetError, match="rerun with --png-deflate zlib --png-level 1"):
        generate(None, d, Options(shard_size=4, progress=False, resume=True), built=open_mapping(SPEC))


def _image_bytes(export_root):
    return {p.relative_to(export_root).as_posix(): p.read_bytes() for p in sorted((export_root / "images").rglob("*"))
            if p.is_file()}


@pytest.mark.parametrize("spec,given", [(NOISE, {}), (SPEC, {}), (SPEC, {"png_deflate": "zlib", "png_level": 6})],
                         ids=["noise-default", "solid-default", "solid-zlib-6"])
def test_a_store_none_export_encodes_by_the_recorded_setting(tmp_path, spec, given):
    exports = {}
    for store in ("files", "none"):
        d = tmp_path / store
        generate(None, d, Options(store=store, progress=False, **given), built=open_mapping(spec))
        assert main(["export", str(d), "--to", "yolo", "--out", str(tmp_path / f"{store}-yolo"), "--quiet"]) == 0
        exports[store] = _image_bytes(tmp_path / f"{store}-yolo")
    assert len(exports["files"]) == 12 and exports["none"] == exports["files"]


def test_an_old_store_none_export_keeps_zlib(tmp_path):
    """A folder from before png_deflate: its PNGs were zlib's; its export still is."""
    for store in ("files", "none"):
        d = tmp_path / store
        generate(None, d, Options(store=store, png_deflate="zlib", png_level=1, progress=False),
                 built=open_mapping(SPEC))
        _as_before_png_deflate(d)
        assert open_dataset(d).layout.get("png_deflate") is None
        assert main(["export", str(d), "--to", "yolo", "--out", str(tmp_path / f"{store}-yolo"), "--quiet"]) == 0
    assert _image_bytes(tmp_path / "none-yolo") == _image_bytes(tmp_path / "files-yolo")


@pytest.mark.parametrize("bad", [["isal"], {"zlib": 1}, 2])
def test_a_library_of_another_type_is_one_line(tmp_path, bad):
    with pytest.raises(DatasetError, match="--png-deflate.*unknown PNG deflate library"):
        generate(None, tmp_path / "ds", Options(png_deflate=bad, progress=False), built=open_mapping(SPEC))
    assert not (tmp_path / "ds").exists()
